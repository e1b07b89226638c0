//! Starting and restarting workers, and the retry policy of one request: a worker that dies is started
//! again and the request sent again, up to the restart limit; protocol and start errors are final.

use std::sync::atomic::Ordering;
use std::thread;
use std::time::Duration;

use super::slots::{fatal, Pool, Slot};
use crate::adapter::process::{Worker, WorkerError, WorkerSpec};
use crate::adapter::protocol::{Hello, ProtocolError, Reply, Request};
use crate::error::EvalError;

/// Starts worker `index`; a worker that dies before its hello line is started again, up to
/// `retries` times, after a short pause that grows with the attempt (launchers such as mpirun can
/// fail transiently when several start at once). Protocol and handshake errors are not retried.
pub(super) fn start_with_retries(
    spec: &WorkerSpec,
    index: usize,
    retries: u32,
) -> Result<Worker, WorkerError> {
    let mut attempt = 0;
    loop {
        match Worker::start(spec, index, attempt) {
            Err(WorkerError::Died(_)) if attempt < retries => {
                attempt += 1;
                thread::sleep(Duration::from_millis(
                    50 * u64::from(attempt) * (index as u64 + 1),
                ));
            }
            r => return r,
        }
    }
}

/// Whether two hellos declare the same problem.
pub(super) fn same_declaration(a: &Hello, b: &Hello) -> bool {
    a.dim == b.dim && a.offers == b.offers && a.names == b.names
}

impl Pool {
    /// Starts the slot's process again, checking that it declares what the first one did.
    fn restart(&self, slot: &mut Slot) -> Result<(), EvalError> {
        let w =
            Worker::start(&self.spec, slot.index, slot.starts).map_err(|e| fatal(e.to_string()))?;
        slot.starts += 1;
        if !same_declaration(w.hello(), &self.hello) || w.encoding() != self.encoding {
            return Err(fatal(format!(
                "the restarted adapter `{}` (worker {}) declared dimension {} and capabilities {:?}, but the \
                 first start declared dimension {} and {:?}: an adapter must declare the same each time",
                self.spec.display,
                slot.index,
                w.hello().dim,
                w.hello().offers,
                self.hello.dim,
                self.hello.offers
            )));
        }
        slot.worker = Some(w);
        Ok(())
    }

    /// Sends one request on an idle worker, restarting dead workers up to `max_restarts` times.
    pub fn call(&self, req: &Request<'_>) -> Result<Reply, EvalError> {
        let mut slot = self.guard(self.take_slot()?);
        self.call_on(slot.slot(), req)
    }

    /// Sends one request on the worker of `slot`, restarting it up to `max_restarts` times.
    pub fn call_on(&self, slot: &mut Slot, req: &Request<'_>) -> Result<Reply, EvalError> {
        let mut restarts = 0u32;
        loop {
            if slot.worker.is_none() {
                self.restart(slot)?;
            }
            let Some(worker) = slot.worker.as_mut() else {
                continue;
            };
            let err = match worker.call(req, self.eval_timeout) {
                Ok(reply) => return Ok(reply),
                Err(e) => e,
            };
            slot.worker = None;
            match err {
                WorkerError::Died(m) => {
                    if restarts >= self.max_restarts {
                        return Err(fatal(format!(
                            "{m}\n(gave up after {restarts} restart{} for this request; raise the restart \
                             limit if the crashes are sporadic)",
                            if restarts == 1 { "" } else { "s" }
                        )));
                    }
                    restarts += 1;
                    self.restarts.fetch_add(1, Ordering::Relaxed);
                }
                WorkerError::Protocol(message, e) => return Err(self.protocol_error(message, e)),
                WorkerError::Start(m) => return Err(fatal(m)),
            }
        }
    }

    /// A wrong vector length is a dimension error; any other broken reply is fatal.
    fn protocol_error(&self, message: String, e: ProtocolError) -> EvalError {
        match e {
            ProtocolError::Length {
                what,
                expected,
                got,
            } => EvalError::Dimension {
                what: format!("{what} returned by the adapter `{}`", self.spec.display),
                expected,
                got,
            },
            _ => fatal(message),
        }
    }
}
