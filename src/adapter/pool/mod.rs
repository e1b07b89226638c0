//! A pool of adapter processes seen as one [`Problem`]: each evaluation takes an idle worker, so callers
//! on several threads (one chain per worker) evaluate in parallel. A worker that dies is restarted and the
//! request retried; a prior offered by the adapter is exposed as a [`Prior`].
//!
//! Files: `config` (how to run the adapter), `slots` (the idle workers and shutting down), `restart`
//! (starts, restarts and the retry policy of one request), `problem` (the [`Problem`] methods), `batch`
//! (many cost evaluations spread over all workers), `prior` (the adapter's background as a [`Prior`]).
//!
//! [`Problem`]: crate::problem::Problem
//! [`Prior`]: crate::problem::Prior

mod batch;
mod config;
mod prior;
mod problem;
mod restart;
mod slots;

use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::thread;

pub use config::{timeout_from_secs, AdapterConfig, MAX_RESTARTS, MAX_TIMEOUT_SECS, MAX_WORKERS};
pub use prior::AdapterPrior;

use crate::adapter::process::{Watchdog, Worker, WorkerError, WorkerSpec};
use crate::adapter::protocol::{Capabilities, Encoding, Op};
use crate::error::{Error, EvalError, Result};
use restart::{same_declaration, start_with_retries};
use slots::{Pool, Slot};

/// A user's code behind the subprocess protocol, as a [`Problem`](crate::problem::Problem).
pub struct AdapterProblem {
    pool: Arc<Pool>,
    prior: Option<AdapterPrior>,
}

/// Starts `config.workers` processes side by side, each with its handshake.
fn start_workers(spec: &WorkerSpec, config: &AdapterConfig) -> Result<Vec<Worker>> {
    let started: Vec<std::result::Result<Worker, WorkerError>> = thread::scope(|s| {
        let handles: Vec<_> = (0..config.workers)
            .map(|i| s.spawn(move || start_with_retries(spec, i, config.max_restarts)))
            .collect();
        handles
            .into_iter()
            .map(|h| {
                h.join()
                    .unwrap_or_else(|_| Err(WorkerError::Start("an adapter start panicked".into())))
            })
            .collect()
    });
    let mut workers = Vec::with_capacity(started.len());
    for r in started {
        workers.push(r.map_err(|e| Error::Adapter(e.to_string()))?);
    }
    let hello = workers[0].hello();
    for (i, w) in workers.iter().enumerate().skip(1) {
        if !same_declaration(w.hello(), hello) {
            return Err(Error::Adapter(format!(
                "adapter workers 0 and {i} of `{}` declare different problems (dimension {} vs {})",
                spec.display,
                hello.dim,
                w.hello().dim
            )));
        }
    }
    Ok(workers)
}

impl AdapterProblem {
    /// Starts `config.workers` adapter processes (in parallel), does each handshake, checks that they all
    /// declare the same problem, and fetches the background if the adapter offers a prior.
    pub fn start(config: &AdapterConfig) -> Result<AdapterProblem> {
        config.validate()?;
        let mut spec = config.spec()?;
        let watchdog = Watchdog::start().map_err(|e| {
            Error::Adapter(format!(
                "cannot start the watchdog process (/bin/sh) that stops the adapters if varpost is \
                 killed: {e}"
            ))
        })?;
        spec.watchdog = Some(Arc::new(watchdog));
        let workers = start_workers(&spec, config)?;
        let hello = workers[0].hello().clone();
        let encoding = workers[0].encoding();
        let slots = workers
            .into_iter()
            .enumerate()
            .map(|(index, w)| Slot {
                index,
                worker: Some(w),
                starts: 1,
            })
            .rev()
            .collect();
        let pool = Arc::new(Pool {
            eval_timeout: config.eval_limit(),
            max_restarts: config.max_restarts,
            workers: config.workers,
            hello,
            encoding,
            spec,
            idle: Mutex::new(slots),
            available: Condvar::new(),
            restarts: AtomicU64::new(0),
        });
        let prior = if pool.hello.offers.prior {
            Some(AdapterPrior::fetch(&pool)?)
        } else {
            None
        };
        Ok(AdapterProblem { pool, prior })
    }

    /// The adapter's self-description from its hello, if it gave one.
    pub fn label(&self) -> Option<&str> {
        self.pool.hello.label.as_deref()
    }

    /// The capabilities the adapter declared.
    pub fn capabilities(&self) -> Capabilities {
        self.pool.hello.offers
    }

    /// The encoding in use.
    pub fn encoding(&self) -> Encoding {
        self.pool.encoding
    }

    /// Number of worker processes.
    pub fn workers(&self) -> usize {
        self.pool.workers
    }

    /// How many times a crashed or hung worker was restarted so far.
    pub fn restarts(&self) -> u64 {
        self.pool.restarts.load(Ordering::Relaxed)
    }

    /// The adapter's prior, if it offers one (also available through [`Problem::prior`]).
    ///
    /// [`Problem::prior`]: crate::problem::Problem::prior
    pub fn adapter_prior(&self) -> Option<&AdapterPrior> {
        self.prior.as_ref()
    }

    fn need(&self, op: Op, capability: &'static str) -> std::result::Result<(), EvalError> {
        if self.pool.hello.offers.allows(op) {
            Ok(())
        } else {
            Err(EvalError::Unsupported { capability })
        }
    }
}
