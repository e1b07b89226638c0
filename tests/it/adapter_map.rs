//! The analysis through the Python adapter equals the built-in problem's (the adapter mirrors the
//! built-in lorenz96 on the demo data), also when the adapter runs under Open MPI's mpirun.

use crate::common;

use common::{read_json, temp_dir, vecf};

fn map_x(args: &[&str], dir: &std::path::Path) -> Vec<f64> {
    let mut a = vec!["map", "--out", dir.to_str().unwrap()];
    a.extend_from_slice(args);
    let o = common::varpost()
        .args(&a)
        .current_dir(common::root())
        .env("OMPI_ALLOW_RUN_AS_ROOT", "1")
        .env("OMPI_ALLOW_RUN_AS_ROOT_CONFIRM", "1")
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "{a:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    vecf(&read_json(&dir.join("summary.json"))["map"]["x"])
}

#[test]
fn analysis_through_the_python_adapter_equals_the_builtin_one() {
    // Both minimise the same cost (the adapter's J and gradient agree with the built-in ones to round-off,
    // tests/adapter_python.rs), so L-BFGS takes the same path and the analyses agree to 1e-10 relative
    // (measured: 1.1e-11). With tolerances far below the default (gradient reduced by 1e10 and more)
    // round-off differences between the two codes grow along the longer path to about 3e-10.
    let d = temp_dir("adapter-map");
    let builtin = map_x(&["--problem", "lorenz96"], &d.join("builtin"));
    let adapter = map_x(
        &["--adapter", "python3 adapters/python/lorenz96.py"],
        &d.join("adapter"),
    );
    let e = common::max_rel_err(&adapter, &builtin);
    assert!(e < 1e-10, "analysis through the adapter differs by {e:e}");
    let mpi = map_x(
        &[
            "--adapter",
            "python3 adapters/python/lorenz96.py",
            "--launcher",
            "mpirun -n 1 --allow-run-as-root --oversubscribe",
        ],
        &d.join("mpirun"),
    );
    let e = common::max_rel_err(&mpi, &builtin);
    assert!(e < 1e-10, "analysis through mpirun differs by {e:e}");
}
