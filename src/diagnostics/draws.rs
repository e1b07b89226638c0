//! Checked (chain, draw) arrays and the transformations the diagnostics share: splitting chains,
//! rank normalisation, folding, indicators and sample quantiles.

use super::special::inverse_normal_cdf;
use crate::error::{Error, Result};

/// Fewest draws per chain the diagnostics accept (each split half then has at least two draws).
pub(crate) const MIN_DRAWS: usize = 4;

/// Chains of equal length, one `Vec` per chain.
pub(crate) type Matrix = Vec<Vec<f64>>;

/// Checks `chains` (at least one chain, at least [`MIN_DRAWS`] draws each, equal lengths, all draws
/// finite) and copies them into a [`Matrix`].
pub(crate) fn checked(chains: &[&[f64]], what: &str) -> Result<Matrix> {
    let Some(first) = chains.first() else {
        return Err(Error::Data(format!(
            "{what}: no chains were given; run at least one chain (four or more for R-hat)"
        )));
    };
    let n = first.len();
    for (c, chain) in chains.iter().enumerate() {
        if chain.len() != n {
            return Err(Error::Data(format!(
                "{what}: chain {c} has {} draws but chain 0 has {n}; all chains must have the same \
                 number of draws (trim them to the shortest)",
                chain.len()
            )));
        }
    }
    if n < MIN_DRAWS {
        return Err(Error::Data(format!(
            "{what}: each chain has {n} draws, at least {MIN_DRAWS} are needed; run the chains longer"
        )));
    }
    for (c, chain) in chains.iter().enumerate() {
        if let Some(i) = chain.iter().position(|x| !x.is_finite()) {
            return Err(Error::Numerical(format!(
                "{what}: draw {i} of chain {c} is {}; the diagnostics need finite draws (check the \
                 sampler output for blow-ups)",
                chain[i]
            )));
        }
    }
    Ok(chains.iter().map(|c| c.to_vec()).collect())
}

/// Every value of the matrix in one vector, chain after chain.
pub(crate) fn flat(m: &Matrix) -> Vec<f64> {
    m.iter().flatten().copied().collect()
}

pub(crate) fn mean(x: &[f64]) -> f64 {
    x.iter().sum::<f64>() / x.len() as f64
}

/// Sample variance with divisor n − 1; exactly zero for equal values (the rounded mean of equal values
/// can differ from them in the last bit, which would otherwise leave a variance of order 1e-32 and turn
/// the documented ∞ / NaN R-hat of constant chains into an arbitrary huge number).
pub(crate) fn var(x: &[f64]) -> f64 {
    if x.iter().all(|&v| v == x[0]) {
        return 0.0;
    }
    let m = mean(x);
    x.iter().map(|v| (v - m) * (v - m)).sum::<f64>() / (x.len() as f64 - 1.0)
}

/// Splits every chain into its first and last ⌊n/2⌋ draws (the middle draw of an odd-length chain is
/// dropped), giving twice as many chains — split-R-hat, Gelman et al. 2013, Bayesian Data Analysis 3rd
/// ed.; Vehtari et al. 2021, Bayesian Analysis 16(2), section 3.
pub(crate) fn split(m: &Matrix) -> Matrix {
    let half = m[0].len() / 2;
    let n = m[0].len();
    let firsts = m.iter().map(|c| c[..half].to_vec());
    let lasts = m.iter().map(|c| c[n - half..].to_vec());
    firsts.chain(lasts).collect()
}

/// Applies `f` to every value.
pub(crate) fn map(m: &Matrix, f: impl Fn(f64) -> f64) -> Matrix {
    m.iter()
        .map(|c| c.iter().map(|&x| f(x)).collect())
        .collect()
}

/// Ranks 1..S of all values pooled over chains, ties given their average rank.
fn average_ranks(values: &[f64]) -> Vec<f64> {
    let mut order: Vec<usize> = (0..values.len()).collect();
    order.sort_by(|&i, &j| values[i].total_cmp(&values[j]));
    let mut ranks = vec![0.0; values.len()];
    let mut start = 0;
    while start < order.len() {
        let mut end = start + 1;
        while end < order.len() && values[order[end]] == values[order[start]] {
            end += 1;
        }
        // Positions start..end (0-based) hold ranks start+1..=end; their average:
        let rank = (start + 1 + end) as f64 / 2.0;
        for &k in &order[start..end] {
            ranks[k] = rank;
        }
        start = end;
    }
    ranks
}

/// Rank normalisation: every value replaced by z = Φ⁻¹((r − 3/8) / (S + 1/4)), r its average rank among
/// all S pooled values — Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2),
/// section 4.1, with Blom's (1958) offset. The method is sometimes stated with the denominator S − 1/4;
/// Blom's fractional rank (r − c) / (S − 2c + 1) with c = 3/8 gives S + 1/4, which is what ArviZ computes
/// (the tests check against it) and what we follow.
pub(crate) fn rank_normalise(m: &Matrix) -> Matrix {
    let values = flat(m);
    let ranks = average_ranks(&values);
    let s = values.len() as f64;
    let n = m[0].len();
    ranks
        .chunks(n)
        .map(|chunk| {
            chunk
                .iter()
                .map(|&r| inverse_normal_cdf((r - 0.375) / (s + 0.25)))
                .collect()
        })
        .collect()
}

/// Sample quantile of type 7 (linear interpolation between order statistics, (1 − γ) x_(k) + γ x_(k+1)
/// with k + γ = (S − 1) p + 1) — Hyndman & Fan 1996, "Sample quantiles in statistical packages", The
/// American Statistician 50(4); evaluated in the same arithmetic order as SciPy's `mquantiles`
/// (alphap = betap = 1), which ArviZ uses. `sorted` must be sorted ascending and non-empty.
pub(crate) fn quantile_sorted(sorted: &[f64], p: f64) -> f64 {
    let n = sorted.len();
    if n == 1 {
        return sorted[0];
    }
    // mquantiles' m = alphap + p (1 − alphap − betap) = 1 − p, exactly.
    let aleph = n as f64 * p + (1.0 - p);
    let k = aleph.clamp(1.0, (n - 1) as f64).floor();
    let gamma = (aleph - k).clamp(0.0, 1.0);
    let k = k as usize;
    (1.0 - gamma) * sorted[k - 1] + gamma * sorted[k]
}

/// All values sorted ascending.
pub(crate) fn sorted(values: &[f64]) -> Vec<f64> {
    let mut s = values.to_vec();
    s.sort_by(f64::total_cmp);
    s
}

/// Median of all values (the mean of the two middle ones for an even count).
pub(crate) fn median(values: &[f64]) -> f64 {
    let s = sorted(values);
    let n = s.len();
    if n % 2 == 1 {
        s[n / 2]
    } else {
        0.5 * (s[n / 2 - 1] + s[n / 2])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ranks_average_ties() {
        // Average ranks for ties, as scipy.stats.rankdata(method="average") defines them.
        let r = average_ranks(&[3.0, 1.0, 3.0, 2.0, 3.0]);
        assert_eq!(r, vec![4.0, 1.0, 4.0, 2.0, 4.0]);
    }

    #[test]
    fn bad_input_is_an_error() {
        // Input validation, not a numerical fact (no external source).
        let a = [1.0, 2.0, 3.0, 4.0];
        let b = [1.0, 2.0, 3.0];
        assert!(checked(&[], "x").is_err());
        assert!(checked(&[&a, &b], "x").is_err());
        assert!(checked(&[&b], "x").is_err());
        assert!(checked(&[&[1.0, f64::NAN, 3.0, 4.0]], "x").is_err());
        assert!(checked(&[&a, &a], "x").is_ok());
    }
}
