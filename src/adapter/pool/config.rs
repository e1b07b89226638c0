//! How to run an adapter: the command, launcher, number of workers, timeouts, restarts, log folder and
//! encoding, and their translation into what starts one process.

use std::path::PathBuf;
use std::time::Duration;

use crate::adapter::process::{split_command, EncodingChoice, WorkerSpec};
use crate::error::{Error, Result};

/// Most adapter processes one pool starts.
pub const MAX_WORKERS: usize = 1024;
/// Most restarts of a crashed or hung adapter allowed per request.
pub const MAX_RESTARTS: u32 = 1000;
/// Longest timeout accepted, in seconds (about 31.7 years); longer ones are surely a mistake, and a
/// deadline that far ahead could not be represented.
pub const MAX_TIMEOUT_SECS: u64 = 1_000_000_000;

/// A timeout from a number of seconds a user gave for `what` (e.g. `--eval-timeout`): finite, not
/// negative, at most [`MAX_TIMEOUT_SECS`]. Zero gives `None` (no limit) where `zero_means_none`, and is
/// an error otherwise.
pub fn timeout_from_secs(what: &str, secs: f64, zero_means_none: bool) -> Result<Option<Duration>> {
    let range = if zero_means_none {
        "0 (no limit) or more"
    } else {
        "more than 0"
    };
    let bad = |why: &str| {
        Error::Config(format!(
            "{what} {secs}: {why}; give a number of seconds, {range}, up to {MAX_TIMEOUT_SECS}"
        ))
    };
    if !secs.is_finite() || secs < 0.0 {
        return Err(bad("not a number of seconds"));
    }
    if secs > MAX_TIMEOUT_SECS as f64 {
        return Err(bad("too long"));
    }
    if secs == 0.0 {
        return if zero_means_none {
            Ok(None)
        } else {
            Err(bad("must be positive"))
        };
    }
    // Checked although the range above makes it safe: never a panic on user input.
    Duration::try_from_secs_f64(secs)
        .map(Some)
        .map_err(|_| bad("not representable"))
}

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

    /// Checks the settings: 1 to [`MAX_WORKERS`] workers, timeouts up to [`MAX_TIMEOUT_SECS`] (a
    /// positive handshake timeout; an evaluation timeout of zero means none), at most [`MAX_RESTARTS`]
    /// restarts, and a launcher and command that split into words.
    pub fn validate(&self) -> Result<()> {
        let cfg = |m: String| Err(Error::Config(m));
        if !(1..=MAX_WORKERS).contains(&self.workers) {
            return cfg(format!(
                "{} adapter workers: the number of adapter workers must be at least 1 and at most \
                 {MAX_WORKERS}",
                self.workers
            ));
        }
        let too_long = |t: &Duration| t.as_secs() > MAX_TIMEOUT_SECS;
        if self.eval_timeout.as_ref().is_some_and(too_long) {
            return cfg(format!(
                "the adapter evaluation timeout must be at most {MAX_TIMEOUT_SECS} s (or 0 for none)"
            ));
        }
        if self.handshake_timeout.is_zero() || too_long(&self.handshake_timeout) {
            return cfg(format!(
                "the adapter handshake timeout must be more than 0 and at most {MAX_TIMEOUT_SECS} s"
            ));
        }
        if self.max_restarts > MAX_RESTARTS {
            return cfg(format!(
                "{} restarts per request: at most {MAX_RESTARTS} are allowed",
                self.max_restarts
            ));
        }
        self.argv().map(|_| ())
    }

    /// The evaluation timeout, `None` for no limit (also when it is zero).
    pub(crate) fn eval_limit(&self) -> Option<Duration> {
        self.eval_timeout.filter(|t| !t.is_zero())
    }

    /// The launcher's and the command's words, and the command as shown in messages.
    fn argv(&self) -> Result<(Vec<String>, String)> {
        let cfg = |m: String| Error::Config(m);
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
        Ok((argv, display))
    }

    /// What starts one worker process: the launcher's and the command's words, the log folder (created).
    pub(crate) fn spec(&self) -> Result<WorkerSpec> {
        let (argv, display) = self.argv()?;
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

#[cfg(test)]
mod tests {
    use super::*;

    fn message(c: &AdapterConfig) -> String {
        c.validate().unwrap_err().to_string()
    }

    #[test]
    fn the_defaults_are_valid_and_bad_settings_are_refused_with_a_message() {
        let ok = AdapterConfig::new("python3 model.py");
        ok.validate().unwrap();
        let with = |f: &dyn Fn(&mut AdapterConfig)| {
            let mut c = ok.clone();
            f(&mut c);
            c
        };
        assert!(message(&with(&|c| c.workers = 0)).contains("at least 1"));
        assert!(message(&with(&|c| c.workers = MAX_WORKERS + 1)).contains("at most 1024"));
        with(&|c| c.workers = MAX_WORKERS).validate().unwrap();
        // An evaluation timeout of zero means none; the handshake needs one.
        with(&|c| c.eval_timeout = Some(Duration::ZERO))
            .validate()
            .unwrap();
        assert_eq!(
            with(&|c| c.eval_timeout = Some(Duration::ZERO)).eval_limit(),
            None
        );
        with(&|c| c.eval_timeout = None).validate().unwrap();
        let huge = Duration::from_secs(MAX_TIMEOUT_SECS + 1);
        assert!(message(&with(&|c| c.eval_timeout = Some(huge))).contains("at most"));
        assert!(message(&with(&|c| c.handshake_timeout = Duration::ZERO)).contains("more than 0"));
        assert!(message(&with(&|c| c.handshake_timeout = Duration::MAX)).contains("at most"));
        assert!(message(&with(&|c| c.max_restarts = MAX_RESTARTS + 1)).contains("at most 1000"));
        assert!(message(&with(&|c| c.command = "  ".into())).contains("command is empty"));
        assert!(message(&with(&|c| c.command = "a 'b".into())).contains("unterminated"));
        assert!(message(&with(&|c| c.launcher = Some("mpirun \"-n".into()))).contains("launcher"));
    }

    #[test]
    fn timeouts_from_seconds_are_checked_before_conversion() {
        assert_eq!(
            timeout_from_secs("--eval-timeout", 0.25, true).unwrap(),
            Some(Duration::from_millis(250))
        );
        assert_eq!(
            timeout_from_secs("--eval-timeout", 0.0, true).unwrap(),
            None
        );
        assert!(timeout_from_secs("--handshake-timeout", 0.0, false).is_err());
        assert_eq!(
            timeout_from_secs("--eval-timeout", 1e9, true).unwrap(),
            Some(Duration::from_secs(MAX_TIMEOUT_SECS))
        );
        for bad in [f64::NAN, f64::INFINITY, -1.0, 1e9 + 1.0, 1e300, f64::MAX] {
            let e = timeout_from_secs("--eval-timeout", bad, true)
                .unwrap_err()
                .to_string();
            assert!(e.contains("--eval-timeout") && e.contains("seconds"), "{e}");
        }
    }
}
