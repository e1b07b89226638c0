//! Running mean and variance of vectors, one pass, memory ∝ n (Welford 1962, "Note on a method for
//! calculating corrected sums of squares and products", Technometrics 4(3)); two accumulators combine
//! by the pairwise formula of Chan, Golub & LeVeque 1979 ("Updating formulae and a pairwise algorithm
//! for computing sample variances").

use crate::util::moments::welford_push;

/// Count, mean and sum of squared deviations M2 of the vectors seen so far.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Welford {
    n: u64,
    mean: Vec<f64>,
    m2: Vec<f64>,
}

impl Welford {
    /// Empty, for vectors of length `dim`.
    pub fn new(dim: usize) -> Self {
        Welford {
            n: 0,
            mean: vec![0.0; dim],
            m2: vec![0.0; dim],
        }
    }

    /// Adds one vector.
    pub fn push(&mut self, x: &[f64]) {
        self.n += 1;
        welford_push(self.n, &mut self.mean, &mut self.m2, x);
    }

    /// The union of two accumulators.
    pub fn merge(&self, other: &Welford) -> Welford {
        if other.n == 0 {
            return self.clone();
        }
        if self.n == 0 {
            return other.clone();
        }
        let (na, nb) = (self.n as f64, other.n as f64);
        let n = na + nb;
        let mut out = Welford::new(self.mean.len());
        out.n = self.n + other.n;
        for i in 0..self.mean.len() {
            let d = other.mean[i] - self.mean[i];
            out.mean[i] = self.mean[i] + d * nb / n;
            out.m2[i] = self.m2[i] + other.m2[i] + d * d * na * nb / n;
        }
        out
    }

    /// Checks an accumulator read from a file: vectors of length `dim` and finite numbers; the message
    /// names the first bad field.
    pub fn check(&self, dim: usize) -> Result<(), String> {
        for (name, v) in [("mean", &self.mean), ("m2", &self.m2)] {
            if v.len() != dim {
                return Err(format!("{name} has {} entries, expected {dim}", v.len()));
            }
            if let Some(i) = v.iter().position(|x| !x.is_finite()) {
                return Err(format!("{name}[{i}] is {}, not a finite number", v[i]));
            }
        }
        Ok(())
    }

    /// Number of vectors.
    pub fn count(&self) -> u64 {
        self.n
    }

    /// The mean (zeros before any vector).
    pub fn mean(&self) -> &[f64] {
        &self.mean
    }

    /// The unbiased sample variance M2 / (n − 1); NaN with fewer than two vectors.
    pub fn variance(&self) -> Vec<f64> {
        if self.n < 2 {
            return vec![f64::NAN; self.m2.len()];
        }
        let d = (self.n - 1) as f64;
        self.m2.iter().map(|s| s / d).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Closed form: for 1..=10 the mean is 5.5 and the unbiased variance n(n+1)/12 = 110/12.
    #[test]
    fn matches_the_closed_form_and_merges() {
        let mut all = Welford::new(1);
        let (mut a, mut b) = (Welford::new(1), Welford::new(1));
        for k in 1..=10 {
            all.push(&[k as f64]);
            if k <= 3 {
                a.push(&[k as f64])
            } else {
                b.push(&[k as f64])
            }
        }
        let m = a.merge(&b);
        for w in [&all, &m] {
            assert_eq!(w.count(), 10);
            assert!((w.mean()[0] - 5.5).abs() < 1e-14);
            assert!((w.variance()[0] - 110.0 / 12.0).abs() < 1e-12);
        }
    }
}
