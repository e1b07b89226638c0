//! The metric learned from the warm-up draws of all chains pooled: their covariance in whitened
//! coordinates, shrunk towards the identity (the Laplace metric, which whitening makes I).
//!
//! With N pooled draws x_k, each centred at the mean of its own chain, X_k = x_k − m_c(k), and the
//! pooled within-chain covariance S = (1/N) Σ_k X_k X_kᵀ, the estimate is
//!
//! ```text
//! Σ* = ρ I + (1 − ρ) S,    ρ = min(1, β² / δ²),
//! δ² = ‖S − I‖²_F,          β² = (1/N²) Σ_k ‖X_k X_kᵀ − S‖²_F = (1/N²) (Σ_k |X_k|⁴ − N ‖S‖²_F),
//! ```
//!
//! the shrinkage weight that minimises the expected Frobenius error, estimated from the draws
//! (Ledoit & Wolf 2004, "A well-conditioned estimator for large-dimensional covariance matrices",
//! J. Multivariate Analysis 88, lemma 3.2 and section 3.3, for their scaled-identity target; the fixed
//! target I is target "A" of Schäfer & Strimmer 2005, "A shrinkage approach to large-scale covariance
//! matrix estimation", Stat. Appl. Genet. Mol. Biol. 4(1)). The identity for β² follows from
//! Σ_k X_kᵀ S X_k = N ‖S‖²_F. The draws of a Markov chain are correlated, so β² (which assumes
//! independent draws) understates the estimate's noise and ρ errs towards less shrinkage.
//!
//! Centring each chain at its own mean keeps chains that have not yet met from widening the metric by
//! the distance between them (the within-chain variance W of the potential scale reduction, Gelman
//! & Rubin 1992); once they have met the two centrings agree.
//!
//! - Dense (n ≤ [`DENSE_MAX`]): Σ* in full, stored by its eigenvectors.
//! - Larger n: the diagonal only, each variance shrunk with the same formula restricted to the
//!   diagonal (δ² = Σ_i (v_i − 1)², β² = (1/N²)(Σ_k Σ_i X_ki⁴ − N Σ_i v_i²)).

use nalgebra::{DMatrix, SymmetricEigen};

use super::metric::Metric;

/// Largest dimension with a dense learned metric (memory n², an eigen-decomposition n³ per window).
pub const DENSE_MAX: usize = 256;
/// Learned variances are kept within [1/BOUND, BOUND] times the Laplace ones.
const BOUND: f64 = 1e6;

/// A learned metric and how it was estimated.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub metric: Metric,
    /// The shrinkage weight ρ towards the Laplace metric.
    pub shrinkage: f64,
    /// Draws it came from.
    pub draws: usize,
}

/// The metric estimated from `chains` (each chain's whitened positions, chains in a fixed order), or
/// `None` with fewer than two draws in all.
pub fn estimate(chains: &[&[Vec<f64>]], n: usize) -> Option<Estimate> {
    let big_n: usize = chains.iter().map(|c| c.len()).sum();
    if big_n < 2 {
        return None;
    }
    let mut centred: Vec<Vec<f64>> = Vec::with_capacity(big_n);
    for draws in chains.iter().filter(|c| !c.is_empty()) {
        let k = draws.len() as f64;
        let mut mean = vec![0.0; n];
        for x in draws.iter() {
            mean.iter_mut().zip(x).for_each(|(m, v)| *m += v / k);
        }
        centred.extend(draws.iter().map(|x| {
            x.iter()
                .zip(&mean)
                .map(|(v, m)| v - m)
                .collect::<Vec<f64>>()
        }));
    }
    let (metric, shrinkage) = if n <= DENSE_MAX {
        dense(&centred, n)
    } else {
        diagonal(&centred, n)
    };
    Some(Estimate {
        metric,
        shrinkage,
        draws: big_n,
    })
}

/// ρ = min(1, β²/δ²) from Σ_k |X_k|⁴ (`fourth`), ‖S‖²_F (`s2`), ‖S − I‖²_F (`delta2`) and N.
fn weight(fourth: f64, s2: f64, delta2: f64, nf: f64) -> f64 {
    let beta2 = ((fourth - nf * s2) / (nf * nf)).max(0.0);
    if delta2 <= 0.0 || !beta2.is_finite() {
        return 1.0;
    }
    (beta2 / delta2).min(1.0)
}

fn dense(x: &[Vec<f64>], n: usize) -> (Metric, f64) {
    let nf = x.len() as f64;
    let mut s = DMatrix::<f64>::zeros(n, n);
    for xk in x {
        for j in 0..n {
            let a = xk[j] / nf;
            for i in j..n {
                s[(i, j)] += a * xk[i];
            }
        }
    }
    for j in 0..n {
        for i in j + 1..n {
            s[(j, i)] = s[(i, j)];
        }
    }
    let fourth: f64 = x
        .iter()
        .map(|xk| {
            let r2: f64 = xk.iter().map(|v| v * v).sum();
            r2 * r2
        })
        .sum();
    let s2 = s.norm_squared();
    let delta2 = (&s - DMatrix::<f64>::identity(n, n)).norm_squared();
    let rho = weight(fourth, s2, delta2, nf);
    let shrunk = s * (1.0 - rho) + DMatrix::<f64>::identity(n, n) * rho;
    let eig = SymmetricEigen::new(shrunk);
    let lambda: Vec<f64> = eig
        .eigenvalues
        .iter()
        .map(|l| l.clamp(1.0 / BOUND, BOUND))
        .collect();
    let metric = Metric::low_rank(&vec![1.0; n], eig.eigenvectors.as_slice().to_vec(), lambda);
    (metric, rho)
}

fn diagonal(x: &[Vec<f64>], n: usize) -> (Metric, f64) {
    let nf = x.len() as f64;
    let mut v = vec![0.0; n];
    let mut fourth = 0.0;
    for xk in x {
        for (vi, xi) in v.iter_mut().zip(xk) {
            let sq = xi * xi;
            *vi += sq / nf;
            fourth += sq * sq;
        }
    }
    let s2: f64 = v.iter().map(|a| a * a).sum();
    let delta2: f64 = v.iter().map(|a| (a - 1.0) * (a - 1.0)).sum();
    let rho = weight(fourth, s2, delta2, nf);
    let d: Vec<f64> = v
        .iter()
        .map(|a| (rho + (1.0 - rho) * a).clamp(1.0 / BOUND, BOUND))
        .collect();
    (Metric::diagonal(&d), rho)
}

/// How far metric `b` is from metric `a`: the root mean square of log(diag(S_b)_i / diag(S_a)_i),
/// the relative change of the spread each component is given.
pub fn change(a: &Metric, b: &Metric) -> f64 {
    let (da, db) = (a.diagonal_of(), b.diagonal_of());
    let n = da.len().max(1) as f64;
    let sum: f64 = da
        .iter()
        .zip(&db)
        .map(|(x, y)| {
            let l = (y / x).ln();
            l * l
        })
        .sum();
    (sum / n).sqrt()
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand_chacha::ChaCha8Rng;
    use rand_distr::{Distribution, StandardNormal};

    /// Draws of N(0, C) with C = [[4, 1.2], [1.2, 0.5]] (closed form), through its Cholesky factor.
    fn correlated(k: usize) -> Vec<Vec<f64>> {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (l11, l21) = (2.0, 0.6);
        let l22 = (0.5f64 - 0.36).sqrt();
        (0..k)
            .map(|_| {
                let z1: f64 = StandardNormal.sample(&mut rng);
                let z2: f64 = StandardNormal.sample(&mut rng);
                vec![l11 * z1, l21 * z1 + l22 * z2]
            })
            .collect()
    }

    #[test]
    fn many_draws_give_the_covariance_and_little_shrinkage() {
        let x = correlated(20_000);
        let e = estimate(&[&x], 2).unwrap();
        assert!(e.shrinkage < 0.01, "ρ = {}", e.shrinkage);
        let s = e.metric.mul(&[1.0, 0.0]);
        // Closed form C e_1 = (4, 1.2), within the sampling error of 20 000 draws.
        assert!(
            (s[0] - 4.0).abs() < 0.15 && (s[1] - 1.2).abs() < 0.05,
            "{s:?}"
        );
    }

    #[test]
    fn few_draws_are_shrunk_towards_the_identity() {
        let x = correlated(3);
        let few = estimate(&[&x], 2).unwrap();
        let x = correlated(2000);
        let many = estimate(&[&x[..1000], &x[1000..]], 2).unwrap();
        assert!(few.shrinkage > many.shrinkage);
        assert!(estimate(&[&x[..1]], 2).is_none());
    }

    #[test]
    fn draws_from_the_identity_shrink_fully() {
        // Standard normal draws: S is I up to noise, so β² ≥ δ² in expectation and ρ is near 1.
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let x: Vec<Vec<f64>> = (0..200)
            .map(|_| (0..5).map(|_| StandardNormal.sample(&mut rng)).collect())
            .collect();
        let e = estimate(&[&x], 5).unwrap();
        assert!(e.shrinkage > 0.5, "ρ = {}", e.shrinkage);
    }

    #[test]
    fn chains_apart_do_not_widen_the_metric() {
        // Two chains with the same draws, one shifted by 10: the within-chain covariance is that of
        // one chain, not widened by the shift (Gelman & Rubin 1992's W).
        let x = correlated(2000);
        let shifted: Vec<Vec<f64>> = x.iter().map(|v| vec![v[0] + 10.0, v[1]]).collect();
        let one = estimate(&[&x], 2).unwrap();
        let two = estimate(&[&x, &shifted], 2).unwrap();
        let (a, b) = (one.metric.diagonal_of(), two.metric.diagonal_of());
        assert!((a[0] - b[0]).abs() < 1e-2 * a[0], "{a:?} {b:?}");
    }

    #[test]
    fn diagonal_estimate_above_the_dense_limit() {
        let n = DENSE_MAX + 1;
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let x: Vec<Vec<f64>> = (0..400)
            .map(|_| {
                (0..n)
                    .map(|_| {
                        let z: f64 = StandardNormal.sample(&mut rng);
                        3.0 * z
                    })
                    .collect()
            })
            .collect();
        let e = estimate(&[&x], n).unwrap();
        assert_eq!(e.metric.rank(), 0);
        let d = e.metric.diagonal_of();
        let mean = d.iter().sum::<f64>() / n as f64;
        // Variance 9 (closed form), shrunk only a little with 400 draws per component.
        assert!((mean - 9.0).abs() < 0.5, "{mean}");
        assert!(change(&Metric::unit(n), &e.metric) > 2.0);
        assert_eq!(change(&e.metric, &e.metric), 0.0);
    }
}
