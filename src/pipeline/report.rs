//! The report of a sampling run, from its folder: components.csv, ensemble.nc, the PNG plots and
//! report.html. It works on a finished run and on a partial one (a run still going, interrupted or
//! killed): the draws files hold every complete draw, cut to the shortest chain.

use std::path::{Path, PathBuf};

use super::sample::{diagnose, read_run};
use crate::diagnostics::{autocorrelation, ComponentStats, Status, Verdict, CONDITIONAL_CAUTION};
use crate::error::Result;
use crate::output::ensemble::{write_ensemble, EnsembleInfo, Member};
use crate::output::html::{write_report, Figure, ReportPage};
use crate::output::plots::{
    autocorrelation_plot, marginal_plot, std_plot, trace_plot, ChainSeries, Marginal,
};
use crate::output::summary::CAUTION;
use crate::output::table::{write_components, ComponentTable};
use crate::output::{worst_first, Summary};
use crate::sampler::open_chains;

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

/// Writes the report files of the run in `dir`; `command_line` goes into the NetCDF history.
pub fn run_report(dir: &Path, command_line: &str) -> Result<ReportOutcome> {
    let run = read_run(dir)?;
    let summary = Summary::read(dir)?;
    let chains = run.sampler.chains;
    let n = summary.dim;
    let (stats, _) = diagnose(dir, chains, n)?;
    let names: Vec<String> = summary
        .component_names
        .clone()
        .filter(|v| v.len() == n)
        .unwrap_or_else(|| (0..n).map(|i| format!("x{i}")).collect());
    let analysis: Vec<f64> = summary
        .map
        .as_ref()
        .map(|m| m.x.clone())
        .unwrap_or_default();
    let laplace_var = summary.laplace.as_ref().map(|l| l.variance.clone());
    let laplace_std: Option<Vec<f64>> = laplace_var
        .as_ref()
        .map(|v| v.iter().map(|x| x.sqrt()).collect());
    let background_std: Option<Vec<f64>> = summary
        .background_variance
        .as_ref()
        .map(|v| v.iter().map(|x| x.sqrt()).collect());
    let khat = summary.laplace_check.as_ref().map(|c| c.khat);
    let verdict = Verdict::from_components(&stats, chains, khat);
    let order = worst_first(&stats);

    // components.csv
    let table = ComponentTable {
        names: &names,
        analysis: &analysis,
        background_std: background_std.as_deref(),
        laplace_std: laplace_std.as_deref(),
        stats: &stats,
    };
    write_components(dir, &table)?;

    // ensemble.nc, streamed member by member.
    let files = open_chains(dir, chains)?;
    let len = files.iter().map(|f| f.records as usize).min().unwrap_or(0);
    let pmean: Vec<f64> = stats.iter().map(|s| s.mean).collect();
    let pvar: Vec<f64> = stats.iter().map(|s| s.sd * s.sd).collect();
    let title = format!("varpost posterior ensemble: {}", summary.description);
    let info = EnsembleInfo {
        title: &title,
        command_line,
        analysis: &analysis,
        names: Some(&names),
        units: None,
        background: summary.background.as_deref(),
        background_variance: summary.background_variance.as_deref(),
        posterior_mean: Some(&pmean),
        posterior_variance: Some(&pvar),
        laplace_variance: laplace_var.as_deref(),
    };
    let mut streams = Vec::new();
    for (c, f) in files.iter().enumerate() {
        let records = f.iter()?.take(len).enumerate();
        streams.push(records.map(move |(d, r)| {
            r.map(|r| Member {
                chain: c,
                draw: d,
                state: r.x,
            })
        }));
    }
    write_ensemble(dir, &info, len * files.len(), streams.into_iter().flatten())?;

    // Plots of the least-converged components.
    let top: Vec<usize> = order.iter().copied().take(PLOTTED.min(n)).collect();
    let per_chain: Vec<Vec<Vec<f64>>> = files
        .iter()
        .map(|f| {
            f.components(&top).map(|mut c| {
                c.iter_mut().for_each(|v| v.truncate(len));
                c
            })
        })
        .collect::<Result<_>>()?;
    let comp: Vec<Vec<Vec<f64>>> = (0..top.len())
        .map(|j| per_chain.iter().map(|c| c[j].clone()).collect())
        .collect();
    let labels: Vec<String> = top
        .iter()
        .map(|&i| {
            format!(
                "{} (R-hat {:.3}, bulk ESS {:.0})",
                names[i], stats[i].rhat, stats[i].ess_bulk
            )
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
    trace_plot(&dir.join("trace.png"), &cs)?;
    let acf: Vec<Vec<Vec<f64>>> = comp
        .iter()
        .map(|d| {
            d.iter()
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
    let marginals: Vec<Marginal> = cs
        .iter()
        .zip(&top)
        .map(|(s, &i)| Marginal {
            series: ChainSeries {
                label: s.label,
                chains: s.chains,
            },
            analysis: analysis.get(i).copied().unwrap_or(f64::NAN),
            laplace_std: laplace_std.as_ref().map(|l| l[i]),
        })
        .collect();
    marginal_plot(&dir.join("marginals.png"), &marginals)?;
    let pstd: Vec<f64> = stats.iter().map(|s| s.sd).collect();
    std_plot(
        &dir.join("std.png"),
        &pstd,
        laplace_std.as_deref(),
        background_std.as_deref(),
    )?;

    // report.html
    let (columns, rows) = table.report_rows(&order);
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
    let mut metadata = vec![
        ("problem".to_string(), summary.description.clone()),
        (
            "chains".to_string(),
            format!(
                "{chains} chains x {len} draws ({} kernel)",
                run.sampler.kernel.name()
            ),
        ),
        (
            "evaluations".to_string(),
            format!("{} model runs", summary.evaluations.model_runs()),
        ),
    ];
    if let Some(c) = &summary.laplace_check {
        metadata.push((
            "Laplace check".into(),
            format!(
                "Pareto k-hat {:.2} (reliable below {:.2}), Kish ESS {:.0} of {}",
                c.khat, c.khat_threshold, c.kish_ess, c.draws
            ),
        ));
    }
    if summary.diagnostics.is_none() {
        metadata.push((
            "state".into(),
            "partial run: the chains have not finished".into(),
        ));
    }
    let text: Vec<&str> = verdict
        .sentences
        .iter()
        .map(String::as_str)
        .filter(|s| *s != CONDITIONAL_CAUTION)
        .collect();
    let text = text.join(" ");
    let page_title = format!("varpost report: {}", summary.problem);
    let page = ReportPage {
        title: &page_title,
        verdict: &text,
        passed: Some(verdict.status == Status::Converged),
        caution: CAUTION,
        columns: &columns,
        rows: &rows,
        max_rows: 50,
        metadata: &metadata,
        figures: &figures,
    };
    let html = write_report(dir, &page)?;
    Ok(ReportOutcome {
        stats,
        verdict,
        names,
        order,
        laplace_std,
        html,
        draws_per_chain: len,
    })
}
