//! Vector arithmetic on slices.

/// Σ aᵢ bᵢ, summed in index order (every caller gets the same rounding).
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dot_sums_products_in_order() {
        assert_eq!(dot(&[1.0, 2.0, 3.0], &[4.0, -5.0, 6.0]), 12.0);
        assert_eq!(dot(&[], &[]), 0.0);
        // Summed left to right: (1e16 + 1) − 1e16 = 0 in floating point, not 1.
        assert_eq!(dot(&[1e16, 1.0, -1e16], &[1.0, 1.0, 1.0]), 0.0);
    }
}
