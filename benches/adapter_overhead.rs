//! Per-evaluation cost of the subprocess adapter against the same trivial cost in-process:
//! J(x) = ½|x|², ∇J = x, in C behind the protocol (benches/trivial_adapter.c) and in Rust.
//!
//! Targets: text encoding ≤ 50 µs overhead per evaluation at n = 40; binary encoding ≥ 1 GB/s at
//! n = 10⁶, counting the bytes of the request (x) and the reply (J and ∇J). Run with
//! `cargo bench --bench adapter_overhead`; needs gcc (and python3 for the Python helper's figure).

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use varpost::adapter::{AdapterConfig, AdapterProblem, EncodingChoice};
use varpost::{EvalError, Problem};

struct InProcess(usize);

impl Problem for InProcess {
    fn dim(&self) -> usize {
        self.0
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> Result<f64, EvalError> {
        grad.copy_from_slice(x);
        Ok(0.5 * x.iter().map(|v| v * v).sum::<f64>())
    }
}

/// Time per cost+gradient evaluation: (best, median) over 7 batches, each of at least `batch`
/// evaluations and 0.2 s. The best batch is the least disturbed by other load on the machine.
fn time_per_eval(p: &dyn Problem, batch: usize) -> (Duration, Duration) {
    let n = p.dim();
    let x: Vec<f64> = (0..n).map(|i| (i as f64 * 0.001).sin()).collect();
    let mut g = vec![0.0; n];
    for _ in 0..3 {
        std::hint::black_box(p.cost_grad(&x, &mut g).expect("evaluation works"));
    }
    let mut means: Vec<Duration> = (0..7)
        .map(|_| {
            let start = Instant::now();
            let mut k = 0;
            while k < batch || start.elapsed() < Duration::from_millis(200) {
                std::hint::black_box(p.cost_grad(&x, &mut g).expect("evaluation works"));
                k += 1;
            }
            start.elapsed() / k as u32
        })
        .collect();
    means.sort();
    (means[0], means[3])
}

fn us(d: Duration) -> f64 {
    d.as_secs_f64() * 1e6
}

fn build_trivial() -> PathBuf {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let out = Path::new(env!("CARGO_TARGET_TMPDIR")).join("trivial_adapter");
    let status = Command::new("gcc")
        .args(["-O2", "-std=c99", "-o"])
        .arg(&out)
        .arg(root.join("benches/trivial_adapter.c"))
        .arg(root.join("adapters/c/varpost_adapter.c"))
        .arg("-I")
        .arg(root.join("adapters/c"))
        .arg("-lm")
        .status()
        .expect("gcc runs");
    assert!(status.success(), "building the benchmark adapter failed");
    out
}

fn adapter(command: String, encoding: EncodingChoice) -> AdapterProblem {
    let mut c = AdapterConfig::new(command);
    c.encoding = encoding;
    AdapterProblem::start(&c).unwrap_or_else(|e| panic!("{e}"))
}

fn main() {
    // `cargo bench` passes --bench; `cargo test --all-targets` runs this binary without it, and timing
    // has no place in the test suite.
    if !std::env::args().any(|a| a == "--bench") {
        println!(
            "adapter_overhead: a benchmark; run it with `cargo bench --bench adapter_overhead`"
        );
        return;
    }
    let bin = build_trivial();
    println!("best (median) of 7 batches; overhead = adapter − in-process; GB/s = (16n + 8) bytes per evaluation / best time");
    println!(
        "{:<22} {:>8} {:>24} {:>12} {:>12} {:>7}",
        "case", "n", "adapter µs/eval", "in-process", "overhead", "GB/s"
    );
    let cases: [(&str, usize, EncodingChoice, usize); 5] = [
        ("C adapter, text", 40, EncodingChoice::Text, 2000),
        ("C adapter, binary", 40, EncodingChoice::Binary, 2000),
        ("C adapter, text", 100_000, EncodingChoice::Text, 3),
        ("C adapter, binary", 100_000, EncodingChoice::Binary, 20),
        ("C adapter, binary", 1_000_000, EncodingChoice::Binary, 3),
    ];
    for (name, n, enc, evals) in cases {
        let p = adapter(format!("'{}' {n}", bin.display()), enc);
        let (t, med) = time_per_eval(&p, evals);
        let (t0, _) = time_per_eval(&InProcess(n), evals);
        // Bytes through the pipes per evaluation: x one way, J and ∇J the other (headers not counted).
        let gbs = (16 * n + 8) as f64 / t.as_secs_f64() / 1e9;
        println!(
            "{name:<22} {n:>8} {:>12.1} ({:>9.1}) {:>12.1} {:>12.1} {gbs:>7.2}",
            us(t),
            us(med),
            us(t0),
            us(t.saturating_sub(t0))
        );
    }
    // The Python helper, for adapter authors' expectations (its own JSON work dominates).
    let python = std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into());
    let script = std::env::temp_dir().join(format!("varpost-bench-{}.py", std::process::id()));
    let helper = Path::new(env!("CARGO_MANIFEST_DIR")).join("adapters/python");
    let code = format!(
        "import sys\nsys.path.insert(0, {:?})\nimport varpost_adapter as va\n\
         va.serve(40, lambda x: (0.5 * sum(v * v for v in x), list(x)))\n",
        helper.display().to_string()
    );
    if std::fs::write(&script, code).is_ok() {
        for enc in [EncodingChoice::Text, EncodingChoice::Binary] {
            if let Ok(p) = AdapterProblem::start(&AdapterConfig {
                encoding: enc,
                ..AdapterConfig::new(format!("{python} '{}'", script.display()))
            }) {
                let (t, med) = time_per_eval(&p, 200);
                let (t0, _) = time_per_eval(&InProcess(40), 200);
                println!(
                    "{:<22} {:>8} {:>12.1} ({:>9.1}) {:>12.1} {:>12.1}",
                    format!("Python helper, {}", p.encoding().name()),
                    40,
                    us(t),
                    us(med),
                    us(t0),
                    us(t.saturating_sub(t0))
                );
            }
        }
        let _ = std::fs::remove_file(&script);
    }
}
