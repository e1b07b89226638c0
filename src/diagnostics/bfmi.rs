//! Energy diagnostic of Hamiltonian Monte Carlo.

use crate::error::{Error, Result};

/// E-BFMI (estimated Bayesian fraction of missing information) of each chain from its per-draw
/// Hamiltonian energies E_n: Σ (E_n − E_{n−1})² / Σ (E_n − Ē)² — Betancourt 2016, "Diagnosing
/// suboptimal cotangent disintegrations in Hamiltonian Monte Carlo", arXiv 1604.00695. Computed as
/// ArviZ does, the mean of the N − 1 squared differences over the sample variance with divisor N − 1,
/// which is exactly that ratio. Values below about 0.3 say the momentum resampling explores the
/// energy levels poorly (Betancourt 2016).
///
/// `energies` holds one slice per chain; each needs at least two finite values. A chain of constant
/// energy gives NaN or +∞ (zero variance).
pub fn bfmi(energies: &[&[f64]]) -> Result<Vec<f64>> {
    if energies.is_empty() {
        return Err(Error::Data(
            "E-BFMI: no chains of energies were given".into(),
        ));
    }
    energies
        .iter()
        .enumerate()
        .map(|(c, e)| {
            if e.len() < 2 {
                return Err(Error::Data(format!(
                    "E-BFMI: chain {c} has {} energies, at least 2 are needed; run the chain longer",
                    e.len()
                )));
            }
            if let Some(i) = e.iter().position(|x| !x.is_finite()) {
                return Err(Error::Numerical(format!(
                    "E-BFMI: energy {i} of chain {c} is {}; energies must be finite",
                    e[i]
                )));
            }
            let n = e.len() as f64;
            let diff2 = e.windows(2).map(|w| (w[1] - w[0]).powi(2)).sum::<f64>() / (n - 1.0);
            let mean = e.iter().sum::<f64>() / n;
            let var = e.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
            Ok(diff2 / var)
        })
        .collect()
}
