//! Many cost evaluations at once through the adapter (`Problem::cost_batch`): the same costs as one by
//! one, in order, spread over every worker, with failures per point and a clean stop on a fatal one.

use std::path::PathBuf;
use std::time::Duration;

use varpost::adapter::{AdapterConfig, AdapterProblem};
use varpost::{EvalError, Problem};

fn config(mode: &str, workers: usize) -> AdapterConfig {
    let python = std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/adapters/faulty.py");
    let mut c = AdapterConfig::new(format!("{python} '{}' {mode}", script.display()));
    c.workers = workers;
    c.eval_timeout = Some(Duration::from_secs(30));
    c.max_restarts = 1;
    c
}

/// J(x) = 1/2 Σ (x_i − c_i)² / s_i², c_i = i + 1, s_i = 1 + i/2: faulty.py's quadratic, closed form.
fn quadratic(x: &[f64]) -> f64 {
    x.iter()
        .enumerate()
        .map(|(i, xi)| {
            let (c, s) = (i as f64 + 1.0, 1.0 + i as f64 / 2.0);
            0.5 * (xi - c).powi(2) / (s * s)
        })
        .sum()
}

#[test]
fn a_batch_gives_the_one_by_one_costs_in_order_and_every_worker_takes_part() {
    let dir = std::env::temp_dir().join(format!("varpost-batch-count-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let k = 3;
    let p = AdapterProblem::start(&config(&format!("counting '{}'", dir.display()), k)).unwrap();
    let points: Vec<Vec<f64>> = (0..13)
        .map(|i| vec![i as f64 * 0.7, -1.0 + i as f64, 0.1 * i as f64, 2.5])
        .collect();
    let xs: Vec<&[f64]> = points.iter().map(|v| v.as_slice()).collect();
    let batch = p.cost_batch(&xs);
    // Every point was evaluated exactly once, and each of the K processes (one count file per pid)
    // evaluated at least one of them.
    let counts: Vec<usize> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| {
            std::fs::read_to_string(e.unwrap().path())
                .unwrap()
                .lines()
                .count()
        })
        .collect();
    assert_eq!(counts.len(), k, "processes that evaluated: {counts:?}");
    assert!(counts.iter().all(|c| *c >= 1), "{counts:?}");
    assert_eq!(counts.iter().sum::<usize>(), points.len(), "{counts:?}");
    for (x, r) in points.iter().zip(&batch) {
        let one = p.cost(x).unwrap();
        let b = *r.as_ref().unwrap();
        assert_eq!(
            b.to_bits(),
            one.to_bits(),
            "batch and one-by-one differ at {x:?}"
        );
        assert!((b - quadratic(x)).abs() <= 1e-12 * quadratic(x).abs().max(1.0));
    }
    assert!(p.cost_batch(&[]).is_empty());
    drop(p);
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn failures_are_per_point_and_a_fatal_one_stops_the_rest() {
    // One worker: the order of evaluation is the order of the points.
    let p = AdapterProblem::start(&config("errors", 1)).unwrap();
    let pts = [
        [0.0, 0.0, 0.0, 0.0],
        [-200.0, 0.0, 0.0, 0.0],
        [200.0, 0.0, 0.0, 0.0],
        [1.0, 2.0, 3.0, 4.0],
        [2000.0, 0.0, 0.0, 0.0],
        [1.0, 1.0, 1.0, 1.0],
        [2.0, 2.0, 2.0, 2.0],
    ];
    let xs: Vec<&[f64]> = pts.iter().map(|v| v.as_slice()).collect();
    let r = p.cost_batch(&xs);
    assert_eq!(
        r[0].as_ref().unwrap().to_bits(),
        quadratic(&pts[0]).to_bits()
    );
    assert!(
        matches!(&r[1], Err(EvalError::Failed { recoverable: true, message }) if message.contains("blew up"))
    );
    assert!(
        matches!(&r[2], Err(EvalError::NonFinite { .. })),
        "{:?}",
        r[2]
    );
    assert_eq!(*r[3].as_ref().unwrap(), 0.0);
    assert!(
        matches!(&r[4], Err(EvalError::Failed { recoverable: false, message }) if message.contains("observation file is missing"))
    );
    for later in &r[5..] {
        match later {
            Err(EvalError::Failed {
                recoverable: false,
                message,
            }) => assert!(
                message.contains("not evaluated")
                    && message.contains("observation file is missing"),
                "{message}"
            ),
            other => panic!("a point after the fatal failure: {other:?}"),
        }
    }
    // The worker is still there for the next call.
    assert_eq!(p.cost(&[1.0, 2.0, 3.0, 4.0]).unwrap(), 0.0);
    // A point of the wrong length is refused before anything is sent.
    let r = p.cost_batch(&[&[0.0; 4], &[0.0; 3]]);
    assert!(r
        .iter()
        .all(|e| matches!(e, Err(EvalError::Dimension { .. }))));
}

#[test]
fn a_batch_on_crashing_workers_ends_with_errors_not_a_hang() {
    let p = AdapterProblem::start(&config("crash_always", 2)).unwrap();
    let pts = vec![vec![0.5; 4]; 6];
    let xs: Vec<&[f64]> = pts.iter().map(|v| v.as_slice()).collect();
    let r = p.cost_batch(&xs);
    assert_eq!(r.len(), 6);
    let crashed = r
        .iter()
        .filter(|e| matches!(e, Err(EvalError::Failed { message, .. }) if message.contains("exited with status 3")))
        .count();
    assert!(crashed >= 1, "{r:?}");
    assert!(
        r.iter()
            .all(|e| e.as_ref().is_err_and(|e| !e.is_recoverable())),
        "{r:?}"
    );
}
