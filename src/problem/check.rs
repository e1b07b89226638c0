//! Checks of a user's gradient, tangent-linear and adjoint.
//!
//! The Taylor (gradient) test of 4D-Var practice (common practice, no source; used e.g. by Navon, Zou &
//! Derber 1992, MWR 120): along a direction h, r(α) = (J(x + α h) − J(x)) / (α hᵀ∇J(x)) tends to 1 as α
//! decreases, with |1 − r(α)| = O(α), until round-off takes over; the remainder
//! |J(x + α h) − J(x) − α hᵀ∇J| falls as α². A wrong gradient shows r → a constant ≠ 1 and a remainder
//! that falls only as α.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

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
    /// The log10 slope of the remainder against α, fitted over the rows above round-off.
    pub remainder_slope: Option<f64>,
    /// Largest relative difference to a central finite-difference gradient (small dimensions only).
    pub fd_max_rel_error: Option<f64>,
    pub passed: bool,
    /// One sentence saying what the test found.
    pub verdict: String,
}

/// Largest dimension for which the finite-difference comparison (2n cost evaluations) is made.
pub const FD_MAX_DIM: usize = 100;

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
    if grad_norm == 0.0 {
        return Err(Error::GradientCheck(
            "the gradient is exactly zero at the test point, so the Taylor test says nothing; \
             test at another point (e.g. the background, not the analysis)"
                .into(),
        ));
    }
    // A random direction, not nearly orthogonal to the gradient: a draw from the background error
    // N(0, B) where the problem gives B (so it has the smoothness and scale of a real increment and
    // does not excite the badly conditioned small scales), else white noise at the scale of the state.
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let prior = problem.prior().filter(|p| p.dim() == n);
    let scale = (norm(x) / (n as f64).sqrt()).max(1.0);
    let mut h = vec![0.0; n];
    let mut z = vec![0.0; n];
    let mut hg = 0.0;
    for _ in 0..20 {
        z.iter_mut()
            .for_each(|v| *v = StandardNormal.sample(&mut rng));
        match prior {
            Some(p) => p.mul_sqrt(&z, &mut h),
            None => h.iter_mut().zip(&z).for_each(|(a, b)| *a = scale * b),
        }
        hg = dot(&h, &g);
        if hg.abs() > 1e-3 * norm(&h) * grad_norm {
            break;
        }
    }
    let mut rows = Vec::new();
    for k in 1..=12 {
        let alpha = 10f64.powi(-k);
        let xp: Vec<f64> = x.iter().zip(&h).map(|(a, b)| a + alpha * b).collect();
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
    let best_ratio_error = rows
        .iter()
        .map(|r| (1.0 - r.ratio).abs())
        .fold(f64::INFINITY, f64::min);
    // Fit the slope over the rows whose remainder is well above the round-off level of J.
    let floor = 1e4 * f64::EPSILON * j0.abs().max(1e-300);
    let usable: Vec<&TaylorRow> = rows.iter().filter(|r| r.remainder > floor).collect();
    let remainder_slope = (usable.len() >= 3).then(|| {
        let pts: Vec<(f64, f64)> = usable
            .iter()
            .map(|r| (r.alpha.log10(), r.remainder.log10()))
            .collect();
        let mx = pts.iter().map(|p| p.0).sum::<f64>() / pts.len() as f64;
        let my = pts.iter().map(|p| p.1).sum::<f64>() / pts.len() as f64;
        let sxy: f64 = pts.iter().map(|p| (p.0 - mx) * (p.1 - my)).sum();
        let sxx: f64 = pts.iter().map(|p| (p.0 - mx).powi(2)).sum();
        sxy / sxx
    });
    let fd_max_rel_error = if with_fd {
        Some(fd_compare(problem, x, &g)?)
    } else {
        None
    };

    let ratio_ok = best_ratio_error < 1e-5;
    let slope_ok = remainder_slope.map_or(ratio_ok, |s| (1.7..=2.3).contains(&s));
    let fd_ok = fd_max_rel_error.map_or(true, |e| e < 1e-4);
    let passed = ratio_ok && slope_ok && fd_ok;
    let verdict = if passed {
        format!(
            "gradient correct: r(alpha) reaches 1 to within {best_ratio_error:.1e} and the Taylor remainder \
             falls as alpha^{:.2}",
            remainder_slope.unwrap_or(2.0)
        )
    } else {
        let mut why = Vec::new();
        if !ratio_ok {
            why.push(format!(
                "r(alpha) never comes closer to 1 than {best_ratio_error:.2e}"
            ));
        }
        if !slope_ok {
            why.push(format!(
                "the remainder falls as alpha^{:.2}, not alpha^2",
                remainder_slope.unwrap_or(f64::NAN)
            ));
        }
        if !fd_ok {
            why.push(format!(
                "the gradient differs from central finite differences by {:.2e} (relative)",
                fd_max_rel_error.unwrap_or(f64::NAN)
            ));
        }
        format!(
            "gradient WRONG: {}. Check the adjoint against the tangent-linear (dot-product test) and \
             that the cost and gradient are computed at the same point",
            why.join("; ")
        )
    };
    Ok(GradientReport {
        cost: j0,
        grad_norm,
        directional: hg,
        rows,
        best_ratio_error,
        remainder_slope,
        fd_max_rel_error,
        passed,
        verdict,
    })
}

/// Largest relative difference between `g` and a central finite-difference gradient (finitediff crate).
fn fd_compare(problem: &dyn Problem, x: &[f64], g: &[f64]) -> Result<f64> {
    let f = |p: &Vec<f64>| -> std::result::Result<f64, anyhow::Error> {
        problem.cost(p).map_err(|e| anyhow::anyhow!("{e}"))
    };
    let fd = finitediff::vec::central_diff(&f)(&x.to_vec())
        .map_err(|e| Error::GradientCheck(format!("finite-difference gradient failed: {e}")))?;
    let scale = norm(g).max(f64::MIN_POSITIVE);
    Ok(fd
        .iter()
        .zip(g)
        .map(|(a, b)| (a - b).abs() / scale)
        .fold(0.0, f64::max))
}

/// Euclidean norm.
pub fn norm(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}
