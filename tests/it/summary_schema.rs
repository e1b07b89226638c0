//! The schema of summary.json (every key path and the JSON type at it) as a snapshot, so that a change
//! to the documented format is seen in review. Values are not part of the snapshot.

use crate::common;

fn paths(v: &serde_json::Value, prefix: &str, out: &mut Vec<String>) {
    match v {
        serde_json::Value::Object(m) => {
            for (k, x) in m {
                // Settings and per-stage counts are problem-specific maps, not schema.
                if prefix.is_empty() && k == "settings" {
                    out.push("settings: object".into());
                    continue;
                }
                paths(
                    x,
                    &if prefix.is_empty() {
                        k.clone()
                    } else {
                        format!("{prefix}.{k}")
                    },
                    out,
                );
            }
        }
        serde_json::Value::Array(a) => match a.first() {
            Some(first) if first.is_object() => paths(first, &format!("{prefix}[]"), out),
            Some(first) => out.push(format!("{prefix}: array of {}", kind(first))),
            None => out.push(format!("{prefix}: array")),
        },
        other => out.push(format!("{prefix}: {}", kind(other))),
    }
}

fn kind(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Null => "null",
        serde_json::Value::Bool(_) => "bool",
        serde_json::Value::Number(_) => "number",
        serde_json::Value::String(_) => "string",
        serde_json::Value::Array(_) => "array",
        serde_json::Value::Object(_) => "object",
    }
}

#[test]
fn sample_summary_schema() {
    let d = common::temp_dir("schema");
    let out = d.join("run");
    let o = common::run(&[
        "sample",
        "--problem",
        "linear-gaussian",
        // HMC, whose chains fill every per-chain field (step size, E-BFMI, the pooled warm-up's).
        "--kernel",
        "hmc",
        // Enough draws for the chains to pass their checks, so that every verdict field is filled.
        "--draws",
        "1000",
        "--warmup",
        "500",
        "--quiet",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert!(
        matches!(o.status.code(), Some(0 | 4 | 5 | 6)),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let s = common::read_json(&out.join("summary.json"));
    let mut p = Vec::new();
    paths(&s, "", &mut p);
    insta::assert_snapshot!(p.join("\n"));
}
