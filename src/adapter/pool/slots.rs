//! The pool of worker places: idle workers wait in a list, a caller takes one for one request and puts it
//! back; shutting down asks every worker to quit at once and then waits for all of them.

use std::sync::atomic::AtomicU64;
use std::sync::{Condvar, Mutex};
use std::time::{Duration, Instant};

use crate::adapter::process::{Worker, WorkerSpec};
use crate::adapter::protocol::{Encoding, Hello};
use crate::error::EvalError;

/// One worker place in the pool; `worker` is `None` while it has to be (re)started.
pub(super) struct Slot {
    pub index: usize,
    pub worker: Option<Worker>,
    /// Processes started in this place so far (numbers the restarts in the log).
    pub starts: u32,
}

/// The adapter's processes and what they declared.
pub(super) struct Pool {
    pub spec: WorkerSpec,
    pub hello: Hello,
    pub encoding: Encoding,
    pub eval_timeout: Option<Duration>,
    pub max_restarts: u32,
    pub workers: usize,
    pub idle: Mutex<Vec<Slot>>,
    pub available: Condvar,
    pub restarts: AtomicU64,
}

/// A non-recoverable evaluation failure with `message`.
pub(super) fn fatal(message: String) -> EvalError {
    EvalError::Failed {
        message,
        recoverable: false,
    }
}

impl Pool {
    /// Waits for an idle worker place and takes it.
    pub fn take_slot(&self) -> Result<Slot, EvalError> {
        let mut idle = self
            .idle
            .lock()
            .map_err(|_| fatal("the adapter pool's lock is poisoned".into()))?;
        loop {
            if let Some(s) = idle.pop() {
                return Ok(s);
            }
            idle = self
                .available
                .wait(idle)
                .map_err(|_| fatal("the adapter pool's lock is poisoned".into()))?;
        }
    }

    /// Gives a worker place back.
    pub fn put_slot(&self, slot: Slot) {
        if let Ok(mut idle) = self.idle.lock() {
            idle.push(slot);
        }
        self.available.notify_one();
    }

    fn shutdown(&self) {
        let mut slots = match self.idle.lock() {
            Ok(mut idle) => std::mem::take(&mut *idle),
            Err(_) => return,
        };
        for s in slots.iter_mut() {
            if let Some(w) = s.worker.as_mut() {
                w.begin_quit();
            }
        }
        let deadline = Instant::now() + Duration::from_secs(2);
        for s in slots.iter_mut() {
            if let Some(w) = s.worker.as_mut() {
                w.finish_quit(deadline);
            }
        }
    }
}

impl Drop for Pool {
    fn drop(&mut self) {
        self.shutdown();
    }
}
