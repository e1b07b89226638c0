//! The order of convergence of the Taylor remainder e(α) = |J(x + α h) − J(x) − α hᵀ∇J|: the rounding
//! floor of the cost, the asymptotic window of α, and the log-log slope fitted over that window only.
//!
//! The rule (common practice of the trade, no source; the constants are this crate's choice):
//! - Rounding floor N = max(FLOOR_ULPS · ε · |J(x)|, FLOOR_NOISE_MULT · median of e(α) at the three
//!   smallest α). The first term is a thousand ulps of the cost (a model run rounds J by far fewer in
//!   practice); the second is the noise measured where the true remainder is negligible (for a wrong
//!   gradient e(α) there is about α·|hᵀδ| at α ≤ 1e-10, so the floor never hides its rows at α ≥ 1e-9).
//!   Rows with e(α) ≤ N are rounding, not Taylor remainder.
//! - Candidate rows: the run of at least MIN_WINDOW consecutive rows above N that reaches the smallest α
//!   (a dip below N at a large α, where higher-order terms cancel, splits runs; the later run is the more
//!   asymptotic one).
//! - Asymptotic window: the longest stretch of consecutive rows that ends at the run's smallest α and
//!   whose successive per-decade slopes log10(e(α_k) / e(α_k+1)) all lie within SLOPE_SPREAD of their
//!   mean. Large α, where the cubic and higher terms still dominate, fall out. The window always ends at
//!   the smallest α above the floor: that is where the order is asymptotic, and a wrong gradient shows
//!   its first-order remainder there only (at larger α its remainder may still look quadratic). The
//!   floor's margin keeps rounding out of that last row. Where even the last MIN_WINDOW rows disagree
//!   (a sign change of the remainder there), the slope is fitted over those rows alone.
//! - The order is the least-squares slope of log10 e against log10 α over the window.

use super::TaylorRow;

/// The floor is at least this many ulps of |J(x)|.
pub const FLOOR_ULPS: f64 = 1e3;
/// ... and at least this multiple of the median remainder at the three smallest α.
pub const FLOOR_NOISE_MULT: f64 = 10.0;
/// Successive per-decade slopes in the window differ from their mean by at most this.
pub const SLOPE_SPREAD: f64 = 0.25;
/// Fewest rows in a window: two successive slopes that agree.
pub const MIN_WINDOW: usize = 3;

/// What the remainder's order analysis found.
#[derive(Debug, Clone, Copy)]
pub struct Order {
    /// The rounding floor N.
    pub floor: f64,
    /// FLOOR_NOISE_MULT times the median remainder at the three smallest α: the measured noise part of N.
    pub noise: f64,
    /// First and last row index (largest and smallest α) of the fitted window.
    pub window: Option<(usize, usize)>,
    /// Whether the window's successive slopes agree (false: they do not even over the last MIN_WINDOW
    /// rows, which were used).
    pub consistent: bool,
    /// The fitted slope.
    pub slope: Option<f64>,
}

/// Floor, window and slope of the remainder column of `rows` (α decreasing), for a cost `j0` at x.
pub fn analyse(rows: &[TaylorRow], j0: f64) -> Order {
    let noise = measured_noise(rows);
    let floor = (FLOOR_ULPS * f64::EPSILON * j0.abs()).max(noise);
    let Some((a, b)) = last_run(rows, floor) else {
        return Order {
            floor,
            noise,
            window: None,
            consistent: false,
            slope: None,
        };
    };
    let (window, consistent) = match consistent_window(rows, a, b) {
        Some(w) => (w, true),
        None => ((b + 1 - MIN_WINDOW, b), false),
    };
    Order {
        floor,
        noise,
        window: Some(window),
        consistent,
        slope: Some(fit_slope(&rows[window.0..=window.1])),
    }
}

/// FLOOR_NOISE_MULT · median remainder at the three smallest α.
fn measured_noise(rows: &[TaylorRow]) -> f64 {
    let mut tail: Vec<f64> = rows
        .iter()
        .rev()
        .take(3)
        .map(|r| r.remainder)
        .filter(|e| e.is_finite())
        .collect();
    tail.sort_by(f64::total_cmp);
    let noise = tail.get(tail.len() / 2).copied().unwrap_or(0.0);
    FLOOR_NOISE_MULT * noise
}

/// The run of at least MIN_WINDOW consecutive rows above `floor` that ends at the smallest α.
fn last_run(rows: &[TaylorRow], floor: f64) -> Option<(usize, usize)> {
    let above = |i: usize| rows[i].remainder.is_finite() && rows[i].remainder > floor;
    let mut best = None;
    let mut i = 0;
    while i < rows.len() {
        if !above(i) {
            i += 1;
            continue;
        }
        let start = i;
        while i + 1 < rows.len() && above(i + 1) {
            i += 1;
        }
        if i + 1 - start >= MIN_WINDOW {
            best = Some((start, i));
        }
        i += 1;
    }
    best
}

/// Within rows a..=b: the longest window ending at b whose per-decade slopes agree.
fn consistent_window(rows: &[TaylorRow], a: usize, b: usize) -> Option<(usize, usize)> {
    let slopes: Vec<f64> = rows.windows(2).map(|w| pair_slope(&w[0], &w[1])).collect();
    (a..=b + 1 - MIN_WINDOW).find_map(|start| {
        let s = &slopes[start..b];
        let mean = s.iter().sum::<f64>() / s.len() as f64;
        s.iter()
            .all(|v| (v - mean).abs() <= SLOPE_SPREAD)
            .then_some((start, b))
    })
}

/// log10(e1 / e2) / log10(α1 / α2).
fn pair_slope(r1: &TaylorRow, r2: &TaylorRow) -> f64 {
    (r1.remainder / r2.remainder).log10() / (r1.alpha / r2.alpha).log10()
}

/// Least-squares slope of log10 remainder against log10 α.
fn fit_slope(rows: &[TaylorRow]) -> f64 {
    let pts: Vec<(f64, f64)> = rows
        .iter()
        .map(|r| (r.alpha.log10(), r.remainder.log10()))
        .collect();
    let k = pts.len() as f64;
    let mx = pts.iter().map(|p| p.0).sum::<f64>() / k;
    let my = pts.iter().map(|p| p.1).sum::<f64>() / k;
    let sxy: f64 = pts.iter().map(|p| (p.0 - mx) * (p.1 - my)).sum();
    let sxx: f64 = pts.iter().map(|p| (p.0 - mx).powi(2)).sum();
    sxy / sxx
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rows(rem: &[f64]) -> Vec<TaylorRow> {
        rem.iter()
            .enumerate()
            .map(|(k, &e)| TaylorRow {
                alpha: 10f64.powi(-(k as i32) - 1),
                ratio: 1.0,
                remainder: e,
            })
            .collect()
    }

    /// The table of `varpost check` on the Lorenz-96 calibration scenario of seed 10195 (n = 10, F
    /// estimated): the α = 0.1 row is dominated by higher-order terms.
    const CALIBRATION: [f64; 12] = [
        3.762e-3, 3.698e-4, 4.083e-6, 4.122e-8, 4.126e-10, 4.102e-12, 3.507e-14, 2.178e-15,
        1.684e-14, 1.040e-13, 4.644e-14, 4.651e-14,
    ];

    #[test]
    fn the_large_alpha_row_dominated_by_higher_orders_is_left_out() {
        let o = analyse(&rows(&CALIBRATION), 290.1278);
        assert!(o.consistent);
        assert_eq!(o.window.unwrap().0, 1, "window {:?}", o.window);
        let s = o.slope.unwrap();
        assert!((s - 2.0).abs() < 0.05, "slope {s}");
    }

    #[test]
    fn a_first_order_remainder_has_slope_one() {
        // e = α² + 1e-3 α: second order at large α, first order (a wrong gradient) at small α.
        let rem: Vec<f64> = (1..=12)
            .map(|k| {
                let a = 10f64.powi(-k);
                a * a + 1e-3 * a + 1e-16
            })
            .collect();
        let o = analyse(&rows(&rem), 1.0);
        let s = o.slope.unwrap();
        assert!((s - 1.0).abs() < 0.1, "slope {s}, window {:?}", o.window);
    }

    #[test]
    fn remainders_below_the_floor_give_no_slope() {
        let o = analyse(&rows(&[1e-20; 12]), 1.0);
        assert!(o.slope.is_none());
        assert!(o.floor >= FLOOR_ULPS * f64::EPSILON);
    }
}
