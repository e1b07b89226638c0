//! The running-moments update of Welford (1962, "Note on a method for calculating corrected sums of
//! squares and products", Technometrics 4(3)): one pass, memory ∝ n, used by the draws' moments
//! ([`crate::sampler::Welford`]) and by the warm-up's metric window.

/// Adds the vector `x` to running means `mean` and sums of squared deviations `m2`, where `count` is
/// the number of vectors including `x` (so at least 1):
/// d = x − mean; mean += d / count; m2 += d (x − mean).
pub(crate) fn welford_push(count: u64, mean: &mut [f64], m2: &mut [f64], x: &[f64]) {
    let k = count as f64;
    for ((m, s), xi) in mean.iter_mut().zip(m2.iter_mut()).zip(x) {
        let d = xi - *m;
        *m += d / k;
        *s += d * (xi - *m);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: for 1, 2, 4 the mean is 7/3 and the sum of squared deviations
    // (16 + 1 + 25) / 9 = 42/9.
    #[test]
    fn matches_the_closed_form() {
        let (mut mean, mut m2) = (vec![0.0], vec![0.0]);
        for (k, x) in [1.0, 2.0, 4.0].iter().enumerate() {
            welford_push(k as u64 + 1, &mut mean, &mut m2, &[*x]);
        }
        assert!((mean[0] - 7.0 / 3.0).abs() < 1e-15);
        assert!((m2[0] - 42.0 / 9.0).abs() < 1e-14);
    }
}
