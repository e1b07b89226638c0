//! Finding the analysis (MAP) with argmin's L-BFGS and More–Thuente line search; the only module that
//! names argmin types.
//!
//! Where the problem gives its background prior N(xb, B = S Sᵀ) and can solve with S, the minimisation
//! runs in the control variable v = S⁻¹ (x − xb), as is common in 4D-Var practice (common practice, no
//! source): the Hessian there is I plus the observation term, so a unit first step has the right scale.
//! Otherwise it runs in x. Either way the iterates (x_k, ∇J(x_k)) are recorded in model space, and the
//! last pairs s_k = x_{k+1} − x_k, y_k = ∇J(x_{k+1}) − ∇J(x_k) are kept for the L-BFGS preconditioner.
//!
//! argmin asks for the cost and the gradient at a point in separate calls; the objective below caches
//! the last point so one model + adjoint run serves both.

use std::collections::VecDeque;
use std::sync::{Arc, Mutex};

use argmin::core::observers::{Observe, ObserverMode};
use argmin::core::{CostFunction, Executor, Gradient, IterState, State, TerminationReason, KV};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::quasinewton::LBFGS;

use crate::error::{Error, EvalError, Result};
use crate::problem::check::norm;
use crate::problem::{Prior, Problem};

/// Settings of the minimisation.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize)]
pub struct MapConfig {
    /// Number of (s, y) pairs L-BFGS keeps.
    pub history: usize,
    /// Stop when ‖∇J‖ falls below `grad_rtol` times its value at the start.
    pub grad_rtol: f64,
    /// Stop when the cost changes by less than this between iterations.
    pub cost_atol: f64,
    /// Iteration limit.
    pub max_iters: u64,
    /// Times the minimisation restarts (fresh history, shorter steps) after a non-finite trial point.
    pub max_restarts: usize,
}

impl Default for MapConfig {
    fn default() -> Self {
        MapConfig {
            history: 20,
            grad_rtol: 1e-8,
            cost_atol: 0.0,
            max_iters: 500,
            max_restarts: 5,
        }
    }
}

impl MapConfig {
    /// Checks every setting, naming the bad one.
    pub fn validate(&self) -> Result<()> {
        if self.history == 0 || self.history > 10_000 {
            return Err(Error::Config(format!(
                "--history {}: keep between 1 and 10,000 pairs",
                self.history
            )));
        }
        if !(self.grad_rtol > 0.0 && self.grad_rtol < 1.0) {
            return Err(Error::Config(format!(
                "--grad-rtol {} must lie strictly between 0 and 1",
                self.grad_rtol
            )));
        }
        if !(self.cost_atol.is_finite() && self.cost_atol >= 0.0) {
            return Err(Error::Config(format!(
                "cost tolerance {} must be finite and >= 0",
                self.cost_atol
            )));
        }
        if self.max_iters == 0 {
            return Err(Error::Config("--max-iters must be at least 1".into()));
        }
        Ok(())
    }
}

/// Why a minimisation stopped: data, not an error. Its text (Display) is what the summary records.
#[derive(Debug, Clone, PartialEq)]
pub enum StopReason {
    /// The gradient norm fell below the tolerance, by this factor from the start.
    GradientReduced { factor: f64 },
    /// The gradient tolerance was reached when the line search could go no further.
    GradientTolerance,
    /// The iteration limit was reached first.
    IterationLimit,
    /// The cost stopped decreasing before the gradient tolerance was reached.
    CostStalled,
    /// The line search could make no progress (often a wrong gradient).
    LineSearch(String),
    /// The last attempt was restarted after a recoverable evaluation failure.
    Restarted(String),
    /// Another reason reported by the minimiser.
    Other(String),
}

impl std::fmt::Display for StopReason {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            StopReason::GradientReduced { factor } => {
                write!(f, "gradient norm reduced by {factor:.1e}")
            }
            StopReason::GradientTolerance => f.write_str("gradient tolerance reached"),
            StopReason::IterationLimit => f.write_str("iteration limit reached"),
            StopReason::CostStalled => f.write_str(
                "the cost stopped decreasing before the gradient tolerance was reached",
            ),
            StopReason::LineSearch(e) => write!(
                f,
                "line search stopped: {e} (no descent along the gradient: if this happens early, check \
                 the gradient with `varpost check`)"
            ),
            StopReason::Restarted(e) => write!(f, "restarted after: {e}"),
            StopReason::Other(m) => f.write_str(m),
        }
    }
}

impl serde::Serialize for StopReason {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.serialize_str(&self.to_string())
    }
}

/// The analysis and how it was found.
#[derive(Debug, Clone, serde::Serialize)]
pub struct MapResult {
    /// The analysis x*.
    pub x: Vec<f64>,
    /// ∇J(x*).
    pub grad: Vec<f64>,
    pub cost: f64,
    pub cost_start: f64,
    pub grad_norm: f64,
    pub grad_norm_start: f64,
    pub iterations: u64,
    pub converged: bool,
    /// Why the minimisation stopped.
    pub reason: StopReason,
    /// Whether it ran in the prior-whitened control variable.
    pub whitened: bool,
    /// The last (s, y) pairs in model space, oldest first.
    #[serde(skip)]
    pub pairs: Vec<(Vec<f64>, Vec<f64>)>,
}

/// The objective argmin sees: J in x, or in v with x = xb + S v.
struct Objective<'a> {
    problem: &'a dyn Problem,
    prior: Option<&'a dyn Prior>,
    /// The last few evaluated points, newest last: argmin asks again for points it has seen.
    recent: Arc<Mutex<VecDeque<Point>>>,
    /// Evaluations that failed, for the restart logic.
    failure: Mutex<Option<EvalError>>,
    /// argmin sees J / scale, so that its first (steepest-descent, unit-length) step has the size of a
    /// prior standard deviation per component instead of the size of the gradient.
    scale: f64,
}

/// How many evaluated points the objective remembers.
const RECENT: usize = 16;

fn lookup(recent: &Mutex<VecDeque<Point>>, p: &[f64]) -> Option<Point> {
    recent
        .lock()
        .ok()?
        .iter()
        .rev()
        .find(|pt| pt.p == p)
        .cloned()
}

#[derive(Clone)]
struct Point {
    p: Vec<f64>,
    cost: f64,
    grad: Vec<f64>,
    x: Vec<f64>,
    gx: Vec<f64>,
}

impl<'a> Objective<'a> {
    fn to_model(&self, p: &[f64]) -> Vec<f64> {
        match self.prior {
            None => p.to_vec(),
            Some(pr) => {
                let mut x = vec![0.0; p.len()];
                pr.mul_sqrt(p, &mut x);
                x.iter_mut().zip(pr.mean()).for_each(|(a, b)| *a += b);
                x
            }
        }
    }

    fn eval(&self, p: &[f64]) -> std::result::Result<Point, argmin::core::Error> {
        if let Some(pt) = lookup(&self.recent, p) {
            return Ok(pt);
        }
        let x = self.to_model(p);
        let mut gx = vec![0.0; x.len()];
        let cost = match self.problem.cost_grad(&x, &mut gx) {
            Ok(c) => c,
            Err(e) => {
                let msg = e.to_string();
                if let Ok(mut f) = self.failure.lock() {
                    *f = Some(e);
                }
                return Err(argmin::core::Error::msg(msg));
            }
        };
        let grad = match self.prior {
            None => gx.clone(),
            Some(pr) => {
                let mut g = vec![0.0; gx.len()];
                pr.mul_sqrt_t(&gx, &mut g);
                g
            }
        };
        let pt = Point {
            p: p.to_vec(),
            cost: cost / self.scale,
            grad: grad.iter().map(|g| g / self.scale).collect(),
            x,
            gx,
        };
        if let Ok(mut r) = self.recent.lock() {
            if r.len() == RECENT {
                r.pop_front();
            }
            r.push_back(pt.clone());
        }
        Ok(pt)
    }
}

impl CostFunction for &Objective<'_> {
    type Param = Vec<f64>;
    type Output = f64;
    fn cost(&self, p: &Self::Param) -> std::result::Result<f64, argmin::core::Error> {
        Ok(self.eval(p)?.cost)
    }
}

impl Gradient for &Objective<'_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;
    fn gradient(&self, p: &Self::Param) -> std::result::Result<Vec<f64>, argmin::core::Error> {
        Ok(self.eval(p)?.grad)
    }
}

type LbfgsState = IterState<Vec<f64>, Vec<f64>, (), (), (), f64>;

/// Records the accepted iterates (found among the objective's recent evaluations, so no extra model
/// run), keeping the last `keep` of them.
struct Recorder {
    recent: Arc<Mutex<VecDeque<Point>>>,
    accepted: Arc<Mutex<(u64, VecDeque<Point>)>>,
    keep: usize,
}

impl Observe<LbfgsState> for Recorder {
    fn observe_iter(
        &mut self,
        state: &LbfgsState,
        _kv: &KV,
    ) -> std::result::Result<(), argmin::core::Error> {
        let pt = state.get_param().and_then(|p| lookup(&self.recent, p));
        if let Ok(mut acc) = self.accepted.lock() {
            acc.0 += 1;
            if let Some(pt) = pt {
                if acc.1.len() == self.keep {
                    acc.1.pop_front();
                }
                acc.1.push_back(pt);
            }
        }
        Ok(())
    }
}

/// Minimises J from `x0` and returns the analysis.
///
/// A non-finite trial point (the model blew up on a too-long step) restarts the minimisation from the
/// best point so far with a fresh history and a step bound ten times shorter, up to
/// `config.max_restarts` times.
pub fn find_map(problem: &dyn Problem, x0: &[f64], config: &MapConfig) -> Result<MapResult> {
    let n = problem.dim();
    if x0.len() != n {
        return Err(Error::Config(format!(
            "the start point has {} components, the problem {n}",
            x0.len()
        )));
    }
    config.validate()?;
    let prior = problem.prior().filter(|pr| {
        let mut t = vec![0.0; n];
        pr.dim() == n && pr.solve_sqrt(x0, &mut t)
    });
    let recent = Arc::new(Mutex::new(VecDeque::with_capacity(RECENT)));
    let mut obj = Objective {
        problem,
        prior,
        recent: recent.clone(),
        failure: Mutex::new(None),
        scale: 1.0,
    };
    let p0 = to_control(prior, x0);
    let start = eval_start(&obj, &p0)?;
    let grad_norm_start = norm(&start.gx);
    let first_step = norm(&start.grad) / (n as f64).sqrt();
    if first_step > 1.0 {
        obj.scale = first_step;
        if let Ok(mut r) = recent.lock() {
            r.clear();
        }
    }
    let obj = obj;
    let start = obj
        .eval(&p0)
        .map_err(|_| Error::Numerical("the start point could not be re-used".into()))?;
    let accepted = Arc::new(Mutex::new((0u64, VecDeque::from(vec![start.clone()]))));
    let (best, converged, reason) = minimise(&obj, &start, config, &recent, &accepted)?;
    let (iterations, pts) = accepted
        .lock()
        .map(|a| (a.0, a.1.clone()))
        .unwrap_or_default();
    Ok(MapResult {
        grad_norm: norm(&best.gx),
        x: best.x,
        grad: best.gx,
        cost: best.cost * obj.scale,
        cost_start: start.cost * obj.scale,
        grad_norm_start,
        iterations,
        converged,
        reason,
        whitened: prior.is_some(),
        pairs: pairs_of(pts.into_iter().collect()),
    })
}

/// The control variable of a model-space point: v = S⁻¹ (x − xb) with the prior, x itself without.
fn to_control(prior: Option<&dyn Prior>, x0: &[f64]) -> Vec<f64> {
    match prior {
        None => x0.to_vec(),
        Some(pr) => {
            let d: Vec<f64> = x0.iter().zip(pr.mean()).map(|(a, b)| a - b).collect();
            let mut v = vec![0.0; x0.len()];
            pr.solve_sqrt(&d, &mut v);
            v
        }
    }
}

/// The first evaluation; its failure stops the minimisation with the cause.
fn eval_start(obj: &Objective<'_>, p0: &[f64]) -> Result<Point> {
    obj.eval(p0).map_err(|_| {
        let e = obj.failure.lock().ok().and_then(|f| f.clone());
        Error::eval(
            "evaluating the cost at the start of the minimisation",
            e.unwrap_or(EvalError::Failed {
                message: "unknown failure".into(),
                recoverable: false,
            }),
        )
    })
}

type Accepted = Arc<Mutex<(u64, VecDeque<Point>)>>;

/// L-BFGS runs from the best point so far, restarted with a shorter step bound after a recoverable
/// failure; returns the best point, whether it converged and why it stopped.
fn minimise(
    obj: &Objective<'_>,
    start: &Point,
    config: &MapConfig,
    recent: &Arc<Mutex<VecDeque<Point>>>,
    accepted: &Accepted,
) -> Result<(Point, bool, StopReason)> {
    let tol = config.grad_rtol * norm(&start.grad);
    let mut best = start.clone();
    let mut step_max = f64::INFINITY;
    let mut reason = StopReason::IterationLimit;
    for attempt in 0..=config.max_restarts {
        let done = accepted.lock().map(|a| a.0).unwrap_or(0);
        let remaining = config.max_iters.saturating_sub(done);
        if remaining == 0 {
            reason = StopReason::IterationLimit;
            break;
        }
        let solver = lbfgs_solver(config, tol, step_max)?;
        let recorder = Recorder {
            recent: recent.clone(),
            accepted: accepted.clone(),
            keep: config.history + 1,
        };
        let p_start = best.p.clone();
        let run = Executor::new(obj, solver)
            .configure(|s| s.param(p_start).max_iters(remaining))
            .add_observer(recorder, ObserverMode::Always)
            .run();
        best = best_accepted(best, accepted);
        let gn = norm(&best.grad);
        let fail = obj.failure.lock().ok().and_then(|mut f| f.take());
        if let Some(ev) = &fail {
            if ev.is_recoverable() && attempt < config.max_restarts && gn > tol {
                step_max = if step_max.is_finite() {
                    step_max / 10.0
                } else {
                    1.0
                };
                reason = StopReason::Restarted(ev.to_string());
                continue;
            }
            if !ev.is_recoverable() {
                return Err(Error::eval("minimising the cost", ev.clone()));
            }
        }
        let r = match run {
            Ok(res) => stop_reason(res.state().get_termination_reason(), gn, tol, start),
            Err(e) => match fail {
                Some(ev) => return Err(Error::eval("minimising the cost", ev)),
                None if gn <= tol => StopReason::GradientTolerance,
                // A line search that cannot make progress ends the minimisation where it is.
                None => StopReason::LineSearch(e.to_string()),
            },
        };
        return Ok((best, gn <= tol, r));
    }
    Ok((best, false, reason))
}

/// L-BFGS with the More–Thuente line search, its step bounded by `step_max` after a restart.
fn lbfgs_solver(
    config: &MapConfig,
    tol: f64,
    step_max: f64,
) -> Result<LBFGS<MoreThuenteLineSearch<Vec<f64>, Vec<f64>, f64>, Vec<f64>, Vec<f64>, f64>> {
    let mut ls = MoreThuenteLineSearch::new();
    if step_max.is_finite() {
        ls = ls
            .with_bounds(f64::EPSILON, step_max)
            .map_err(|e| Error::Numerical(format!("line search set-up: {e}")))?;
    }
    LBFGS::new(ls, config.history)
        .with_tolerance_grad(tol)
        .and_then(|s| s.with_tolerance_cost(config.cost_atol))
        .map_err(|e| Error::Numerical(format!("L-BFGS set-up: {e}")))
}

/// The best accepted point: the lowest cost, except that among points whose costs agree to round-off
/// (near the minimum the cost no longer tells them apart) the smallest gradient wins.
fn best_accepted(mut best: Point, accepted: &Accepted) -> Point {
    if let Ok(acc) = accepted.lock() {
        for pt in acc.1.iter() {
            let noise = 1e-13 * best.cost.abs().max(pt.cost.abs());
            let better = pt.cost < best.cost - noise
                || ((pt.cost - best.cost).abs() <= noise && norm(&pt.grad) < norm(&best.grad));
            if better {
                best = pt.clone();
            }
        }
    }
    best
}

/// Why a completed L-BFGS run stopped.
fn stop_reason(t: Option<&TerminationReason>, gn: f64, tol: f64, start: &Point) -> StopReason {
    match t {
        Some(TerminationReason::SolverConverged) if gn <= tol => StopReason::GradientReduced {
            factor: norm(&start.grad) / gn.max(f64::MIN_POSITIVE),
        },
        Some(TerminationReason::SolverConverged) => StopReason::CostStalled,
        Some(TerminationReason::MaxItersReached) => StopReason::IterationLimit,
        Some(r) => StopReason::Other(r.text().to_string()),
        None => StopReason::Other("stopped".into()),
    }
}

/// Model-space pairs from consecutive accepted iterates with positive curvature.
fn pairs_of(pts: Vec<Point>) -> Vec<(Vec<f64>, Vec<f64>)> {
    pts.windows(2)
        .map(|w| {
            let s: Vec<f64> = w[1].x.iter().zip(&w[0].x).map(|(a, b)| a - b).collect();
            let y: Vec<f64> = w[1].gx.iter().zip(&w[0].gx).map(|(a, b)| a - b).collect();
            (s, y)
        })
        .filter(|(s, y)| s.iter().zip(y).map(|(a, b)| a * b).sum::<f64>() > 0.0)
        .collect()
}
