//! The handshake: the adapter's hello line within the handshake timeout, the choice of encoding, and
//! varpost's start line.

use std::time::{Duration, Instant};

use crate::adapter::pool::MAX_TIMEOUT_SECS;

use super::pipes::{Framing, ReadOutcome};
use super::terminate::{closed_output, describe_end, TERM_GRACE};
use super::{Worker, WorkerError, WorkerSpec};
use crate::adapter::protocol::{self, Encoding, Hello};

/// Which encoding to ask for after the handshake.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "lowercase")]
pub enum EncodingChoice {
    /// Binary for states of 1000 components or more when the adapter offers it, otherwise text when
    /// offered, otherwise binary.
    #[default]
    Auto,
    /// Text; an error if the adapter does not offer it.
    Text,
    /// Binary; an error if the adapter does not offer it.
    Binary,
}

/// Vectors of the adapter's dimension that one evaluation holds at once: the state, the request as
/// sent, the reply as read, and the gradient decoded from it.
const VECTORS_PER_EVALUATION: u128 = 4;

/// Refuses a hello whose dimension this machine cannot hold, before anything of that size is allocated.
fn fits_in_memory(hello: &Hello) -> crate::Result<()> {
    let n = hello.dim as u128;
    crate::resources::ensure_fits(
        &format!(
            "the adapter's state of {n} components (the \"dim\" of its hello), with its gradient and the \
             two messages of one evaluation,"
        ),
        crate::resources::f64_bytes(n.saturating_mul(VECTORS_PER_EVALUATION)),
        "check the dimension the adapter declares, or run on a machine with more memory",
    )
}

fn choose_encoding(choice: EncodingChoice, hello: &Hello) -> Result<Encoding, String> {
    let offers = |e| hello.encodings.contains(&e);
    let forced = match choice {
        EncodingChoice::Text => Encoding::Text,
        EncodingChoice::Binary => Encoding::Binary,
        EncodingChoice::Auto => {
            return Ok(
                if offers(Encoding::Binary) && (hello.dim >= 1000 || !offers(Encoding::Text)) {
                    Encoding::Binary
                } else if offers(Encoding::Text) {
                    Encoding::Text
                } else {
                    Encoding::Binary
                },
            )
        }
    };
    if offers(forced) {
        return Ok(forced);
    }
    let names: Vec<_> = hello.encodings.iter().map(|e| e.name()).collect();
    Err(format!(
        "the {} encoding was asked for but the adapter offers only: {}",
        forced.name(),
        names.join(", ")
    ))
}

impl Worker {
    /// Starts worker `index` (its `restart`-th restart; 0 for the first start) and does the handshake.
    pub fn start(spec: &WorkerSpec, index: usize, restart: u32) -> Result<Worker, WorkerError> {
        let mut w = Worker::spawn(spec, index, restart)?;
        w.handshake(spec)?;
        Ok(w)
    }

    fn handshake(&mut self, spec: &WorkerSpec) -> Result<(), WorkerError> {
        // Validated to at most MAX_TIMEOUT_SECS; saturated all the same, never a panic.
        let deadline = Instant::now()
            .checked_add(spec.handshake_timeout)
            .unwrap_or_else(|| Instant::now() + Duration::from_secs(MAX_TIMEOUT_SECS));
        let line = self.hello_line(spec, deadline)?;
        let hello = match protocol::decode_hello(&line) {
            Ok(h) => h,
            Err(e) => return Err(self.refuse(&format!("failed the handshake: {e}"))),
        };
        if let Err(e) = fits_in_memory(&hello) {
            return Err(self.refuse(&format!("failed the handshake: {e}")));
        }
        let encoding = match choose_encoding(spec.encoding, &hello) {
            Ok(e) => e,
            Err(m) => return Err(self.refuse(&m)),
        };
        let sent = self
            .pipes
            .write_all(&protocol::encode_start(encoding), Some(deadline));
        if !matches!(sent, Ok(true)) {
            let ended = self.reap_after_eof();
            return Err(WorkerError::Start(self.describe(&format!(
                "{} during the handshake",
                describe_end(ended)
            ))));
        }
        self.started = true;
        self.framing = match encoding {
            Encoding::Text => Framing::Line {
                max: protocol::max_text_line(hello.dim),
            },
            Encoding::Binary => Framing::Frame {
                max_body: protocol::max_frame_body(hello.dim),
            },
        };
        self.hello = hello;
        self.encoding = encoding;
        Ok(())
    }

    /// Stops the process and gives the start error `what`.
    fn refuse(&mut self, what: &str) -> WorkerError {
        self.stop(TERM_GRACE);
        WorkerError::Start(self.describe(what))
    }

    /// The adapter's first line on stdout.
    fn hello_line(&mut self, spec: &WorkerSpec, deadline: Instant) -> Result<Vec<u8>, WorkerError> {
        match self.pipes.read_message(self.framing, Some(deadline)) {
            ReadOutcome::Message(end) => {
                let line = self.pipes.buf[..end].to_vec();
                self.pipes.consume(end);
                Ok(line)
            }
            ReadOutcome::Eof => {
                // Gone before saying hello: a crash at start-up, which a new start may not repeat
                // (e.g. a launcher that lost a race for its session directory).
                let ended = self.reap_after_eof();
                Err(WorkerError::Died(
                    self.describe(&closed_output(ended, "before its hello line")),
                ))
            }
            ReadOutcome::Broken(m) => Err(self.refuse(&format!("sent no valid hello line: {m}"))),
            ReadOutcome::Timeout => Err(self.refuse(&format!(
                "sent no hello line within {:.1} s and was stopped (raise the handshake timeout if it \
                 starts slowly, and check that it flushes stdout after the hello)",
                spec.handshake_timeout.as_secs_f64()
            ))),
        }
    }
}
