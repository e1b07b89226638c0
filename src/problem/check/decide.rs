//! Which criterion judges the gradient, the judgement, and the sentence that says it.
//!
//! The first-order ratio r(α) can only come within RATIO_TOL of 1 if the first-order change α |hᵀ∇J|
//! stands out both from the curvature term (about c α², so |1 − r| ≥ c α / |hᵀ∇J|) and from the cost's
//! rounding N (|1 − r| ≥ N / (α |hᵀ∇J|)). The best α gives |1 − r| ≈ 2 √(c N) / |hᵀ∇J|, and the table's
//! decades miss that α by at most a factor √10, which costs less than a factor 2. So the ratio is
//! judged only where 4 √(c N) ≤ RATIO_TOL |hᵀ∇J| (criterion "ratio"), with c = max e(α)/α² over the
//! asymptotic window when its order is 2 (else e/α² at the largest α) and N the cost's rounding:
//! the larger of RATIO_NOISE_ULPS ulps of |J| and the noise measured at the smallest α (ten times the
//! median remainder there, see [`super::order`]). This N is the actual rounding, not the floor's
//! thousand-ulp margin: the floor keeps rounding out of a slope fit, while here it would wrongly
//! declare the ratio out of reach at most ordinary points. Elsewhere — at or near a minimum, where hᵀ∇J ≈ 0 — only the remainder's order
//! decides (criterion "remainder order"). Both criteria also need the remainder to fall as α^(2 ± ORDER_TOL)
//! where its slope can be fitted, and the finite differences, where made, to agree within FD_TOL.
//! (Common practice of the trade, no source; the constants are this crate's choice.)

use super::fd::{describe, FdComparison};
use super::order::{analyse, Order};
use super::TaylorRow;

/// r(α) must come this close to 1 where the ratio is judged.
pub const RATIO_TOL: f64 = 1e-5;
/// The rounding of J assumed for the ratio's reach is at least this many ulps of |J|.
pub const RATIO_NOISE_ULPS: f64 = 10.0;
/// The remainder's fitted order must be within this of 2.
pub const ORDER_TOL: f64 = 0.25;
/// Largest scaled difference to central finite differences.
pub const FD_TOL: f64 = 1e-4;

/// The criterion that judged the gradient.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Criterion {
    /// The first-order ratio reaching 1, with the remainder falling as α².
    #[default]
    Ratio,
    /// The remainder falling as α² alone (hᵀ∇J too small for the ratio, e.g. at a minimum).
    RemainderOrder,
    /// Neither could be judged: the remainder stays below the rounding floor and hᵀ∇J is too small.
    Undecided,
}

impl Criterion {
    /// In words, for the verdict line.
    pub fn text(self) -> &'static str {
        match self {
            Criterion::Ratio => "ratio",
            Criterion::RemainderOrder => "remainder order",
            Criterion::Undecided => "none",
        }
    }
}

/// The judgement of a Taylor table.
pub struct Judgement {
    pub order: Order,
    pub best_ratio_error: f64,
    pub criterion: Criterion,
    pub passed: bool,
    pub verdict: String,
}

/// Judges the table `rows` at a point where the cost is `j0` and the directional derivative `hg`.
pub fn judge(rows: &[TaylorRow], j0: f64, hg: f64, fd: Option<&FdComparison>) -> Judgement {
    let order = analyse(rows, j0);
    let best_ratio_error = rows
        .iter()
        .map(|r| (1.0 - r.ratio).abs())
        .fold(f64::INFINITY, f64::min);
    let order_ok = order.slope.map(|s| (s - 2.0).abs() <= ORDER_TOL);
    let c = curvature(rows, &order, order_ok == Some(true));
    let noise = order.noise.max(RATIO_NOISE_ULPS * f64::EPSILON * j0.abs());
    let criterion = if hg != 0.0 && 4.0 * (c * noise).sqrt() <= RATIO_TOL * hg.abs() {
        Criterion::Ratio
    } else if order.slope.is_some() {
        Criterion::RemainderOrder
    } else {
        Criterion::Undecided
    };
    let ratio_ok = best_ratio_error < RATIO_TOL;
    let fd_ok = fd.is_none_or(|f| f.max_rel_error < FD_TOL);
    let passed = fd_ok
        && match criterion {
            Criterion::Ratio => ratio_ok && order_ok.unwrap_or(true),
            Criterion::RemainderOrder => order_ok == Some(true),
            Criterion::Undecided => false,
        };
    let facts = Facts {
        rows,
        order: &order,
        best_ratio_error,
        hg,
        criterion,
        ratio_ok,
        order_ok,
        fd,
    };
    let verdict = if passed {
        pass_text(&facts)
    } else {
        fail_text(&facts)
    };
    Judgement {
        order,
        best_ratio_error,
        criterion,
        passed,
        verdict,
    }
}

/// The curvature c of J along h: e(α)/α² over the window where its order is 2, else at the largest α.
fn curvature(rows: &[TaylorRow], order: &Order, second_order: bool) -> f64 {
    let at = |r: &TaylorRow| r.remainder.max(order.floor) / (r.alpha * r.alpha);
    match order.window {
        Some((a, b)) if second_order => rows[a..=b].iter().map(at).fold(0.0, f64::max),
        _ => rows.first().map_or(0.0, at),
    }
}

/// What the verdict sentence draws on.
struct Facts<'a> {
    rows: &'a [TaylorRow],
    order: &'a Order,
    best_ratio_error: f64,
    hg: f64,
    criterion: Criterion,
    ratio_ok: bool,
    order_ok: Option<bool>,
    fd: Option<&'a FdComparison>,
}

impl Facts<'_> {
    /// "alpha^2.00 over alpha = 1e-2 to 1e-5".
    fn order_text(&self) -> String {
        match (self.order.slope, self.order.window) {
            (Some(s), Some((a, b))) => format!(
                "alpha^{s:.2} over alpha = {:.0e} to {:.0e}{}",
                self.rows[a].alpha,
                self.rows[b].alpha,
                if self.order.consistent {
                    ""
                } else {
                    " (even the last rows above the rounding floor disagree in order)"
                }
            ),
            _ => "no measurable power of alpha (it stays below the rounding floor)".into(),
        }
    }
}

fn pass_text(f: &Facts) -> String {
    match f.criterion {
        Criterion::Ratio => format!(
            "gradient correct (criterion: ratio): r(alpha) reaches 1 to within {:.1e} and the Taylor \
             remainder falls as {}",
            f.best_ratio_error,
            f.order_text()
        ),
        _ => format!(
            "gradient correct (criterion: remainder order): the Taylor remainder falls as {}; \
             h.grad J = {:.2e} is too small against the cost's rounding and curvature for r(alpha) to \
             reach 1 (as at a minimum), so r(alpha) is not judged",
            f.order_text(),
            f.hg
        ),
    }
}

fn fail_text(f: &Facts) -> String {
    let mut why = Vec::new();
    if f.criterion == Criterion::Ratio && !f.ratio_ok {
        why.push(format!(
            "r(alpha) never comes closer to 1 than {:.2e}",
            f.best_ratio_error
        ));
    }
    if f.order_ok == Some(false) {
        why.push(format!(
            "the remainder falls as {}, not alpha^2",
            f.order_text()
        ));
    }
    if let Some(c) = f.fd.filter(|c| c.max_rel_error >= FD_TOL) {
        why.push(format!(
            "the gradient differs from central finite differences by {:.2e} (relative), worst at {}",
            c.max_rel_error,
            describe(&c.worst)
        ));
    }
    if f.criterion == Criterion::Undecided && why.is_empty() {
        return format!(
            "gradient test INCONCLUSIVE (criterion: none): h.grad J = {:.2e} is too small for r(alpha) \
             and the remainder stays below the rounding floor {:.1e}; test at another point or with \
             another --seed",
            f.hg, f.order.floor
        );
    }
    format!(
        "gradient WRONG (criterion: {}): {}. Check the adjoint against the tangent-linear (dot-product \
         test) and that the cost and gradient are computed at the same point",
        f.criterion.text(),
        why.join("; ")
    )
}
