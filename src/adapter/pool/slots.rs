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

    /// Takes up to `want` (at least 1) worker places: waits for the first, then takes those idle now.
    pub fn take_slots(&self, want: usize) -> Result<Vec<SlotGuard<'_>>, EvalError> {
        let mut taken = vec![self.guard(self.take_slot()?)];
        if let Ok(mut idle) = self.idle.lock() {
            while taken.len() < want {
                match idle.pop() {
                    Some(s) => taken.push(SlotGuard {
                        pool: self,
                        slot: s,
                    }),
                    None => break,
                }
            }
        }
        Ok(taken)
    }

    /// Holds `slot` until the guard is dropped, which gives it back (also when a panic unwinds).
    pub fn guard(&self, slot: Slot) -> SlotGuard<'_> {
        SlotGuard { pool: self, slot }
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

/// A worker place taken from the pool, given back when dropped.
pub(super) struct SlotGuard<'a> {
    pool: &'a Pool,
    slot: Slot,
}

impl SlotGuard<'_> {
    /// The place held.
    pub fn slot(&mut self) -> &mut Slot {
        &mut self.slot
    }
}

impl Drop for SlotGuard<'_> {
    fn drop(&mut self) {
        let empty = Slot {
            index: self.slot.index,
            worker: None,
            starts: 0,
        };
        self.pool.put_slot(std::mem::replace(&mut self.slot, empty));
    }
}

impl Drop for Pool {
    fn drop(&mut self) {
        self.shutdown();
    }
}
