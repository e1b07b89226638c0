//! Checks of a user's gradient, tangent-linear and adjoint.
//!
//! The Taylor (gradient) test of 4D-Var practice (common practice, no source; used e.g. by Navon, Zou &
//! Derber 1992, MWR 120): along a direction h, r(α) = (J(x + α h) − J(x)) / (α hᵀ∇J(x)) tends to 1 as α
//! decreases, with |1 − r(α)| = O(α), until round-off takes over; the remainder
//! |J(x + α h) − J(x) − α hᵀ∇J| falls as α². A wrong gradient shows r → a constant ≠ 1 and a remainder
//! that falls only as α.
//!
//! Two criteria, chosen by [`decide`]: where hᵀ∇J is large enough against the cost's rounding and
//! curvature for r(α) to come within [`decide::RATIO_TOL`] of 1, the ratio must do so and the remainder
//! must fall as α² (criterion "ratio"); where it is not (at or near a minimum, where hᵀ∇J ≈ 0 and r(α) is
//! meaningless), the remainder's order alone decides (criterion "remainder order"). The order is fitted
//! over the asymptotic window of α only, found by [`order`]. For small dimensions the gradient is also
//! compared with central finite differences ([`fd`]).

mod decide;
mod direction;
mod fd;
mod order;

pub use decide::{Criterion, FD_TOL, ORDER_TOL, RATIO_TOL};
pub use fd::{describe as describe_fd_worst, FdComponent};
pub use order::{FLOOR_NOISE_MULT, FLOOR_ULPS, MIN_WINDOW, SLOPE_SPREAD};

use super::Problem;
use crate::error::{Error, Result};
use crate::util::vector::dot;

/// One row of the Taylor test table.
#[derive(Debug, Clone, Copy, serde::Serialize)]
pub struct TaylorRow {
    pub alpha: f64,
    /// r(α) = (J(x + α h) − J(x)) / (α hᵀ∇J).
    pub ratio: f64,
    /// |J(x + α h) − J(x) − α hᵀ∇J|.
    pub remainder: f64,
}

/// The result of a gradient check.
#[derive(Debug, Clone, serde::Serialize)]
pub struct GradientReport {
    pub cost: f64,
    pub grad_norm: f64,
    /// hᵀ∇J for the test direction.
    pub directional: f64,
    pub rows: Vec<TaylorRow>,
    /// Smallest |1 − r(α)| over the table.
    pub best_ratio_error: f64,
    /// Remainders at or below this are taken as rounding of J and left out of the slope fit.
    pub rounding_floor: f64,
    /// The log10 slope of the remainder against α, fitted over `slope_window`.
    pub remainder_slope: Option<f64>,
    /// Largest and smallest α of the rows the slope was fitted over (the asymptotic window).
    pub slope_window: Option<(f64, f64)>,
    /// Which criterion decided: the first-order ratio (with the remainder order) or the remainder order
    /// alone.
    pub criterion: Criterion,
    /// Largest relative difference to a central finite-difference gradient (small dimensions only).
    pub fd_max_rel_error: Option<f64>,
    /// The components with the largest finite-difference differences, worst first (at most
    /// [`fd::FD_WORST`]; empty where the comparison was not made).
    pub fd_worst: Vec<FdComponent>,
    pub passed: bool,
    /// One sentence saying what the test found.
    pub verdict: String,
}

/// Largest dimension for which the finite-difference comparison (2n cost evaluations) is made.
pub const FD_MAX_DIM: usize = 100;

/// The step sizes α = 10^-1 … 10^-12 of the table.
const STEPS: i32 = 12;

/// Runs the Taylor test at `x` along a seeded random direction, plus a finite-difference comparison
/// for small dimensions.
pub fn gradient_test(problem: &dyn Problem, x: &[f64], seed: u64) -> Result<GradientReport> {
    taylor(problem, x, seed, problem.dim() <= FD_MAX_DIM)
}

/// The Taylor test alone (13 evaluations), without the finite-difference comparison: the check a
/// sampling run makes of its start before spending model runs on the analysis and the chains.
pub fn taylor_test(problem: &dyn Problem, x: &[f64], seed: u64) -> Result<GradientReport> {
    taylor(problem, x, seed, false)
}

fn taylor(problem: &dyn Problem, x: &[f64], seed: u64, with_fd: bool) -> Result<GradientReport> {
    let n = problem.dim();
    let mut g = vec![0.0; n];
    let j0 = problem
        .cost_grad(x, &mut g)
        .map_err(|e| Error::eval("evaluating the cost and gradient at the test point", e))?;
    let grad_norm = norm(&g);
    if !j0.is_finite() || !grad_norm.is_finite() {
        return Err(Error::GradientCheck(format!(
            "the cost ({j0}) or the gradient norm ({grad_norm}) at the test point is not finite; \
             test at a point where the model runs (e.g. the background)"
        )));
    }
    let h = direction::choose(problem, x, &g, seed);
    let hg = dot(&h, &g);
    let rows = table(problem, x, &h, j0, hg)?;
    let fd = if with_fd {
        Some(fd::compare(problem, x, &g, j0)?)
    } else {
        None
    };
    let d = decide::judge(&rows, j0, hg, fd.as_ref());
    Ok(GradientReport {
        cost: j0,
        grad_norm,
        directional: hg,
        best_ratio_error: d.best_ratio_error,
        rounding_floor: d.order.floor,
        remainder_slope: d.order.slope,
        slope_window: d.order.window.map(|(a, b)| (rows[a].alpha, rows[b].alpha)),
        criterion: d.criterion,
        fd_max_rel_error: fd.as_ref().map(|f| f.max_rel_error),
        fd_worst: fd.map(|f| f.worst).unwrap_or_default(),
        passed: d.passed,
        verdict: d.verdict,
        rows,
    })
}

/// The table: J(x + α h) for α = 10^-1 … 10^-12, as ratio and remainder.
fn table(problem: &dyn Problem, x: &[f64], h: &[f64], j0: f64, hg: f64) -> Result<Vec<TaylorRow>> {
    let mut rows = Vec::new();
    for k in 1..=STEPS {
        let alpha = 10f64.powi(-k);
        let xp: Vec<f64> = x.iter().zip(h).map(|(a, b)| a + alpha * b).collect();
        let jp = problem
            .cost(&xp)
            .map_err(|e| Error::eval(format!("evaluating the cost at x + {alpha:e} h"), e))?;
        let diff = jp - j0;
        rows.push(TaylorRow {
            alpha,
            ratio: diff / (alpha * hg),
            remainder: (diff - alpha * hg).abs(),
        });
    }
    Ok(rows)
}

/// Euclidean norm.
pub fn norm(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}
