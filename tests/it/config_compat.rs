//! Run records written by the first release (version 1, no version field) are read by this one.

use std::path::Path;

use varpost::config::{KernelKind, MetricKind, RunConfig, RUN_RECORD_VERSION};

use crate::common::temp_dir;

fn fixture() -> serde_json::Value {
    let p = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/it/fixtures/run-v1.json");
    serde_json::from_str(&std::fs::read_to_string(p).unwrap()).unwrap()
}

fn read(v: &serde_json::Value, name: &str) -> varpost::Result<RunConfig> {
    let d = temp_dir(name);
    std::fs::write(d.join("run.json"), serde_json::to_string_pretty(v).unwrap()).unwrap();
    let r = RunConfig::read(&d);
    std::fs::remove_dir_all(&d).ok();
    r
}

/// The record of a demo run made by the first release (tests/it/fixtures/run-v1.json).
#[test]
fn a_first_release_record_reads_with_its_settings() {
    let c = read(&fixture(), "run-v1").unwrap();
    assert_eq!(c.version, RUN_RECORD_VERSION);
    assert_eq!(c.sampler.kernel, KernelKind::Hmc);
    assert_eq!(c.sampler.hmc.time, std::f64::consts::FRAC_PI_2);
    assert_eq!(c.sampler.hmc.max_steps, 1000);
    assert_eq!(c.sampler.independence.t_dof, None);
    assert_eq!(c.metric, MetricKind::Laplace);
    assert_eq!(c.laplace_check.draws, 200);
    assert!(c.skip_check);
    // Written before runs could extend their chains: it keeps its fixed draws, without limits.
    assert_eq!(c.stop.target_ess, 0);
    assert_eq!(c.stop.max_evaluations, None);
    assert_eq!(c.stop.time_limit, None);
}

/// A record with a stop rule keeps it; a bad one is refused by name.
#[test]
fn the_stop_rule_is_recorded_and_checked() {
    let mut v = fixture();
    v["stop"] =
        serde_json::json!({ "target_ess": 800, "max_evaluations": 50000, "time_limit": 60.0 });
    let c = read(&v, "stop-rule").unwrap();
    assert_eq!(c.stop.target_ess, 800);
    assert_eq!(c.stop.max_evaluations, Some(50000));
    assert_eq!(c.stop.time_limit, Some(60.0));
    v["stop"]["time_limit"] = serde_json::json!(-1.0);
    let e = read(&v, "stop-rule-bad").unwrap_err().to_string();
    assert!(e.contains("--time-limit"), "{e}");
}

#[test]
fn first_release_metric_and_student_t_settings_carry_over() {
    let mut v = fixture();
    v["metric"] = serde_json::json!({ "method": "low-rank" });
    v["sampler"]["t_dof"] = serde_json::json!(5.0);
    v["sampler"]["kernel"] = serde_json::json!("laplace-mh");
    let c = read(&v, "run-v1-t").unwrap();
    assert_eq!(c.metric, MetricKind::LowRank);
    assert_eq!(c.sampler.independence.t_dof, Some(5.0));
    assert_eq!(c.sampler.kernel, KernelKind::LaplaceMh);
}

#[test]
fn newer_or_broken_records_are_refused_by_name() {
    let mut v = fixture();
    v["version"] = serde_json::json!(99);
    let e = read(&v, "run-v99").unwrap_err().to_string();
    assert!(e.contains("newer varpost"), "{e}");
    let mut v = fixture();
    v["sampler"]["chains"] = serde_json::json!(0);
    let e = read(&v, "run-bad").unwrap_err().to_string();
    assert!(e.contains("chains"), "{e}");
}
