//! Parallel chains: the same two chains timed on a rayon pool of one thread and of two threads.

use std::sync::Arc;
use std::time::Instant;

use serde::{Deserialize, Serialize};
use varpost::precond::{IdentityPrecond, Preconditioner};
use varpost::sampler::{self, KernelKind, SampleConfig, Target};
use varpost::Interrupt;
use varpost::{Counted, Problem};

use crate::matrix::lg_settings;
use crate::run::{open, GradientOnly};

/// Wall times of the sampling stage (no analysis, no preconditioner build).
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Scaling {
    pub dim: usize,
    pub iterations_per_chain: u64,
    pub one_thread_s: f64,
    pub two_threads_s: f64,
    pub speedup: f64,
    /// The 1-minute load average before the timing (other work on the machine distorts it).
    pub load_before: f64,
}

/// Two MALA chains on the linear-Gaussian problem, started at its closed-form posterior mean with
/// the identity preconditioner, on 1 and then on 2 threads.
pub fn run(quick: bool) -> Result<Scaling, String> {
    let (problem, reference) = open("linear-gaussian", &lg_settings(quick))?;
    let x_star = reference
        .ok_or("the linear-Gaussian problem gave no closed form")?
        .mean;
    // Thinning keeps the draws files small while the chains run long enough to time.
    let (warmup, draws, thin) = if quick { (50, 200, 1) } else { (500, 2000, 10) };
    let load_before = load_average();
    // Each timing is the best of three, alternating 1 and 2 threads, so that a burst of other work on
    // the machine spoils one repetition rather than the comparison.
    let mut times = [f64::INFINITY; 2];
    for repetition in 0..3 {
        for (k, threads) in [1usize, 2].into_iter().enumerate() {
            let t = time_chains(&problem, &x_star, threads, warmup, draws, thin, repetition)?;
            times[k] = times[k].min(t);
        }
    }
    Ok(Scaling {
        dim: problem.dim(),
        iterations_per_chain: warmup + draws * thin,
        one_thread_s: times[0],
        two_threads_s: times[1],
        speedup: times[0] / times[1],
        load_before,
    })
}

/// Wall time of two MALA chains on a pool of `threads` threads.
fn time_chains(
    problem: &Counted<GradientOnly>,
    x_star: &[f64],
    threads: usize,
    warmup: u64,
    draws: u64,
    thin: u64,
    repetition: usize,
) -> Result<f64, String> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .map_err(|e| format!("building a pool of {threads} threads: {e}"))?;
    let precond: Arc<dyn Preconditioner> = Arc::new(IdentityPrecond::new(problem.dim()));
    let target = Target::new(problem, "linear-gaussian", x_star.to_vec(), precond)
        .map_err(|e| e.to_string())?;
    let config = SampleConfig {
        kernel: KernelKind::Mala,
        chains: 2,
        warmup,
        draws,
        thin,
        seed: 3,
        checkpoint_every: warmup + draws * thin,
        ..Default::default()
    };
    let dir = std::env::temp_dir().join(format!(
        "varpost-bench-scaling-{}-{threads}-{repetition}",
        std::process::id()
    ));
    std::fs::remove_dir_all(&dir).ok();
    let t = Instant::now();
    let r = pool.install(|| {
        sampler::run(
            &target,
            &config,
            &dir,
            None,
            &Interrupt::new(),
            &|_, _, _| {},
        )
    });
    let elapsed = t.elapsed().as_secs_f64();
    std::fs::remove_dir_all(&dir).ok();
    r.map_err(|e| e.to_string())?;
    Ok(elapsed)
}

/// The 1-minute load average (/proc/loadavg); NaN where unavailable.
pub fn load_average() -> f64 {
    std::fs::read_to_string("/proc/loadavg")
        .ok()
        .and_then(|s| s.split_whitespace().next().and_then(|v| v.parse().ok()))
        .unwrap_or(f64::NAN)
}
