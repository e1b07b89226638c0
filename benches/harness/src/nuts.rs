//! The comparison sampler: nuts-rs on the same log-density −J(x) and gradient, in model space, with
//! its diagonal or its low-rank mass-matrix adaptation.

use std::collections::HashMap;

use nuts_rs::rand::SeedableRng;
use nuts_rs::{
    Chain, CpuLogpFunc, CpuMath, CpuMathError, DiagNutsSettings, HasDims, LogpError,
    LowRankNutsSettings, NutsSettings, Settings,
};
use rayon::prelude::*;
use varpost::{EvalError, Problem};

/// Which mass-matrix adaptation nuts-rs runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Adaptation {
    Diagonal,
    LowRank,
}

/// A failed evaluation, as nuts-rs wants it: recoverable ones become divergences.
#[derive(Debug)]
pub struct DensityError(EvalError);

impl std::fmt::Display for DensityError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        self.0.fmt(f)
    }
}

impl std::error::Error for DensityError {}

impl LogpError for DensityError {
    fn is_recoverable(&self) -> bool {
        self.0.is_recoverable()
    }
}

/// log π(x) = −J(x), ∇ log π = −∇J, evaluated through the (counted) problem.
struct Density<'a> {
    problem: &'a dyn Problem,
}

impl HasDims for Density<'_> {
    fn dim_sizes(&self) -> HashMap<String, u64> {
        HashMap::from([("x".to_string(), self.problem.dim() as u64)])
    }
}

impl CpuLogpFunc for Density<'_> {
    type LogpError = DensityError;
    type FlowParameters = ();
    type ExpandedVector = Vec<f64>;

    fn dim(&self) -> usize {
        self.problem.dim()
    }

    fn logp(&mut self, position: &[f64], gradient: &mut [f64]) -> Result<f64, DensityError> {
        let j = self
            .problem
            .cost_grad(position, gradient)
            .map_err(DensityError)?;
        gradient.iter_mut().for_each(|g| *g = -*g);
        Ok(-j)
    }

    fn expand_vector<R>(&mut self, _rng: &mut R, array: &[f64]) -> Result<Vec<f64>, CpuMathError>
    where
        R: nuts_rs::rand::Rng + ?Sized,
    {
        Ok(array.to_vec())
    }
}

/// The kept draws of every chain, `[chain][draw][component]`, and the divergences after tuning.
pub struct NutsDraws {
    pub draws: Vec<Vec<Vec<f64>>>,
    pub divergences: u64,
}

/// Runs `chains` chains in parallel (rayon), each from `start`, with `tune` tuning and `draws` kept
/// draws; chain c is seeded with `seed` and its chain number.
pub fn sample(
    problem: &dyn Problem,
    adaptation: Adaptation,
    start: &[f64],
    chains: usize,
    tune: u64,
    draws: u64,
    seed: u64,
) -> Result<NutsDraws, String> {
    let per_chain: Vec<Result<(Vec<Vec<f64>>, u64), String>> = (0..chains)
        .into_par_iter()
        .map(|c| {
            let c = c as u64;
            match adaptation {
                Adaptation::Diagonal => {
                    let s = sized(DiagNutsSettings::default(), chains, tune, draws, seed);
                    one_chain(&s, problem, start, c, seed)
                }
                Adaptation::LowRank => {
                    let s = sized(LowRankNutsSettings::default(), chains, tune, draws, seed);
                    one_chain(&s, problem, start, c, seed)
                }
            }
        })
        .collect();
    let mut out = NutsDraws {
        draws: Vec::new(),
        divergences: 0,
    };
    for r in per_chain {
        let (d, div) = r?;
        out.draws.push(d);
        out.divergences += div;
    }
    Ok(out)
}

/// nuts-rs's default settings of one adaptation, with the run's lengths and seed.
fn sized<A: std::fmt::Debug + Copy + Default + serde::Serialize>(
    mut s: NutsSettings<A>,
    chains: usize,
    tune: u64,
    draws: u64,
    seed: u64,
) -> NutsSettings<A> {
    s.num_tune = tune;
    s.num_draws = draws;
    s.num_chains = chains;
    s.seed = seed;
    s
}

fn one_chain<S: Settings>(
    settings: &S,
    problem: &dyn Problem,
    start: &[f64],
    chain: u64,
    seed: u64,
) -> Result<(Vec<Vec<f64>>, u64), String> {
    let math = CpuMath::new(Density { problem });
    let mut rng = nuts_rs::rand::rngs::StdRng::seed_from_u64(seed.wrapping_mul(1000) + chain);
    let mut sampler = settings
        .new_chain(chain, math, &mut rng)
        .map_err(|e| format!("nuts-rs chain {chain}: {e}"))?;
    sampler
        .set_position(start)
        .map_err(|e| format!("nuts-rs chain {chain}: start point: {e}"))?;
    let total = settings.hint_num_tune() + settings.hint_num_draws();
    let mut kept = Vec::with_capacity(settings.hint_num_draws());
    let mut divergences = 0;
    for _ in 0..total {
        let (draw, info) = sampler
            .draw()
            .map_err(|e| format!("nuts-rs chain {chain}: {e}"))?;
        if !info.tuning {
            kept.push(draw.into_vec());
            divergences += u64::from(info.diverging);
        }
    }
    Ok((kept, divergences))
}
