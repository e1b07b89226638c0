//! Using varpost in-process: a cost function of your own, implemented as `Problem`, through the
//! stages one by one (gradient test, analysis, Laplace covariance, chains, diagnostics).
//!
//! Run with `cargo run --example in_process`. The toy problem: a control vector x of 3 components with
//! background N(0, I) and two observations of nonlinear functions of it, y1 = x0 x1 and y2 = x1 + x2²,
//! so the posterior is not Gaussian: the sign of x2 is not observed, and the posterior has two modes,
//! x2 ≈ ±0.66. The chains move between them only rarely, and the verdict at the end says so: an
//! example of the diagnostics refusing an ensemble that the Laplace picture (one Gaussian around one
//! analysis) would have misdescribed.

use std::sync::Arc;

use varpost::diagnostics::{
    component_stats, AnalysisReading, GradientTest, LaplaceFacts, RunFacts, Verdict,
};
use varpost::optimize::{find_map, MapConfig};
use varpost::precond::{laplace, LaplaceOptions};
use varpost::problem::check::gradient_test;
use varpost::problem::{Counted, DiagonalPrior, Prior, Problem};
use varpost::sampler::{component_per_chain, run, KernelKind, SampleConfig, Target};
use varpost::EvalError;
use varpost::Interrupt;

struct MyCost {
    prior: DiagonalPrior,
    y: [f64; 2],
    sigma_o: f64,
}

impl Problem for MyCost {
    fn dim(&self) -> usize {
        3
    }
    fn cost_grad(&self, x: &[f64], g: &mut [f64]) -> Result<f64, EvalError> {
        // J = 1/2 |x - xb|^2 + 1/2 sum (y - h(x))^2 / sigma_o^2, with its gradient by hand.
        let w = 1.0 / (self.sigma_o * self.sigma_o);
        let d1 = self.y[0] - x[0] * x[1];
        let d2 = self.y[1] - (x[1] + x[2] * x[2]);
        g[0] = x[0] - w * d1 * x[1];
        g[1] = x[1] - w * d1 * x[0] - w * d2;
        g[2] = x[2] - w * d2 * 2.0 * x[2];
        Ok(0.5 * (x[0] * x[0] + x[1] * x[1] + x[2] * x[2]) + 0.5 * w * (d1 * d1 + d2 * d2))
    }
    fn prior(&self) -> Option<&dyn Prior> {
        Some(&self.prior)
    }
}

fn main() -> varpost::Result<()> {
    let out = std::env::temp_dir().join("varpost-in-process-example");
    let _ = std::fs::remove_dir_all(&out);
    let problem = Counted::new(MyCost {
        prior: DiagonalPrior::new(vec![0.0; 3], vec![1.0; 3])?,
        y: [0.8, 1.5],
        sigma_o: 0.3,
    });
    let xb = vec![0.0, 0.5, 0.5];
    let check = gradient_test(&problem, &xb, 1)?;
    println!("gradient test: {}", check.verdict);
    let map = find_map(&problem, &xb, &MapConfig::default())?;
    println!("analysis {:?} ({})", map.x, map.reason);
    let lap = laplace(&problem, &map.x, &map.pairs, &LaplaceOptions::default())?;
    let sd: Vec<f64> = lap.variance.iter().map(|v| v.sqrt()).collect();
    println!("Laplace standard deviations: {sd:?}");
    let target = Target::new(&problem, "my-cost", map.x.clone(), Arc::from(lap.precond))?;
    let config = SampleConfig {
        kernel: KernelKind::Hmc,
        ..Default::default()
    };
    let result = run(
        &target,
        &config,
        &out,
        None,
        &Interrupt::new(),
        &|_, _, _| {},
    )?;
    let mut stats = Vec::new();
    for i in 0..3 {
        let chains = component_per_chain(&out, config.chains, i)?;
        let slices: Vec<&[f64]> = chains.iter().map(Vec::as_slice).collect();
        stats.push(component_stats(&slices)?);
    }
    for (i, s) in stats.iter().enumerate() {
        println!(
            "x{i}: posterior mean {:.3}, sd {:.3} (R-hat {:.3}, bulk ESS {:.0})",
            s.mean, s.sd, s.rhat, s.ess_bulk
        );
    }
    // The verdict on what ran here: the gradient test, the analysis, the Laplace standard deviations
    // (no importance check was run, so the Laplace approximation stays unjudged) and the chains.
    let facts = RunFacts {
        gradient: Some(if check.passed {
            GradientTest::Passed
        } else {
            GradientTest::Failed
        }),
        analysis: Some(AnalysisReading {
            converged: map.converged,
            reason: map.reason.to_string(),
            iterations: map.iterations,
        }),
        laplace: Some(LaplaceFacts {
            khat: None,
            sd: &sd,
        }),
        ..Default::default()
    };
    println!("{}", Verdict::judge(&stats, config.chains, &facts).text());
    println!(
        "evaluations: {} model runs ({} while sampling)",
        problem.counts().model_runs(),
        result.counts_sampling.model_runs()
    );
    Ok(())
}
