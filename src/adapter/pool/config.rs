//! How to run an adapter: the command, launcher, number of workers, timeouts, restarts, log folder and
//! encoding, and their translation into what starts one process.

use std::path::PathBuf;
use std::time::Duration;

use crate::adapter::process::{split_command, EncodingChoice, WorkerSpec};
use crate::error::{Error, Result};

/// How to run an adapter. [`AdapterConfig::new`] gives the defaults.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct AdapterConfig {
    /// The adapter command, split with shell-like quoting (no shell runs it), e.g. `python3 model.py`.
    pub command: String,
    /// Number of adapter processes (default 1). Each serves one evaluation at a time.
    pub workers: usize,
    /// Words put before the command, e.g. `mpirun -n 4` (default none).
    pub launcher: Option<String>,
    /// Longest time one request may take before the adapter is killed and treated as crashed
    /// (default 600 s; `None`: no limit).
    pub eval_timeout: Option<Duration>,
    /// Longest time from start to the adapter's hello line (default 60 s).
    pub handshake_timeout: Duration,
    /// How many times one request may restart a crashed or hung adapter before the run stops (default 3).
    pub max_restarts: u32,
    /// Folder for the adapters' stderr logs `adapter-<worker>.log` (default none: only the last lines are
    /// kept, for error messages).
    pub log_dir: Option<PathBuf>,
    /// Encoding to ask for (default: chosen from what the adapter offers and the dimension).
    pub encoding: EncodingChoice,
}

impl AdapterConfig {
    /// The defaults for `command`.
    pub fn new(command: impl Into<String>) -> Self {
        AdapterConfig {
            command: command.into(),
            workers: 1,
            launcher: None,
            eval_timeout: Some(Duration::from_secs(600)),
            handshake_timeout: Duration::from_secs(60),
            max_restarts: 3,
            log_dir: None,
            encoding: EncodingChoice::Auto,
        }
    }

    /// What starts one worker process: the launcher's and the command's words, the log folder (created).
    pub(crate) fn spec(&self) -> Result<WorkerSpec> {
        let cfg = |m: String| Error::Config(m);
        if self.workers == 0 {
            return Err(cfg(
                "the number of adapter workers must be at least 1".into()
            ));
        }
        if self.eval_timeout.is_some_and(|t| t.is_zero()) || self.handshake_timeout.is_zero() {
            return Err(cfg("adapter timeouts must be positive".into()));
        }
        let mut argv = Vec::new();
        let mut display = String::new();
        if let Some(l) = self.launcher.as_deref().filter(|l| !l.trim().is_empty()) {
            argv = split_command(l).map_err(|e| cfg(format!("bad launcher: {e}")))?;
            display = format!("{} ", l.trim());
        }
        let cmd =
            split_command(&self.command).map_err(|e| cfg(format!("bad adapter command: {e}")))?;
        if cmd.is_empty() {
            return Err(cfg(
                "the adapter command is empty: give the program that speaks the protocol, \
                            e.g. --adapter \"python3 model.py\""
                    .into(),
            ));
        }
        argv.extend(cmd);
        display.push_str(self.command.trim());
        if let Some(d) = &self.log_dir {
            std::fs::create_dir_all(d).map_err(|e| Error::io(d, e))?;
        }
        Ok(WorkerSpec {
            argv,
            display,
            log_dir: self.log_dir.clone(),
            handshake_timeout: self.handshake_timeout,
            encoding: self.encoding,
            watchdog: None,
            logs: Default::default(),
        })
    }
}
