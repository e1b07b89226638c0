//! A pool of adapter processes seen as one [`Problem`]: each evaluation takes an idle worker, so callers
//! on several threads (one chain per worker) evaluate in parallel. A worker that dies is restarted and the
//! request retried; a prior offered by the adapter is exposed as a [`Prior`].

use std::path::PathBuf;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Condvar, Mutex};
use std::thread;
use std::time::{Duration, Instant};

use super::process::{split_command, EncodingChoice, Worker, WorkerError, WorkerSpec};
use super::protocol::{Capabilities, Encoding, Hello, Op, ProtocolError, Reply, Request};
use crate::error::{Error, EvalError, Result};
use crate::problem::{check_finite, CostSplit, Prior, Problem};

/// Starts worker `index`; a worker that dies before its hello line is started again, up to
/// `retries` times, after a short pause that grows with the attempt (launchers such as mpirun can
/// fail transiently when several start at once). Protocol and handshake errors are not retried.
fn start_with_retries(
    spec: &WorkerSpec,
    index: usize,
    retries: u32,
) -> std::result::Result<Worker, WorkerError> {
    let mut attempt = 0;
    loop {
        match Worker::start(spec, index, attempt) {
            Err(WorkerError::Died(_)) if attempt < retries => {
                attempt += 1;
                thread::sleep(std::time::Duration::from_millis(
                    50 * u64::from(attempt) * (index as u64 + 1),
                ));
            }
            r => return r,
        }
    }
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

    fn spec(&self) -> Result<WorkerSpec> {
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
        })
    }
}

/// One worker place in the pool; `worker` is `None` while it has to be (re)started.
struct Slot {
    index: usize,
    worker: Option<Worker>,
    starts: u32,
}

struct Pool {
    spec: WorkerSpec,
    hello: Hello,
    encoding: Encoding,
    eval_timeout: Option<Duration>,
    max_restarts: u32,
    workers: usize,
    idle: Mutex<Vec<Slot>>,
    available: Condvar,
    restarts: AtomicU64,
}

/// The background N(xb, B) as the adapter gives it; products with B^{1/2} are requests to the adapter.
pub struct AdapterPrior {
    pool: Arc<Pool>,
    xb: Vec<f64>,
    var: Vec<f64>,
    log_det: f64,
    solve: bool,
    last_error: Mutex<Option<String>>,
}

/// A user's code behind the subprocess protocol, as a [`Problem`].
pub struct AdapterProblem {
    pool: Arc<Pool>,
    prior: Option<AdapterPrior>,
}

fn fatal(message: String) -> EvalError {
    EvalError::Failed {
        message,
        recoverable: false,
    }
}

fn same_declaration(a: &Hello, b: &Hello) -> bool {
    a.dim == b.dim && a.offers == b.offers && a.names == b.names
}

impl Pool {
    fn take_slot(&self) -> std::result::Result<Slot, EvalError> {
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

    fn put_slot(&self, slot: Slot) {
        if let Ok(mut idle) = self.idle.lock() {
            idle.push(slot);
        }
        self.available.notify_one();
    }

    /// Starts the slot's process again, checking that it declares what the first one did.
    fn restart(&self, slot: &mut Slot) -> std::result::Result<(), EvalError> {
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
    fn call(&self, req: &Request<'_>) -> std::result::Result<Reply, EvalError> {
        let mut slot = self.take_slot()?;
        let result = self.call_on(&mut slot, req);
        self.put_slot(slot);
        result
    }

    fn call_on(&self, slot: &mut Slot, req: &Request<'_>) -> std::result::Result<Reply, EvalError> {
        let mut restarts = 0u32;
        loop {
            if slot.worker.is_none() {
                self.restart(slot)?;
            }
            let Some(worker) = slot.worker.as_mut() else {
                continue;
            };
            match worker.call(req, self.eval_timeout) {
                Ok(reply) => return Ok(reply),
                Err(WorkerError::Died(m)) => {
                    slot.worker = None;
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
                Err(WorkerError::Protocol(message, e)) => {
                    slot.worker = None;
                    return Err(match e {
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
                    });
                }
                Err(WorkerError::Start(m)) => {
                    slot.worker = None;
                    return Err(fatal(m));
                }
            }
        }
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

fn reported(message: String, recoverable: bool) -> EvalError {
    EvalError::Failed {
        message: format!("the adapter reported: {message}"),
        recoverable,
    }
}

fn unexpected(op: Op) -> EvalError {
    fatal(format!(
        "the adapter's reply does not answer a {} request",
        op.name()
    ))
}

impl AdapterProblem {
    /// Starts `config.workers` adapter processes (in parallel), does each handshake, checks that they all
    /// declare the same problem, and fetches the background if the adapter offers a prior.
    pub fn start(config: &AdapterConfig) -> Result<AdapterProblem> {
        let spec = config.spec()?;
        let started: Vec<std::result::Result<Worker, WorkerError>> = thread::scope(|s| {
            let handles: Vec<_> = (0..config.workers)
                .map(|i| {
                    s.spawn({
                        let spec = &spec;
                        move || start_with_retries(spec, i, config.max_restarts)
                    })
                })
                .collect();
            handles
                .into_iter()
                .map(|h| {
                    h.join().unwrap_or_else(|_| {
                        Err(WorkerError::Start("an adapter start panicked".into()))
                    })
                })
                .collect()
        });
        let mut workers = Vec::with_capacity(started.len());
        for r in started {
            workers.push(r.map_err(|e| Error::Adapter(e.to_string()))?);
        }
        let hello = workers[0].hello().clone();
        let encoding = workers[0].encoding();
        for (i, w) in workers.iter().enumerate().skip(1) {
            if !same_declaration(w.hello(), &hello) {
                return Err(Error::Adapter(format!(
                    "adapter workers 0 and {i} of `{}` declare different problems (dimension {} vs {})",
                    spec.display,
                    hello.dim,
                    w.hello().dim
                )));
            }
        }
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
            eval_timeout: config.eval_timeout,
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
            let reply = pool
                .call(&Request::new(Op::Background, &[], &[]))
                .map_err(|e| Error::eval("fetching the background from the adapter", e))?;
            let Reply::Background { xb, var, log_det } = reply else {
                return Err(Error::Adapter(
                    "the adapter answered the background request with another reply".into(),
                ));
            };
            if let Some(i) = var.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
                return Err(Error::Adapter(format!(
                    "the adapter's background variance {i} is {}; variances must be positive and finite",
                    var[i]
                )));
            }
            if xb.iter().any(|v| !v.is_finite()) || !log_det.is_finite() {
                return Err(Error::Adapter(
                    "the adapter's background xb or log det B is not finite".into(),
                ));
            }
            Some(AdapterPrior {
                pool: pool.clone(),
                xb,
                var,
                log_det,
                solve: pool.hello.offers.prior_solve,
                last_error: Mutex::new(None),
            })
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

impl Problem for AdapterProblem {
    fn dim(&self) -> usize {
        self.pool.hello.dim
    }

    fn component_names(&self) -> Option<Vec<String>> {
        self.pool.hello.names.clone()
    }

    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let n = self.pool.hello.dim;
        crate::problem::check_len("control vector", x, n)?;
        crate::problem::check_len("gradient buffer", grad, n)?;
        match self.pool.call(&Request::new(Op::CostGrad, x, &[]))? {
            Reply::CostGrad { cost, grad: g } => {
                grad.copy_from_slice(&g);
                check_finite(cost, Some(grad))?;
                Ok(cost)
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::CostGrad)),
        }
    }

    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        crate::problem::check_len("control vector", x, self.pool.hello.dim)?;
        match self.pool.call(&Request::new(Op::Cost, x, &[]))? {
            Reply::Cost { cost } => {
                check_finite(cost, None)?;
                Ok(cost)
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::Cost)),
        }
    }

    fn has_hess_vec(&self) -> bool {
        self.pool.hello.offers.hess_vec
    }

    fn hess_vec(
        &self,
        x: &[f64],
        v: &[f64],
        out: &mut [f64],
    ) -> std::result::Result<(), EvalError> {
        self.need(Op::HessVec, "Hessian-vector product")?;
        let n = self.pool.hello.dim;
        crate::problem::check_len("control vector", x, n)?;
        crate::problem::check_len("direction", v, n)?;
        crate::problem::check_len("product buffer", out, n)?;
        match self.pool.call(&Request::new(Op::HessVec, x, v))? {
            Reply::HessVec { hv } => {
                out.copy_from_slice(&hv);
                check_finite(0.0, Some(out)).map_err(|_| EvalError::NonFinite {
                    what: "Hessian-vector product".into(),
                })
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::HessVec)),
        }
    }

    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        if !self.pool.hello.offers.split {
            return Ok(None);
        }
        crate::problem::check_len("control vector", x, self.pool.hello.dim)?;
        match self.pool.call(&Request::new(Op::Split, x, &[]))? {
            Reply::Split { jb, jo } => {
                check_finite(jb + jo, None)?;
                Ok(Some(CostSplit {
                    background: jb,
                    observation: jo,
                }))
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(Op::Split)),
        }
    }

    fn prior(&self) -> Option<&dyn Prior> {
        self.prior.as_ref().map(|p| p as &dyn Prior)
    }
}

impl AdapterPrior {
    /// Applies one of the prior operators through the adapter: out = S v, Sᵀ v, S⁻¹ v or S⁻ᵀ v.
    pub fn apply(&self, op: Op, v: &[f64], out: &mut [f64]) -> std::result::Result<(), EvalError> {
        if !matches!(
            op,
            Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve
        ) || !self.pool.hello.offers.allows(op)
        {
            return Err(EvalError::Unsupported {
                capability: "prior operator",
            });
        }
        let n = self.pool.hello.dim;
        crate::problem::check_len("prior operand", v, n)?;
        crate::problem::check_len("prior product buffer", out, n)?;
        match self.pool.call(&Request::new(op, &[], v))? {
            Reply::Vector { out: r } => {
                out.copy_from_slice(&r);
                check_finite(0.0, Some(out)).map_err(|_| EvalError::NonFinite {
                    what: format!("{} result", op.name()),
                })
            }
            Reply::Error {
                message,
                recoverable,
            } => Err(reported(message, recoverable)),
            _ => Err(unexpected(op)),
        }
    }

    /// The error of the last failed prior product, if any, taken (cleared). [`Prior`]'s products cannot
    /// return errors: a failed one fills its output with NaN and records the error here.
    pub fn take_error(&self) -> Option<String> {
        self.last_error.lock().ok().and_then(|mut e| e.take())
    }

    fn apply_or_nan(&self, op: Op, v: &[f64], out: &mut [f64]) {
        if let Err(e) = self.apply(op, v, out) {
            out.iter_mut().for_each(|o| *o = f64::NAN);
            if let Ok(mut last) = self.last_error.lock() {
                *last = Some(e.to_string());
            }
        }
    }
}

impl Prior for AdapterPrior {
    fn dim(&self) -> usize {
        self.xb.len()
    }
    fn mean(&self) -> &[f64] {
        &self.xb
    }
    fn mul_sqrt(&self, z: &[f64], out: &mut [f64]) {
        self.apply_or_nan(Op::BHalf, z, out)
    }
    fn mul_sqrt_t(&self, v: &[f64], out: &mut [f64]) {
        self.apply_or_nan(Op::BHalfT, v, out)
    }
    fn solve_sqrt(&self, x: &[f64], out: &mut [f64]) -> bool {
        if !self.solve {
            return false;
        }
        self.apply_or_nan(Op::BHalfSolve, x, out);
        true
    }
    fn solve_sqrt_t(&self, x: &[f64], out: &mut [f64]) -> bool {
        if !self.solve {
            return false;
        }
        self.apply_or_nan(Op::BHalfTSolve, x, out);
        true
    }
    fn variance(&self) -> Vec<f64> {
        self.var.clone()
    }
    fn log_det(&self) -> f64 {
        self.log_det
    }
}
