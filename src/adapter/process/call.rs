//! One request and its reply, within the evaluation timeout; what went wrong when it failed.

use std::time::{Duration, Instant};

use super::pipes::ReadOutcome;
use super::terminate::{closed_output, wait_exit, TERM_GRACE};
use super::{Worker, WorkerError};
use crate::adapter::protocol::{self, Op, ProtocolError, Reply, Request};

impl Worker {
    /// Sends one request and waits up to `timeout` for its reply. On [`WorkerError::Died`] and
    /// [`WorkerError::Protocol`] the process has been stopped and reaped.
    pub fn call(
        &mut self,
        req: &Request<'_>,
        timeout: Option<Duration>,
    ) -> Result<Reply, WorkerError> {
        let op = req.op;
        let id = self.next_id;
        self.next_id += 1;
        self.out.clear();
        protocol::encode_request(self.encoding, id, req, &mut self.out);
        let deadline = timeout.and_then(|t| Instant::now().checked_add(t));
        let outcome = match self.pipes.write_all(&self.out, deadline) {
            Ok(true) => self.pipes.read_message(self.framing, deadline),
            Ok(false) => ReadOutcome::Timeout,
            // The adapter closed its stdin: it is exiting, or has.
            Err(_) => ReadOutcome::Eof,
        };
        match outcome {
            ReadOutcome::Message(end) => self.take_reply(end, id, op),
            ReadOutcome::Eof => Err(self.died(op)),
            ReadOutcome::Broken(m) => {
                // A stream cut inside a message usually means the process died while writing.
                let pid = self.child.as_ref().map(|c| c.id());
                if pid.is_some_and(|p| wait_exit(p, Duration::from_millis(200))) {
                    Err(self.died(op))
                } else {
                    Err(self.protocol_failure(op, ProtocolError::Malformed(m)))
                }
            }
            ReadOutcome::Timeout => {
                let secs = timeout.map_or(0.0, |t| t.as_secs_f64());
                self.stop(TERM_GRACE);
                Err(WorkerError::Died(self.describe(&format!(
                    "did not answer a {} request within {secs:.1} s and was killed (raise the evaluation \
                     timeout if one evaluation can take longer)",
                    op.name()
                ))))
            }
        }
    }

    /// Decodes the reply in the first `end` bytes of the read buffer, checking its id.
    fn take_reply(&mut self, end: usize, id: u64, op: Op) -> Result<Reply, WorkerError> {
        let bytes = &self.pipes.buf[..end];
        let result = match protocol::decode_reply(self.encoding, bytes, op, self.hello.dim) {
            Ok((got, reply)) if got == id => Ok(reply),
            Ok((got, _)) => Err(ProtocolError::Malformed(format!(
                "the reply carries id {got} but answers request id {id}; received {}",
                protocol::quote(bytes, 240)
            ))),
            Err(e) => Err(e),
        };
        self.pipes.consume(end);
        result.map_err(|e| self.protocol_failure(op, e))
    }

    fn died(&mut self, op: Op) -> WorkerError {
        let ended = self.reap_after_eof();
        let when = format!("during a {} request", op.name());
        WorkerError::Died(self.describe(&closed_output(ended, &when)))
    }

    fn protocol_failure(&mut self, op: Op, e: ProtocolError) -> WorkerError {
        self.stop(TERM_GRACE);
        let m = self.describe(&format!(
            "broke the protocol answering a {} request: {e}",
            op.name()
        ));
        WorkerError::Protocol(m, e)
    }
}
