//! The convergence diagnostics checked against ArviZ 0.23.4, SciPy 1.15.3 and NumPy 2.2.6
//! (tests/reference/arviz_diagnostics.py writes the fixture), and against textbook facts.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::Value;
use varpost::diagnostics::{
    autocorrelation, autocovariance, bfmi, component_stats, ess_bulk, ess_tail, importance_check,
    inverse_normal_cdf, mcse_mean, mcse_quantile, mcse_sd, rhat,
};

fn fixture() -> Value {
    let path = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/reference/arviz_diagnostics.json"
    );
    let text =
        std::fs::read_to_string(path).expect("fixture tests/reference/arviz_diagnostics.json");
    serde_json::from_str(&text).expect("fixture is JSON")
}

/// A fixture number; non-finite values are stored as the strings "nan", "inf", "-inf".
fn num(v: &Value) -> f64 {
    match v {
        Value::Number(n) => n.as_f64().expect("f64"),
        Value::String(s) if s == "nan" => f64::NAN,
        Value::String(s) if s == "inf" => f64::INFINITY,
        Value::String(s) if s == "-inf" => f64::NEG_INFINITY,
        other => panic!("not a number: {other}"),
    }
}

fn nums(v: &Value) -> Vec<f64> {
    v.as_array().expect("array").iter().map(num).collect()
}

/// Equal within `rel` relative (and 1e-12 absolute, for exact zeros); NaN equals NaN, ∞ equals ∞.
fn assert_close(got: f64, want: f64, rel: f64, what: &str) {
    if want.is_nan() {
        assert!(got.is_nan(), "{what}: got {got}, ArviZ gives NaN");
        return;
    }
    if want.is_infinite() {
        assert_eq!(got, want, "{what}");
        return;
    }
    let err = (got - want).abs();
    assert!(
        err <= rel * want.abs() || err <= 1e-12,
        "{what}: got {got:?}, want {want:?} (relative error {:.2e})",
        err / want.abs()
    );
}

#[test]
fn chain_diagnostics_match_arviz() {
    // Reference: ArviZ 0.23.4 rhat(method="rank"), ess(method="bulk"/"tail"),
    // mcse(method="mean"/"sd"/"quantile"); NumPy mean, std(ddof=1), quantile (linear).
    // Method: Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2).
    let f = fixture();
    for case in f["chain_cases"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let rows: Vec<Vec<f64>> = case["chains"]
            .as_array()
            .unwrap()
            .iter()
            .map(nums)
            .collect();
        let chains: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
        let s = component_stats(&chains).unwrap();
        let tol = 1e-6;
        let check =
            |got: f64, key: &str| assert_close(got, num(&case[key]), tol, &format!("{name} {key}"));
        if chains.len() > 1 {
            check(s.rhat, "rhat");
            check(rhat(&chains).unwrap(), "rhat");
        } else {
            // ArviZ returns NaN R-hat for a single chain; we split it into two halves and compute the
            // split R-hat (Vehtari et al. 2021, section 3), so it is finite here.
            assert!(s.rhat.is_finite(), "{name}: single-chain split R-hat");
        }
        check(s.ess_bulk, "ess_bulk");
        check(s.ess_tail, "ess_tail");
        check(s.mcse_mean, "mcse_mean");
        check(s.mcse_sd, "mcse_sd");
        check(s.mcse_q05, "mcse_q05");
        check(s.mcse_q95, "mcse_q95");
        check(s.mean, "mean");
        check(s.sd, "sd");
        check(s.q05, "q05");
        check(s.q95, "q95");
        // The single-purpose functions give the same numbers as the combined summary.
        check(ess_bulk(&chains).unwrap(), "ess_bulk");
        check(ess_tail(&chains).unwrap(), "ess_tail");
        check(mcse_mean(&chains).unwrap(), "mcse_mean");
        check(mcse_sd(&chains).unwrap(), "mcse_sd");
        check(mcse_quantile(&chains, 0.05).unwrap(), "mcse_q05");
        check(mcse_quantile(&chains, 0.95).unwrap(), "mcse_q95");
    }
}

#[test]
fn autocorrelation_matches_arviz() {
    // Reference: ArviZ 0.23.4 autocov / autocorr (FFT, zero-padded), first 30 lags of an AR(1) chain.
    let f = fixture();
    let a = &f["autocorrelation"];
    let chain = nums(&a["chain"]);
    let acov = autocovariance(&chain);
    let acorr = autocorrelation(&chain);
    for (t, (want_cov, want_corr)) in nums(&a["autocov"])
        .iter()
        .zip(nums(&a["autocorr"]))
        .enumerate()
    {
        // Absolute, as values near zero at larger lags carry FFT round-off of order 1e-16.
        assert!(
            (acov[t] - want_cov).abs() < 1e-12,
            "autocov lag {t}: {} vs {want_cov}",
            acov[t]
        );
        assert!(
            (acorr[t] - want_corr).abs() < 1e-12,
            "autocorr lag {t}: {} vs {want_corr}",
            acorr[t]
        );
    }
}

#[test]
fn bfmi_matches_arviz() {
    // Reference: ArviZ 0.23.4 bfmi; method Betancourt 2016, arXiv 1604.00695.
    let f = fixture();
    let rows: Vec<Vec<f64>> = f["bfmi"]["energy"]
        .as_array()
        .unwrap()
        .iter()
        .map(nums)
        .collect();
    let energies: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
    let got = bfmi(&energies).unwrap();
    for (c, want) in nums(&f["bfmi"]["bfmi"]).iter().enumerate() {
        assert_close(got[c], *want, 1e-12, &format!("bfmi chain {c}"));
    }
}

#[test]
fn psis_matches_arviz() {
    // Reference: ArviZ 0.23.4 psislw(reff=1): k-hat and the smoothed normalised weights; method
    // Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25; GPD fit Zhang & Stephens 2009. Kish ESS of
    // the raw weights from NumPy (Kish 1965).
    let f = fixture();
    for case in f["psis"].as_array().unwrap() {
        let name = case["name"].as_str().unwrap();
        let lt = nums(&case["log_target"]);
        let lq = nums(&case["log_proposal"]);
        let c = importance_check(&lt, &lq).unwrap();
        let w = &c.smoothed_weights;
        let s = w.len() as f64;
        let ess = 1.0 / w.iter().map(|x| x * x).sum::<f64>();
        let max = w.iter().copied().fold(0.0, f64::max);
        let moment = w
            .iter()
            .enumerate()
            .map(|(i, x)| x * (i + 1) as f64)
            .sum::<f64>()
            / s;
        // The GPD fit is the same arithmetic as ArviZ's, so k-hat matches as tightly as the rest.
        assert_close(c.khat, num(&case["khat"]), 1e-9, &format!("{name} khat"));
        assert_close(
            ess,
            num(&case["smoothed_ess"]),
            1e-9,
            &format!("{name} smoothed ESS"),
        );
        assert_close(
            max,
            num(&case["smoothed_max"]),
            1e-9,
            &format!("{name} smoothed max"),
        );
        assert_close(
            moment,
            num(&case["smoothed_moment"]),
            1e-9,
            &format!("{name} moment"),
        );
        assert_close(
            c.kish_ess,
            num(&case["raw_kish_ess"]),
            1e-9,
            &format!("{name} Kish ESS"),
        );
        // min(1 − 1/log10(S), 0.7) — Vehtari et al. 2024, JMLR 25, section 3.
        assert_close(
            c.khat_threshold,
            (1.0 - 1.0 / s.log10()).min(0.7),
            1e-15,
            "threshold",
        );
    }
}

#[test]
fn inverse_normal_cdf_matches_scipy() {
    // Reference: scipy.stats.norm.ppf (SciPy 1.15.3) at fixed probabilities down to 1e-300.
    let f = fixture();
    let ps = nums(&f["norm_ppf"]["p"]);
    let zs = nums(&f["norm_ppf"]["z"]);
    for (p, z) in ps.iter().zip(&zs) {
        assert_close(inverse_normal_cdf(*p), *z, 1e-14, &format!("Phi^-1({p})"));
    }
    // Phi^-1(1/2) = 0 and the limits (definition of the quantile function).
    assert_eq!(inverse_normal_cdf(0.5), 0.0);
    assert_eq!(inverse_normal_cdf(0.0), f64::NEG_INFINITY);
    assert_eq!(inverse_normal_cdf(1.0), f64::INFINITY);
    assert!(inverse_normal_cdf(1.5).is_nan());
}

/// Stationary AR(1) chains x_t = rho x_{t-1} + sqrt(1 - rho^2) e_t with unit marginal variance.
fn ar1(rng: &mut ChaCha8Rng, n_chains: usize, n: usize, rho: f64) -> Vec<Vec<f64>> {
    let scale = (1.0 - rho * rho).sqrt();
    (0..n_chains)
        .map(|_| {
            let mut x: f64 = StandardNormal.sample(rng);
            (0..n)
                .map(|_| {
                    let e: f64 = StandardNormal.sample(rng);
                    x = rho * x + scale * e;
                    x
                })
                .collect()
        })
        .collect()
}

#[test]
fn ess_of_ar1_matches_textbook() {
    // AR(1) with coefficient rho has integrated autocorrelation time (1 + rho) / (1 - rho), so
    // ESS = N (1 - rho) / (1 + rho) (textbook; e.g. Geyer 1992, Statistical Science 7(4)).
    // 4 chains x 20000 draws, rho = 0.9: ESS = 80000 / 19 = 4210.5. The estimate's own Monte Carlo
    // error is a few per cent at this length; 10% tolerance.
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let rho = 0.9;
    let rows = ar1(&mut rng, 4, 20_000, rho);
    let chains: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
    let expected = 80_000.0 * (1.0 - rho) / (1.0 + rho);
    let s = component_stats(&chains).unwrap();
    for (what, got) in [("bulk", s.ess_bulk), ("mean", (s.sd / s.mcse_mean).powi(2))] {
        assert!(
            (got / expected - 1.0).abs() < 0.10,
            "ESS ({what}) {got:.0} vs N(1 - rho)/(1 + rho) = {expected:.0}"
        );
    }
    // The chains are stationary and mixed: R-hat near 1 (Vehtari et al. 2021).
    assert!(s.rhat < 1.01, "rhat {}", s.rhat);
}

fn normal(rng: &mut ChaCha8Rng) -> f64 {
    StandardNormal.sample(rng)
}

fn normal_log_pdf(x: f64, sd: f64) -> f64 {
    -0.5 * (x / sd).powi(2) - sd.ln() - 0.5 * (2.0 * std::f64::consts::PI).ln()
}

#[test]
fn khat_small_for_wider_gaussian_proposal_large_for_heavy_target() {
    // Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25: weights of a proposal with heavier tails
    // than the target are bounded (k <= 0 in the limit, so k-hat is well below 0.7); a Gaussian
    // proposal much narrower than a Cauchy target gives weights w ~ exp(x^2 / (2 s^2)) / (1 + x^2) whose
    // tail P(w > t) decays like 1/t up to a log factor, i.e. k = 1. Finite-S k-hat is biased low and
    // noisy (about ±0.12 at S = 4000 for that case), so we average 10 independent sets.
    let mut rng = ChaCha8Rng::seed_from_u64(7);
    let s = 4000;
    let mut mean_small = 0.0;
    let mut mean_large = 0.0;
    let reps = 10;
    for _ in 0..reps {
        // Target N(0, 1), proposal N(0, 1.2^2).
        let x: Vec<f64> = (0..s).map(|_| 1.2 * normal(&mut rng)).collect();
        let lt: Vec<f64> = x.iter().map(|&v| normal_log_pdf(v, 1.0)).collect();
        let lq: Vec<f64> = x.iter().map(|&v| normal_log_pdf(v, 1.2)).collect();
        let c = importance_check(&lt, &lq).unwrap();
        assert!(
            c.reliable(),
            "k-hat {} for a wider Gaussian proposal",
            c.khat
        );
        assert!(c.kish_ess > 0.8 * s as f64, "Kish ESS {}", c.kish_ess);
        mean_small += c.khat / reps as f64;
        // Target standard Cauchy, proposal N(0, 0.2^2).
        let x: Vec<f64> = (0..s).map(|_| 0.2 * normal(&mut rng)).collect();
        let lt: Vec<f64> = x
            .iter()
            .map(|&v| -(std::f64::consts::PI * (1.0 + v * v)).ln())
            .collect();
        let lq: Vec<f64> = x.iter().map(|&v| normal_log_pdf(v, 0.2)).collect();
        mean_large += importance_check(&lt, &lq).unwrap().khat / reps as f64;
    }
    assert!(
        mean_small < 0.5,
        "mean k-hat {mean_small} for a wider Gaussian proposal"
    );
    assert!(
        mean_large > 0.7,
        "mean k-hat {mean_large} for a narrow proposal on a Cauchy target"
    );
}

#[test]
fn bad_input_gives_errors_not_panics() {
    // Input validation, not a numerical fact: errors name the chain and draw (no external source).
    let a = [0.1, 0.2, 0.3, 0.4, 0.5];
    let short = [0.1, 0.2, 0.3, 0.4];
    assert!(component_stats(&[]).is_err());
    let unequal = component_stats(&[&a, &short]).unwrap_err().to_string();
    assert!(unequal.contains("chain 1 has 4 draws"), "{unequal}");
    let nan = component_stats(&[&a, &[0.1, f64::NAN, 0.3, 0.4, 0.5]])
        .unwrap_err()
        .to_string();
    assert!(nan.contains("draw 1 of chain 1"), "{nan}");
    assert!(component_stats(&[&[1.0, 2.0]]).is_err());
    assert!(mcse_quantile(&[&a], 1.5).is_err());
    assert!(bfmi(&[&[1.0]]).is_err());
}
