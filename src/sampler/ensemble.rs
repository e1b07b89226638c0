//! One result type for what a sampler produces: equally weighted draws of Markov chains, or weighted
//! particles with their log-weights. Diagnostics and every output read an [`Ensemble`] through one path
//! with a weighted branch.

use std::path::{Path, PathBuf};

use super::draws::{open_chains, DrawsFile};
use crate::error::{Error, Result};

/// What a sampler produced.
pub enum Ensemble {
    /// Equally weighted draws of Markov chains, streamed from their files.
    Chains(ChainDraws),
    /// Weighted draws (importance sampling, sequential Monte Carlo), held in memory.
    Weighted(WeightedDraws),
}

impl Ensemble {
    /// Dimension of each member.
    pub fn dim(&self) -> usize {
        match self {
            Ensemble::Chains(c) => c.dim,
            Ensemble::Weighted(w) => w.dim(),
        }
    }

    /// Number of members (all chains' draws, or all particles).
    pub fn members(&self) -> usize {
        match self {
            Ensemble::Chains(c) => c.chains() * c.len,
            Ensemble::Weighted(w) => w.x.len(),
        }
    }
}

/// The draws of a run's chains in its folder, cut to the shortest chain's complete records.
pub struct ChainDraws {
    dir: PathBuf,
    files: Vec<DrawsFile>,
    /// Draws per chain used (the shortest chain's complete records).
    pub len: usize,
    /// Dimension of the draws.
    pub dim: usize,
}

impl ChainDraws {
    /// Opens the `chains` draws files in `dir`.
    pub fn open(dir: &Path, chains: usize) -> Result<Self> {
        let files = open_chains(dir, chains)?;
        let len = files.iter().map(|f| f.records as usize).min().unwrap_or(0);
        let dim = files.first().map_or(0, |f| f.dim);
        Ok(ChainDraws {
            dir: dir.to_path_buf(),
            files,
            len,
            dim,
        })
    }

    /// Number of chains.
    pub fn chains(&self) -> usize {
        self.files.len()
    }

    /// The folder the draws are in.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The draws files, one per chain.
    pub fn files(&self) -> &[DrawsFile] {
        &self.files
    }

    /// Components `which`, per chain: `out[c][j]` holds the `len` draws of component `which[j]` in
    /// chain `c`.
    pub fn components(&self, which: &[usize]) -> Result<Vec<Vec<Vec<f64>>>> {
        self.files
            .iter()
            .map(|f| {
                f.components(which).map(|mut c| {
                    c.iter_mut().for_each(|v| v.truncate(self.len));
                    c
                })
            })
            .collect()
    }

    /// Per chain, a value of every draw (e.g. the HMC energy), cut to `len`.
    pub fn per_draw(&self, f: impl Fn(&super::DrawRecord) -> f64) -> Result<Vec<Vec<f64>>> {
        let mut out = Vec::with_capacity(self.files.len());
        for file in &self.files {
            let mut v = Vec::with_capacity(self.len);
            for r in file.iter()?.take(self.len) {
                v.push(f(&r?));
            }
            out.push(v);
        }
        Ok(out)
    }
}

/// Weighted draws in model space with unnormalised log-weights (−∞ for a draw whose evaluation failed).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct WeightedDraws {
    /// The draws, each of the problem's dimension.
    pub x: Vec<Vec<f64>>,
    /// log w of each draw, up to a common constant.
    pub log_weights: Vec<f64>,
}

impl WeightedDraws {
    /// Checks that there is one finite-or-(−∞) log-weight per draw, all draws of one dimension, and at
    /// least one draw with a finite weight.
    pub fn new(x: Vec<Vec<f64>>, log_weights: Vec<f64>) -> Result<Self> {
        if x.len() != log_weights.len() {
            return Err(Error::Data(format!(
                "{} weighted draws but {} log-weights",
                x.len(),
                log_weights.len()
            )));
        }
        let n = x.first().map_or(0, |v| v.len());
        if let Some(i) = x.iter().position(|v| v.len() != n) {
            return Err(Error::Data(format!(
                "weighted draw {i} has {} components, the first has {n}",
                x[i].len()
            )));
        }
        if log_weights
            .iter()
            .any(|w| w.is_nan() || *w == f64::INFINITY)
        {
            return Err(Error::Data("a log-weight is NaN or +∞".into()));
        }
        if !log_weights.iter().any(|w| w.is_finite()) {
            return Err(Error::Data(
                "every weighted draw failed to evaluate: no ensemble".into(),
            ));
        }
        Ok(WeightedDraws { x, log_weights })
    }

    /// Dimension of the draws.
    pub fn dim(&self) -> usize {
        self.x.first().map_or(0, |v| v.len())
    }

    /// The weights normalised to sum to 1 (computed from the log-weights stably).
    pub fn normalized_weights(&self) -> Vec<f64> {
        let max = self
            .log_weights
            .iter()
            .copied()
            .fold(f64::NEG_INFINITY, f64::max);
        let w: Vec<f64> = self.log_weights.iter().map(|l| (l - max).exp()).collect();
        let sum: f64 = w.iter().sum();
        w.into_iter().map(|v| v / sum).collect()
    }

    /// Component `i` of every draw.
    pub fn component(&self, i: usize) -> Vec<f64> {
        self.x.iter().map(|v| v[i]).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn weights_normalise_and_bad_input_is_named() {
        let w = WeightedDraws::new(
            vec![vec![0.0], vec![1.0], vec![2.0]],
            vec![1000.0, 1000.0 + 2f64.ln(), f64::NEG_INFINITY],
        )
        .unwrap();
        let n = w.normalized_weights();
        assert!((n[0] - 1.0 / 3.0).abs() < 1e-12 && (n[1] - 2.0 / 3.0).abs() < 1e-12);
        assert_eq!(n[2], 0.0);
        assert!(WeightedDraws::new(vec![vec![0.0]], vec![f64::NAN]).is_err());
        assert!(WeightedDraws::new(vec![vec![0.0]], vec![f64::NEG_INFINITY]).is_err());
        assert!(WeightedDraws::new(vec![vec![0.0], vec![1.0, 2.0]], vec![0.0, 0.0]).is_err());
    }
}
