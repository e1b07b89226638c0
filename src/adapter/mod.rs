//! The subprocess adapter: a user's code in any language, run as one or more child processes that speak
//! the varpost adapter protocol over stdin/stdout, seen by the rest of the crate as a [`Problem`].
//!
//! - [`protocol`]: the messages and their text and binary encodings (no I/O);
//! - [`process`]: one adapter process (spawn, handshake, pipes, timeouts, stderr log, stopping);
//! - [`pool`]: K processes as one [`AdapterProblem`], with restarts and an optional prior.
//!
//! The protocol is specified for adapter authors in `adapters/PROTOCOL.md`.
//!
//! [`Problem`]: crate::problem::Problem

pub mod pool;
pub mod process;
pub mod protocol;

pub use pool::{timeout_from_secs, AdapterConfig, AdapterPrior, AdapterProblem};
pub use process::{split_command, EncodingChoice};
pub use protocol::{Encoding, PROTOCOL_VERSION};
