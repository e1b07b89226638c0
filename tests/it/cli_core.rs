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
    // A start point of the wrong length, and one with a NaN.
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
        1,
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
        1,
        "not finite",
    );
    // A start point where the model blows up: the cost is not finite.
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
    // A scenario folder that is missing or corrupt.
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
        1,
        "site 99",
    );
    std::fs::write(
        sc.join("observations.csv"),
        obs.replacen("\n2,0,", "\n2,0,abc", 1),
    )
    .unwrap();
    fails_with(
        &["map", "--problem", "lorenz96", "--set", &data, "--out", out],
        1,
        "not a number",
    );
    std::fs::write(sc.join("observations.csv"), &obs).unwrap();
    std::fs::write(sc.join("scenario.json"), "{\"config\": {\"model\": 3}}").unwrap();
    fails_with(
        &["map", "--problem", "lorenz96", "--set", &data, "--out", out],
        1,
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
