//! Many independent cost evaluations side by side: the built-in problems' [`Problem::cost_batch`]
//! spreads the points over the threads of rayon's pool.

use rayon::prelude::*;

use super::Problem;
use crate::error::EvalError;

/// The costs at `xs`, evaluated in parallel, in the order given. Each entry is exactly what
/// [`Problem::cost`] returns for that point (the evaluations share nothing, so the results are
/// bit-identical to evaluating one after the other, whatever the number of threads).
pub fn parallel_costs<P: Problem + ?Sized>(
    problem: &P,
    xs: &[&[f64]],
) -> Vec<Result<f64, EvalError>> {
    xs.par_iter().map(|x| problem.cost(x)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::problem::builtin;
    use crate::problem::settings::Settings;

    /// Points around the background: a deterministic pseudo-random spread, no generator needed.
    fn points(p: &dyn Problem, count: usize) -> Vec<Vec<f64>> {
        let xb = p.prior().map(|pr| pr.mean().to_vec()).unwrap();
        (0..count)
            .map(|k| {
                xb.iter()
                    .enumerate()
                    .map(|(i, v)| v + 0.3 * ((k * 31 + i * 17) as f64 * 0.618).fract() - 0.15)
                    .collect()
            })
            .collect()
    }

    #[test]
    fn batch_equals_one_by_one_bit_for_bit_in_input_order() {
        // Determinism requirement, no outside source.
        for (name, pairs) in [
            ("lorenz96", vec![("window", "4")]),
            ("linear-gaussian", vec![]),
            ("burgers", vec![("n", "32"), ("window", "20")]),
        ] {
            let b = builtin::open(name, &Settings::from_pairs(&pairs)).unwrap();
            let p = b.problem.as_ref();
            let mut xs = points(p, 40);
            // A point of the wrong length in the middle: its error stays in its place.
            xs[17].pop();
            let refs: Vec<&[f64]> = xs.iter().map(Vec::as_slice).collect();
            let batch = p.cost_batch(&refs);
            assert_eq!(batch.len(), refs.len());
            for (k, (got, x)) in batch.iter().zip(&refs).enumerate() {
                match (got, p.cost(x)) {
                    (Ok(a), Ok(b)) => assert_eq!(a.to_bits(), b.to_bits(), "{name} point {k}"),
                    (Err(a), Err(b)) => assert_eq!(*a, b, "{name} point {k}"),
                    (a, b) => panic!("{name} point {k}: batch {a:?}, one by one {b:?}"),
                }
            }
            assert!(
                matches!(batch[17], Err(EvalError::Dimension { .. })),
                "{name}"
            );
        }
    }
}
