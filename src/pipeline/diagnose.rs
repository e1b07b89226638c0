//! Diagnostics of an ensemble, through one path with a weighted branch: per-component statistics of
//! chains (R-hat, bulk and tail ESS, MCSE) or of weighted draws (self-normalised moments, delta-method
//! errors), and the E-BFMI of HMC chains.

use rayon::prelude::*;

use crate::diagnostics::{self, ComponentStats};
use crate::error::{Error, Result};
use crate::sampler::{ChainDraws, Ensemble, WeightedDraws};

/// Per-component statistics of `ensemble`, and the E-BFMI of each chain where the draws carry HMC
/// energies.
pub fn diagnose(ensemble: &Ensemble) -> Result<(Vec<ComponentStats>, Option<Vec<f64>>)> {
    match ensemble {
        Ensemble::Chains(c) => Ok((chain_stats(c)?, chain_ebfmi(c)?)),
        Ensemble::Weighted(w) => Ok((weighted_stats(w)?, None)),
    }
}

/// Components in blocks, so that memory stays at block × draws × chains.
const BLOCK: usize = 256;

fn chain_stats(c: &ChainDraws) -> Result<Vec<ComponentStats>> {
    if c.len < 4 {
        return Err(Error::Data(format!(
            "the chains in {} hold {} draws each; diagnostics need at least 4",
            c.dir().display(),
            c.len
        )));
    }
    let n = c.dim;
    let mut stats = Vec::with_capacity(n);
    for start in (0..n).step_by(BLOCK) {
        let which: Vec<usize> = (start..(start + BLOCK).min(n)).collect();
        let per_chain = c.components(&which)?;
        let block: Vec<ComponentStats> = (0..which.len())
            .into_par_iter()
            .map(|j| {
                let slices: Vec<&[f64]> = per_chain.iter().map(|c| c[j].as_slice()).collect();
                diagnostics::component_stats(&slices)
            })
            .collect::<Result<_>>()?;
        stats.extend(block);
    }
    Ok(stats)
}

fn chain_ebfmi(c: &ChainDraws) -> Result<Option<Vec<f64>>> {
    let energies = c.per_draw(|r| r.energy)?;
    if !energies.iter().all(|e| e.iter().all(|v| v.is_finite())) {
        return Ok(None);
    }
    let slices: Vec<&[f64]> = energies.iter().map(|e| e.as_slice()).collect();
    Ok(diagnostics::bfmi(&slices).ok())
}

fn weighted_stats(w: &WeightedDraws) -> Result<Vec<ComponentStats>> {
    let weights = w.normalized_weights();
    (0..w.dim())
        .into_par_iter()
        .map(|i| diagnostics::weighted_component_stats(&w.component(i), &weights))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_weighted_ensemble_goes_through_the_weighted_branch() {
        // Two points with weights 1/4 and 3/4: mean 0.75 and variance 3/16 in closed form.
        let w = WeightedDraws::new(
            vec![
                vec![0.0, 1.0],
                vec![1.0, 1.0],
                vec![1.0, 1.0],
                vec![1.0, 1.0],
            ],
            vec![0.0; 4],
        )
        .unwrap();
        let (stats, ebfmi) = diagnose(&Ensemble::Weighted(w)).unwrap();
        assert!(ebfmi.is_none());
        assert!((stats[0].mean - 0.75).abs() < 1e-15);
        assert!((stats[0].sd - (3.0f64 / 16.0).sqrt()).abs() < 1e-15);
        assert!(stats[0].rhat.is_nan());
    }
}
