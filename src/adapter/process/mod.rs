//! One adapter process: spawning it, the handshake, requests with a deadline, and stopping it without
//! leaving a zombie or a stray process behind.
//!
//! Requests and replies go through the adapter's stdin and stdout from the calling thread: both pipes
//! are non-blocking and every read and write waits with `poll` until the request's deadline, so neither
//! a silent adapter nor one that stops reading can block varpost past its timeout. Only stderr has a
//! thread of its own, which copies it to the log file and keeps its last lines for error messages.
//!
//! Each adapter runs in a session (and so a process group) of its own, so that a launcher (`mpirun ...`)
//! and everything it started — even ranks the launcher puts in process groups of their own — can be
//! stopped together, and so that the terminal's Ctrl-C reaches varpost only, which then shuts its
//! adapters down in order. Stopping is SIGTERM to the whole session, a short grace, then SIGKILL, on every
//! path (quit, error, drop during a panic). If varpost dies without that chance (`kill -9`), the pool's
//! watchdog process ends the sessions, and on Linux the process varpost started also gets SIGTERM from
//! the kernel (the children are forked from one long-lived thread, since the kernel ties this signal to
//! the forking thread). An adapter that sees end-of-file on its stdin must exit.
//!
//! Files: `command` (splitting the command line), `spawn` (starting the process), `handshake`,
//! `pipes` (stdin/stdout with deadlines, cutting stdout into messages), `call` (one request within the
//! evaluation timeout), `stderr` (the log and the last lines), `terminate` (stopping and reaping),
//! `watchdog` (ending the sessions when varpost dies abruptly).

mod call;
mod command;
mod handshake;
mod log;
pub(crate) mod pipes;
mod spawn;
mod stderr;
mod terminate;
mod watchdog;

use std::collections::HashMap;
use std::path::PathBuf;
use std::process::Child;
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::Duration;

pub use command::split_command;
pub use handshake::EncodingChoice;
pub use log::{LOG_HEAD, LOG_TAIL};

use super::protocol::{Encoding, Hello, ProtocolError};
use log::{LimitedLog, SharedLog};
use pipes::{Framing, Pipes};
use stderr::StderrTail;
pub(crate) use watchdog::Watchdog;

/// How to start one adapter process.
#[derive(Debug, Clone)]
pub(crate) struct WorkerSpec {
    /// Launcher words followed by the command's words.
    pub argv: Vec<String>,
    /// The command as the user wrote it (launcher included), for messages.
    pub display: String,
    /// Folder for `adapter-<worker>.log`; `None` keeps only the last lines in memory.
    pub log_dir: Option<PathBuf>,
    /// Time allowed from start to the hello line.
    pub handshake_timeout: Duration,
    /// Encoding to ask for.
    pub encoding: EncodingChoice,
    /// The pool's watchdog, told about every adapter session (none: only the parent-death signal
    /// protects against varpost dying abruptly).
    pub watchdog: Option<Arc<Watchdog>>,
    /// The logs of the worker places opened so far, shared by the processes each place starts.
    pub logs: Arc<Mutex<HashMap<usize, SharedLog>>>,
}

impl WorkerSpec {
    /// The log file of worker `index`.
    pub fn log_path(&self, index: usize) -> Option<PathBuf> {
        self.log_dir
            .as_ref()
            .map(|d| d.join(format!("adapter-{index}.log")))
    }

    /// The log of worker `index`: created (emptied) at its first start, shared after that.
    fn log(&self, index: usize) -> Result<Option<SharedLog>, String> {
        let Some(path) = self.log_path(index) else {
            return Ok(None);
        };
        let mut logs = self
            .logs
            .lock()
            .map_err(|_| "the adapter logs' lock is poisoned".to_string())?;
        if let Some(l) = logs.get(&index) {
            return Ok(Some(l.clone()));
        }
        let l = LimitedLog::shared(&path)?;
        logs.insert(index, l.clone());
        Ok(Some(l))
    }
}

/// Why a request or a start failed.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum WorkerError {
    /// The process exited, was killed, closed its stdout, or did not answer in time. It is gone; a new one
    /// may be started.
    Died(String),
    /// The adapter answered with something that breaks the protocol: the whole message (quoting what
    /// arrived) and the protocol error itself. The process has been stopped (its stream can no longer be
    /// trusted).
    Protocol(String, ProtocolError),
    /// The process could not be started or the handshake failed.
    Start(String),
}

impl std::fmt::Display for WorkerError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            WorkerError::Died(m) | WorkerError::Start(m) | WorkerError::Protocol(m, _) => {
                write!(f, "{m}")
            }
        }
    }
}

/// One running adapter process after a successful handshake.
pub(crate) struct Worker {
    index: usize,
    display: String,
    log_path: Option<PathBuf>,
    child: Option<Child>,
    pipes: Pipes,
    /// How stdout is cut into messages: lines until the handshake ends, then the chosen encoding's.
    framing: Framing,
    /// Whether the start line went out (then a quit message can be sent).
    started: bool,
    /// The request being sent (kept to reuse its allocation).
    out: Vec<u8>,
    stderr_thread: Option<JoinHandle<()>>,
    tail: StderrTail,
    hello: Hello,
    encoding: Encoding,
    next_id: u64,
    watchdog: Option<Arc<Watchdog>>,
}

impl Worker {
    /// The adapter's hello.
    pub fn hello(&self) -> &Hello {
        &self.hello
    }

    /// The encoding in use after the handshake.
    pub fn encoding(&self) -> Encoding {
        self.encoding
    }

    /// "the adapter `CMD` (worker i) WHAT; last lines of its stderr: ...".
    fn describe(&mut self, what: &str) -> String {
        // Let the stderr thread drain what the process wrote before it ended.
        self.drain_stderr();
        let lines = self.tail.lines();
        let log = match &self.log_path {
            Some(p) => format!(" (full log: {})", p.display()),
            None => String::new(),
        };
        let tail = if lines.is_empty() {
            format!("; it wrote nothing to stderr{log}")
        } else {
            format!(
                "; last lines of its stderr{log}:\n    {}",
                lines.join("\n    ")
            )
        };
        format!(
            "the adapter `{}` (worker {}) {what}{tail}",
            self.display, self.index
        )
    }
}
