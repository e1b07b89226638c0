//! `varpost hessian` as a user meets it: the Laplace covariance at the analysis written to summary.json,
//! variance.csv and eigenvectors.csv, and bad options refused with a clear message.

use crate::common;

use common::{read_json, run, temp_dir};

fn numbers(v: &serde_json::Value) -> Vec<f64> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

#[test]
fn hessian_on_linear_gaussian_matches_the_closed_form() {
    // Source: Gaussian conditioning, Σ = (B⁻¹ + Gᵀ R⁻¹ G)⁻¹ (textbook), reported by the problem itself
    // as `reference`; dense and low-rank Laplace covariances are exact for a linear problem.
    for method in ["dense", "low-rank"] {
        let d = temp_dir(&format!("hessian-{method}"));
        let o = run(&[
            "hessian",
            "--problem",
            "linear-gaussian",
            "--set",
            "n=80",
            "--set",
            "m=30",
            "--method",
            method,
            "--threshold",
            "1e-12",
            "--out",
            d.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let s = read_json(&d.join("summary.json"));
        let lap = &s["laplace"];
        assert_eq!(lap["method"], method);
        let var = numbers(&lap["variance"]);
        let truth = numbers(&s["reference"]["variance"]);
        for (i, (a, b)) in var.iter().zip(&truth).enumerate() {
            assert!(
                (a - b).abs() < 1e-6 * b,
                "{method}: variance {i}: {a} vs {b}"
            );
        }
        if method == "low-rank" {
            assert_eq!(lap["rank"], 30, "forward map of rank m = 30");
        }
        assert!(s["evaluations"]["hessvec"].as_u64().unwrap() > 0);
        let eig = numbers(&lap["eigenvalues"]);
        assert!(eig.windows(2).all(|w| w[0] >= w[1]));
        let table = std::fs::read_to_string(d.join("variance.csv")).unwrap();
        assert!(table.starts_with("component,name,analysis,laplace_variance"));
        let modes = std::fs::read_to_string(d.join("eigenvectors.csv")).unwrap();
        assert_eq!(modes.lines().count(), 81);
    }
}

#[test]
fn bad_hessian_options_are_refused() {
    let d = temp_dir("hessian-bad");
    let out = d.to_str().unwrap();
    let o = run(&[
        "hessian",
        "--problem",
        "linear-gaussian",
        "--method",
        "cholesky",
        "--out",
        out,
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("choose auto, dense, low-rank"));
    let o = run(&[
        "hessian",
        "--problem",
        "linear-gaussian",
        "--max-rank",
        "50",
        "--out",
        out,
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("larger than the dimension 20"));
}
