//! Autocovariance and autocorrelation of one chain, by FFT.

use std::cell::RefCell;

use rustfft::num_complex::Complex;
use rustfft::FftPlanner;

thread_local! {
    // Plans are cached by the planner; one per thread so repeated calls (many components, several
    // transformations each) reuse them.
    static PLANNER: RefCell<FftPlanner<f64>> = RefCell::new(FftPlanner::new());
}

/// Autocovariance estimates γ̂_t = (1/n) Σ_{i=0}^{n−1−t} (x_i − x̄)(x_{i+t} − x̄) for every lag t = 0..n−1.
///
/// Computed as the inverse FFT of |FFT(x − x̄)|² with the chain zero-padded to a power of two ≥ 2n, so
/// the circular correlation equals the linear one — Wiener–Khinchin; Geyer 1992, "Practical Markov
/// chain Monte Carlo", Statistical Science 7(4) for the 1/n normalisation. An empty chain gives an empty
/// vector.
pub fn autocovariance(chain: &[f64]) -> Vec<f64> {
    let n = chain.len();
    if n == 0 {
        return Vec::new();
    }
    let mean = chain.iter().sum::<f64>() / n as f64;
    let m = (2 * n).next_power_of_two();
    let mut buf: Vec<Complex<f64>> = chain.iter().map(|&x| Complex::new(x - mean, 0.0)).collect();
    buf.resize(m, Complex::new(0.0, 0.0));
    let (forward, inverse) = PLANNER.with(|p| {
        let mut p = p.borrow_mut();
        (p.plan_fft_forward(m), p.plan_fft_inverse(m))
    });
    forward.process(&mut buf);
    for z in buf.iter_mut() {
        *z = Complex::new(z.norm_sqr(), 0.0);
    }
    inverse.process(&mut buf);
    // rustfft does not normalise: the round trip multiplies by m.
    let scale = 1.0 / (m as f64 * n as f64);
    buf[..n].iter().map(|z| z.re * scale).collect()
}

/// Autocorrelation ρ̂_t = γ̂_t / γ̂_0 for every lag (NaN for a constant chain, whose γ̂_0 is zero).
pub fn autocorrelation(chain: &[f64]) -> Vec<f64> {
    let acov = autocovariance(chain);
    let Some(&c0) = acov.first() else {
        return acov;
    };
    acov.iter().map(|&c| c / c0).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fft_matches_direct_sum() {
        // The definition of the autocovariance evaluated directly (Geyer 1992, eq. for gamma-hat).
        let x: Vec<f64> = (0..37).map(|i| ((i * 7919) % 101) as f64 / 10.0).collect();
        let n = x.len();
        let mean = x.iter().sum::<f64>() / n as f64;
        let fft = autocovariance(&x);
        for t in 0..n {
            let direct: f64 = (0..n - t)
                .map(|i| (x[i] - mean) * (x[i + t] - mean))
                .sum::<f64>()
                / n as f64;
            assert!(
                (fft[t] - direct).abs() < 1e-12,
                "lag {t}: {} vs {direct}",
                fft[t]
            );
        }
        assert_eq!(autocorrelation(&x)[0], 1.0);
    }
}
