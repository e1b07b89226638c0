//! Writing every output of a sampling run from the chains' draws files: components.csv, ensemble.nc,
//! the pictures and report.html. Samples a small linear-Gaussian problem with MALA first.
//!
//! Run with `cargo run --example report_from_draws -- OUT_DIR`.

use std::path::PathBuf;
use std::sync::Arc;

use varpost::diagnostics::{
    autocorrelation, component_stats, ComponentStats, Status, Verdict, CONDITIONAL_CAUTION,
};
use varpost::interrupt::Interrupt;
use varpost::output::ensemble::{write_ensemble, EnsembleInfo, Member};
use varpost::output::html::{write_report, Figure, ReportPage};
use varpost::output::plots::{
    autocorrelation_plot, marginal_plot, std_plot, trace_plot, ChainSeries, Marginal,
};
use varpost::output::summary::CAUTION;
use varpost::output::table::{write_components, ComponentTable};
use varpost::output::worst_first;
use varpost::precond::IdentityPrecond;
use varpost::problem::linear_gaussian::{LinearGaussian, LinearGaussianConfig};
use varpost::problem::{Counted, Problem};
use varpost::sampler::{open_chains, run, KernelKind, SampleConfig, Target};

/// One labelled panel per component: `data[k][chain][i]`.
fn series<'a>(data: &[&'a Vec<Vec<f64>>], labels: &'a [String]) -> Vec<ChainSeries<'a>> {
    data.iter()
        .zip(labels)
        .map(|(d, l)| ChainSeries {
            label: l,
            chains: d,
        })
        .collect()
}

fn main() -> varpost::Result<()> {
    let dir = PathBuf::from(std::env::args().nth(1).unwrap_or("report-example".into()));
    let n = 12;
    let lg = LinearGaussian::new(LinearGaussianConfig {
        n,
        m: 8,
        rank: 6,
        ..Default::default()
    })?;
    let reference = lg.reference()?;
    let (xb, bvar) = match lg.prior() {
        Some(p) => (p.mean().to_vec(), p.variance()),
        None => return Err(varpost::Error::Config("the problem has no prior".into())),
    };
    let x_star = reference.mean.clone();
    let problem = Counted::new(lg);
    let target = Target::new(
        &problem,
        "linear-gaussian",
        x_star.clone(),
        Arc::new(IdentityPrecond::new(n)),
    )?;
    let config = SampleConfig {
        kernel: KernelKind::Mala,
        warmup: 300,
        draws: 800,
        ..Default::default()
    };
    run(
        &target,
        &config,
        &dir,
        None,
        &Interrupt::new(),
        &|_, _, _| {},
    )?;

    // Per component and chain: comp[i][c] holds the draws of component i in chain c.
    let files = open_chains(&dir, config.chains)?;
    let all: Vec<usize> = (0..n).collect();
    let per_chain = files
        .iter()
        .map(|f| f.components(&all))
        .collect::<varpost::Result<Vec<_>>>()?;
    let comp: Vec<Vec<Vec<f64>>> = (0..n)
        .map(|i| per_chain.iter().map(|c| c[i].clone()).collect())
        .collect();
    let stats = comp
        .iter()
        .map(|c| component_stats(&c.iter().map(Vec::as_slice).collect::<Vec<_>>()))
        .collect::<varpost::Result<Vec<ComponentStats>>>()?;
    let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
    let (lstd, bstd): (Vec<f64>, Vec<f64>) = (
        reference.variance.iter().map(|v| v.sqrt()).collect(),
        bvar.iter().map(|v| v.sqrt()).collect(),
    );

    // Pictures of the three least-converged components.
    let order = worst_first(&stats);
    let top = &order[..3];
    let labels: Vec<String> = top
        .iter()
        .map(|&i| {
            let s = &stats[i];
            format!(
                "{} (R-hat {:.3}, bulk ESS {:.0})",
                names[i], s.rhat, s.ess_bulk
            )
        })
        .collect();
    let draws: Vec<&Vec<Vec<f64>>> = top.iter().map(|&i| &comp[i]).collect();
    trace_plot(&dir.join("trace.png"), &series(&draws, &labels))?;
    let acf: Vec<Vec<Vec<f64>>> = draws
        .iter()
        .map(|d| {
            d.iter()
                .map(|c| autocorrelation(c)[..60].to_vec())
                .collect()
        })
        .collect();
    autocorrelation_plot(
        &dir.join("autocorrelation.png"),
        &series(&acf.iter().collect::<Vec<_>>(), &labels),
    )?;
    let marginals: Vec<Marginal> = series(&draws, &labels)
        .into_iter()
        .zip(top)
        .map(|(s, &i)| Marginal {
            series: s,
            analysis: x_star[i],
            laplace_std: Some(lstd[i]),
        })
        .collect();
    marginal_plot(&dir.join("marginals.png"), &marginals)?;
    let pstd: Vec<f64> = stats.iter().map(|s| s.sd).collect();
    std_plot(&dir.join("std.png"), &pstd, Some(&lstd), Some(&bstd))?;

    // components.csv and ensemble.nc (members streamed from the draws files).
    let table = ComponentTable {
        names: &names,
        analysis: &x_star,
        background_std: Some(&bstd),
        laplace_std: Some(&lstd),
        stats: &stats,
    };
    write_components(&dir, &table)?;
    let pmean: Vec<f64> = stats.iter().map(|s| s.mean).collect();
    let pvar: Vec<f64> = pstd.iter().map(|s| s * s).collect();
    let info = EnsembleInfo {
        title: "varpost posterior ensemble: linear-gaussian",
        command_line: "cargo run --example report_from_draws",
        analysis: &x_star,
        names: Some(&names),
        units: None,
        background: Some(&xb),
        background_variance: Some(&bvar),
        posterior_mean: Some(&pmean),
        posterior_variance: Some(&pvar),
        laplace_variance: Some(&reference.variance),
    };
    let total: usize = files.iter().map(|f| f.records as usize).sum();
    let mut streams = Vec::new();
    for (c, f) in files.iter().enumerate() {
        let records = f.iter()?.enumerate();
        streams.push(records.map(move |(d, r)| {
            r.map(|r| Member {
                chain: c,
                draw: d,
                state: r.x,
            })
        }));
    }
    write_ensemble(&dir, &info, total, streams.into_iter().flatten())?;

    // The report page.
    let verdict = Verdict::from_components(&stats, config.chains, None);
    let (columns, rows) = table.report_rows(&order);
    let figures = [
        ("trace.png", "Trace plots of the least-converged components"),
        ("autocorrelation.png", "Autocorrelation per chain"),
        (
            "marginals.png",
            "Marginals against the Laplace approximation",
        ),
        ("std.png", "Standard deviations per component"),
    ]
    .map(|(file, caption)| Figure { file, caption });
    let metadata = vec![
        ("problem".to_string(), format!("linear-gaussian, n = {n}")),
        (
            "sampler".to_string(),
            format!("MALA, {} chains x {} draws", config.chains, config.draws),
        ),
    ];
    // The verdict ends with its own caution; the page shows the caution on its own.
    let sentences: Vec<&str> = verdict
        .sentences
        .iter()
        .map(String::as_str)
        .filter(|s| *s != CONDITIONAL_CAUTION)
        .collect();
    let text = sentences.join(" ");
    let page = ReportPage {
        title: "varpost report: linear-gaussian",
        verdict: &text,
        passed: Some(verdict.status == Status::Converged),
        caution: CAUTION,
        columns: &columns,
        rows: &rows,
        max_rows: 50,
        metadata: &metadata,
        figures: &figures,
    };
    let path = write_report(&dir, &page)?;
    println!("{}", path.display());
    Ok(())
}
