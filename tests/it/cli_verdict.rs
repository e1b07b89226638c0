//! The verdict through the real binary: never green by mistake. An analysis stopped before it
//! converged, a skipped gradient test and a partial run each give a status other than `converged`, a
//! documented non-zero exit code (README, "Exit codes") and a sentence naming the reason; `report`
//! recomputes the same verdict from the folder.

use crate::common;

use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};

use common::{read_json, run, temp_dir};
use varpost::config::{ProblemSource, RunConfig};
use varpost::Interrupt;

fn stdout(o: &std::process::Output) -> String {
    String::from_utf8_lossy(&o.stdout).into_owned()
}

fn reasons(summary: &serde_json::Value) -> Vec<String> {
    summary["diagnostics"]["reasons"]
        .as_array()
        .expect("diagnostics.reasons")
        .iter()
        .map(|r| r.as_str().unwrap().to_string())
        .collect()
}

/// `varpost report DIR`: its output, and its exit code.
fn report(dir: &Path) -> (String, Option<i32>) {
    let o = run(&["report", dir.to_str().unwrap()]);
    assert!(
        o.status.code() != Some(1) && o.status.code() != Some(2),
        "report failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    (stdout(&o), o.status.code())
}

#[test]
fn an_analysis_stopped_before_converging_is_never_green() {
    let d = temp_dir("verdict-unconverged");
    let out = d.join("run");
    // Eight L-BFGS iterations do not reach the minimum of the non-Gaussian Lorenz-96 problem.
    let o = run(&[
        "sample",
        "--problem",
        "lorenz96",
        "--set",
        "obs_op=square",
        "--max-iters",
        "8",
        "--draws",
        "200",
        "--warmup",
        "200",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]);
    let text = stdout(&o);
    let code = o.status.code();
    // 4: converged with warnings, one of them the analysis; 5: the chains are not usable either.
    assert!(
        code == Some(4) || code == Some(5),
        "{code:?}: {text}{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let s = read_json(&out.join("summary.json"));
    assert_eq!(s["map"]["converged"], false);
    let diag = &s["diagnostics"];
    assert_ne!(diag["status"], "converged");
    assert_eq!(diag["converged"], false);
    assert_eq!(diag["exit_code"].as_i64().map(|c| c as i32), code);
    assert!(reasons(&s).contains(&"analysis_not_converged".to_string()));
    // One k-hat threshold: the check's, the verdict's and the printed one are the same.
    let threshold = s["laplace_check"]["khat_threshold"].as_f64().unwrap();
    assert_eq!(diag["khat_threshold"].as_f64(), Some(threshold));
    let khat = s["laplace_check"]["khat"].as_f64().unwrap_or(f64::NAN);
    let (_, printed) = varpost::diagnostics::khat_text(khat, threshold);
    assert!(
        text.contains(&format!("(reliable below {printed})")),
        "{text}"
    );
    assert!(text.contains("  - the analysis did not converge"), "{text}");
    assert!(text.contains("Raise --max-iters"), "{text}");
    assert!(
        diag["verdict"]
            .as_str()
            .unwrap()
            .contains("The analysis (L-BFGS) did not converge (iteration limit reached after 8"),
        "{diag}"
    );
    // The report recomputes the same verdict from the folder.
    let (rtext, rcode) = report(&out);
    assert_eq!(rcode, code, "{rtext}");
    assert!(
        rtext.contains("  - the analysis did not converge"),
        "{rtext}"
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("did not converge"));
    assert!(!html.contains("verdict pass"), "a red or neutral verdict");
}

#[test]
fn a_skipped_gradient_test_is_named_and_not_green() {
    let d = temp_dir("verdict-skip-check");
    let out = d.join("run");
    let o = run(&[
        "sample",
        "--problem",
        "linear-gaussian",
        "--skip-check",
        "--draws",
        "300",
        "--warmup",
        "300",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]);
    let text = stdout(&o);
    let code = o.status.code();
    // 6: converged with warnings; 5 should the chains also fail their checks.
    assert!(code == Some(6) || code == Some(5), "{code:?}: {text}");
    let s = read_json(&out.join("summary.json"));
    assert!(s.get("check").is_none(), "no gradient test ran");
    assert_ne!(s["diagnostics"]["status"], "converged");
    assert!(reasons(&s).contains(&"gradient_test_skipped".to_string()));
    assert!(text.contains("  - the gradient test was skipped"), "{text}");
    assert!(text.contains("(--skip-check)"), "{text}");
    let (rtext, rcode) = report(&out);
    assert_eq!(rcode, code, "{rtext}");
    assert!(rtext.contains("the gradient test was skipped"), "{rtext}");
}

/// Samples linear-gaussian into `out` through the library and interrupts the run (as SIGINT would) once
/// every chain has done `stop_at` iterations (warm-up included), leaving a partial run: the summary
/// written before the chains, the draws files and a checkpoint.
fn partial_run(out: &Path, warmup: u64, draws: u64, stop_at: u64) {
    let source = ProblemSource::Builtin {
        name: "linear-gaussian".into(),
        settings: vec![],
    };
    let mut cfg = RunConfig::new(source.clone());
    cfg.sampler.warmup = warmup;
    cfg.sampler.draws = draws;
    cfg.sampler.checkpoint_every = 10;
    let loaded = varpost::pipeline::load(&source).unwrap();
    let interrupt = Interrupt::new();
    let done: Vec<AtomicU64> = (0..cfg.sampler.chains).map(|_| AtomicU64::new(0)).collect();
    let stop = |chain: usize, d: u64, _total: u64| {
        done[chain].store(d, Ordering::SeqCst);
        if done.iter().all(|x| x.load(Ordering::SeqCst) >= stop_at) {
            interrupt.trigger();
        }
    };
    let r = varpost::pipeline::run_sample(&loaded, &cfg, out, false, &interrupt, &stop);
    assert!(
        matches!(r, Err(varpost::Error::Interrupted(_))),
        "the run was interrupted"
    );
}

#[test]
fn a_report_on_a_partial_run_is_not_green_and_says_how_far_it_got() {
    let d = temp_dir("verdict-partial");
    let out = d.join("run");
    partial_run(&out, 100, 400, 160);
    let (text, code) = report(&out);
    assert_eq!(code, Some(5), "{text}");
    assert!(
        text.contains("verdict: partial run (exit code 5)"),
        "{text}"
    );
    assert!(text.contains("  - the chains have not finished"), "{text}");
    assert!(text.contains("of the 400 planned draws each"), "{text}");
    assert!(text.contains("model runs so far"), "{text}");
    assert!(text.contains("varpost resume"), "{text}");
    // The model runs stated are at least those spent before the chains.
    let s = read_json(&out.join("summary.json"));
    let before: u64 = ["cost", "gradient"]
        .iter()
        .map(|k| s["evaluations"][k].as_u64().unwrap())
        .sum();
    let stated: u64 = text
        .split(" model runs so far")
        .next()
        .and_then(|t| t.rsplit(' ').next())
        .and_then(|n| n.parse().ok())
        .expect("the number of model runs");
    assert!(
        stated > before,
        "{stated} model runs stated, {before} before the chains"
    );
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(html.contains("verdict fail") && html.contains("partial"));
}

#[test]
fn a_report_before_the_first_draws_says_how_far_the_run_got() {
    let d = temp_dir("verdict-warmup");
    let out = d.join("run");
    partial_run(&out, 100, 400, 30);
    let o = run(&["report", out.to_str().unwrap()]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_ne!(o.status.code(), Some(0), "{e}");
    assert!(
        e.contains("diagnostics need at least 4 draws per chain"),
        "{e}"
    );
    assert!(e.contains("of the 400 planned draws each"), "{e}");
    assert!(
        e.contains("model runs so far") && e.contains("varpost resume"),
        "{e}"
    );
}
