//! A plain-language verdict on a whole run: every reason it is not simply good, one status, the exit
//! code that goes with it, and sentences saying what was found and what to do.
//!
//! The statuses, from the reasons found (each reason is named in the verdict, all of them, in order):
//!
//! - `partial`: the chains hold fewer draws than planned (a run interrupted or still going);
//! - `not_converged`: the ensemble must not be used as it is: R-hat ≥ 1.01, bulk or tail ESS below
//!   400 or fewer than 4 chains (Vehtari et al. 2021); more than [`DIVERGENCE_LIMIT`] (0.1%) of the
//!   sampling transitions over all chains divergent; or a failed gradient test;
//! - `converged_with_warnings`: the chains pass and the ensemble can be used, but the analysis
//!   (L-BFGS) did not converge, the gradient test was skipped, or the Laplace approximation is not
//!   adequate or could not be judged;
//! - `converged`: none of these.
//!
//! "Laplace adequate" (the inverse Hessian is a usable description of the posterior) needs both the
//! Pareto k-hat of the importance check below [`khat_threshold`] of its draws and, after converged
//! chains, every component's sd_post / sd_Laplace within 10% of 1 beyond two Monte Carlo standard
//! errors ([`super::spread`]). Either failing makes it `false`; a part that is missing (check not run,
//! k-hat not estimable, chains not converged, a component not comparable) leaves it unknown.
//!
//! Exit codes ([`Verdict::exit_code`], numbers in [`ExitCode`]): `converged` 0; `partial` 5;
//! `not_converged` 3 when the gradient test failed, else 5; `converged_with_warnings` 4 when the
//! analysis did not converge, else 6.

use serde::{Deserialize, Serialize};

use super::laplace_check::{khat_threshold, min_draws_for_khat, ImportanceCheck};
use super::spread::{compare_spread, SpreadComparison, SpreadFlag, SPREAD_TOLERANCE};
use super::summary::ComponentStats;
use crate::error::ExitCode;

/// R-hat must be below this — Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis
/// 16(2), section 5.
pub const RHAT_LIMIT: f64 = 1.01;
/// Bulk and tail ESS must reach this (100 per chain with 4 chains) — Vehtari et al. 2021, section 5.
pub const ESS_LIMIT: f64 = 400.0;
/// Fewest chains for a trustworthy R-hat — Vehtari et al. 2021, section 5.
pub const MIN_CHAINS: usize = 4;
/// The cap of the sample-size dependent k-hat threshold [`khat_threshold`] = min(1 − 1/log10 S, 0.7),
/// reached from S = 2155 draws on — Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25. The verdict
/// always judges k-hat against the threshold of its own number of draws.
pub const KHAT_LIMIT: f64 = 0.7;
/// Largest fraction of divergent sampling transitions (over all chains) the ensemble may have: 0.1%.
/// This crate's choice (common practice, no source): a divergence marks a region the sampler could not
/// explore, a handful in thousands is usual noise, more says the ensemble is biased.
pub const DIVERGENCE_LIMIT: f64 = 0.001;
/// Components (or chains) named in a sentence before "and N more".
pub const MAX_NAMED: usize = 10;

/// The Laplace importance check as the verdict reads it: k-hat and the number of draws it came from,
/// which sets its limit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct KhatReading {
    /// Pareto k-hat; −∞ for equal weights, NaN when it could not be estimated.
    pub khat: f64,
    /// The number of importance draws.
    pub draws: usize,
}

impl KhatReading {
    /// The limit k-hat must stay below: [`khat_threshold`] of the draws (the one threshold).
    pub fn limit(&self) -> f64 {
        khat_threshold(self.draws)
    }
}

impl From<&ImportanceCheck> for KhatReading {
    fn from(c: &ImportanceCheck) -> Self {
        KhatReading {
            khat: c.khat,
            draws: c.draws(),
        }
    }
}

/// The gradient test as the verdict reads it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GradientTest {
    Passed,
    Failed,
    /// Not run (`--skip-check`).
    Skipped,
}

/// The analysis (L-BFGS) as the verdict reads it.
#[derive(Debug, Clone, PartialEq)]
pub struct AnalysisReading {
    pub converged: bool,
    /// Why it stopped, in words.
    pub reason: String,
    pub iterations: u64,
}

/// Divergent transitions of one chain while sampling.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ChainDivergences {
    pub divergences: u64,
    /// Sampling transitions made (kept draws × thinning).
    pub transitions: u64,
}

/// How far a partial run got.
#[derive(Debug, Clone, PartialEq)]
pub struct RunProgress {
    /// Draws written per chain.
    pub draws_per_chain: Vec<u64>,
    /// Draws planned per chain.
    pub planned: u64,
    /// Model runs spent so far.
    pub model_runs: u64,
}

/// The Laplace approximation: its importance check (`None` when it was not run) and its standard
/// deviation per component.
#[derive(Debug, Clone, Copy)]
pub struct LaplaceFacts<'a> {
    pub khat: Option<KhatReading>,
    pub sd: &'a [f64],
}

/// What the verdict knows of a run besides the chains' statistics. A field left `None` (or empty) is
/// not part of the verdict: library users judging chains alone leave them so; the pipeline fills them.
#[derive(Debug, Clone, Default)]
pub struct RunFacts<'a> {
    pub gradient: Option<GradientTest>,
    pub analysis: Option<AnalysisReading>,
    pub laplace: Option<LaplaceFacts<'a>>,
    /// Component names for the sentences (`x0`, `x1`, ... when absent).
    pub names: Option<&'a [String]>,
    /// Per chain; empty when not known.
    pub divergences: Vec<ChainDivergences>,
    /// `Some` for a run whose chains hold fewer draws than planned.
    pub partial: Option<RunProgress>,
    /// `Some` for a run that extended its chains towards a target ESS.
    pub target: Option<TargetFacts>,
}

/// A run that extended its chains towards a target effective sample size, and what ended it.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TargetFacts {
    /// The bulk and tail ESS every component was to reach.
    pub target_ess: u64,
    /// What ended the run, in words ("target met", "max evaluations", "time limit").
    pub stop: &'static str,
    /// Whether a limit (of model runs or of time) ended it.
    pub cut_short: bool,
}

/// The status of a run (see the module documentation for the rule).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Status {
    /// Every check passed.
    Converged,
    /// The chains passed and the ensemble can be used; the verdict names what else needs attention.
    ConvergedWithWarnings,
    /// The ensemble must not be used as it is.
    NotConverged,
    /// The chains have not finished.
    Partial,
}

impl Status {
    /// The status in words.
    pub fn describe(self) -> &'static str {
        match self {
            Status::Converged => "converged",
            Status::ConvergedWithWarnings => "converged with warnings",
            Status::NotConverged => "not converged",
            Status::Partial => "partial run",
        }
    }
}

/// A reason the status is not `converged`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Reason {
    PartialRun,
    TargetNotReached,
    GradientTestFailed,
    GradientTestSkipped,
    AnalysisNotConverged,
    ChainsNotConverged,
    TooManyDivergences,
    LaplaceInadequate,
    LaplaceNotJudged,
}

impl Reason {
    /// The reason in a few words.
    pub fn describe(self) -> &'static str {
        match self {
            Reason::PartialRun => "the chains have not finished",
            Reason::TargetNotReached => "a limit ended the run before the target ESS was reached",
            Reason::GradientTestFailed => "the gradient test failed",
            Reason::GradientTestSkipped => "the gradient test was skipped",
            Reason::AnalysisNotConverged => "the analysis did not converge",
            Reason::ChainsNotConverged => "the chains have not converged",
            Reason::TooManyDivergences => "too many divergent transitions",
            Reason::LaplaceInadequate => "the Laplace approximation is not adequate",
            Reason::LaplaceNotJudged => "the Laplace approximation could not be judged",
        }
    }

    /// Whether the reason makes the ensemble unusable as it is.
    fn blocks_use(self) -> bool {
        matches!(
            self,
            Reason::GradientTestFailed | Reason::ChainsNotConverged | Reason::TooManyDivergences
        )
    }
}

/// One check: its value, the limit, and whether it passed.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Check {
    /// "rhat", "ess_bulk", "ess_tail", "chains", "divergences" or "khat".
    pub name: &'static str,
    /// The value found (NaN serialises as null).
    pub value: f64,
    /// The limit: an upper bound for rhat, divergences (a fraction, passing at equality) and khat, a
    /// lower bound for the others.
    pub limit: f64,
    pub passed: bool,
}

/// The verdict: a status with all its reasons, the individual checks, and sentences for people.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Verdict {
    pub status: Status,
    /// Every reason the status is not `converged`, in the order of the sentences.
    pub reasons: Vec<Reason>,
    /// Whether the inverse Hessian is a usable description of the posterior (k-hat and spread both
    /// pass); `None` when it could not be established or the Laplace approximation was not given.
    pub laplace_adequate: Option<bool>,
    /// The k-hat threshold the check was judged against, where it ran.
    pub khat_threshold: Option<f64>,
    /// Posterior against Laplace spread per component: the ratios wherever the Laplace standard
    /// deviations were given, the flags only after converged chains (`NotCompared` before).
    pub spread: Option<SpreadComparison>,
    /// Divergent sampling transitions over all chains, as a fraction, where known.
    pub divergent_fraction: Option<f64>,
    pub checks: Vec<Check>,
    /// A headline naming the status and every reason, then a sentence per finding, ending with the
    /// caution that the spread is conditional on the model, B and R.
    pub sentences: Vec<String>,
}

/// The caution every verdict ends with.
pub const CONDITIONAL_CAUTION: &str = "The spread shown is the posterior uncertainty conditional on \
the model, the background-error covariance B and the observation-error covariance R that were given: \
errors in the model or in B or R are not part of it.";

/// What the verdict collects while it reads the facts.
#[derive(Default)]
struct Findings {
    reasons: Vec<Reason>,
    checks: Vec<Check>,
    sentences: Vec<String>,
}

impl Findings {
    fn check(&mut self, name: &'static str, value: f64, limit: f64, passed: bool) {
        self.checks.push(Check {
            name,
            value,
            limit,
            passed,
        });
    }

    fn reason(&mut self, r: Reason, sentence: String) {
        self.reasons.push(r);
        self.sentences.push(sentence);
    }
}

impl Verdict {
    /// The verdict on chains with per-component statistics `stats` (the worst R-hat and ESS count) and
    /// `n_chains` chains, and on the other `facts` of the run. A NaN diagnostic fails its check.
    pub fn judge(stats: &[ComponentStats], n_chains: usize, facts: &RunFacts<'_>) -> Verdict {
        let mut f = Findings::default();
        if let Some(p) = &facts.partial {
            f.reason(Reason::PartialRun, partial_sentence(p));
        }
        match facts.gradient {
            Some(GradientTest::Failed) => {
                f.reason(Reason::GradientTestFailed, GRADIENT_FAILED.into())
            }
            Some(GradientTest::Skipped) => {
                f.reason(Reason::GradientTestSkipped, GRADIENT_SKIPPED.into())
            }
            Some(GradientTest::Passed) | None => {}
        }
        if let Some(a) = facts.analysis.as_ref().filter(|a| !a.converged) {
            f.reason(Reason::AnalysisNotConverged, analysis_sentence(a));
        }
        let worst = Worst::of(stats);
        if let Some(t) = facts.target.filter(|t| t.cut_short) {
            let reached = worst.rhat < RHAT_LIMIT
                && worst.bulk >= t.target_ess as f64
                && worst.tail >= t.target_ess as f64;
            if !reached {
                f.reason(Reason::TargetNotReached, target_sentence(&t, &worst));
            }
        }
        let chains_ok = judge_chains(&mut f, &worst, n_chains);
        let divergent_fraction = judge_divergences(&mut f, &facts.divergences);
        let (mut spread, mut laplace_adequate, mut khat_limit) = (None, None, None);
        if let Some(l) = facts.laplace {
            spread = compare_spread(stats, l.sd)
                .ok()
                .map(|s| judged_after(s, chains_ok));
            khat_limit = l.khat.map(|r| r.limit());
            let judged = spread.as_ref().filter(|_| chains_ok);
            laplace_adequate = judge_laplace(&mut f, l.khat, judged, facts.names, chains_ok);
        }
        let status = status_of(&f.reasons);
        let mut sentences = vec![headline(status, &f.reasons)];
        sentences.append(&mut f.sentences);
        sentences.push(CONDITIONAL_CAUTION.to_string());
        Verdict {
            status,
            reasons: f.reasons,
            laplace_adequate,
            khat_threshold: khat_limit,
            spread,
            divergent_fraction,
            checks: f.checks,
            sentences,
        }
    }

    /// The exit code of the process for this verdict: 0 converged; 5 partial; 3 not converged with
    /// a failed gradient test, else 5; 4 converged with warnings one of which is an analysis that did
    /// not converge, else 6.
    pub fn exit_code(&self) -> ExitCode {
        let has = |r: Reason| self.reasons.contains(&r);
        match self.status {
            Status::Converged => ExitCode::Success,
            Status::Partial => ExitCode::EnsembleNotUsable,
            Status::NotConverged if has(Reason::GradientTestFailed) => ExitCode::GradientWrong,
            Status::NotConverged => ExitCode::EnsembleNotUsable,
            Status::ConvergedWithWarnings if has(Reason::AnalysisNotConverged) => {
                ExitCode::AnalysisNotConverged
            }
            Status::ConvergedWithWarnings => ExitCode::ConvergedWithWarnings,
        }
    }

    /// Indices of the components whose spread the inverse Hessian understates (`Understated`) or
    /// overstates (`Overstated`); empty when the spread was not compared.
    pub fn spread_components(&self, flag: SpreadFlag) -> Vec<usize> {
        self.spread
            .as_ref()
            .map_or(Vec::new(), |s| s.with_flag(flag))
    }

    /// All sentences as one paragraph.
    pub fn text(&self) -> String {
        self.sentences.join(" ")
    }
}

/// The ratios stay for the record, but no component is judged before the chains have converged (their
/// standard deviations and MCSE are not yet to be trusted).
fn judged_after(mut s: SpreadComparison, chains_ok: bool) -> SpreadComparison {
    if !chains_ok {
        s.flags.fill(SpreadFlag::NotCompared);
    }
    s
}

/// The status the reasons give.
fn status_of(reasons: &[Reason]) -> Status {
    if reasons.contains(&Reason::PartialRun) {
        Status::Partial
    } else if reasons.iter().any(|r| r.blocks_use()) {
        Status::NotConverged
    } else if reasons.is_empty() {
        Status::Converged
    } else {
        Status::ConvergedWithWarnings
    }
}

/// The first sentence: the status and every reason.
fn headline(status: Status, reasons: &[Reason]) -> String {
    let list: Vec<&str> = reasons.iter().map(|r| r.describe()).collect();
    let list = list.join("; ");
    match status {
        Status::Converged => {
            "Verdict: converged. Every check passed and the ensemble can be used.".to_string()
        }
        Status::ConvergedWithWarnings => format!(
            "Verdict: converged with warnings. The chains converged and the ensemble can be used, \
             but: {list}."
        ),
        Status::NotConverged => {
            format!("Verdict: not converged. The ensemble must not be used as it is: {list}.")
        }
        Status::Partial => format!("Verdict: partial run. The ensemble is not complete: {list}."),
    }
}

const GRADIENT_FAILED: &str = "The gradient test failed: the gradient does not match the cost, so \
the analysis and the gradient-based chains (HMC, MALA) cannot be trusted. Fix the gradient (`varpost \
check` shows the Taylor table) and run again.";

const GRADIENT_SKIPPED: &str = "The gradient test was skipped (--skip-check): nothing confirmed that \
the gradient matches the cost, and a wrong gradient silently spoils the analysis and biases the HMC \
and MALA chains. Run `varpost check` on the problem, or sample without --skip-check.";

fn analysis_sentence(a: &AnalysisReading) -> String {
    format!(
        "The analysis (L-BFGS) did not converge ({} after {} iterations): it is not the minimum of J, \
         and the Hessian, the Laplace approximation and the chains' metric were built away from the \
         minimum. Raise --max-iters (or loosen --grad-rtol) and run again.",
        a.reason, a.iterations
    )
}

fn target_sentence(t: &TargetFacts, w: &Worst) -> String {
    let next = if t.stop == "time limit" {
        "Continue it with `varpost resume DIR` (the time limit counts anew from there)"
    } else {
        "The budget counts the whole run: run again with a larger --max-evaluations"
    };
    format!(
        "The {} ended the run before every component reached the target ESS of {} with R-hat \
         below {RHAT_LIMIT} (smallest bulk ESS {:.0}, smallest tail ESS {:.0}, largest R-hat {:.3}): \
         the ensemble is less precise than asked for. {next}.",
        t.stop, t.target_ess, w.bulk, w.tail, w.rhat
    )
}

fn partial_sentence(p: &RunProgress) -> String {
    let per_chain: Vec<String> = p.draws_per_chain.iter().map(u64::to_string).collect();
    let used = p.draws_per_chain.iter().copied().min().unwrap_or(0);
    format!(
        "The run is partial: the chains hold {} of the {} planned draws each (the diagnostics use the \
         first {used} of every chain), after {} model runs so far. Continue it with `varpost resume \
         DIR`; the diagnostics describe the draws so far only.",
        per_chain.join(", "),
        p.planned,
        p.model_runs
    )
}

/// The worst values over all components: the largest R-hat, the smallest bulk and tail ESS (NaN in any
/// component carries through; no components give NaN).
struct Worst {
    rhat: f64,
    bulk: f64,
    tail: f64,
}

impl Worst {
    fn of(stats: &[ComponentStats]) -> Worst {
        let worst = |f: fn(&ComponentStats) -> f64, larger_is_worse: bool| {
            stats
                .iter()
                .map(f)
                .fold(None, |acc: Option<f64>, v| match acc {
                    None => Some(v),
                    Some(a) if a.is_nan() || v.is_nan() => Some(f64::NAN),
                    Some(a) => Some(if (v > a) == larger_is_worse { v } else { a }),
                })
                .unwrap_or(f64::NAN)
        };
        Worst {
            rhat: worst(|s| s.rhat, true),
            bulk: worst(|s| s.ess_bulk, false),
            tail: worst(|s| s.ess_tail, false),
        }
    }
}

/// R-hat, bulk and tail ESS and the number of chains; whether all pass.
fn judge_chains(f: &mut Findings, w: &Worst, n_chains: usize) -> bool {
    let rhat_ok = w.rhat < RHAT_LIMIT;
    let bulk_ok = w.bulk >= ESS_LIMIT;
    let tail_ok = w.tail >= ESS_LIMIT;
    let chains_ok = n_chains >= MIN_CHAINS;
    f.check("rhat", w.rhat, RHAT_LIMIT, rhat_ok);
    f.check("ess_bulk", w.bulk, ESS_LIMIT, bulk_ok);
    f.check("ess_tail", w.tail, ESS_LIMIT, tail_ok);
    f.check("chains", n_chains as f64, MIN_CHAINS as f64, chains_ok);
    let all_ok = rhat_ok && bulk_ok && tail_ok && chains_ok;
    if all_ok {
        f.sentences.push(format!(
            "The {n_chains} chains agree (largest R-hat {}, below {RHAT_LIMIT}) and every component \
             has at least {ESS_LIMIT:.0} effective draws in the bulk ({}) and in the tails ({}).",
            against_limit(w.rhat, RHAT_LIMIT, 3).0,
            ess_text(w.bulk),
            ess_text(w.tail)
        ));
        return true;
    }
    let mut why = Vec::new();
    if !rhat_ok {
        why.push(rhat_sentence(w.rhat));
    }
    if !bulk_ok {
        why.push(format!(
            "The smallest bulk effective sample size is {} (at least {ESS_LIMIT:.0} is needed): means \
             and medians rest on too few effectively independent draws. Run the chains longer or run \
             more chains.",
            ess_text(w.bulk)
        ));
    }
    if !tail_ok {
        why.push(format!(
            "The smallest tail effective sample size is {} (at least {ESS_LIMIT:.0} is needed): the 5% \
             and 95% quantiles, and so the spread, are poorly estimated. Run the chains longer or run \
             more chains.",
            ess_text(w.tail)
        ));
    }
    if !chains_ok {
        why.push(format!(
            "Only {n_chains} chain{} were run (at least {MIN_CHAINS} are needed for R-hat to catch \
             chains stuck in different places). Run at least {MIN_CHAINS} chains.",
            if n_chains == 1 { "" } else { "s" }
        ));
    }
    f.reason(Reason::ChainsNotConverged, why.join(" "));
    false
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
            "The largest R-hat is {} (it must be below {RHAT_LIMIT}): the chains do not yet \
             agree with each other. Run the chains longer (more warm-up and more draws); if it \
             persists the posterior may have several modes, or the chains started too far apart to \
             meet.",
            against_limit(rhat_max, RHAT_LIMIT, 3).0
        )
    }
}

/// Divergent transitions against [`DIVERGENCE_LIMIT`]; the fraction over all chains, where known.
fn judge_divergences(f: &mut Findings, per_chain: &[ChainDivergences]) -> Option<f64> {
    let total: u64 = per_chain.iter().map(|c| c.divergences).sum();
    let transitions: u64 = per_chain.iter().map(|c| c.transitions).sum();
    if transitions == 0 {
        return None;
    }
    let fraction = total as f64 / transitions as f64;
    let passed = fraction <= DIVERGENCE_LIMIT;
    f.check("divergences", fraction, DIVERGENCE_LIMIT, passed);
    if total == 0 {
        return Some(fraction);
    }
    let counts: Vec<String> = per_chain
        .iter()
        .enumerate()
        .map(|(c, d)| format!("chain {c}: {}", d.divergences))
        .collect();
    let found = format!(
        "{total} of {transitions} sampling transitions diverged ({:.2}%; {})",
        100.0 * fraction,
        named_list(&counts)
    );
    if passed {
        f.sentences.push(format!(
            "{found}, within the {}% allowed.",
            100.0 * DIVERGENCE_LIMIT
        ));
    } else {
        f.reason(
            Reason::TooManyDivergences,
            format!(
                "{found}, more than the {}% allowed: the chains could not enter part of the \
                 posterior, so the ensemble is likely biased. Reduce the step size (raise \
                 --target-accept, e.g. to 0.9) or use a better metric, and run again.",
                100.0 * DIVERGENCE_LIMIT
            ),
        );
    }
    Some(fraction)
}

/// At most [`MAX_NAMED`] items joined by commas, then "and N more".
fn named_list(items: &[String]) -> String {
    let shown = items[..items.len().min(MAX_NAMED)].join(", ");
    if items.len() > MAX_NAMED {
        format!("{shown} and {} more", items.len() - MAX_NAMED)
    } else {
        shown
    }
}

/// `value` and its `limit` as text with at least `decimals` decimals and as many more (up to 6) as it
/// takes for the two to read differently when they differ, so that a printed value never looks equal
/// to a limit it failed (an ESS of 399.6 is "399.6", not "400").
pub fn against_limit(value: f64, limit: f64, decimals: usize) -> (String, String) {
    let mut pair = (format!("{value:.decimals$}"), format!("{limit:.decimals$}"));
    for d in decimals + 1..=6 {
        if pair.0 != pair.1 || value == limit {
            break;
        }
        pair = (format!("{value:.d$}"), format!("{limit:.d$}"));
    }
    pair
}

/// k-hat and its limit as text ([`against_limit`] from 2 decimals): "-inf" for equal weights, "not
/// estimated" for NaN.
pub fn khat_text(khat: f64, limit: f64) -> (String, String) {
    if khat.is_nan() {
        return ("not estimated".into(), format!("{limit:.2}"));
    }
    if khat == f64::NEG_INFINITY {
        return ("-inf".into(), format!("{limit:.2}"));
    }
    against_limit(khat, limit, 2)
}

/// An ESS for a sentence: whole draws unless that would read as the limit it failed.
fn ess_text(v: f64) -> String {
    if v.is_nan() {
        "not computable".to_string()
    } else {
        against_limit(v, ESS_LIMIT, 0).0
    }
}

/// The Laplace part: the importance check, the spread comparison (after converged chains) and the
/// conclusion; returns whether the inverse Hessian is adequate (`None`: not established).
fn judge_laplace(
    f: &mut Findings,
    khat: Option<KhatReading>,
    spread: Option<&SpreadComparison>,
    names: Option<&[String]>,
    chains_ok: bool,
) -> Option<bool> {
    let (khat_ok, mut text) = khat_part(f, khat);
    let spread_ok = match spread {
        Some(s) => spread_part(s, names, &mut text),
        None => {
            text.push(
                if chains_ok {
                    "The chains' standard deviations could not be compared with the Laplace ones."
                } else {
                    "The chains' standard deviations are compared with the Laplace ones only once \
                     the chains have converged."
                }
                .to_string(),
            );
            None
        }
    };
    let adequate = match (khat_ok, spread_ok) {
        (Some(false), _) | (_, Some(false)) => Some(false),
        (Some(true), Some(true)) => Some(true),
        _ => None,
    };
    text.push(
        match adequate {
            Some(true) => {
                "The Laplace covariance, the inverse Hessian, is a usable description of \
                the posterior."
            }
            Some(false) => {
                "The inverse Hessian is not a trustworthy posterior covariance here; rely \
                on the sampled ensemble instead."
            }
            None => {
                "The inverse Hessian is not established as a usable description of the \
                posterior: that needs both a k-hat below its threshold and standard deviations \
                agreeing with those of converged chains."
            }
        }
        .to_string(),
    );
    let text = text.join(" ");
    match adequate {
        Some(true) => f.sentences.push(text),
        Some(false) => f.reason(Reason::LaplaceInadequate, text),
        None => f.reason(Reason::LaplaceNotJudged, text),
    }
    adequate
}

/// The importance check in words; whether k-hat passed (`None`: not run or not estimable). An
/// estimated k-hat (−∞ included) adds its check.
fn khat_part(f: &mut Findings, khat: Option<KhatReading>) -> (Option<bool>, Vec<String>) {
    let Some(r) = khat else {
        let s = "The importance check of the Laplace (Gaussian) approximation was not run \
                 (--laplace-draws 0).";
        return (None, vec![s.to_string()]);
    };
    let (k, limit) = (r.khat, r.limit());
    if k.is_nan() {
        let min = min_draws_for_khat();
        let why = if r.draws < min {
            format!("from {} draws (at least {min} are needed, and a few hundred for a useful estimate)", r.draws)
        } else {
            format!(
                "from these {} draws: too few distinct large importance weights for the Pareto fit",
                r.draws
            )
        };
        let s = format!(
            "The importance check of the Laplace (Gaussian) approximation could not judge it: Pareto \
             k-hat cannot be estimated {why}. Run it with more draws (--laplace-draws)."
        );
        return (None, vec![s]);
    }
    let ok = k < limit;
    f.check("khat", k, limit, ok);
    let (ks, ls) = khat_text(k, limit);
    let s = if k == f64::NEG_INFINITY {
        "The Laplace (Gaussian) approximation passed the importance check: the importance weights are \
         equal, the Gaussian is the posterior up to rounding."
            .to_string()
    } else if ok {
        format!("The Laplace (Gaussian) approximation passed the importance check (Pareto k-hat {ks}, below the threshold {ls} for {} draws).", r.draws)
    } else {
        format!("The Laplace (Gaussian) approximation failed the importance check (Pareto k-hat {ks}, at least the threshold {ls} for {} draws).", r.draws)
    };
    (Some(ok), vec![s])
}

/// The spread comparison in words, naming the components; whether every component agrees (`None`:
/// none disagrees but some could not be compared).
fn spread_part(
    s: &SpreadComparison,
    names: Option<&[String]>,
    text: &mut Vec<String>,
) -> Option<bool> {
    let name = |i: usize| {
        names
            .and_then(|n| n.get(i))
            .cloned()
            .unwrap_or_else(|| format!("x{i}"))
    };
    let tol = 100.0 * SPREAD_TOLERANCE;
    let listed = |idx: &[usize]| {
        let items: Vec<String> = idx
            .iter()
            .map(|&i| format!("{} ({:.2} ± {:.2})", name(i), s.ratio[i], s.ratio_mcse[i]))
            .collect();
        named_list(&items)
    };
    let under = s.with_flag(SpreadFlag::Understated);
    let over = s.with_flag(SpreadFlag::Overstated);
    let not_compared = s.with_flag(SpreadFlag::NotCompared);
    if s.all_agree() {
        text.push(format!(
            "For every component the chains' standard deviation agrees with the Laplace one within \
             {tol:.0}% (beyond two Monte Carlo standard errors)."
        ));
        return Some(true);
    }
    let plural = |n: usize| if n == 1 { "" } else { "s" };
    if !under.is_empty() {
        text.push(format!(
            "The inverse Hessian understates the spread of {} component{} (posterior sd / Laplace sd \
             above {:.1} by more than two Monte Carlo standard errors): {}.",
            under.len(), plural(under.len()), 1.0 + SPREAD_TOLERANCE, listed(&under)
        ));
    }
    if !over.is_empty() {
        text.push(format!(
            "The inverse Hessian overstates the spread of {} component{} (posterior sd / Laplace sd \
             below {:.1} by more than two Monte Carlo standard errors): {}.",
            over.len(), plural(over.len()), 1.0 - SPREAD_TOLERANCE, listed(&over)
        ));
    }
    if !not_compared.is_empty() {
        let items: Vec<String> = not_compared.iter().map(|&i| name(i)).collect();
        text.push(format!(
            "{} component{} could not be compared (constant draws or a zero Laplace variance): {}.",
            not_compared.len(),
            plural(not_compared.len()),
            named_list(&items)
        ));
    }
    if under.is_empty() && over.is_empty() {
        None
    } else {
        Some(false)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Limits R-hat < 1.01, ESS >= 400, >= 4 chains: Vehtari et al. 2021, Bayesian Analysis 16(2);
    // k-hat below min(1 - 1/log10 S, 0.7): Vehtari et al. 2024, JMLR 25, section 3. The divergence
    // fraction 0.1% and the spread rule (10% beyond 2 MCSE) are this crate's (common practice, no
    // source).

    /// Components with the given posterior sds (MCSE of the sd 0.02) from well-mixed chains.
    fn comps(sds: &[f64]) -> Vec<ComponentStats> {
        sds.iter()
            .map(|&sd| ComponentStats {
                mean: 0.0,
                sd,
                rhat: 1.002,
                ess_bulk: 900.0,
                ess_tail: 800.0,
                mcse_mean: 0.03,
                mcse_sd: 0.02,
                q05: -1.6 * sd,
                q95: 1.6 * sd,
                mcse_q05: 0.05,
                mcse_q95: 0.05,
            })
            .collect()
    }

    fn khat(k: f64, draws: usize) -> Option<KhatReading> {
        Some(KhatReading { khat: k, draws })
    }

    /// A run where everything passed: gradient test, analysis, 2000 Laplace draws with k-hat 0.3, no
    /// divergences.
    fn good_facts(sd: &[f64]) -> RunFacts<'_> {
        RunFacts {
            gradient: Some(GradientTest::Passed),
            analysis: Some(AnalysisReading {
                converged: true,
                reason: "gradient norm reduced by 1.0e-6".into(),
                iterations: 12,
            }),
            laplace: Some(LaplaceFacts {
                khat: khat(0.3, 2000),
                sd,
            }),
            names: None,
            divergences: vec![
                ChainDivergences {
                    divergences: 0,
                    transitions: 1000,
                };
                4
            ],
            partial: None,
            target: None,
        }
    }

    #[test]
    fn everything_passed_is_green() {
        let sd = [1.0, 2.0];
        let v = Verdict::judge(&comps(&[1.01, 1.98]), 4, &good_facts(&sd));
        assert_eq!(v.status, Status::Converged, "{}", v.text());
        assert!(v.reasons.is_empty());
        assert_eq!(v.exit_code(), ExitCode::Success);
        assert_eq!(v.laplace_adequate, Some(true));
        assert!(v.checks.iter().all(|c| c.passed));
        let text = v.text();
        assert!(
            text.starts_with("Verdict: converged. Every check passed"),
            "{text}"
        );
        assert!(
            text.contains("is a usable description of the posterior"),
            "{text}"
        );
        assert!(text.ends_with(CONDITIONAL_CAUTION));
        let json = serde_json::to_value(&v).unwrap();
        assert_eq!(json["status"], "converged");
        assert_eq!(json["checks"][0]["name"], "rhat");
    }

    #[test]
    fn variance_ratios_of_2_4_and_1_5_with_khat_above_its_threshold_are_not_adequate() {
        // The reported case: k-hat 0.63 from the default 200 draws, whose threshold is
        // 1 - 1/log10(200) = 0.565 (printed 0.57), and sampled/Laplace variance ratios 2.4 and 1.5
        // (sd ratios 1.55 and 1.22, far outside [0.9, 1.1] with an MCSE of 0.02).
        let sd = [1.0, 1.0, 1.0];
        let names = ["u".to_string(), "v".to_string(), "w".to_string()];
        let mut facts = good_facts(&sd);
        facts.laplace = Some(LaplaceFacts {
            khat: khat(0.63, 200),
            sd: &sd,
        });
        facts.names = Some(&names);
        let stats = comps(&[2.4f64.sqrt(), 1.5f64.sqrt(), 1.0]);
        let v = Verdict::judge(&stats, 4, &facts);
        let text = v.text();
        assert_eq!(v.laplace_adequate, Some(false), "{text}");
        assert!(!text.contains("is a usable description"), "{text}");
        assert!(
            text.contains("not a trustworthy posterior covariance"),
            "{text}"
        );
        assert_ne!(v.status, Status::Converged);
        assert_eq!(v.reasons, vec![Reason::LaplaceInadequate]);
        assert_eq!(v.exit_code(), ExitCode::ConvergedWithWarnings);
        // The threshold printed is the one used, and k-hat is named as failing it.
        assert!((v.khat_threshold.unwrap() - (1.0 - 1.0 / 200f64.log10())).abs() < 1e-15);
        assert!(
            text.contains("k-hat 0.63, at least the threshold 0.57 for 200 draws"),
            "{text}"
        );
        let khat_check = v.checks.iter().find(|c| c.name == "khat").unwrap();
        assert!(!khat_check.passed && khat_check.limit == v.khat_threshold.unwrap());
        // Both components are named, the agreeing one is not.
        assert_eq!(v.spread_components(SpreadFlag::Understated), vec![0, 1]);
        assert!(text.contains("u (1.55 ± 0.02), v (1.22 ± 0.02)"), "{text}");
        assert!(!text.contains("w ("), "{text}");
    }

    #[test]
    fn adequacy_needs_both_khat_and_spread() {
        let sd = [1.0, 1.0];
        // k-hat passes, spreads do not.
        let v = Verdict::judge(&comps(&[1.5, 1.0]), 4, &good_facts(&sd));
        assert_eq!(v.laplace_adequate, Some(false));
        assert_eq!(v.reasons, vec![Reason::LaplaceInadequate]);
        // Spreads agree, k-hat fails (0.7 against 0.7 for 5000 draws: at the limit fails).
        let mut f = good_facts(&sd);
        f.laplace = Some(LaplaceFacts {
            khat: khat(0.7, 5000),
            sd: &sd,
        });
        let v = Verdict::judge(&comps(&[1.0, 1.0]), 4, &f);
        assert_eq!(v.laplace_adequate, Some(false));
        // Just below the threshold of 5000 draws passes.
        f.laplace = Some(LaplaceFacts {
            khat: khat(0.699, 5000),
            sd: &sd,
        });
        assert_eq!(
            Verdict::judge(&comps(&[1.0, 1.0]), 4, &f).laplace_adequate,
            Some(true)
        );
        // An overstated spread: posterior sd 0.8 of the Laplace one.
        let v = Verdict::judge(&comps(&[0.8, 1.0]), 4, &good_facts(&sd));
        assert_eq!(v.spread_components(SpreadFlag::Overstated), vec![0]);
        assert!(v.text().contains("overstates the spread of 1 component"));
    }

    #[test]
    fn khat_is_judged_against_the_threshold_of_its_draws() {
        // With S = 100 the threshold is 0.5: k-hat 0.55 fails there, passes with 5000 draws (0.7).
        let sd = [1.0];
        let mut f = good_facts(&sd);
        for (draws, adequate) in [(100, false), (5000, true)] {
            f.laplace = Some(LaplaceFacts {
                khat: khat(0.55, draws),
                sd: &sd,
            });
            let v = Verdict::judge(&comps(&[1.0]), 4, &f);
            assert_eq!(v.laplace_adequate, Some(adequate), "{}", v.text());
        }
        assert!((khat_threshold(100) - 0.5).abs() < 1e-15);
    }

    #[test]
    fn printed_khat_and_threshold_never_look_equal() {
        assert_eq!(khat_text(0.63, 0.5654), ("0.63".into(), "0.57".into()));
        assert_eq!(
            khat_text(0.5652, 0.5654),
            ("0.5652".into(), "0.5654".into())
        );
        assert_eq!(khat_text(0.566, 0.5654), ("0.566".into(), "0.565".into()));
        assert_eq!(khat_text(f64::NAN, 0.5).0, "not estimated");
        assert_eq!(against_limit(399.6, 400.0, 0).0, "399.6");
        assert_eq!(against_limit(1.0101, 1.01, 3).0, "1.0101");
        assert_eq!(against_limit(400.0, 400.0, 0).0, "400");
    }

    #[test]
    fn an_unrun_or_unestimable_khat_leaves_the_laplace_approximation_unjudged() {
        // Fewest draws for the Pareto tail fit: 21 (Vehtari et al. 2024; ArviZ 0.23 psislw).
        let sd = [1.0];
        let mut f = good_facts(&sd);
        f.laplace = Some(LaplaceFacts {
            khat: khat(f64::NAN, 20),
            sd: &sd,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.laplace_adequate, None);
        assert_eq!(v.reasons, vec![Reason::LaplaceNotJudged]);
        assert_eq!(v.status, Status::ConvergedWithWarnings);
        assert_eq!(v.exit_code(), ExitCode::ConvergedWithWarnings);
        assert!(v.checks.iter().all(|c| c.name != "khat"));
        let text = v.text();
        assert!(
            text.contains("from 20 draws") && text.contains("at least 21"),
            "{text}"
        );
        assert!(!text.contains("is a usable description"), "{text}");
        f.laplace = Some(LaplaceFacts {
            khat: None,
            sd: &sd,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.reasons, vec![Reason::LaplaceNotJudged]);
        assert!(v.text().contains("--laplace-draws 0"));
        // Equal weights (k-hat -inf) pass.
        f.laplace = Some(LaplaceFacts {
            khat: khat(f64::NEG_INFINITY, 200),
            sd: &sd,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.laplace_adequate, Some(true));
        assert!(v.text().contains("weights are equal"), "{}", v.text());
    }

    #[test]
    fn an_unconverged_analysis_is_a_warning_with_exit_code_4() {
        let sd = [1.0];
        let mut f = good_facts(&sd);
        f.analysis = Some(AnalysisReading {
            converged: false,
            reason: "iteration limit reached".into(),
            iterations: 3,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::ConvergedWithWarnings);
        assert_eq!(v.reasons, vec![Reason::AnalysisNotConverged]);
        assert_eq!(v.exit_code(), ExitCode::AnalysisNotConverged);
        assert!(v
            .text()
            .contains("did not converge (iteration limit reached after 3 iterations)"));
    }

    #[test]
    fn gradient_test_skipped_warns_and_failed_blocks() {
        let sd = [1.0];
        let mut f = good_facts(&sd);
        f.gradient = Some(GradientTest::Skipped);
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(
            (v.status, v.exit_code()),
            (
                Status::ConvergedWithWarnings,
                ExitCode::ConvergedWithWarnings
            )
        );
        assert!(v.text().contains("--skip-check"));
        f.gradient = Some(GradientTest::Failed);
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::NotConverged);
        assert_eq!(v.exit_code(), ExitCode::GradientWrong);
        assert_eq!(v.reasons, vec![Reason::GradientTestFailed]);
    }

    #[test]
    fn divergences_above_a_tenth_of_a_percent_block_use() {
        let sd = [1.0];
        let mut f = good_facts(&sd);
        // 4 of 4000 transitions: exactly 0.1%, allowed (and still reported per chain).
        f.divergences[2].divergences = 4;
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::Converged, "{}", v.text());
        assert!((v.divergent_fraction.unwrap() - 0.001).abs() < 1e-15);
        assert!(v.text().contains("chain 2: 4") && v.text().contains("within the 0.1% allowed"));
        // 5 of 4000: above.
        f.divergences[2].divergences = 5;
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::NotConverged);
        assert_eq!(v.reasons, vec![Reason::TooManyDivergences]);
        assert_eq!(v.exit_code(), ExitCode::EnsembleNotUsable);
        let text = v.text();
        assert!(
            text.contains("5 of 4000 sampling transitions diverged"),
            "{text}"
        );
        assert!(
            text.contains("chain 0: 0, chain 1: 0, chain 2: 5, chain 3: 0"),
            "{text}"
        );
    }

    #[test]
    fn a_partial_run_says_how_far_it_got_and_is_not_green() {
        let sd = [1.0];
        let mut f = good_facts(&sd);
        f.partial = Some(RunProgress {
            draws_per_chain: vec![300, 310, 305, 300],
            planned: 1000,
            model_runs: 12345,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::Partial);
        assert_eq!(v.reasons, vec![Reason::PartialRun]);
        assert_eq!(v.exit_code(), ExitCode::EnsembleNotUsable);
        let text = v.text();
        assert!(
            text.contains("300, 310, 305, 300 of the 1000 planned draws"),
            "{text}"
        );
        assert!(text.contains("12345 model runs"), "{text}");
    }

    #[test]
    fn a_limit_that_ended_the_run_short_of_the_target_is_not_green() {
        let sd = [1.0];
        let mut f = good_facts(&sd);
        // The chains pass the verdict's own limits (ESS 800, R-hat 1.002) but not a target of 1000.
        f.target = Some(TargetFacts {
            target_ess: 1000,
            stop: "max evaluations",
            cut_short: true,
        });
        let v = Verdict::judge(&comps(&[1.0]), 4, &f);
        assert_eq!(v.status, Status::ConvergedWithWarnings);
        assert_eq!(v.reasons, vec![Reason::TargetNotReached]);
        assert!(v.text().contains("max evaluations"), "{}", v.text());
        assert!(v.text().contains("--max-evaluations"), "{}", v.text());
        // Reached all the same, or ended by the target itself: no reason.
        for (target_ess, stop, cut_short) in
            [(500, "time limit", true), (1000, "target met", false)]
        {
            f.target = Some(TargetFacts {
                target_ess,
                stop,
                cut_short,
            });
            let v = Verdict::judge(&comps(&[1.0]), 4, &f);
            assert_eq!(v.status, Status::Converged, "{stop}");
        }
    }

    #[test]
    fn every_reason_is_listed_not_just_the_first() {
        let sd = [1.0, 1.0];
        let mut f = good_facts(&sd);
        f.gradient = Some(GradientTest::Skipped);
        f.analysis.as_mut().unwrap().converged = false;
        f.divergences[0].divergences = 100;
        f.partial = Some(RunProgress {
            draws_per_chain: vec![50; 4],
            planned: 1000,
            model_runs: 10,
        });
        f.laplace = Some(LaplaceFacts {
            khat: khat(0.9, 200),
            sd: &sd,
        });
        let mut stats = comps(&[1.0, 1.0]);
        stats[1].rhat = 1.05;
        let v = Verdict::judge(&stats, 2, &f);
        assert_eq!(
            v.reasons,
            vec![
                Reason::PartialRun,
                Reason::GradientTestSkipped,
                Reason::AnalysisNotConverged,
                Reason::ChainsNotConverged,
                Reason::TooManyDivergences,
                Reason::LaplaceInadequate,
            ]
        );
        assert_eq!(v.status, Status::Partial);
        let head = &v.sentences[0];
        for r in &v.reasons {
            assert!(head.contains(r.describe()), "{head}");
        }
        let failed: Vec<_> = v
            .checks
            .iter()
            .filter(|c| !c.passed)
            .map(|c| c.name)
            .collect();
        assert_eq!(failed, vec!["rhat", "chains", "divergences", "khat"]);
        // Chains not converged: the ratios are kept, no component is judged.
        let spread = v.spread.as_ref().unwrap();
        assert_eq!(spread.ratio.len(), 2);
        assert!(spread.flags.iter().all(|f| *f == SpreadFlag::NotCompared));
        assert!(v.text().contains("only once the chains have converged"));
        assert!(v.text().contains("Only 2 chains"));
    }

    #[test]
    fn unconverged_chains_leave_a_passing_khat_unjudged() {
        let sd = [1.0];
        let mut stats = comps(&[1.0]);
        stats[0].ess_tail = 399.6;
        let v = Verdict::judge(&stats, 4, &good_facts(&sd));
        assert!(
            v.text()
                .contains("tail effective sample size is 399.6 (at least 400"),
            "{}",
            v.text()
        );
        assert_eq!(v.status, Status::NotConverged);
        assert_eq!(
            v.reasons,
            vec![Reason::ChainsNotConverged, Reason::LaplaceNotJudged]
        );
        assert_eq!(v.laplace_adequate, None);
        // ESS exactly 400 passes.
        stats[0].ess_tail = 400.0;
        assert_eq!(
            Verdict::judge(&stats, 4, &good_facts(&sd)).status,
            Status::Converged
        );
    }

    #[test]
    fn named_components_are_capped_at_ten() {
        let n = 15;
        let sd = vec![1.0; n];
        let v = Verdict::judge(&comps(&vec![2.0; n]), 4, &good_facts(&sd));
        assert_eq!(v.spread_components(SpreadFlag::Understated).len(), n);
        let text = v.text();
        assert!(text.contains("of 15 components"), "{text}");
        assert!(text.contains("x9 (2.00 ± 0.02) and 5 more"), "{text}");
        assert!(!text.contains("x10 ("), "{text}");
    }

    #[test]
    fn nan_fails_and_chains_alone_can_be_judged() {
        let mut stats = comps(&[1.0]);
        stats[0].rhat = f64::NAN;
        let v = Verdict::judge(&stats, 4, &RunFacts::default());
        assert_eq!(v.status, Status::NotConverged);
        assert!(v.text().contains("all its draws are equal"));
        assert_eq!(v.laplace_adequate, None);
        // Facts left out are not part of the verdict.
        let v = Verdict::judge(&comps(&[1.0]), 4, &RunFacts::default());
        assert_eq!(v.status, Status::Converged);
        assert_eq!(
            Verdict::judge(&[], 4, &RunFacts::default()).status,
            Status::NotConverged
        );
    }
}
