//! What the subcommands print on stdout: the results of each stage in a few readable lines. Nothing
//! here computes beyond formatting.

use crate::diagnostics::{against_limit, khat_text, Verdict, ESS_LIMIT, RHAT_LIMIT};
use crate::optimize::MapResult;
use crate::output::summary::{DiagnosticsSummary, LaplaceCheckSummary, LaplaceSummary};
use crate::output::Summary;
use crate::pipeline::{DemoReport, ReportOutcome, SampleOutcome};
use crate::precond::SpectrumOf;
use crate::problem::check::{describe_fd_worst, GradientReport};

/// The gradient test's table and verdict.
pub fn check(r: &GradientReport) {
    println!(
        "  J = {:.6e}, |grad J| = {:.3e}, h.grad J = {:.3e}",
        r.cost, r.grad_norm, r.directional
    );
    println!("  {:>8}  {:>22}  {:>12}", "alpha", "r(alpha)", "remainder");
    for row in &r.rows {
        // Far from 1 (near a minimum r(alpha) means nothing) the ratio is shown in powers of ten.
        let ratio = if row.ratio.abs() < 1e3 {
            format!("{:.15}", row.ratio)
        } else {
            format!("{:.6e}", row.ratio)
        };
        println!(
            "  {:>8.0e}  {:>22}  {:>12.3e}",
            row.alpha, ratio, row.remainder
        );
    }
    if let (Some(s), Some((a, b))) = (r.remainder_slope, r.slope_window) {
        println!(
            "  remainder order {s:.2}, fitted over alpha = {a:.0e} to {b:.0e} (rounding floor {:.1e})",
            r.rounding_floor
        );
    }
    if let Some(e) = r.fd_max_rel_error {
        println!(
            "  central finite differences: largest relative difference {e:.2e}; worst components {}",
            describe_fd_worst(&r.fd_worst)
        );
    }
    println!("  {}", r.verdict);
}

/// The minimisation: costs, gradient norms, iterations and whether it converged.
pub fn map(m: &MapResult) {
    println!(
        "  cost {:.6e} -> {:.6e}; |grad J| {:.3e} -> {:.3e} in {} iterations ({})",
        m.cost_start, m.cost, m.grad_norm_start, m.grad_norm, m.iterations, m.reason
    );
    println!(
        "  {}",
        if m.converged {
            "converged"
        } else {
            "NOT converged: the analysis may be inaccurate"
        }
    );
}

/// Largest relative difference of `a` from `b`, scaled by the largest |b|.
pub fn rel_err(a: &[f64], b: &[f64]) -> f64 {
    let scale = b
        .iter()
        .map(|v| v.abs())
        .fold(0.0, f64::max)
        .max(f64::MIN_POSITIVE);
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).abs() / scale)
        .fold(0.0, f64::max)
}

/// The Laplace covariance: method, cost, leading eigenvalues, warnings and the spread of the
/// analysis-error standard deviations.
pub fn laplace(l: &LaplaceSummary) {
    let rank = l.rank.map(|r| format!(", rank {r}")).unwrap_or_default();
    let products = match (l.info.products, l.info.exact_products) {
        (0, _) => "no extra evaluations".to_string(),
        (k, true) => format!("{k} exact Hessian-vector products"),
        (k, false) => format!("{k} Hessian-vector products by differences of gradients"),
    };
    println!(
        "  Laplace covariance: {} method{rank}, {products}",
        l.method
    );
    if !l.eigenvalues.is_empty() {
        let lead: Vec<String> = l
            .eigenvalues
            .iter()
            .take(5)
            .map(|v| format!("{v:.4e}"))
            .collect();
        println!(
            "  leading eigenvalues {}: {}",
            match l.info.spectrum_of {
                Some(SpectrumOf::Hessian) => "of the Hessian",
                _ => "of the prior-preconditioned misfit Hessian",
            },
            lead.join(", ")
        );
    }
    if l.info.rank_truncated {
        println!("  the maximum rank was reached with eigenvalues still above the threshold: raise --max-rank");
    }
    if l.info.pairs_skipped > 0 {
        println!(
            "  {} L-BFGS pairs skipped (curvature condition)",
            l.info.pairs_skipped
        );
    }
    let (lo, hi) = l
        .variance
        .iter()
        .fold((f64::INFINITY, 0.0_f64), |(a, b), v| (a.min(*v), b.max(*v)));
    println!(
        "  analysis-error standard deviations from {:.4e} to {:.4e}",
        lo.sqrt(),
        hi.sqrt()
    );
}

/// The stages of a sampling run, the chains and the diagnostics.
pub fn sample(o: &SampleOutcome) {
    let s = &o.summary;
    if let Some(m) = &s.map {
        println!(
            "  analysis: cost {:.6e} -> {:.6e} in {} iterations{}",
            m.cost_start,
            m.cost,
            m.iterations,
            if m.converged { "" } else { " (NOT converged)" }
        );
    }
    if let Some(l) = &s.laplace {
        println!(
            "  Laplace covariance: {} ({} Hessian-vector products)",
            l.method, l.info.products
        );
    }
    if let Some(c) = &s.laplace_check {
        laplace_check(c, "  ");
    }
    chains(s);
    if let Some(d) = &s.diagnostics {
        println!("  {}", worst_diagnostics(d));
    }
    stopped(s);
    verdict(&o.diagnosis.verdict);
    evaluations_by_stage(s);
}

/// What ended the chains and the draws per chain they reached.
fn stopped(s: &crate::output::Summary) {
    let Some(smp) = &s.sampling else { return };
    let (Some(reason), Some(reached)) = (&smp.stop_reason, smp.draws_reached) else {
        return;
    };
    let (target, first) = if smp.target_ess > 0 {
        (format!(" (target ESS {})", smp.target_ess), "first block")
    } else {
        (String::new(), "planned")
    };
    println!(
        "  stopped by: {reason}{target}; {reached} draws per chain ({first} {})",
        smp.draws_per_chain
    );
}

/// The worst R-hat and ESS, never rounded onto the limit they failed.
fn worst_diagnostics(d: &DiagnosticsSummary) -> String {
    format!(
        "R-hat max {}, bulk ESS min {}, tail ESS min {}",
        against_limit(d.rhat_max, RHAT_LIMIT, 4).0,
        against_limit(d.ess_bulk_min, ESS_LIMIT, 0).0,
        against_limit(d.ess_tail_min, ESS_LIMIT, 0).0
    )
}

/// The Laplace check's line: k-hat against the threshold the verdict uses (as many decimals as it
/// takes to tell them apart), and why k-hat is −∞ or not estimated where it is.
fn laplace_check(c: &LaplaceCheckSummary, indent: &str) {
    let (k, limit) = khat_text(c.khat, c.khat_threshold);
    println!(
        "{indent}Laplace check: Pareto k-hat {k} (reliable below {limit}), Kish ESS {:.0} of {} draws",
        c.kish_ess, c.draws
    );
    if let Some(note) = &c.khat_note {
        println!("{indent}  {note}");
    }
}

/// The verdict: its status and exit code, every reason as a list, then the sentences after the
/// headline (which says the same as the list; the component lists in them are already capped).
pub fn verdict(v: &Verdict) {
    let reasons = if v.reasons.is_empty() {
        "every check passed"
    } else {
        "because"
    };
    println!(
        "verdict: {} (exit code {}), {reasons}",
        v.status.describe(),
        v.exit_code().code()
    );
    for r in &v.reasons {
        println!("  - {}", r.describe());
    }
    for s in v.sentences.iter().skip(1) {
        println!("  {s}");
    }
}

fn chains(s: &Summary) {
    if let (Some(sm), Some(ch)) = (&s.sampling, &s.chains) {
        println!(
            "  {} chains of {} draws, kernel {}, metric {}, warm-up {} iterations{}",
            sm.chains,
            sm.draws_per_chain,
            sm.kernel,
            sm.metric,
            sm.warmup_done,
            sm.warmup_settled_at
                .map_or(String::new(), |a| format!(" (settled at {a})"))
        );
        if let Some(why) = &sm.kernel_reason {
            println!("    kernel: {why}");
        }
        for c in ch {
            println!(
                "    chain {}: acceptance {:.3}, step size {}, divergences {}, rejected (non-finite) {}",
                c.chain,
                c.acceptance,
                c.step_size.map_or("-".into(), |v| format!("{v:.3}")),
                c.divergences,
                c.rejected_nonfinite
            );
        }
    }
}

fn evaluations_by_stage(s: &Summary) {
    let by = &s.evaluations_by_stage;
    let runs = |k: &str| by.get(k).map_or(0, |c| c.model_runs());
    println!(
        "evaluations: {} in all (check {}, analysis {}, Hessian {}, Laplace check {}, warm-up {}, sampling {})",
        s.evaluations.model_runs(),
        runs("check"),
        runs("map"),
        runs("hessian"),
        runs("laplace_check"),
        runs("warmup"),
        runs("sampling")
    );
}

/// The diagnostics table, worst-converged components first, and the verdict.
pub fn report(r: &ReportOutcome, rows: usize) {
    println!(
        "{} components, {} draws per chain; worst-converged first:",
        r.stats.len(),
        r.draws_per_chain
    );
    println!(
        "  {:<14} {:>12} {:>11} {:>11} {:>8} {:>9} {:>9} {:>10}",
        "component", "mean", "sd", "Laplace sd", "R-hat", "bulk ESS", "tail ESS", "MCSE mean"
    );
    for &i in r.order.iter().take(rows) {
        let s = &r.stats[i];
        let lsd = r
            .laplace_std
            .as_ref()
            .map_or("-".to_string(), |l| format!("{:.4e}", l[i]));
        println!(
            "  {:<14} {:>12.5e} {:>11.4e} {:>11} {:>8.4} {:>9.0} {:>9.0} {:>10.3e}",
            r.names[i], s.mean, s.sd, lsd, s.rhat, s.ess_bulk, s.ess_tail, s.mcse_mean
        );
    }
    if r.order.len() > rows {
        println!("  ... {} more in components.csv", r.order.len() - rows);
    }
    verdict(&r.verdict);
    println!("report: {}", r.html.display());
}

/// The demo's story: each stage's result, the standard deviations side by side, the verdict.
pub fn demo(r: &DemoReport, out: &std::path::Path) {
    let s = &r.sample.summary;
    println!("{}", s.description);
    println!("1. gradient test at the background: {}", r.check.verdict);
    println!("2. analysis (L-BFGS):");
    if let Some(m) = &s.map {
        println!(
            "  cost {:.6e} -> {:.6e}; |grad J| {:.3e} -> {:.3e} in {} iterations ({})",
            m.cost_start, m.cost, m.grad_norm_start, m.grad_norm, m.iterations, m.reason
        );
    }
    if let (Some(b), Some(a)) = (r.rmse_background, r.rmse_analysis) {
        println!(
            "   error against the truth (RMSE over {} sites): background {b:.3}, analysis {a:.3}",
            s.dim
        );
    }
    demo_spreads(r);
    if let Some(c) = &s.laplace_check {
        laplace_check(c, "   ");
    }
    if let Some(d) = &s.diagnostics {
        println!("5. diagnostics: {}", worst_diagnostics(d));
    }
    verdict(&r.sample.diagnosis.verdict);
    println!(
        "evaluations: {} model runs in all",
        s.evaluations.model_runs()
    );
    println!("report: {}", r.report.html.display());
    println!(
        "output: {} (summary.json, components.csv, ensemble.nc, report.html)",
        out.display()
    );
}

/// Background, Laplace and posterior standard deviations at every tenth site, and their means.
fn demo_spreads(r: &DemoReport) {
    let s = &r.sample.summary;
    let (Some(l), Some(bv), Some(p)) = (&s.laplace, &s.background_variance, &s.posterior) else {
        return;
    };
    println!(
        "3. Hessian at the analysis ({}), and 4. {} chains ({}): standard deviations per site",
        l.method,
        s.sampling.as_ref().map_or(0, |x| x.chains),
        s.sampling.as_ref().map_or("", |x| x.kernel.as_str())
    );
    println!(
        "   {:>6} {:>10} {:>10} {:>10}",
        "site", "background", "Laplace", "posterior"
    );
    for i in (0..s.dim).step_by((s.dim / 10).max(1)) {
        println!(
            "   {:>6} {:>10.3} {:>10.3} {:>10.3}",
            r.report.names[i],
            bv[i].sqrt(),
            l.variance[i].sqrt(),
            p.variance[i].sqrt()
        );
    }
    let mean = |v: &[f64]| v.iter().map(|x| x.sqrt()).sum::<f64>() / v.len() as f64;
    println!(
        "   mean over sites: background {:.3}, Laplace {:.3}, posterior {:.3} (the observations cut the \
         background error by {:.0}%)",
        mean(bv),
        mean(&l.variance),
        mean(&p.variance),
        100.0 * (1.0 - mean(&l.variance) / mean(bv))
    );
}
