//! Benchmark: writing ensemble.nc from a stream of members, and drawing a trace plot of long chains.
//!
//! Run with `cargo bench --bench output_write`. Prints one JSON object per case (members, components,
//! file size, wall time, throughput, peak resident memory VmHWM) and exits non-zero when a target is
//! missed: ensemble.nc written at 20 MB/s or more with peak memory under 100 MB while the file is
//! 160 MB (the members are streamed, never all held), and a trace plot of 4 components x 4 chains x
//! 100 000 draws in under 10 s.

mod common;

use std::time::Instant;

use common::peak_rss;
use varpost::output::ensemble::{write_ensemble, EnsembleInfo, Member};
use varpost::output::plots::{trace_plot, ChainSeries};

const MB: f64 = 1024.0 * 1024.0;

fn ensemble_case(dir: &std::path::Path, members: usize, n: usize) -> bool {
    let analysis = vec![0.5; n];
    let info = EnsembleInfo {
        title: "benchmark",
        analysis: &analysis,
        ..Default::default()
    };
    let stream = (0..members).map(|k| {
        Ok(Member {
            chain: k % 4,
            draw: k / 4,
            state: (0..n).map(|i| (k * n + i) as f64 * 1e-3).collect(),
            weight: None,
        })
    });
    let t0 = Instant::now();
    let path = match write_ensemble(dir, &info, members, stream) {
        Ok(p) => p,
        Err(e) => {
            eprintln!("ensemble {members} x {n}: {e}");
            return false;
        }
    };
    let secs = t0.elapsed().as_secs_f64();
    let bytes = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0) as f64;
    let rss = peak_rss().map(|b| b as f64 / MB);
    let rate = bytes / MB / secs;
    let ok = rate >= 20.0 && rss.is_none_or(|r| r < 100.0);
    println!(
        "{}",
        serde_json::json!({
            "case": "ensemble.nc", "members": members, "components": n,
            "file_mb": bytes / MB, "seconds": secs, "mb_per_s": rate, "peak_rss_mb": rss, "ok": ok,
        })
    );
    let _ = std::fs::remove_file(&path);
    ok
}

fn trace_case(dir: &std::path::Path) -> bool {
    let chains: Vec<Vec<f64>> = (0..4)
        .map(|c| {
            (0..100_000)
                .map(|t| ((t as f64) * 0.001 + c as f64).sin())
                .collect()
        })
        .collect();
    let series: Vec<ChainSeries> = (0..4)
        .map(|_| ChainSeries {
            label: "component",
            chains: &chains,
        })
        .collect();
    let t0 = Instant::now();
    let res = trace_plot(&dir.join("trace.png"), &series);
    let secs = t0.elapsed().as_secs_f64();
    let ok = res.is_ok() && secs < 10.0;
    if let Err(e) = &res {
        eprintln!("trace plot: {e}");
    }
    println!(
        "{}",
        serde_json::json!({"case": "trace plot", "components": 4, "chains": 4, "draws": 100_000,
                           "seconds": secs, "ok": ok})
    );
    ok
}

fn main() {
    let dir = std::env::temp_dir().join(format!("varpost-bench-output-{}", std::process::id()));
    let mut ok = true;
    ok &= ensemble_case(&dir, 100_000, 20);
    ok &= ensemble_case(&dir, 10_000, 2_000);
    ok &= trace_case(&dir);
    let _ = std::fs::remove_dir_all(&dir);
    if !ok {
        std::process::exit(1);
    }
}
