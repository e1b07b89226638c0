//! `varpost sample --target-ess`: chains extended in blocks until every component's bulk and tail ESS
//! reach the target, within --max-evaluations and --time-limit; the summary and the verdict say what
//! ended the run; kill -9 during an extension block and resume reproduce the uninterrupted run.

use crate::common;

use std::path::Path;
use std::process::Stdio;
use std::time::{Duration, Instant};

use common::{read_json, run, temp_dir, vecf};

fn sample(out: &Path, extra: &[&str]) -> (Option<i32>, serde_json::Value) {
    let mut args = vec![
        "sample",
        "--problem",
        "linear-gaussian",
        "--seed",
        "1",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ];
    args.extend_from_slice(extra);
    let o = run(&args);
    assert!(
        matches!(o.status.code(), Some(0 | 4 | 5 | 6)),
        "{args:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    (o.status.code(), read_json(&out.join("summary.json")))
}

fn min_ess(s: &serde_json::Value) -> f64 {
    let d = &s["diagnostics"];
    d["ess_bulk_min"]
        .as_f64()
        .unwrap()
        .min(d["ess_tail_min"].as_f64().unwrap())
}

#[test]
fn a_short_first_block_extends_until_the_target_is_met_and_matches_the_closed_form() {
    // Closed form: the Gaussian posterior of the linear problem (textbook conditioning); the check is
    // within 4 Monte Carlo standard errors of the mean and of the variance (Vehtari, Gelman, Simpson,
    // Carpenter & Burkner 2021).
    for kernel in ["hmc", "mala"] {
        let d = temp_dir(&format!("target-{kernel}"));
        let out = d.join("run");
        let (code, s) = sample(
            &out,
            &[
                "--kernel",
                kernel,
                "--draws",
                "40",
                "--warmup",
                "300",
                "--target-ess",
                "400",
            ],
        );
        let smp = &s["sampling"];
        assert_eq!(smp["stop_reason"], "target met", "{kernel}");
        assert_eq!(smp["target_ess"], 400);
        assert_eq!(smp["draws_per_chain"], 40);
        let reached = smp["draws_reached"].as_u64().unwrap();
        assert!(
            reached > 40,
            "{kernel}: the chains were extended ({reached})"
        );
        assert_eq!(s["posterior"]["draws"].as_u64().unwrap(), 4 * reached);
        assert!(min_ess(&s) >= 400.0, "{kernel}: {}", min_ess(&s));
        assert!(s["diagnostics"]["rhat_max"].as_f64().unwrap() < 1.01);
        assert_eq!(code, Some(0), "{kernel}: {}", s["diagnostics"]["verdict"]);
        let mean = vecf(&s["posterior"]["mean"]);
        let var = vecf(&s["posterior"]["variance"]);
        let mcse = vecf(&s["posterior"]["mcse_mean"]);
        let mcse_sd = vecf(&s["posterior"]["mcse_sd"]);
        let rmean = vecf(&s["reference"]["mean"]);
        let rvar = vecf(&s["reference"]["variance"]);
        for i in 0..mean.len() {
            let z = (mean[i] - rmean[i]).abs() / mcse[i];
            assert!(z < 4.0, "{kernel} component {i}: mean {z:.2} MCSE off");
            let zv = (var[i] - rvar[i]).abs() / (2.0 * var[i].sqrt() * mcse_sd[i]);
            assert!(
                zv < 4.0,
                "{kernel} component {i}: variance {zv:.2} MCSE off"
            );
        }
    }
}

#[test]
fn max_evaluations_ends_the_run_early_with_that_reason_and_a_verdict_that_is_not_green() {
    let d = temp_dir("target-budget");
    let out = d.join("run");
    let (code, s) = sample(
        &out,
        &[
            "--kernel",
            "hmc",
            "--draws",
            "50",
            "--warmup",
            "100",
            "--target-ess",
            "100000",
            "--max-evaluations",
            "20000",
        ],
    );
    assert_eq!(s["sampling"]["stop_reason"], "max evaluations");
    let e = &s["evaluations"];
    let runs = ["cost", "gradient", "hessvec"]
        .iter()
        .map(|k| e[k].as_u64().unwrap())
        .sum::<u64>();
    assert!(runs <= 20000, "{runs} model runs, over the budget");
    assert!(s["sampling"]["draws_reached"].as_u64().unwrap() > 50);
    assert_ne!(code, Some(0));
    assert_ne!(s["diagnostics"]["status"], "converged");
    let verdict = s["diagnostics"]["verdict"].to_string();
    assert!(verdict.contains("max evaluations"), "{verdict}");
    // `report` on the folder reaches the same verdict (a run a limit ended is not partial).
    let o = run(&["report", out.to_str().unwrap()]);
    assert_eq!(
        o.status.code(),
        code,
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}

#[test]
fn target_ess_0_keeps_the_fixed_draws() {
    let d = temp_dir("target-off");
    let out = d.join("run");
    let (_, s) = sample(
        &out,
        &["--draws", "60", "--warmup", "100", "--target-ess", "0"],
    );
    assert_eq!(s["sampling"]["stop_reason"], "draws");
    assert_eq!(s["sampling"]["draws_reached"], 60);
    assert_eq!(s["posterior"]["draws"], 240);
    // The checkpoint of a run never extended keeps the layout of earlier releases.
    let ck = std::fs::read_to_string(out.join("checkpoint.vpck")).unwrap();
    assert!(!ck.contains("extra_draws"));
}

#[test]
fn bad_limits_give_clear_errors() {
    let d = temp_dir("target-bad");
    let out = d.join("run");
    let o_s = out.to_str().unwrap();
    let cases: [(&[&str], &str); 6] = [
        (&["--target-ess", "-1"], "negative"),
        (&["--target-ess", "NaN"], "not a whole number"),
        (&["--max-evaluations", "0"], "zero"),
        (&["--max-evaluations", "-3"], "negative"),
        (&["--time-limit", "nan"], "not a finite number"),
        (&["--time-limit", "-2"], "out of range"),
    ];
    for (extra, needle) in cases {
        let mut args = vec!["sample", "--problem", "linear-gaussian", "--out", o_s];
        args.extend_from_slice(extra);
        let o = run(&args);
        let e = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{extra:?}: {e}");
        assert!(e.contains(extra[0]) && e.contains(needle), "{extra:?}: {e}");
    }
    // A budget the stages before the chains already spend is refused, saying how many they needed.
    let o = run(&[
        "sample",
        "--problem",
        "linear-gaussian",
        "--max-evaluations",
        "100",
        "--quiet",
        "--out",
        o_s,
    ]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_ne!(o.status.code(), Some(0));
    assert!(
        e.contains("--max-evaluations 100") && e.contains("stages before the chains"),
        "{e}"
    );
}

fn spawn_extending(out: &Path) -> std::process::Child {
    common::varpost()
        .args([
            "sample",
            "--problem",
            "lorenz96",
            "--kernel",
            "hmc",
            "--draws",
            "50",
            "--warmup",
            "200",
            "--checkpoint-every",
            "20",
            "--target-ess",
            "1500",
            "--quiet",
            "--out",
        ])
        .arg(out)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .unwrap()
}

/// Whether the checkpoint in `dir` is one of an extension block still running.
fn in_extension(dir: &Path) -> bool {
    std::fs::read_to_string(dir.join("checkpoint.vpck"))
        .is_ok_and(|t| t.contains("\"extra_draws\"") && t.contains("\"complete\":false"))
}

#[test]
fn kill_9_during_an_extension_block_then_resume_reproduces_the_uninterrupted_run() {
    let d = temp_dir("target-kill");
    let full = d.join("full");
    let st = spawn_extending(&full).wait().unwrap();
    assert!(matches!(st.code(), Some(0 | 4 | 5 | 6)));
    assert_eq!(
        read_json(&full.join("summary.json"))["sampling"]["stop_reason"],
        "target met"
    );
    let cut = d.join("cut");
    let mut child = spawn_extending(&cut);
    // Poll until the chains are in an extension block, then SIGKILL.
    let t0 = Instant::now();
    let mut caught = false;
    while t0.elapsed() < Duration::from_secs(600) {
        if in_extension(&cut) {
            caught = true;
            break;
        }
        if child.try_wait().unwrap().is_some() {
            break;
        }
        std::thread::sleep(Duration::from_millis(2));
    }
    child.kill().unwrap();
    let _ = child.wait();
    assert!(caught, "the run ended before an extension block was seen");
    let o = run(&["resume", "--quiet", cut.to_str().unwrap()]);
    assert!(
        matches!(o.status.code(), Some(0 | 4 | 5 | 6)),
        "resume: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    for f in [
        "chain-0.draws",
        "chain-1.draws",
        "chain-2.draws",
        "chain-3.draws",
        "checkpoint.vpck",
    ] {
        let a = std::fs::read(full.join(f)).unwrap();
        let b = std::fs::read(cut.join(f)).unwrap();
        assert!(
            a == b,
            "{f} differs after kill -9 in an extension block and resume"
        );
    }
    let (sa, sb) = (
        read_json(&full.join("summary.json")),
        read_json(&cut.join("summary.json")),
    );
    for key in ["posterior", "chains", "diagnostics", "evaluations"] {
        assert_eq!(sa[key], sb[key], "{key} differs after kill and resume");
    }
    assert_eq!(
        sa["sampling"]["draws_reached"],
        sb["sampling"]["draws_reached"]
    );
    assert_eq!(sb["sampling"]["stop_reason"], "target met");
}

#[test]
fn a_time_limit_saves_the_outputs_and_resume_continues() {
    let d = temp_dir("target-time");
    let out = d.join("run");
    let (code, s) = sample(
        &out,
        &[
            "--kernel",
            "hmc",
            "--draws",
            "50",
            "--warmup",
            "100",
            "--checkpoint-every",
            "10",
            "--target-ess",
            "1000000",
            "--time-limit",
            "1",
        ],
    );
    assert_eq!(s["sampling"]["stop_reason"], "time limit");
    assert_ne!(code, Some(0));
    let reached = s["sampling"]["draws_reached"].as_u64().unwrap();
    assert!(out.join("report.html").exists());
    let o = run(&["resume", "--quiet", out.to_str().unwrap()]);
    assert!(matches!(o.status.code(), Some(0 | 4 | 5 | 6)));
    let s2 = read_json(&out.join("summary.json"));
    assert_eq!(s2["sampling"]["stop_reason"], "time limit");
    assert!(s2["sampling"]["draws_reached"].as_u64().unwrap() > reached);
}
