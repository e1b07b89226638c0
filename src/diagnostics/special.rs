//! Special functions the diagnostics need: the standard normal quantile (for rank normalisation) and
//! the beta quantile (for the Monte Carlo standard error of a quantile).

/// Quantile function Φ⁻¹(p) of the standard normal distribution.
///
/// Wichura's rational approximations in three regions (|p − 1/2| ≤ 0.425, then
/// r = sqrt(−ln min(p, 1 − p)) ≤ 5 and r > 5), accurate to about 1 part in 10¹⁶ — M. J. Wichura 1988,
/// "Algorithm AS 241: The percentage points of the normal distribution", Applied Statistics 37(3),
/// 477–484 (coefficients PPND16 from that paper).
///
/// Returns −∞ at p = 0, +∞ at p = 1 and NaN outside [0, 1].
#[allow(clippy::excessive_precision)] // the coefficients as the paper prints them
                                      // The coefficients of the rational approximations of inverse_normal_cdf, in its three regions
                                      // (central, tail, far tail); each array is c[0] … c[7] of a polynomial in r.
const A: [f64; 8] = [
    3.387_132_872_796_366_608,
    1.331_416_678_917_843_774_5e2,
    1.971_590_950_306_551_442_7e3,
    1.373_169_376_550_946_112_5e4,
    4.592_195_393_154_987_145_7e4,
    6.726_577_092_700_870_085_3e4,
    3.343_057_558_358_812_810_5e4,
    2.509_080_928_730_122_672_7e3,
];
const B: [f64; 8] = [
    1.0,
    4.231_333_070_160_091_125_2e1,
    6.871_870_074_920_579_083_0e2,
    5.394_196_021_424_751_107_7e3,
    2.121_379_430_158_659_586_7e4,
    3.930_789_580_009_271_061_0e4,
    2.872_908_573_572_194_267_4e4,
    5.226_495_278_852_854_561_0e3,
];
const C: [f64; 8] = [
    1.423_437_110_749_683_577_34,
    4.630_337_846_156_545_295_90,
    5.769_497_221_460_691_405_50,
    3.647_848_324_763_204_605_04,
    1.270_458_252_452_368_382_58,
    2.417_807_251_774_506_117_70e-1,
    2.272_384_498_926_918_458_33e-2,
    7.745_450_142_783_414_076_40e-4,
];
const D: [f64; 8] = [
    1.0,
    2.053_191_626_637_758_821_87,
    1.676_384_830_183_803_849_40,
    6.897_673_349_851_000_045_50e-1,
    1.481_039_764_274_800_745_90e-1,
    1.519_866_656_361_645_719_66e-2,
    5.475_938_084_995_344_946_00e-4,
    1.050_750_071_644_416_843_24e-9,
];
const E: [f64; 8] = [
    6.657_904_643_501_103_777_20,
    5.463_784_911_164_114_369_90,
    1.784_826_539_917_291_335_80,
    2.965_605_718_285_048_912_30e-1,
    2.653_218_952_657_612_309_30e-2,
    1.242_660_947_388_078_438_60e-3,
    2.711_555_568_743_487_578_15e-5,
    2.010_334_399_292_288_132_65e-7,
];
const F: [f64; 8] = [
    1.0,
    5.998_322_065_558_879_376_90e-1,
    1.369_298_809_227_358_053_10e-1,
    1.487_536_129_085_061_485_25e-2,
    7.868_691_311_456_132_591_00e-4,
    1.846_318_317_510_054_681_80e-5,
    1.421_511_758_316_445_888_70e-7,
    2.044_263_103_389_939_785_64e-15,
];

pub fn inverse_normal_cdf(p: f64) -> f64 {
    if p.is_nan() || !(0.0..=1.0).contains(&p) {
        return f64::NAN;
    }
    if p == 0.0 {
        return f64::NEG_INFINITY;
    }
    if p == 1.0 {
        return f64::INFINITY;
    }
    let q = p - 0.5;
    if q.abs() <= 0.425 {
        let r = 0.180_625 - q * q;
        return q * horner(&A, r) / horner(&B, r);
    }
    let tail = if q < 0.0 { p } else { 1.0 - p };
    let r = (-tail.ln()).sqrt();
    let z = if r <= 5.0 {
        let r = r - 1.6;
        horner(&C, r) / horner(&D, r)
    } else {
        let r = r - 5.0;
        horner(&E, r) / horner(&F, r)
    };
    if q < 0.0 {
        -z
    } else {
        z
    }
}

/// c[0] + c[1] x + ... + c[7] x⁷.
fn horner(c: &[f64; 8], x: f64) -> f64 {
    c.iter().rev().fold(0.0, |acc, &ci| acc * x + ci)
}

/// ln Γ(x) for x > 0: the recurrence Γ(x + 1) = x Γ(x) lifts x to at least 10, then Stirling's series
/// with terms up to x⁻¹³ — Abramowitz & Stegun 1964, Handbook of Mathematical Functions, 6.1.40–6.1.41.
/// The first omitted term is below 3·10⁻¹⁷ at x = 10.
fn ln_gamma(x: f64) -> f64 {
    let mut shift = 0.0;
    let mut x = x;
    while x < 10.0 {
        shift += x.ln();
        x += 1.0;
    }
    let x2 = x * x;
    // B_{2k} / (2k (2k − 1)) for k = 1..7.
    let series = (1.0 / 12.0
        + (-1.0 / 360.0
            + (1.0 / 1260.0
                + (-1.0 / 1680.0
                    + (1.0 / 1188.0 + (-691.0 / 360_360.0 + (1.0 / 156.0) / x2) / x2) / x2)
                    / x2)
                / x2)
            / x2)
        / x;
    (x - 0.5) * x.ln() - x + 0.5 * (2.0 * std::f64::consts::PI).ln() + series - shift
}

/// The regularised incomplete beta function I_x(a, b) for a, b > 0 and 0 ≤ x ≤ 1.
///
/// The continued fraction of Abramowitz & Stegun 1964, 26.5.8, evaluated by the modified Lentz method
/// (Lentz 1976, Applied Optics 15; Thompson & Barnett 1986, J. Comput. Phys. 64), on the side of the
/// symmetry I_x(a, b) = 1 − I_{1−x}(b, a) where it converges fast (x < (a + 1) / (a + b + 2)).
fn incomplete_beta(a: f64, b: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    if x > (a + 1.0) / (a + b + 2.0) {
        return 1.0 - incomplete_beta(b, a, 1.0 - x);
    }
    let ln_front = a * x.ln() + b * (-x).ln_1p() - (ln_gamma(a) + ln_gamma(b) - ln_gamma(a + b));
    let front = ln_front.exp() / a;
    const TINY: f64 = 1e-300;
    // Continued fraction 1 / (1 + d1 / (1 + d2 / (1 + ...))).
    let mut f = 1.0;
    let mut c = 1.0;
    let mut d = 0.0;
    for i in 0..10_000 {
        let m = (i / 2) as f64;
        let numerator = if i == 0 {
            1.0
        } else if i % 2 == 0 {
            m * (b - m) * x / ((a + 2.0 * m - 1.0) * (a + 2.0 * m))
        } else {
            -((a + m) * (a + b + m) * x) / ((a + 2.0 * m) * (a + 2.0 * m + 1.0))
        };
        d = 1.0 + numerator * d;
        if d.abs() < TINY {
            d = TINY;
        }
        d = 1.0 / d;
        c = 1.0 + numerator / c;
        if c.abs() < TINY {
            c = TINY;
        }
        let delta = c * d;
        f *= delta;
        if (delta - 1.0).abs() < 1e-16 {
            break;
        }
    }
    front * (f - 1.0)
}

/// Quantile of the Beta(a, b) distribution: the x in [0, 1] with I_x(a, b) = p, found by bisection
/// on the monotone I_x down to adjacent floating-point numbers. NaN for non-finite or non-positive
/// parameters or p outside [0, 1].
pub(crate) fn beta_quantile(p: f64, a: f64, b: f64) -> f64 {
    if !(a.is_finite() && b.is_finite() && a > 0.0 && b > 0.0 && (0.0..=1.0).contains(&p)) {
        return f64::NAN;
    }
    let (mut lo, mut hi) = (0.0_f64, 1.0_f64);
    loop {
        let mid = 0.5 * (lo + hi);
        if mid <= lo || mid >= hi {
            break;
        }
        if incomplete_beta(a, b, mid) < p {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ln_gamma_at_known_points() {
        // Γ(n) = (n − 1)! and Γ(1/2) = sqrt(pi) (handbook identities, Abramowitz & Stegun 6.1.6, 6.1.8).
        assert!((ln_gamma(1.0)).abs() < 1e-15);
        assert!((ln_gamma(5.0) - 24f64.ln()).abs() < 1e-14);
        assert!((ln_gamma(0.5) - std::f64::consts::PI.sqrt().ln()).abs() < 1e-14);
        assert!((ln_gamma(171.0) - (1..171).map(|k| (k as f64).ln()).sum::<f64>()).abs() < 1e-10);
    }

    #[test]
    fn incomplete_beta_closed_forms() {
        // I_x(1, 1) = x; I_x(a, 1) = x^a; I_x(1, b) = 1 − (1 − x)^b (handbook, A&S 26.5.x special cases).
        for &x in &[0.01, 0.3, 0.77] {
            assert!((incomplete_beta(1.0, 1.0, x) - x).abs() < 1e-14);
            assert!((incomplete_beta(3.5, 1.0, x) - x.powf(3.5)).abs() < 1e-14);
            assert!((incomplete_beta(1.0, 2.5, x) - (1.0 - (1.0 - x).powf(2.5))).abs() < 1e-14);
        }
    }

    #[test]
    fn beta_quantile_matches_scipy() {
        // Reference: scipy.stats.beta.ppf (SciPy 1.15.3), values in tests/reference/arviz_diagnostics.json.
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/reference/arviz_diagnostics.json"
        );
        let text = std::fs::read_to_string(path).unwrap();
        let fixture: serde_json::Value = serde_json::from_str(&text).unwrap();
        for case in fixture["beta_ppf"].as_array().unwrap() {
            let get = |k: &str| case[k].as_f64().unwrap();
            let (a, b, p, want) = (get("a"), get("b"), get("p"), get("x"));
            let got = beta_quantile(p, a, b);
            let rel = ((got - want) / want).abs();
            assert!(
                rel < 1e-12,
                "Beta({a}, {b}) quantile at {p}: {got} vs {want}"
            );
        }
    }
}
