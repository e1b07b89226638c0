//! The Markdown report: one table row per run, then the targets with PASS / MISS.

use std::fmt::Write;

use crate::matrix::{BURGERS, L96_LINEAR, L96_SQUARE, LG};
use crate::run::{Outcome, Spec, CHAINS};
use crate::scaling::Scaling;

type Row = (Spec, Result<Outcome, String>);

/// Min bulk ESS per 1000 model evaluations.
fn bulk_per_k(o: &Outcome) -> f64 {
    1000.0 * o.min_ess_bulk / o.evaluations.max(1) as f64
}

fn opt(v: Option<f64>, digits: usize) -> String {
    v.map_or("–".to_string(), |x| format!("{x:.digits$}"))
}

pub fn markdown(
    quick: bool,
    notes: &[String],
    rows: &[Row],
    scaling: &Result<Scaling, String>,
    total_s: f64,
) -> String {
    let mut s = String::new();
    let (warmup, draws) = rows.first().map_or((0, 0), |(sp, _)| (sp.warmup, sp.draws));
    let _ = writeln!(
        s,
        "{CHAINS} chains per run, {warmup} warm-up iterations (nuts-rs: tuning draws) and {draws} kept \
         draws per chain, seed 1. Evaluations are model runs over the whole run (a cost-only and a \
         cost + gradient call count one each; Hessian-vector products are finite differences of two \
         gradients). varpost runs count the gradient check, the analysis (L-BFGS from the background), \
         the preconditioner and the sampling; nuts-rs runs count every log-density call, tuning \
         included, with all chains started at the background, in model space. ESS is the minimum over \
         components of varpost's bulk / tail ESS on the kept draws (the same code for both samplers). \
         Peak memory is VmHWM of the run's own process, diagnostics included.\n"
    );
    for n in notes {
        let _ = writeln!(s, "- {n}");
    }
    let _ = writeln!(s);
    let _ = writeln!(
        s,
        "| problem | sampler | preconditioner | min bulk ESS | min tail ESS | bulk ESS / 1000 evals | \
         tail ESS / 1000 evals | evaluations (setup) | max R-hat | divergences | wall s | peak MB | \
         mean err (sd) | var err (rel) |"
    );
    let _ = writeln!(s, "|{}", "---|".repeat(14));
    for (sp, r) in rows {
        match r {
            Ok(o) => {
                let _ = writeln!(
                    s,
                    "| {} | {} | {} | {:.0} | {:.0} | {:.2} | {:.2} | {} ({}) | {:.3} | {} | {:.1} | {:.0} | {} | {} |",
                    sp.case,
                    sp.sampler,
                    sp.precond,
                    o.min_ess_bulk,
                    o.min_ess_tail,
                    bulk_per_k(o),
                    1000.0 * o.min_ess_tail / o.evaluations.max(1) as f64,
                    o.evaluations,
                    o.evaluations_setup,
                    o.max_rhat,
                    o.divergences,
                    o.wall_s,
                    o.peak_kb as f64 / 1024.0,
                    opt(o.mean_err_sd, 3),
                    opt(o.var_rel_err, 3),
                );
            }
            Err(e) => {
                let _ = writeln!(
                    s,
                    "| {} | {} | {} | failed: {} |{}",
                    sp.case,
                    sp.sampler,
                    sp.precond,
                    e.replace('|', "/"),
                    " |".repeat(10)
                );
            }
        }
    }
    let _ = writeln!(s);
    match scaling {
        Ok(sc) => {
            let _ = writeln!(
                s,
                "Parallel chains: 2 MALA chains × {} iterations on the linear-Gaussian problem (n = {}), \
                 best of 3: {:.2} s on a 1-thread pool, {:.2} s on a 2-thread pool, speed-up {:.2}× (1-minute load \
                 average before timing: {:.2}).\n",
                sc.iterations_per_chain,
                sc.dim,
                sc.one_thread_s,
                sc.two_threads_s,
                sc.speedup,
                sc.load_before
            );
        }
        Err(e) => {
            let _ = writeln!(s, "Parallel chains: failed: {e}\n");
        }
    }
    let _ = writeln!(s, "## Targets\n");
    if quick {
        let _ = writeln!(
            s,
            "Quick mode: the verdicts below are of the quick figures and do not judge the targets.\n"
        );
    }
    for t in targets(rows, scaling) {
        let _ = writeln!(s, "- {t}");
    }
    let _ = writeln!(s, "\nWhole benchmark: {total_s:.0} s.");
    s
}

fn verdict(ok: bool) -> &'static str {
    if ok {
        "PASS"
    } else {
        "MISS"
    }
}

/// The best successful run of a case matching `pick`, by min bulk ESS per 1000 evaluations.
fn best<'a>(
    rows: &'a [Row],
    case: &str,
    pick: impl Fn(&Spec) -> bool,
) -> Option<(&'a Spec, &'a Outcome)> {
    rows.iter()
        .filter(|(sp, _)| sp.case == case && pick(sp))
        .filter_map(|(sp, r)| r.as_ref().ok().map(|o| (sp, o)))
        .max_by(|a, b| bulk_per_k(a.1).total_cmp(&bulk_per_k(b.1)))
}

fn targets(rows: &[Row], scaling: &Result<Scaling, String>) -> Vec<String> {
    let mut out = Vec::new();
    let hessian = |sp: &Spec| !sp.is_nuts() && (sp.precond == "dense" || sp.precond == "low-rank");
    for (case, factor) in [(LG, 20.0), (L96_LINEAR, 5.0), (L96_SQUARE, 5.0)] {
        let v = best(rows, case, hessian);
        let n = best(rows, case, |sp| sp.is_nuts());
        out.push(match (v, n) {
            (Some((vs, vo)), Some((ns, no))) => {
                let ratio = bulk_per_k(vo) / bulk_per_k(no);
                format!(
                    "{case}: Hessian-preconditioned varpost ≥ {factor}× the better nuts-rs adaptation in \
                     min bulk ESS per 1000 evaluations: best varpost {} / {} {:.2}, best nuts-rs {} {:.2}, \
                     ratio {ratio:.1}× — {}",
                    vs.sampler,
                    vs.precond,
                    bulk_per_k(vo),
                    ns.sampler,
                    bulk_per_k(no),
                    verdict(ratio >= factor)
                )
            }
            _ => format!("{case}: ≥ {factor}× nuts-rs — not judged (a run is missing or failed)"),
        });
    }
    let lmh = rows
        .iter()
        .find(|(sp, _)| sp.case == LG && sp.sampler == "laplace-mh" && sp.precond == "low-rank");
    out.push(match lmh {
        Some((_, Ok(o))) => {
            let per_draw = o.min_ess_bulk / o.kept_draws.max(1) as f64;
            format!(
                "{LG}: Laplace-MH (low-rank) min bulk ESS per draw ≥ 0.8: {per_draw:.2} — {}",
                verdict(per_draw >= 0.8)
            )
        }
        _ => format!(
            "{LG}: Laplace-MH ESS per draw ≥ 0.8 — not judged (the run is missing or failed)"
        ),
    });
    let burgers: Vec<&Row> = rows
        .iter()
        .filter(|(sp, _)| sp.case == BURGERS && sp.precond == "low-rank")
        .collect();
    if burgers.is_empty() {
        out.push(format!(
            "{BURGERS}: not run (the problem is not in this build) — not judged"
        ));
    }
    for (sp, r) in burgers {
        out.push(match r {
            Ok(o) => {
                let ok = o.wall_s < 600.0 && o.min_ess_bulk >= 400.0 && o.peak_kb < 1024 * 1024;
                format!(
                    "{BURGERS} ({} / low-rank): < 10 min, min bulk ESS ≥ 400, peak memory < 1 GB: \
                     {:.0} s, {:.0}, {:.0} MB — {}",
                    sp.sampler,
                    o.wall_s,
                    o.min_ess_bulk,
                    o.peak_kb as f64 / 1024.0,
                    verdict(ok)
                )
            }
            Err(e) => format!("{BURGERS} ({} / low-rank): failed: {e} — MISS", sp.sampler),
        });
    }
    out.push(match scaling {
        Ok(sc) => format!(
            "parallel chains: 2 chains on 2 threads ≥ 1.8× as fast as on 1: {:.2}× — {}",
            sc.speedup,
            verdict(sc.speedup >= 1.8)
        ),
        Err(e) => format!("parallel chains: failed: {e} — MISS"),
    });
    out
}
