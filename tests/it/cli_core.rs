//! The binary as a user meets it: the demo, check, map, and bad input giving clear errors.

use crate::common;

use common::{read_json, run, temp_dir};

fn stderr(o: &std::process::Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

#[test]
fn demo_runs_with_no_arguments_and_writes_its_summary() {
    let d = temp_dir("demo");
    let o = common::varpost()
        .arg("demo")
        .current_dir(&d)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", stderr(&o));
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(out.contains("conditional on the model"), "{out}");
    let s = read_json(&d.join("varpost-demo/summary.json"));
    assert_eq!(s["dim"], 40);
    assert_eq!(s["map"]["converged"], true);
    assert!(s["evaluations"]["gradient"].as_u64().unwrap() > 0);
}

#[test]
fn check_passes_on_lorenz96_and_map_converges() {
    let d = temp_dir("check-map");
    let o = run(&[
        "check",
        "--problem",
        "lorenz96",
        "--out",
        d.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(String::from_utf8_lossy(&o.stdout).contains("gradient correct"));
    let o = run(&["map", "--problem", "lorenz96", "--out", d.to_str().unwrap()]);
    assert!(o.status.success(), "{}", stderr(&o));
    let s = read_json(&d.join("summary.json"));
    let reduction =
        s["map"]["grad_norm_start"].as_f64().unwrap() / s["map"]["grad_norm"].as_f64().unwrap();
    assert!(reduction >= 1e5, "gradient norm reduced by {reduction}");
    assert_eq!(s["map"]["x"].as_array().unwrap().len(), 40);
    assert!(d.join("analysis.csv").exists());
}

#[test]
fn map_on_linear_gaussian_matches_the_reference_mean() {
    let d = temp_dir("map-lg");
    let o = run(&[
        "map",
        "--problem",
        "linear-gaussian",
        "--out",
        d.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let s = read_json(&d.join("summary.json"));
    let x = common::vecf(&s["map"]["x"]);
    let mean = common::vecf(&s["reference"]["mean"]);
    assert!(common::max_rel_err(&x, &mean) < 1e-6);
    assert_eq!(common::vecf(&s["reference"]["variance"]).len(), 20);
}

fn fails_with(args: &[&str], code: i32, needle: &str) {
    let o = run(args);
    let e = stderr(&o);
    assert_eq!(o.status.code(), Some(code), "{args:?}: {e}");
    assert!(e.contains(needle), "{args:?}: expected '{needle}' in: {e}");
    assert!(!e.contains("panicked"), "{e}");
}

#[test]
fn bad_input_gives_clear_errors() {
    let d = temp_dir("bad");
    let out = d.to_str().unwrap();
    fails_with(
        &["map", "--problem", "lorenz69", "--out", out],
        2,
        "unknown problem 'lorenz69'",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--set",
            "windw=3",
            "--out",
            out,
        ],
        2,
        "known settings",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--set",
            "window",
            "--out",
            out,
        ],
        2,
        "key=value",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--set",
            "sigma_o=-1",
            "--out",
            out,
        ],
        2,
        "positive",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--set",
            "obs_op=cube",
            "--out",
            out,
        ],
        2,
        "'linear' or 'square'",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "linear-gaussian",
            "--set",
            "rank=50",
            "--out",
            out,
        ],
        2,
        "rank",
    );
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--grad-rtol",
            "2",
            "--out",
            out,
        ],
        2,
        "--grad-rtol",
    );
    fails_with(&["map", "--out", out], 2, "--problem");
    // A start point of the wrong length, and one with a NaN: bad files are bad input (2).
    let start = d.join("start.txt");
    std::fs::write(&start, "1 2 3\n").unwrap();
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--start",
            start.to_str().unwrap(),
            "--out",
            out,
        ],
        2,
        "dimension 40",
    );
    std::fs::write(&start, vec!["1.0"; 39].join("\n") + "\nnan\n").unwrap();
    fails_with(
        &[
            "check",
            "--problem",
            "lorenz96",
            "--start",
            start.to_str().unwrap(),
            "--out",
            out,
        ],
        2,
        "not finite",
    );
    // A start point where the model blows up: the cost is not finite (a failure of the run, 1).
    std::fs::write(&start, vec!["1e200"; 40].join("\n")).unwrap();
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--start",
            start.to_str().unwrap(),
            "--out",
            out,
        ],
        1,
        "not finite",
    );
    // A scenario folder that is missing or corrupt (bad input, 2).
    fails_with(
        &[
            "map",
            "--problem",
            "lorenz96",
            "--set",
            "data=/nonexistent",
            "--out",
            out,
        ],
        2,
        "does not exist",
    );
    let sc = d.join("scenario");
    std::fs::create_dir_all(&sc).unwrap();
    for f in ["scenario.json", "background.csv", "observations.csv"] {
        std::fs::copy(
            common::root().join("demo-data/lorenz96").join(f),
            sc.join(f),
        )
        .unwrap();
    }
    let obs = std::fs::read_to_string(sc.join("observations.csv")).unwrap();
    std::fs::write(
        sc.join("observations.csv"),
        obs.replacen("\n2,0,", "\n2,99,", 1),
    )
    .unwrap();
    let data = format!("data={}", sc.display());
    fails_with(
        &["map", "--problem", "lorenz96", "--set", &data, "--out", out],
        2,
        "site 99",
    );
    std::fs::write(
        sc.join("observations.csv"),
        obs.replacen("\n2,0,", "\n2,0,abc", 1),
    )
    .unwrap();
    fails_with(
        &["map", "--problem", "lorenz96", "--set", &data, "--out", out],
        2,
        "not a number",
    );
    std::fs::write(sc.join("observations.csv"), &obs).unwrap();
    std::fs::write(sc.join("scenario.json"), "{\"config\": {\"model\": 3}}").unwrap();
    fails_with(
        &["map", "--problem", "lorenz96", "--set", &data, "--out", out],
        2,
        "scenario.json",
    );
}

#[test]
fn a_users_own_observations_are_read_from_a_scenario_folder() {
    let d = temp_dir("own-obs");
    let sc = d.join("scenario");
    let o = run(&[
        "synth",
        "--set",
        "seed=5",
        "--set",
        "obs_every=4",
        "--out",
        sc.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    std::fs::remove_file(sc.join("truth.csv")).unwrap();
    let data = format!("data={}", sc.display());
    let o = run(&[
        "map",
        "--problem",
        "lorenz96",
        "--set",
        &data,
        "--out",
        d.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let s = read_json(&d.join("summary.json"));
    assert_eq!(s["settings"]["obs_every"], 4);
}

/// Runs `args` and asserts a usage error (exit code 2) naming `option`, without a panic.
fn refused(args: &[&str], option: &str) {
    let o = run(args);
    let e = stderr(&o);
    assert_eq!(o.status.code(), Some(2), "{args:?}: {e}");
    assert!(e.contains(option), "{args:?}: expected '{option}' in: {e}");
    assert!(!e.contains("panicked"), "{args:?}: {e}");
}

#[test]
fn every_float_option_is_checked_when_parsed() {
    // Per option: the subcommand and arguments that reach it, and which of the values are in range.
    // Values in range are shown to pass the parser by the error that comes next: an adapter option
    // given without --adapter.
    const VALUES: [&str; 5] = ["1e30", "1e19", "nan", "-1", "inf"];
    let cases: [(&[&str], &str, &[&str]); 7] = [
        (&["map", "--problem", "lorenz96"], "--grad-rtol", &[]),
        (
            &["hessian", "--problem", "lorenz96"],
            "--threshold",
            &["1e30", "1e19"],
        ),
        (&["sample", "--problem", "lorenz96"], "--target-accept", &[]),
        (&["sample", "--problem", "lorenz96"], "--hmc-time", &[]),
        (
            &["sample", "--problem", "lorenz96"],
            "--t-dof",
            &["1e30", "1e19"],
        ),
        (&["check", "--adapter", "true"], "--eval-timeout", &[]),
        (&["check", "--adapter", "true"], "--handshake-timeout", &[]),
    ];
    for (base, option, accepted) in cases {
        for v in VALUES {
            let mut args = base.to_vec();
            args.extend_from_slice(&[option, v]);
            if accepted.contains(&v) {
                args.extend_from_slice(&["--workers", "2"]);
                refused(&args, "--workers applies only to --adapter");
            } else {
                refused(&args, &format!("invalid value '{v}' for '{option}"));
            }
        }
    }
    // The durations that used to panic or hang name their limit.
    refused(
        &["sample", "--adapter", "true", "--eval-timeout", "1e19"],
        "between 0 (no limit) and 1e9",
    );
}

#[test]
fn adapter_options_with_a_builtin_problem_are_refused() {
    for (option, value) in [
        ("--workers", "0"),
        ("--workers", "4"),
        ("--encoding", "foo"),
        ("--encoding", "text"),
        ("--eval-timeout", "5"),
        ("--handshake-timeout", "5"),
        ("--launcher", "mpirun -n 2"),
        ("--restarts", "5"),
    ] {
        let o = run(&["check", "--problem", "lorenz96", option, value]);
        let e = stderr(&o);
        assert_eq!(o.status.code(), Some(2), "{option} {value}: {e}");
        // A value refused by its own parser says so; a valid one is refused as adapter-only.
        assert!(
            e.contains(&format!("{option} applies only to --adapter"))
                || e.contains(&format!("invalid value '{value}' for '{option}")),
            "{option} {value}: {e}"
        );
    }
    let o = run(&["check", "--problem", "lorenz96", "--eval-timeout", "nan"]);
    assert!(stderr(&o).contains("not a finite number"), "{}", stderr(&o));
}

#[test]
fn without_out_each_subcommand_writes_to_a_folder_named_after_it() {
    let d = temp_dir("default-out");
    let in_d = |args: &[&str]| {
        common::varpost()
            .args(args)
            .current_dir(&d)
            .output()
            .unwrap()
    };
    for (sub, problem) in [
        ("check", "lorenz96"),
        ("map", "lorenz96"),
        ("hessian", "linear-gaussian"),
    ] {
        let o = in_d(&[sub, "--problem", problem]);
        assert!(o.status.success(), "{sub}: {}", stderr(&o));
        let out = String::from_utf8_lossy(&o.stdout);
        let folder = format!("varpost-{sub}");
        assert!(
            out.lines()
                .next()
                .unwrap()
                .starts_with(&format!("output folder: {folder} (the default")),
            "{out}"
        );
        assert_eq!(
            read_json(&d.join(&folder).join("summary.json"))["command"],
            sub
        );
    }
    // `sample` names its folder before anything runs (here: before a setting is refused).
    let o = in_d(&[
        "sample",
        "--problem",
        "linear-gaussian",
        "--laplace-draws",
        "20",
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(String::from_utf8_lossy(&o.stdout).starts_with("output folder: varpost-sample"));
    // An explicit --out is named too.
    let o = in_d(&["check", "--problem", "lorenz96", "--out", "mine"]);
    assert!(String::from_utf8_lossy(&o.stdout).starts_with("output folder: mine\n"));
    assert!(d.join("mine/summary.json").exists());
}

/// A folder locked by a live run is refused before any model starts, naming the run that holds it
/// (common practice, no source: one writer per output folder).
#[test]
fn a_locked_folder_is_refused_naming_the_holder() {
    let d = temp_dir("locked-folder");
    let lock = varpost::output::lock::RunLock::acquire(&d, "a test holding the folder").unwrap();
    let o = run(&[
        "map",
        "--problem",
        "linear-gaussian",
        "--out",
        d.to_str().unwrap(),
    ]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains(&std::process::id().to_string()), "{e}");
    assert!(
        !d.join("summary.json").exists(),
        "the refused run wrote its summary"
    );
    drop(lock);
    let o = run(&[
        "map",
        "--problem",
        "linear-gaussian",
        "--out",
        d.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        !d.join(".varpost.lock").exists(),
        "the lock is released on exit"
    );
}

/// `map`, `check`, `hessian` and `sample` refuse a folder that holds a sampling run instead of
/// overwriting its summary (the run record here is the first release's, tests/it/fixtures/run-v1.json).
#[test]
fn a_sampling_run_is_not_overwritten() {
    let d = temp_dir("holds-a-run");
    std::fs::copy(
        common::root().join("tests/it/fixtures/run-v1.json"),
        d.join("run.json"),
    )
    .unwrap();
    for cmd in ["map", "check", "hessian", "sample"] {
        let o = run(&[
            cmd,
            "--problem",
            "linear-gaussian",
            "--out",
            d.to_str().unwrap(),
        ]);
        let e = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{cmd}: {e}");
        assert!(
            e.contains("holds a sampling run") && e.contains("varpost resume"),
            "{cmd}: {e}"
        );
        assert!(!d.join("summary.json").exists(), "{cmd} wrote a summary");
    }
}

/// Output piped into a reader that stops after one line (`varpost check | head -1`) ends varpost
/// quietly, as it does other command-line tools (SIGPIPE; common practice, no source), not with an
/// internal error.
#[test]
fn a_reader_that_stops_early_ends_the_run_quietly() {
    use std::io::{BufRead, BufReader};
    use std::process::Stdio;
    let d = common::temp_dir("broken-pipe");
    let mut child = common::varpost()
        .args(["check", "--problem", "lorenz96", "--out"])
        .arg(d.join("run"))
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let mut first = String::new();
    BufReader::new(child.stdout.take().unwrap())
        .read_line(&mut first)
        .unwrap();
    // The reader goes away after one line.
    let out = child.wait_with_output().unwrap();
    let e = String::from_utf8_lossy(&out.stderr);
    assert!(!e.contains("internal error"), "{e}");
    assert!(!first.is_empty());
}
