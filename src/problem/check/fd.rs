//! Comparison of the gradient with central finite differences (small dimensions), naming the components
//! that disagree most.
//!
//! The differences are scaled by max(|∇J|, the finite differences' own rounding level): the central
//! difference with step δ = ε^(1/3) (finitediff crate) carries a rounding error of about ε |J| / δ per
//! component, so near a minimum, where |∇J| → 0, a plain relative error would blame the gradient for
//! the differences' noise. The level is FD_NOISE_ULPS ε |J| / δ / FD_TOL: a difference of a thousand
//! ulps of J over the step passes (common practice of the trade, no source; constants this crate's).

use super::{norm, FD_TOL};
use crate::error::{Error, Result};
use crate::problem::Problem;

/// How many of the worst components are named.
pub const FD_WORST: usize = 3;
/// Ulps of |J| over the step that the finite differences' rounding may reach.
pub const FD_NOISE_ULPS: f64 = 1e3;

/// One component of the finite-difference comparison.
#[derive(Debug, Clone, serde::Serialize, serde::Deserialize, PartialEq)]
pub struct FdComponent {
    /// Index in the control vector.
    pub index: usize,
    /// The problem's name of the component, where it has names.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub name: Option<String>,
    /// The gradient's value.
    pub gradient: f64,
    /// The central finite difference.
    pub finite_difference: f64,
    /// |difference| / max(|∇J|, rounding level).
    pub rel_error: f64,
}

/// What the comparison found.
pub struct FdComparison {
    pub max_rel_error: f64,
    /// The FD_WORST components with the largest differences, worst first.
    pub worst: Vec<FdComponent>,
}

/// Compares `g` (the gradient at `x`, where the cost is `j0`) with central finite differences.
pub fn compare(problem: &dyn Problem, x: &[f64], g: &[f64], j0: f64) -> Result<FdComparison> {
    let f = |p: &Vec<f64>| -> std::result::Result<f64, anyhow::Error> {
        problem.cost(p).map_err(|e| anyhow::anyhow!("{e}"))
    };
    let fd = finitediff::vec::central_diff(&f)(&x.to_vec())
        .map_err(|e| Error::GradientCheck(format!("finite-difference gradient failed: {e}")))?;
    Ok(rank(g, &fd, j0, problem.component_names()))
}

/// Scales and ranks the differences between `g` and `fd`.
fn rank(g: &[f64], fd: &[f64], j0: f64, names: Option<Vec<String>>) -> FdComparison {
    let step = f64::EPSILON.cbrt();
    let noise = FD_NOISE_ULPS * f64::EPSILON * j0.abs() / step / FD_TOL;
    let scale = norm(g).max(noise).max(f64::MIN_POSITIVE);
    let mut all: Vec<FdComponent> = g
        .iter()
        .zip(fd)
        .enumerate()
        .map(|(i, (&a, &b))| FdComponent {
            index: i,
            name: names.as_ref().and_then(|n| n.get(i).cloned()),
            gradient: a,
            finite_difference: b,
            rel_error: if (a - b).is_nan() {
                f64::INFINITY
            } else {
                (a - b).abs() / scale
            },
        })
        .collect();
    all.sort_by(|p, q| q.rel_error.total_cmp(&p.rel_error));
    all.truncate(FD_WORST);
    FdComparison {
        max_rel_error: all.first().map_or(0.0, |c| c.rel_error),
        worst: all,
    }
}

/// "x3 (1.2e-2), F (3.0e-5)": the worst components and their relative errors.
pub fn describe(worst: &[FdComponent]) -> String {
    worst
        .iter()
        .map(|c| {
            let name = c.name.clone().unwrap_or_else(|| format!("[{}]", c.index));
            format!("{name} ({:.1e})", c.rel_error)
        })
        .collect::<Vec<_>>()
        .join(", ")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_worst_components_come_first_with_their_names() {
        let g = [1.0, 2.0, 3.0, 4.0];
        let fd = [1.0, 2.5, 3.0, 3.9];
        let names = Some(vec!["a".into(), "b".into(), "c".into(), "d".into()]);
        let c = rank(&g, &fd, 1.0, names);
        assert_eq!(c.worst.len(), FD_WORST);
        assert_eq!(c.worst[0].index, 1);
        assert_eq!(c.worst[0].name.as_deref(), Some("b"));
        assert_eq!(c.worst[1].index, 3);
        assert!((c.max_rel_error - 0.5 / 30f64.sqrt()).abs() < 1e-12);
        assert_eq!(describe(&c.worst[..1]), "b (9.1e-2)");
    }

    #[test]
    fn near_a_minimum_the_scale_is_the_rounding_level() {
        // |g| = 1e-9 but J = 100: differences of 1e-7 are the differences' own noise.
        let c = rank(&[1e-9, 0.0], &[1.1e-7, -1e-7], 100.0, None);
        assert!(c.max_rel_error < FD_TOL, "{}", c.max_rel_error);
        let wrong = rank(&[1e-9, 0.0], &[1e-2, 0.0], 100.0, None);
        assert!(wrong.max_rel_error > FD_TOL);
    }
}
