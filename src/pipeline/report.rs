//! The report of a sampling run: components.csv, ensemble.nc, the PNG plots and report.html. `sample`
//! hands over the diagnostics it computed ([`report_after_sample`]); `varpost report` computes them
//! from the folder ([`run_report`]), for a finished or a partial run (the draws files hold every
//! complete draw, cut to the shortest chain).

use std::path::{Path, PathBuf};

use super::assemble;
use super::diagnose::diagnose;
use super::sample::{read_run, SampleOutcome};
use crate::config::RunConfig;
use crate::diagnostics::{
    autocorrelation, khat_text, ComponentStats, KhatReading, LaplaceFacts, RunFacts, RunProgress,
    Status, TargetFacts, Verdict, CONDITIONAL_CAUTION,
};
use crate::error::{Error, Result};
use crate::output::ensemble::{write_ensemble, EnsembleInfo, Member};
use crate::output::html::{write_report, Figure, ReportPage};
use crate::output::plots::{
    autocorrelation_plot, marginal_plot, std_plot, trace_plot, ChainSeries, Marginal,
};
use crate::output::summary::CAUTION;
use crate::output::table::{write_components, ComponentTable};
use crate::output::{worst_first, Summary};
use crate::sampler::draws::FLAG_DIVERGENT;
use crate::sampler::{ChainDraws, Checkpoint, Ensemble, StopReason, WeightedDraws};

/// What the report found and wrote.
pub struct ReportOutcome {
    pub stats: Vec<ComponentStats>,
    pub verdict: Verdict,
    pub names: Vec<String>,
    /// Components in display order, worst-converged first.
    pub order: Vec<usize>,
    pub laplace_std: Option<Vec<f64>>,
    pub html: PathBuf,
    /// Draws per chain the report used.
    pub draws_per_chain: usize,
}

/// How many components get trace, marginal and autocorrelation plots.
const PLOTTED: usize = 4;
/// Lags shown in the autocorrelation plot.
const LAGS: usize = 60;

/// Everything the report is written from.
struct ReportData {
    summary: Summary,
    draws: Ensemble,
    kernel: String,
    stats: Vec<ComponentStats>,
    verdict: Verdict,
    names: Vec<String>,
    analysis: Vec<f64>,
    laplace_std: Option<Vec<f64>>,
    background_std: Option<Vec<f64>>,
}

impl ReportData {
    fn new(
        summary: Summary,
        draws: Ensemble,
        kernel: String,
        stats: Vec<ComponentStats>,
        verdict: Verdict,
    ) -> Self {
        let n = summary.dim;
        let names = summary
            .component_names
            .clone()
            .filter(|v| v.len() == n)
            .unwrap_or_else(|| (0..n).map(|i| format!("x{i}")).collect());
        let analysis = summary
            .map
            .as_ref()
            .map(|m| m.x.clone())
            .unwrap_or_default();
        let sqrt = |v: &Vec<f64>| v.iter().map(|x| x.sqrt()).collect::<Vec<f64>>();
        let laplace_std = summary.laplace.as_ref().map(|l| sqrt(&l.variance));
        let background_std = summary.background_variance.as_ref().map(sqrt);
        ReportData {
            summary,
            draws,
            kernel,
            stats,
            verdict,
            names,
            analysis,
            laplace_std,
            background_std,
        }
    }
}

/// Writes the report files of the run in `dir`, computing its diagnostics from the draws files;
/// `command_line` goes into the NetCDF history.
pub fn run_report(dir: &Path, command_line: &str) -> Result<ReportOutcome> {
    let run = read_run(dir)?;
    let summary = Summary::read(dir)?;
    let chains = run.sampler.chains;
    let draws = ChainDraws::open(dir, chains)?;
    if draws.dim != summary.dim {
        return Err(Error::format(
            dir.join("summary.json"),
            format!(
                "the summary says dimension {} but the draws files hold {} components: the folder's files do not belong together",
                summary.dim, draws.dim
            ),
        ));
    }
    if draws.len < 4 {
        return Err(too_early(dir, &run, &summary, &draws));
    }
    let (stats, _) = diagnose(&Ensemble::Chains(ChainDraws::open(dir, chains)?))?;
    let verdict = verdict_from_disk(dir, &run, &summary, &draws, &stats)?;
    let data = ReportData::new(
        summary,
        Ensemble::Chains(draws),
        run.sampler.kernel.name().into(),
        stats,
        verdict,
    );
    write_all(dir, &data, command_line)
}

/// The verdict on the run in `dir` from its files: the gradient test, the analysis and the Laplace
/// check from summary.json, the divergences from the summary's chains (or, for a partial run, from the
/// draws' flags), and how far a partial run got.
fn verdict_from_disk(
    dir: &Path,
    run: &RunConfig,
    summary: &Summary,
    draws: &ChainDraws,
    stats: &[ComponentStats],
) -> Result<Verdict> {
    let progress = run_progress(dir, run, summary, draws);
    let divergences = match (&summary.chains, &progress) {
        (Some(ch), None) => assemble::chain_divergences(
            ch.iter().map(|c| (c.divergences, c.draws)),
            run.sampler.thin,
        ),
        _ => {
            let flags = draws.per_draw(|r| f64::from(r.flags & FLAG_DIVERGENT != 0))?;
            let per_chain = flags
                .iter()
                .map(|c| (c.iter().sum::<f64>() as u64, c.len() as u64));
            assemble::chain_divergences(per_chain, run.sampler.thin)
        }
    };
    let names = summary
        .component_names
        .clone()
        .filter(|v| v.len() == summary.dim);
    let lap_sd = summary.laplace.as_ref().map(assemble::laplace_sd);
    let facts = RunFacts {
        gradient: assemble::gradient_reading(
            summary.check.as_ref().map(|c| c.passed),
            run.skip_check,
        ),
        analysis: summary.map.as_ref().map(assemble::analysis_reading),
        laplace: lap_sd.as_deref().map(|sd| LaplaceFacts {
            khat: summary.laplace_check.as_ref().map(|c| KhatReading {
                khat: c.khat,
                draws: c.draws,
            }),
            sd,
        }),
        names: names.as_deref(),
        divergences,
        partial: progress,
        target: target_facts(run, summary),
    };
    Ok(Verdict::judge(stats, run.sampler.chains, &facts))
}

/// The target ESS of a run that extended its chains, and what ended it, from summary.json.
fn target_facts(run: &RunConfig, summary: &Summary) -> Option<TargetFacts> {
    let stop = summary.sampling.as_ref()?.stop_reason.as_deref()?;
    let stop = [
        StopReason::TargetMet,
        StopReason::MaxEvaluations,
        StopReason::TimeLimit,
    ]
    .into_iter()
    .find(|r| r.name() == stop)?;
    (run.stop.target_ess > 0).then_some(TargetFacts {
        target_ess: run.stop.target_ess,
        stop: stop.name(),
        cut_short: stop.cut_short(),
    })
}

/// The error for a run whose chains hold too few draws for any diagnostic yet, saying how far it got.
fn too_early(dir: &Path, run: &RunConfig, summary: &Summary, draws: &ChainDraws) -> Error {
    let held = match run_progress(dir, run, summary, draws) {
        Some(p) => {
            let per_chain: Vec<String> = p.draws_per_chain.iter().map(u64::to_string).collect();
            format!(
                "hold {} of the {} planned draws each, after {} model runs so far",
                per_chain.join(", "),
                p.planned,
                p.model_runs
            )
        }
        None => format!("hold {} draws each", draws.len),
    };
    Error::Data(format!(
        "the chains in {} {held}: diagnostics need at least 4 draws per chain (the run is partial, \
         perhaps still in its warm-up); report again later, or continue it with `varpost resume {}`",
        dir.display(),
        dir.display()
    ))
}

/// How far the run got, when some chain holds fewer draws than planned; the model runs are those
/// recorded before the chains plus those of the chains as of their last checkpoint.
fn run_progress(
    dir: &Path,
    run: &RunConfig,
    summary: &Summary,
    draws: &ChainDraws,
) -> Option<RunProgress> {
    let draws_per_chain: Vec<u64> = draws.files().iter().map(|f| f.records).collect();
    // A run extended towards a target whose chains a limit ended (summary.json says where) is not
    // partial: the verdict says the target was not reached.
    let ended_at = summary.sampling.as_ref().and_then(|s| s.draws_reached);
    if run.stop.target_ess > 0 && ended_at.is_some_and(|r| draws_per_chain.iter().all(|&d| d >= r))
    {
        return None;
    }
    let extra = Checkpoint::load(dir).map_or(0, |c| c.extra_draws);
    let planned = run.sampler.draws + extra;
    if draws_per_chain.iter().all(|&d| d >= planned) {
        return None;
    }
    let mut model_runs = summary.evaluations.model_runs();
    if summary.sampling.is_none() {
        // The summary predates the chains: add what the chains spent, as checkpointed.
        if let Ok(ck) = Checkpoint::load(dir) {
            model_runs += ck.counts_warmup.plus(&ck.counts_sampling).model_runs();
        }
    }
    Some(RunProgress {
        draws_per_chain,
        planned,
        model_runs,
    })
}

/// Writes the report files of a weighted ensemble `draws` (importance sampling) with its diagnostics
/// `stats` and `verdict` into `dir`: components.csv, ensemble.nc with a `weight` variable, the
/// marginal and spread plots and report.html. `method` names the sampler in the report.
pub fn report_weighted(
    dir: &Path,
    summary: Summary,
    draws: WeightedDraws,
    method: &str,
    stats: Vec<ComponentStats>,
    verdict: Verdict,
    command_line: &str,
) -> Result<ReportOutcome> {
    if draws.dim() != summary.dim {
        return Err(crate::error::Error::Data(format!(
            "the weighted draws have {} components but the run has dimension {}",
            draws.dim(),
            summary.dim
        )));
    }
    let data = ReportData::new(
        summary,
        Ensemble::Weighted(draws),
        method.into(),
        stats,
        verdict,
    );
    write_all(dir, &data, command_line)
}

/// Writes the report files of a sampling run that just ended, from its own diagnostics.
pub fn report_after_sample(
    dir: &Path,
    outcome: &SampleOutcome,
    command_line: &str,
) -> Result<ReportOutcome> {
    let chains = outcome.result.chains.len();
    let data = ReportData::new(
        outcome.summary.clone(),
        Ensemble::Chains(ChainDraws::open(dir, chains)?),
        outcome.result.kernel.into(),
        outcome.diagnosis.stats.clone(),
        outcome.diagnosis.verdict.clone(),
    );
    write_all(dir, &data, command_line)
}

fn write_all(dir: &Path, d: &ReportData, command_line: &str) -> Result<ReportOutcome> {
    let order = worst_first(&d.stats);
    let table = ComponentTable {
        names: &d.names,
        analysis: &d.analysis,
        background_std: d.background_std.as_deref(),
        laplace_std: d.laplace_std.as_deref(),
        stats: &d.stats,
    };
    write_components(dir, &table)?;
    write_netcdf(dir, d, command_line)?;
    write_plots(dir, d, &order)?;
    let (columns, rows) = table.report_rows(&order);
    let html = write_html(dir, d, &columns, &rows)?;
    Ok(ReportOutcome {
        stats: d.stats.clone(),
        verdict: d.verdict.clone(),
        names: d.names.clone(),
        order,
        laplace_std: d.laplace_std.clone(),
        html,
        draws_per_chain: match &d.draws {
            Ensemble::Chains(c) => c.len,
            Ensemble::Weighted(w) => w.x.len(),
        },
    })
}

/// ensemble.nc, streamed member by member.
fn write_netcdf(dir: &Path, d: &ReportData, command_line: &str) -> Result<()> {
    let pmean: Vec<f64> = d.stats.iter().map(|s| s.mean).collect();
    let pvar: Vec<f64> = d.stats.iter().map(|s| s.sd * s.sd).collect();
    let title = format!("varpost posterior ensemble: {}", d.summary.description);
    let laplace_var = d.summary.laplace.as_ref().map(|l| l.variance.clone());
    let info = EnsembleInfo {
        title: &title,
        command_line,
        analysis: &d.analysis,
        names: Some(&d.names),
        units: None,
        background: d.summary.background.as_deref(),
        background_variance: d.summary.background_variance.as_deref(),
        posterior_mean: Some(&pmean),
        posterior_variance: Some(&pvar),
        laplace_variance: laplace_var.as_deref(),
        weighted: false,
    };
    let chains = match &d.draws {
        Ensemble::Chains(c) => c,
        Ensemble::Weighted(w) => {
            let info = EnsembleInfo {
                weighted: true,
                ..info
            };
            let weights = w.normalized_weights();
            let members = w.x.iter().zip(weights).enumerate().map(|(i, (x, wi))| {
                Ok(Member {
                    chain: 0,
                    draw: i,
                    state: x.clone(),
                    weight: Some(wi),
                })
            });
            write_ensemble(dir, &info, w.x.len(), members)?;
            return Ok(());
        }
    };
    let len = chains.len;
    let mut streams = Vec::new();
    for (c, f) in chains.files().iter().enumerate() {
        let records = f.iter()?.take(len).enumerate();
        streams.push(records.map(move |(i, r)| {
            r.map(|r| Member {
                chain: c,
                draw: i,
                state: r.x,
                weight: None,
            })
        }));
    }
    write_ensemble(
        dir,
        &info,
        len * chains.chains(),
        streams.into_iter().flatten(),
    )?;
    Ok(())
}

/// Trace, autocorrelation and marginal plots of the least-converged components, and the standard
/// deviations of every component. A weighted ensemble has no chains to trace: its marginals are drawn
/// from the weighted draws resampled, and the trace and autocorrelation plots are left out.
fn write_plots(dir: &Path, d: &ReportData, order: &[usize]) -> Result<()> {
    let top: Vec<usize> = order
        .iter()
        .copied()
        .take(PLOTTED.min(d.names.len()))
        .collect();
    let comp = plotted_series(d, &top)?;
    let labels: Vec<String> = top
        .iter()
        .map(|&i| {
            let s = &d.stats[i];
            match d.draws {
                Ensemble::Chains(_) => format!(
                    "{} (R-hat {:.3}, bulk ESS {:.0})",
                    d.names[i], s.rhat, s.ess_bulk
                ),
                Ensemble::Weighted(_) => format!("{} (ESS {:.0})", d.names[i], s.ess_bulk),
            }
        })
        .collect();
    let cs: Vec<ChainSeries> = labels
        .iter()
        .zip(&comp)
        .map(|(l, c)| ChainSeries {
            label: l,
            chains: c,
        })
        .collect();
    if matches!(d.draws, Ensemble::Chains(_)) {
        chain_plots(dir, &labels, &cs, &comp)?;
    }
    let marginals: Vec<Marginal> = cs
        .iter()
        .zip(&top)
        .map(|(s, &i)| Marginal {
            series: ChainSeries {
                label: s.label,
                chains: s.chains,
            },
            analysis: d.analysis.get(i).copied().unwrap_or(f64::NAN),
            laplace_std: d.laplace_std.as_ref().map(|l| l[i]),
        })
        .collect();
    marginal_plot(&dir.join("marginals.png"), &marginals)?;
    let pstd: Vec<f64> = d.stats.iter().map(|s| s.sd).collect();
    std_plot(
        &dir.join("std.png"),
        &pstd,
        d.laplace_std.as_deref(),
        d.background_std.as_deref(),
    )?;
    Ok(())
}

/// The values of components `top`, per component a list of series: one per chain, or the one series of
/// the weighted draws resampled (equally weighted).
fn plotted_series(d: &ReportData, top: &[usize]) -> Result<Vec<Vec<Vec<f64>>>> {
    Ok(match &d.draws {
        Ensemble::Chains(c) => {
            let per_chain = c.components(top)?;
            (0..top.len())
                .map(|j| per_chain.iter().map(|c| c[j].clone()).collect())
                .collect()
        }
        Ensemble::Weighted(w) => {
            let picks = systematic_resample(&w.normalized_weights());
            top.iter()
                .map(|&i| vec![picks.iter().map(|&k| w.x[k][i]).collect()])
                .collect()
        }
    })
}

/// trace.png and autocorrelation.png of chains.
fn chain_plots(
    dir: &Path,
    labels: &[String],
    cs: &[ChainSeries<'_>],
    comp: &[Vec<Vec<f64>>],
) -> Result<()> {
    trace_plot(&dir.join("trace.png"), cs)?;
    let acf: Vec<Vec<Vec<f64>>> = comp
        .iter()
        .map(|ch| {
            ch.iter()
                .map(|c| autocorrelation(c).into_iter().take(LAGS).collect())
                .collect()
        })
        .collect();
    let acs: Vec<ChainSeries> = labels
        .iter()
        .zip(&acf)
        .map(|(l, c)| ChainSeries {
            label: l,
            chains: c,
        })
        .collect();
    autocorrelation_plot(&dir.join("autocorrelation.png"), &acs)?;
    Ok(())
}

/// Indices of draws picked by systematic resampling of normalised `weights` (Douc, Cappé & Moulines
/// 2005, "Comparison of resampling schemes for particle filtering"), as many as there are weights,
/// with the fixed offset 1/2 so that the report is the same on every run: draw k is picked
/// floor(M w_k) or ceil(M w_k) times.
fn systematic_resample(weights: &[f64]) -> Vec<usize> {
    let m = weights.len();
    let mut picks = Vec::with_capacity(m);
    let mut cum = 0.0;
    let mut k = 0;
    for j in 0..m {
        let u = (j as f64 + 0.5) / m as f64;
        while k < m && cum + weights[k] <= u {
            cum += weights[k];
            k += 1;
        }
        picks.push(k.min(m - 1));
    }
    picks
}

/// report.html.
fn write_html(
    dir: &Path,
    d: &ReportData,
    columns: &[String],
    rows: &[Vec<String>],
) -> Result<PathBuf> {
    let figures = [
        (
            "std.png",
            "Posterior, Laplace (inverse Hessian) and background standard deviation per component",
        ),
        (
            "trace.png",
            "Trace plots of the least-converged components, one line per chain",
        ),
        (
            "marginals.png",
            "Marginal histograms with the Laplace Gaussian drawn over them",
        ),
        (
            "autocorrelation.png",
            "Autocorrelation per chain of the least-converged components",
        ),
    ]
    .map(|(file, caption)| Figure { file, caption });
    // A weighted ensemble has no chains to trace (see write_plots).
    let chains = matches!(d.draws, Ensemble::Chains(_));
    let figures: Vec<Figure> = figures
        .into_iter()
        .filter(|f| chains || (f.file != "trace.png" && f.file != "autocorrelation.png"))
        .collect();
    let metadata = report_metadata(d);
    let text: Vec<&str> = d
        .verdict
        .sentences
        .iter()
        .map(String::as_str)
        .filter(|s| *s != CONDITIONAL_CAUTION)
        .collect();
    let text = text.join(" ");
    let page_title = format!("varpost report: {}", d.summary.problem);
    let page = ReportPage {
        title: &page_title,
        verdict: &text,
        // Green only when every check passed; warnings are drawn neutral, the rest red.
        passed: match d.verdict.status {
            Status::Converged => Some(true),
            Status::ConvergedWithWarnings => None,
            Status::NotConverged | Status::Partial => Some(false),
        },
        caution: CAUTION,
        columns,
        rows,
        max_rows: 50,
        metadata: &metadata,
        figures: &figures,
    };
    write_report(dir, &page)
}

fn report_metadata(d: &ReportData) -> Vec<(String, String)> {
    let s = &d.summary;
    let mut metadata = vec![
        ("problem".to_string(), s.description.clone()),
        match &d.draws {
            Ensemble::Chains(c) => (
                "chains".to_string(),
                format!(
                    "{} chains x {} draws ({} kernel)",
                    c.chains(),
                    c.len,
                    d.kernel
                ),
            ),
            Ensemble::Weighted(w) => (
                "ensemble".to_string(),
                format!("{} weighted draws ({})", w.x.len(), d.kernel),
            ),
        },
        (
            "evaluations".to_string(),
            format!("{} model runs", s.evaluations.model_runs()),
        ),
    ];
    if let Some(c) = &s.laplace_check {
        let (k, limit) = khat_text(c.khat, c.khat_threshold);
        let note = c
            .khat_note
            .as_ref()
            .map_or(String::new(), |n| format!(" ({n})"));
        metadata.push((
            "Laplace check".into(),
            format!(
                "Pareto k-hat {k} (reliable below {limit}){note}, Kish ESS {:.0} of {}",
                c.kish_ess, c.draws
            ),
        ));
    }
    let status = d.verdict.status.describe();
    metadata.push((
        "status".into(),
        format!("{status} (exit code {})", d.verdict.exit_code().code()),
    ));
    metadata
}
