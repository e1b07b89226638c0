//! Benchmark harness: ESS per model evaluation of varpost's kernels and preconditioners side by side
//! with a general-purpose NUTS sampler (nuts-rs) on the same cost functions.
//!
//! ```text
//! varpost-bench [--quick]       run the matrix, print a Markdown report (table and targets)
//! varpost-bench one SPEC_JSON   run one configuration, print its outcome as JSON (used by the above)
//! varpost-bench scaling [--quick]  time 2 chains on a 1-thread and a 2-thread pool
//! ```
//!
//! Every configuration runs in a child process (this binary re-executed with `one`) so that the
//! reported peak memory (VmHWM) is that configuration's alone.

mod matrix;
mod nuts;
mod report;
mod run;
mod scaling;

use std::process::{Command, ExitCode};

use run::{Outcome, Spec};

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let quick = args.iter().any(|a| a == "--quick");
    let result = match args.first().map(String::as_str) {
        Some("one") => match args.get(1) {
            Some(json) => one(json),
            None => Err("usage: varpost-bench one SPEC_JSON".to_string()),
        },
        Some("scaling") => scaling::run(quick).and_then(|s| print_json(&s)),
        None | Some("--quick") => drive(quick),
        Some(other) => Err(format!(
            "unknown argument '{other}'; usage: varpost-bench [--quick] | one SPEC_JSON | scaling [--quick]"
        )),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("varpost-bench: {e}");
            ExitCode::FAILURE
        }
    }
}

fn print_json<T: serde::Serialize>(v: &T) -> Result<(), String> {
    println!(
        "{}",
        serde_json::to_string(v).map_err(|e| format!("writing the outcome: {e}"))?
    );
    Ok(())
}

fn one(json: &str) -> Result<(), String> {
    let spec: Spec = serde_json::from_str(json).map_err(|e| format!("bad spec {json}: {e}"))?;
    print_json(&run::run(&spec)?)
}

/// Runs `args` in a child process of this binary and parses the JSON line it prints.
fn child<T: serde::de::DeserializeOwned>(args: &[&str]) -> Result<T, String> {
    let exe = std::env::current_exe().map_err(|e| format!("finding this program: {e}"))?;
    let out = Command::new(exe)
        .args(args)
        .output()
        .map_err(|e| format!("starting a child run: {e}"))?;
    if !out.status.success() {
        let err = String::from_utf8_lossy(&out.stderr);
        return Err(err.trim().lines().last().unwrap_or("failed").to_string());
    }
    let text = String::from_utf8_lossy(&out.stdout);
    let line = text.lines().last().unwrap_or("");
    serde_json::from_str(line).map_err(|e| format!("reading the child's outcome '{line}': {e}"))
}

fn drive(quick: bool) -> Result<(), String> {
    let started = std::time::Instant::now();
    let plan = matrix::plan(quick);
    let mut rows: Vec<(Spec, Result<Outcome, String>)> = Vec::new();
    for spec in plan.specs {
        let json = serde_json::to_string(&spec).map_err(|e| e.to_string())?;
        let t = std::time::Instant::now();
        let r: Result<Outcome, String> = child(&["one", &json]);
        eprintln!(
            "[{:>6.1} s] {} / {} / {}: {}",
            t.elapsed().as_secs_f64(),
            spec.case,
            spec.sampler,
            spec.precond,
            match &r {
                Ok(o) => format!(
                    "min bulk ESS {:.0}, {} evaluations",
                    o.min_ess_bulk, o.evaluations
                ),
                Err(e) => format!("failed: {e}"),
            }
        );
        rows.push((spec, r));
    }
    let mut args = vec!["scaling"];
    if quick {
        args.push("--quick");
    }
    let scaling: Result<scaling::Scaling, String> = child(&args);
    eprintln!("parallel chains: {scaling:?}");
    let total = started.elapsed().as_secs_f64();
    print!(
        "{}",
        report::markdown(quick, &plan.notes, &rows, &scaling, total)
    );
    Ok(())
}
