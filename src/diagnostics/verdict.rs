//! A plain-language verdict on a run's diagnostics: which checks passed, which failed and what to do.

use serde::Serialize;

use super::laplace_check::{khat_threshold, min_draws_for_khat, ImportanceCheck};
use super::summary::ComponentStats;

/// R-hat must be below this — Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis
/// 16(2), section 5.
pub const RHAT_LIMIT: f64 = 1.01;
/// Bulk and tail ESS must reach this (100 per chain with 4 chains) — Vehtari et al. 2021, section 5.
pub const ESS_LIMIT: f64 = 400.0;
/// Fewest chains for a trustworthy R-hat — Vehtari et al. 2021, section 5.
pub const MIN_CHAINS: usize = 4;
/// Pareto k-hat must be below this for the Laplace approximation to be usable as an importance
/// proposal — Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25. It is the limit for many draws; the
/// sample-size dependent threshold [`khat_threshold`] = min(1 − 1/log10 S, 0.7) is lower below
/// S = 2155 draws, and is what the verdict uses when the number of draws is known.
pub const KHAT_LIMIT: f64 = 0.7;

/// The Laplace importance check as the verdict reads it: k-hat and, where known, the number of draws
/// it came from, which sets its limit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KhatReading {
    /// Pareto k-hat; −∞ for equal weights, NaN when it could not be estimated.
    pub khat: f64,
    /// The number of importance draws, where known.
    pub draws: Option<usize>,
}

impl KhatReading {
    /// The limit k-hat must stay below: [`khat_threshold`] of the draws, or [`KHAT_LIMIT`] when their
    /// number is not known.
    pub fn limit(&self) -> f64 {
        self.draws.map_or(KHAT_LIMIT, khat_threshold)
    }
}

impl From<f64> for KhatReading {
    /// A k-hat whose number of draws is not known.
    fn from(khat: f64) -> Self {
        KhatReading { khat, draws: None }
    }
}

impl From<&ImportanceCheck> for KhatReading {
    fn from(c: &ImportanceCheck) -> Self {
        KhatReading {
            khat: c.khat,
            draws: Some(c.draws()),
        }
    }
}

/// Whether the chains can be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Status {
    /// Every convergence check passed.
    Converged,
    /// At least one convergence check failed (or could not be computed).
    NotConverged,
}

/// One check: its value, the limit, and whether it passed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Check {
    /// "rhat", "ess_bulk", "ess_tail", "chains" or "khat".
    pub name: &'static str,
    /// The value found (NaN serialises as null).
    pub value: f64,
    /// The limit: an upper bound for rhat and khat, a lower bound for the others.
    pub limit: f64,
    pub passed: bool,
}

/// The verdict: a status, the individual checks, and sentences for people.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    /// Chain convergence (R-hat, bulk and tail ESS, number of chains).
    pub status: Status,
    /// Whether the Laplace approximation passed the k-hat check; `None` if it was not run.
    pub laplace_adequate: Option<bool>,
    pub checks: Vec<Check>,
    /// Sentences saying what passed, what failed and what to do, ending with the caution that the
    /// spread is conditional on the model, B and R.
    pub sentences: Vec<String>,
}

/// The caution every verdict ends with.
pub const CONDITIONAL_CAUTION: &str = "The spread shown is the posterior uncertainty conditional on \
the model, the background-error covariance B and the observation-error covariance R that were given: \
errors in the model or in B or R are not part of it.";

impl Verdict {
    /// Verdict from the worst values over all components: the largest R-hat, the smallest bulk and
    /// tail ESS, the number of chains, and (optionally) the k-hat of the Laplace importance check,
    /// judged against [`KHAT_LIMIT`] (see [`Verdict::with_khat`] to judge it against the threshold of
    /// its number of draws). A NaN value (a diagnostic that could not be computed) fails its check,
    /// except k-hat: a NaN k-hat leaves the Laplace approximation unjudged.
    pub fn new(
        rhat_max: f64,
        ess_bulk_min: f64,
        ess_tail_min: f64,
        n_chains: usize,
        khat: Option<f64>,
    ) -> Verdict {
        let khat = khat.map(KhatReading::from);
        Verdict::with_khat(rhat_max, ess_bulk_min, ess_tail_min, n_chains, khat)
    }

    /// As [`Verdict::new`], with the k-hat reading of the Laplace check judged against its limit
    /// ([`KhatReading::limit`]).
    pub fn with_khat(
        rhat_max: f64,
        ess_bulk_min: f64,
        ess_tail_min: f64,
        n_chains: usize,
        khat: Option<KhatReading>,
    ) -> Verdict {
        let rhat_ok = rhat_max < RHAT_LIMIT;
        let bulk_ok = ess_bulk_min >= ESS_LIMIT;
        let tail_ok = ess_tail_min >= ESS_LIMIT;
        let chains_ok = n_chains >= MIN_CHAINS;
        let check = |name, value, limit, passed| Check {
            name,
            value,
            limit,
            passed,
        };
        let mut checks = vec![
            check("rhat", rhat_max, RHAT_LIMIT, rhat_ok),
            check("ess_bulk", ess_bulk_min, ESS_LIMIT, bulk_ok),
            check("ess_tail", ess_tail_min, ESS_LIMIT, tail_ok),
            check("chains", n_chains as f64, MIN_CHAINS as f64, chains_ok),
        ];
        let mut sentences = Vec::new();
        let converged = rhat_ok && bulk_ok && tail_ok && chains_ok;
        if converged {
            sentences.push(format!(
                "The {n_chains} chains agree (largest R-hat {rhat_max:.3}, below {RHAT_LIMIT}) and every \
                 component has at least {ESS_LIMIT:.0} effective draws in the bulk ({ess_bulk_min:.0}) \
                 and in the tails ({ess_tail_min:.0}): the ensemble can be used."
            ));
        }
        if !rhat_ok {
            sentences.push(rhat_sentence(rhat_max));
        }
        if !bulk_ok {
            sentences.push(format!(
                "The smallest bulk effective sample size is {} (at least {ESS_LIMIT:.0} is needed): means \
                 and medians rest on too few effectively independent draws. Run the chains longer or \
                 run more chains.",
                number(ess_bulk_min)
            ));
        }
        if !tail_ok {
            sentences.push(format!(
                "The smallest tail effective sample size is {} (at least {ESS_LIMIT:.0} is needed): the \
                 5% and 95% quantiles, and so the spread, are poorly estimated. Run the chains longer or \
                 run more chains.",
                number(ess_tail_min)
            ));
        }
        if !chains_ok {
            sentences.push(format!(
                "Only {n_chains} chain{} were run (at least {MIN_CHAINS} are needed for R-hat to catch \
                 chains stuck in different places). Run at least {MIN_CHAINS} chains.",
                if n_chains == 1 { "" } else { "s" }
            ));
        }
        let laplace_adequate = khat.and_then(|r| {
            let (adequate, sentence) = laplace_judgement(r, &mut checks);
            sentences.push(sentence);
            adequate
        });
        sentences.push(CONDITIONAL_CAUTION.to_string());
        Verdict {
            status: if converged {
                Status::Converged
            } else {
                Status::NotConverged
            },
            laplace_adequate,
            checks,
            sentences,
        }
    }

    /// Verdict over many components: the largest R-hat and the smallest ESS values among `stats`
    /// (a NaN in any component carries through and fails its check); k-hat as in [`Verdict::new`].
    pub fn from_components(
        stats: &[ComponentStats],
        n_chains: usize,
        khat: Option<f64>,
    ) -> Verdict {
        Verdict::from_components_with_khat(stats, n_chains, khat.map(KhatReading::from))
    }

    /// As [`Verdict::from_components`], with the k-hat reading judged as in [`Verdict::with_khat`]
    /// (e.g. `Some((&importance_check).into())`).
    pub fn from_components_with_khat(
        stats: &[ComponentStats],
        n_chains: usize,
        khat: Option<KhatReading>,
    ) -> Verdict {
        let worst = |f: fn(&ComponentStats) -> f64, larger_is_worse: bool| {
            stats
                .iter()
                .map(f)
                .fold(None, |acc: Option<f64>, v| match acc {
                    None => Some(v),
                    Some(a) if a.is_nan() || v.is_nan() => Some(f64::NAN),
                    Some(a) => Some(if (v > a) == larger_is_worse { v } else { a }),
                })
        };
        let rhat = worst(|s| s.rhat, true).unwrap_or(f64::NAN);
        let bulk = worst(|s| s.ess_bulk, false).unwrap_or(f64::NAN);
        let tail = worst(|s| s.ess_tail, false).unwrap_or(f64::NAN);
        Verdict::with_khat(rhat, bulk, tail, n_chains, khat)
    }

    /// All sentences as one paragraph.
    pub fn text(&self) -> String {
        self.sentences.join(" ")
    }
}

/// The sentence for a failed R-hat check: all draws equal (NaN), stuck chains (∞), or chains that do not
/// yet agree.
fn rhat_sentence(rhat_max: f64) -> String {
    if rhat_max.is_nan() {
        "R-hat could not be computed for some component because all its draws are equal: the chains \
         may not be moving at all (check the acceptance rate and reduce the step size), or that \
         component does not vary."
            .to_string()
    } else if rhat_max.is_infinite() {
        "R-hat is infinite: every chain stayed at one value of some component but the chains stayed \
         at different values, so they are stuck. Check the acceptance rate, reduce the step size and \
         run again."
            .to_string()
    } else {
        format!(
            "The largest R-hat is {rhat_max:.3} (it must be below {RHAT_LIMIT}): the chains do not yet \
             agree with each other. Run the chains longer (more warm-up and more draws); if it \
             persists the posterior may have several modes, or the chains started too far apart to \
             meet."
        )
    }
}

/// The Laplace part of the verdict: whether the approximation is adequate (`None` when k-hat could not
/// be estimated) and the sentence saying so; a k-hat that was estimated adds its check.
fn laplace_judgement(r: KhatReading, checks: &mut Vec<Check>) -> (Option<bool>, String) {
    let (k, limit) = (r.khat, r.limit());
    if k.is_nan() {
        let min = min_draws_for_khat();
        let why = match r.draws {
            Some(s) if s < min => format!(
                "from {s} draws (at least {min} are needed, and a few hundred for a useful estimate)"
            ),
            Some(s) => format!(
                "from these {s} draws: too few distinct large importance weights for the Pareto fit"
            ),
            None => "(too few importance draws for the Pareto fit of the largest weights)".into(),
        };
        let sentence = format!(
            "The Gaussian (Laplace) approximation at the analysis could not be judged: Pareto k-hat \
             cannot be estimated {why}. Run the importance check with more draws."
        );
        return (None, sentence);
    }
    let ok = k < limit;
    checks.push(Check {
        name: "khat",
        value: k,
        limit,
        passed: ok,
    });
    let sentence = if k == f64::NEG_INFINITY {
        "The Gaussian (Laplace) approximation at the analysis passed the importance check (the \
         importance weights are equal: the Gaussian is the posterior up to rounding): its covariance, \
         the inverse Hessian, describes the posterior."
            .to_string()
    } else if ok {
        format!(
            "The Gaussian (Laplace) approximation at the analysis passed the importance check (Pareto \
             k-hat {k:.2}, below {limit:.2}): its covariance, the inverse Hessian, is a usable \
             description of the posterior."
        )
    } else {
        format!(
            "The Gaussian (Laplace) approximation at the analysis failed the importance check (Pareto \
             k-hat {}, at least {limit:.2}): the inverse Hessian is not a trustworthy posterior \
             covariance here; rely on the sampled ensemble instead.",
            number(k)
        )
    };
    (Some(ok), sentence)
}

/// A value for a sentence: whole numbers for large values, "not computable" for NaN.
fn number(v: f64) -> String {
    if v.is_nan() {
        "not computable".to_string()
    } else if v.abs() >= 10.0 {
        format!("{v:.0}")
    } else {
        format!("{v:.2}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Limits R-hat < 1.01, ESS >= 400, >= 4 chains: Vehtari et al. 2021, Bayesian Analysis 16(2);
    // k-hat < 0.7: Vehtari et al. 2024, JMLR 25.

    #[test]
    fn passing_run() {
        let v = Verdict::new(1.004, 812.0, 650.0, 4, Some(0.3));
        assert_eq!(v.status, Status::Converged);
        assert_eq!(v.laplace_adequate, Some(true));
        assert!(v.checks.iter().all(|c| c.passed));
        assert!(v.text().contains("background-error covariance B"));
        let json = serde_json::to_value(&v).unwrap();
        assert_eq!(json["status"], "converged");
        assert_eq!(json["checks"][0]["name"], "rhat");
    }

    #[test]
    fn each_failure_is_named() {
        let v = Verdict::new(1.05, 120.0, 500.0, 2, Some(0.9));
        assert_eq!(v.status, Status::NotConverged);
        assert_eq!(v.laplace_adequate, Some(false));
        let failed: Vec<_> = v
            .checks
            .iter()
            .filter(|c| !c.passed)
            .map(|c| c.name)
            .collect();
        assert_eq!(failed, vec!["rhat", "ess_bulk", "chains", "khat"]);
        let text = v.text();
        assert!(text.contains("1.050") && text.contains("Run the chains longer"));
        assert!(text.contains("Only 2 chains"));
        assert!(text.contains("inverse Hessian is not a trustworthy"));
        assert!(text.ends_with(CONDITIONAL_CAUTION));
    }

    #[test]
    fn khat_is_judged_against_the_threshold_of_its_draws() {
        // min(1 - 1/log10 S, 0.7): Vehtari et al. 2024, JMLR 25, section 3. With S = 100 the limit
        // is 0.5, so k-hat 0.6 fails there but passes the many-draw limit 0.7.
        let r = KhatReading {
            khat: 0.6,
            draws: Some(100),
        };
        let v = Verdict::with_khat(1.0, 500.0, 500.0, 4, Some(r));
        assert_eq!(v.laplace_adequate, Some(false));
        let c = v.checks.iter().find(|c| c.name == "khat").unwrap();
        assert!((c.limit - 0.5).abs() < 1e-15 && !c.passed);
        assert!(v.text().contains("at least 0.50"), "{}", v.text());
        assert_eq!(
            Verdict::new(1.0, 500.0, 500.0, 4, Some(0.6)).laplace_adequate,
            Some(true)
        );
    }

    #[test]
    fn an_unestimable_khat_leaves_the_laplace_check_unjudged() {
        // Fewest draws for the Pareto tail fit: 21 (Vehtari et al. 2024; ArviZ 0.23 psislw).
        let r = KhatReading {
            khat: f64::NAN,
            draws: Some(20),
        };
        let v = Verdict::with_khat(1.0, 500.0, 500.0, 4, Some(r));
        assert_eq!(v.status, Status::Converged);
        assert_eq!(v.laplace_adequate, None);
        assert!(v.checks.iter().all(|c| c.name != "khat"));
        let text = v.text();
        assert!(
            text.contains("could not be judged") && text.contains("from 20 draws"),
            "{text}"
        );
        assert!(text.contains("at least 21"), "{text}");
        let v = Verdict::new(1.0, 500.0, 500.0, 4, Some(f64::NEG_INFINITY));
        assert_eq!(v.laplace_adequate, Some(true));
        assert!(v.text().contains("weights are equal"), "{}", v.text());
    }

    #[test]
    fn nan_fails_and_propagates() {
        let v = Verdict::new(f64::NAN, 400.0, 400.0, 4, None);
        assert_eq!(v.status, Status::NotConverged);
        assert!(v.text().contains("all its draws are equal"));
        // The boundary values themselves pass (ESS >= 400).
        assert!(v.checks[1].passed && v.checks[2].passed);
        assert_eq!(v.laplace_adequate, None);
    }
}
