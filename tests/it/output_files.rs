//! The output files read back by independent readers: ensemble.nc by Python netCDF4 and
//! scipy.io.netcdf_file, components.csv by Python's csv module, the PNG pictures by the `image` crate,
//! and the links of report.html resolved against the folder.

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde_json::Value;
use varpost::diagnostics::{component_stats, ComponentStats};
use varpost::output::ensemble::{write_ensemble, EnsembleInfo, Member};
use varpost::output::html::{write_report, Figure, ReportPage};
use varpost::output::plots::{
    autocorrelation_plot, marginal_plot, std_plot, trace_plot, ChainSeries, Marginal,
    MARGINAL_PANEL, PANEL_HEIGHT, STD_SIZE, TITLE_HEIGHT, WIDTH,
};
use varpost::output::table::{write_components, ComponentTable, COMPONENT_COLUMNS};
use varpost::Error;

/// The Python interpreter with numpy, scipy and netCDF4: $VARPOST_PYTHON, else the project's test
/// virtual environment, else the shared one, else python3.
fn python() -> String {
    if let Ok(p) = std::env::var("VARPOST_PYTHON") {
        return p;
    }
    let candidates = [
        common::root().join("target/test-venv/bin/python"),
        PathBuf::from("/work/main/target/test-venv/bin/python"),
    ];
    candidates
        .iter()
        .find(|p| p.is_file())
        .map(|p| p.to_string_lossy().into_owned())
        .unwrap_or_else(common::python)
}

/// Runs an inline Python script with arguments; returns what it printed as JSON.
fn run_python(script: &str, args: &[&Path]) -> Value {
    let out = Command::new(python())
        .arg("-c")
        .arg(script)
        .args(args)
        .env("MPLCONFIGDIR", std::env::temp_dir())
        .output()
        .expect("the Python interpreter runs (set VARPOST_PYTHON)");
    assert!(
        out.status.success(),
        "python failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("the script prints JSON")
}

fn strs(v: &Value) -> Vec<String> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_str().expect("string").to_string())
        .collect()
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

/// Values that test full precision: thirds, tiny and huge magnitudes, negative zero's neighbours.
fn test_vector(n: usize, seed: f64) -> Vec<f64> {
    (0..n)
        .map(|i| {
            let k = i as f64 + seed;
            match i % 4 {
                0 => k / 3.0,
                1 => -std::f64::consts::PI * 1e-300 * k,
                2 => 1.0e300 / (k + 7.0),
                _ => (k * 0.1).sin(),
            }
        })
        .collect()
}

const NC_READER: &str = r#"
import json, sys
import numpy as np
import netCDF4
from scipy.io import netcdf_file

path = sys.argv[1]
out = {}
with netCDF4.Dataset(path) as ds:
    ds.set_auto_mask(False)
    r = {"data_model": ds.data_model,
         "dims": {k: len(d) for k, d in ds.dimensions.items()},
         "unlimited": [k for k, d in ds.dimensions.items() if d.isunlimited()],
         "global": {k: ds.getncattr(k) for k in ds.ncattrs()},
         "vars": {}}
    for name, v in ds.variables.items():
        e = {"dims": list(v.dimensions), "dtype": str(v.dtype),
             "attrs": {k: v.getncattr(k) for k in v.ncattrs()}}
        if name == "component_name":
            v.set_auto_chartostring(False)
            e["data"] = [b"".join(row).decode("utf-8").rstrip("\x00") for row in v[:]]
        else:
            e["data"] = np.asarray(v[:]).tolist()
        r["vars"][name] = e
    out["netCDF4"] = r
f = netcdf_file(path, "r", mmap=False)
r = {"version": int(f.version_byte),
     "dims": {k: d for k, d in f.dimensions.items()},
     "global": {k: (v.decode() if isinstance(v, bytes) else v) for k, v in f._attributes.items()},
     "vars": {}}
for name, v in f.variables.items():
    e = {"dims": list(v.dimensions), "shape": list(v.shape),
         "attrs": {k: (a.decode() if isinstance(a, bytes) else a) for k, a in v._attributes.items()}}
    if name == "component_name":
        e["data"] = [b"".join(row).decode("utf-8").rstrip("\x00") for row in v.data]
    else:
        e["data"] = v.data.tolist()
    r["vars"][name] = e
f.close()
out["scipy"] = r
print(json.dumps(out, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o)))
"#;

#[test]
fn ensemble_round_trip_through_netcdf4_and_scipy() {
    let dir = common::temp_dir("ensemble-nc");
    let n = 5;
    let names: Vec<String> = ["x0", "T(lev=2,lat=10)", "u", "v wind", "q"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let analysis = test_vector(n, 0.25);
    let background = test_vector(n, 1.5);
    let bvar: Vec<f64> = (0..n).map(|i| 1.0 + i as f64 / 7.0).collect();
    let pmean = test_vector(n, 2.75);
    let pvar: Vec<f64> = (0..n).map(|i| 0.1 / (i as f64 + 3.0)).collect();
    let lvar: Vec<f64> = (0..n).map(|i| 0.3 / (i as f64 + 11.0)).collect();
    let (chains, draws) = (3, 4);
    let members: Vec<Member> = (0..chains * draws)
        .map(|k| Member {
            chain: k / draws,
            draw: k % draws + 1000,
            state: test_vector(n, k as f64 + 0.5),
            weight: None,
        })
        .collect();
    let info = EnsembleInfo {
        title: "varpost posterior ensemble: test",
        command_line: "varpost sample --problem lorenz96 --out DIR",
        analysis: &analysis,
        names: Some(&names),
        units: Some("m s-1"),
        background: Some(&background),
        background_variance: Some(&bvar),
        posterior_mean: Some(&pmean),
        posterior_variance: Some(&pvar),
        laplace_variance: Some(&lvar),
        weighted: false,
    };
    let path = write_ensemble(&dir, &info, members.len(), members.iter().cloned().map(Ok)).unwrap();
    assert_eq!(path, dir.join("ensemble.nc"));
    let got = run_python(NC_READER, &[&path]);

    // Both readers: the NetCDF classic format (Unidata, "The NetCDF Classic Format Specification":
    // version byte 1) with `member` the unlimited dimension; values compared exactly, as the file
    // stores IEEE doubles big-endian and JSON carries Python's round-trip repr.
    let nc = &got["netCDF4"];
    assert_eq!(nc["data_model"], "NETCDF3_CLASSIC");
    assert_eq!(nc["unlimited"], serde_json::json!(["member"]));
    assert_eq!(nc["dims"]["member"], 12);
    assert_eq!(nc["dims"]["component"], 5);
    assert_eq!(nc["dims"]["name_strlen"], "T(lev=2,lat=10)".len());
    let sp = &got["scipy"];
    assert_eq!(sp["version"], 1);
    // scipy reports the unlimited dimension's length as None (scipy.io.netcdf_file documentation).
    assert_eq!(sp["dims"]["member"], Value::Null);
    assert_eq!(sp["dims"]["component"], 5);

    for r in [nc, sp] {
        let vars = &r["vars"];
        let state: Vec<Vec<f64>> = vars["state"]["data"]
            .as_array()
            .unwrap()
            .iter()
            .map(f64s)
            .collect();
        assert_eq!(state.len(), 12);
        for (row, m) in state.iter().zip(&members) {
            assert_eq!(row, &m.state);
        }
        assert_eq!(
            vars["state"]["dims"],
            serde_json::json!(["member", "component"])
        );
        // Integers arrive as JSON numbers; compared as f64, exact below 2^53.
        let chain: Vec<f64> = members.iter().map(|m| m.chain as f64).collect();
        let draw: Vec<f64> = members.iter().map(|m| m.draw as f64).collect();
        assert_eq!(f64s(&vars["chain"]["data"]), chain);
        assert_eq!(f64s(&vars["draw"]["data"]), draw);
        for (name, want) in [
            ("analysis", &analysis),
            ("background", &background),
            ("background_variance", &bvar),
            ("posterior_mean", &pmean),
            ("posterior_variance", &pvar),
            ("laplace_variance", &lvar),
        ] {
            assert_eq!(&f64s(&vars[name]["data"]), want, "{name}");
            assert_eq!(vars[name]["dims"], serde_json::json!(["component"]));
            assert!(vars[name]["attrs"]["long_name"].as_str().unwrap().len() > 5);
        }
        assert_eq!(strs(&vars["component_name"]["data"]), names);
        assert_eq!(vars["state"]["attrs"]["units"], "m s-1");
        assert_eq!(vars["analysis"]["attrs"]["units"], "m s-1");
        assert_eq!(vars["posterior_variance"]["attrs"]["units"], "(m s-1)^2");

        // CF conventions 1.8, section 2.6.2 (global attributes title, source, history, comment).
        let g = &r["global"];
        assert_eq!(g["Conventions"], "CF-1.8");
        assert_eq!(g["title"], "varpost posterior ensemble: test");
        assert_eq!(
            g["source"],
            format!("varpost {}", env!("CARGO_PKG_VERSION"))
        );
        assert_eq!(g["comment"], varpost::output::summary::CAUTION);
        let history = g["history"].as_str().unwrap();
        assert!(history.ends_with("Z: varpost sample --problem lorenz96 --out DIR"));
        assert_eq!(history.find('T'), Some(10), "ISO 8601 timestamp: {history}");
    }
    assert_eq!(nc["vars"]["chain"]["dtype"], "int32");
    assert_eq!(nc["vars"]["state"]["dtype"], "float64");
}

#[test]
fn ensemble_without_optional_fields_and_with_no_members() {
    let dir = common::temp_dir("ensemble-minimal");
    let analysis = vec![1.0, 2.0];
    let info = EnsembleInfo {
        analysis: &analysis,
        ..Default::default()
    };
    let path = write_ensemble(&dir, &info, 0, std::iter::empty()).unwrap();
    let got = run_python(NC_READER, &[&path]);
    let nc = &got["netCDF4"];
    let mut vars: Vec<&str> = nc["vars"]
        .as_object()
        .unwrap()
        .keys()
        .map(String::as_str)
        .collect();
    vars.sort();
    assert_eq!(vars, ["analysis", "chain", "draw", "state"]);
    assert_eq!(nc["dims"]["member"], 0);
    assert_eq!(nc["unlimited"], serde_json::json!(["member"]));
    assert!(nc["vars"]["state"]["attrs"].get("units").is_none());
    assert_eq!(f64s(&got["scipy"]["vars"]["analysis"]["data"]), analysis);
}

#[test]
fn ensemble_names_with_nul_and_huge_names_read_back_whole() {
    // Read back by Python netCDF4 and scipy.io.netcdf_file; the storage rule (NUL written as \0, names
    // cut to MAX_NAME_BYTES ending in "...") is this project's, stated in the comment attribute.
    use varpost::output::ensemble::MAX_NAME_BYTES;
    let dir = common::temp_dir("ensemble-names");
    let names: Vec<String> = vec!["T\0lev2".into(), "x".repeat(5_000_000), "q".into()];
    let analysis = vec![1.0, 2.0, 3.0];
    let info = EnsembleInfo {
        analysis: &analysis,
        names: Some(&names),
        ..Default::default()
    };
    let path = write_ensemble(&dir, &info, 0, std::iter::empty()).unwrap();
    assert!(std::fs::metadata(&path).unwrap().len() < 10_000);
    let got = run_python(NC_READER, &[&path]);
    let cut = format!("{}...", "x".repeat(MAX_NAME_BYTES - 3));
    for r in [&got["netCDF4"], &got["scipy"]] {
        let v = &r["vars"]["component_name"];
        assert_eq!(strs(&v["data"]), ["T\\0lev2", cut.as_str(), "q"]);
        let comment = v["attrs"]["comment"].as_str().unwrap();
        assert!(
            comment.contains("NUL") && comment.contains("components.csv"),
            "{comment}"
        );
    }
    assert_eq!(got["netCDF4"]["dims"]["name_strlen"], MAX_NAME_BYTES);
}

/// Files left in a folder, temporary ones included.
fn listing(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}

#[test]
fn bad_members_give_clear_errors_and_leave_no_file() {
    let dir = common::temp_dir("ensemble-bad");
    let analysis = vec![0.0; 3];
    let info = EnsembleInfo {
        analysis: &analysis,
        ..Default::default()
    };
    let member = |len: usize| Member {
        chain: 0,
        draw: 0,
        state: vec![1.0; len],
        weight: None,
    };
    let e = write_ensemble(&dir, &info, 2, [Ok(member(3)), Ok(member(2))]).unwrap_err();
    assert!(
        e.to_string().contains("has 2 components, expected 3"),
        "{e}"
    );
    let e = write_ensemble(&dir, &info, 3, [Ok(member(3)), Ok(member(3))]).unwrap_err();
    assert!(
        e.to_string()
            .contains("2 ensemble members given, 3 announced"),
        "{e}"
    );
    let e = write_ensemble(&dir, &info, 1, [Ok(member(3)), Ok(member(3))]).unwrap_err();
    assert!(
        e.to_string().contains("more ensemble members than the 1"),
        "{e}"
    );
    let failing = [
        Ok(member(3)),
        Err(Error::Config("draws file truncated".into())),
    ];
    let e = write_ensemble(&dir, &info, 2, failing).unwrap_err();
    assert!(e.to_string().contains("draws file truncated"), "{e}");
    let big = Member {
        chain: 1 << 40,
        ..member(3)
    };
    let e = write_ensemble(&dir, &info, 1, [Ok(big)]).unwrap_err();
    assert!(e.to_string().contains("does not fit a NetCDF int"), "{e}");
    let bvar = vec![1.0; 2];
    let bad = EnsembleInfo {
        background_variance: Some(&bvar),
        ..info.clone()
    };
    let e = write_ensemble(&dir, &bad, 0, std::iter::empty()).unwrap_err();
    assert!(
        e.to_string().contains("background_variance has 2 values"),
        "{e}"
    );
    assert!(listing(&dir).is_empty(), "{:?}", listing(&dir));
}

/// AR(1) chains x_t = rho x_{t-1} + sqrt(1 - rho^2) e_t: stationary N(0, 1) with autocorrelation
/// rho^k at lag k (Box and Jenkins 1976, "Time Series Analysis", section 3.2.4).
fn ar1_chains(n_chains: usize, len: usize, rho: f64, offset: f64, seed: u64) -> Vec<Vec<f64>> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let normal = Normal::new(0.0, 1.0).unwrap();
    (0..n_chains)
        .map(|c| {
            let mut x = normal.sample(&mut rng);
            (0..len)
                .map(|_| {
                    x = rho * x + (1.0 - rho * rho).sqrt() * normal.sample(&mut rng);
                    x + offset * c as f64
                })
                .collect()
        })
        .collect()
}

/// Decodes a PNG with the `image` crate; checks its size and that the title band holds dark pixels
/// (text drawn: without a usable font plotters leaves it blank).
fn check_png(path: &Path, size: (u32, u32)) {
    let img = image::open(path)
        .unwrap_or_else(|e| panic!("{} does not decode: {e}", path.display()))
        .to_rgb8();
    assert_eq!(img.dimensions(), size, "{}", path.display());
    let dark = (0..size.0)
        .flat_map(|x| (0..TITLE_HEIGHT.min(size.1)).map(move |y| (x, y)))
        .filter(|&(x, y)| img.get_pixel(x, y).0.iter().all(|&c| c < 100))
        .count();
    assert!(
        dark > 200,
        "{}: title text missing ({dark} dark pixels)",
        path.display()
    );
}

/// Draws the four pictures of a synthetic run into `dir`; returns their file names.
fn draw_pictures(dir: &Path) -> Vec<(&'static str, (u32, u32))> {
    let slow = ar1_chains(4, 1500, 0.97, 0.4, 1);
    let fast = ar1_chains(4, 1500, 0.3, 0.0, 2);
    let traces = [
        ChainSeries {
            label: "x3  (R-hat 1.21, bulk ESS 38)",
            chains: &slow,
        },
        ChainSeries {
            label: "x7  (R-hat 1.002, bulk ESS 2100)",
            chains: &fast,
        },
    ];
    let mut out = Vec::new();
    let size = trace_plot(&dir.join("trace.png"), &traces).unwrap();
    assert_eq!(size, (WIDTH, TITLE_HEIGHT + 2 * PANEL_HEIGHT));
    out.push(("trace.png", size));

    // Autocorrelations: the closed form rho^k of each AR(1) chain, one rho per chain.
    let acf: Vec<Vec<f64>> = [0.97, 0.9, 0.6, 0.3]
        .iter()
        .map(|r: &f64| (0..100).map(|k| r.powi(k)).collect())
        .collect();
    let acf_neg: Vec<Vec<f64>> = vec![(0..100).map(|k| (-0.5f64).powi(k)).collect()];
    let series = [
        ChainSeries {
            label: "x3",
            chains: &acf,
        },
        ChainSeries {
            label: "x9 (antithetic)",
            chains: &acf_neg,
        },
    ];
    let size = autocorrelation_plot(&dir.join("autocorrelation.png"), &series).unwrap();
    assert_eq!(size, (WIDTH, TITLE_HEIGHT + 2 * PANEL_HEIGHT));
    out.push(("autocorrelation.png", size));

    let marg: Vec<Marginal> = [
        ("x3", &slow, 0.6, Some(1.0)),
        ("x7", &fast, 0.0, Some(1.0)),
        ("x8 (Laplace too narrow)", &fast, 0.0, Some(0.4)),
        ("x9", &fast, 0.1, None),
    ]
    .into_iter()
    .map(|(label, chains, analysis, laplace_std)| Marginal {
        series: ChainSeries { label, chains },
        analysis,
        laplace_std,
    })
    .collect();
    let size = marginal_plot(&dir.join("marginals.png"), &marg).unwrap();
    assert_eq!(size, (WIDTH, TITLE_HEIGHT + 2 * MARGINAL_PANEL.1));
    out.push(("marginals.png", size));

    let n = 40;
    let post: Vec<f64> = (0..n).map(|i| 0.3 + 0.1 * (i as f64 * 0.5).sin()).collect();
    let lap: Vec<f64> = post.iter().map(|s| s * 0.95).collect();
    let bg = vec![1.0; n];
    let size = std_plot(&dir.join("std.png"), &post, Some(&lap), Some(&bg)).unwrap();
    assert_eq!(size, STD_SIZE);
    out.push(("std.png", size));
    let wide: Vec<f64> = (0..n).map(|i| 10f64.powf(-2.0 + i as f64 / 10.0)).collect();
    let size = std_plot(&dir.join("std_log.png"), &wide, None, Some(&bg)).unwrap();
    out.push(("std_log.png", size));
    out
}

#[test]
fn plots_are_decodable_pngs_of_the_stated_size_with_text() {
    let dir = common::temp_dir("plots");
    for (file, size) in draw_pictures(&dir) {
        check_png(&dir.join(file), size);
    }
    // Only the pictures remain: no temporary files.
    assert_eq!(
        listing(&dir),
        [
            "autocorrelation.png",
            "marginals.png",
            "std.png",
            "std_log.png",
            "trace.png"
        ]
    );
}

#[test]
fn plots_survive_non_finite_and_empty_input() {
    let dir = common::temp_dir("plots-odd");
    let odd = vec![
        vec![f64::NAN; 10],
        vec![1.0, f64::INFINITY, 2.0, 3.0],
        vec![],
    ];
    let s = [ChainSeries {
        label: "stuck",
        chains: &odd,
    }];
    let size = trace_plot(&dir.join("t.png"), &s).unwrap();
    check_png(&dir.join("t.png"), size);
    let many = ar1_chains(12, 300, 0.5, 0.1, 3);
    let s = [ChainSeries {
        label: "twelve chains",
        chains: &many,
    }];
    let size = trace_plot(&dir.join("many.png"), &s).unwrap();
    check_png(&dir.join("many.png"), size);
    let size = autocorrelation_plot(&dir.join("a.png"), &[]).unwrap();
    check_png(&dir.join("a.png"), size);
    let e = std_plot(&dir.join("s.png"), &[1.0, 2.0], Some(&[1.0]), None).unwrap_err();
    assert!(e.to_string().contains("1 values for 2 components"), "{e}");
}

#[test]
fn plots_of_a_five_megabyte_name_draw_a_shortened_label() {
    // Display rule of this project, no outside source: labels are cut to MAX_LABEL_CHARS (90) and
    // MAX_MARGINAL_LABEL_CHARS (40) characters around an ellipsis, so the text layout stays small.
    use varpost::output::plots::{fit_label, MAX_LABEL_CHARS};
    let dir = common::temp_dir("plots-long-name");
    let label = format!("{} (R-hat 1.21, bulk ESS 38)", "v".repeat(5 << 20));
    let chains = ar1_chains(2, 200, 0.5, 0.0, 4);
    let s = [ChainSeries {
        label: &label,
        chains: &chains,
    }];
    let size = trace_plot(&dir.join("t.png"), &s).unwrap();
    check_png(&dir.join("t.png"), size);
    let m = [Marginal {
        series: s[0],
        analysis: 0.0,
        laplace_std: Some(1.0),
    }];
    let size = marginal_plot(&dir.join("m.png"), &m).unwrap();
    check_png(&dir.join("m.png"), size);
    let shown = fit_label(&label, MAX_LABEL_CHARS);
    assert!(
        shown.len() < 400 && shown.ends_with("bulk ESS 38)"),
        "{shown}"
    );
}

#[test]
fn report_links_resolve_to_decodable_pictures_and_text_is_escaped() {
    let dir = common::temp_dir("report");
    let pictures = draw_pictures(&dir);
    let mut figures: Vec<Figure> = pictures
        .iter()
        .map(|(file, _)| Figure {
            file,
            caption: "a picture",
        })
        .collect();
    figures.push(Figure {
        file: "missing.png",
        caption: "never drawn",
    });
    let columns: Vec<String> = ["name", "R-hat", "bulk ESS"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let rows: Vec<Vec<String>> = (0..30)
        .map(|i| {
            vec![
                format!("x{i} <b>&"),
                format!("{:.3}", 1.2 - i as f64 * 0.001),
                "40".into(),
            ]
        })
        .collect();
    let meta = vec![(
        "command".to_string(),
        "varpost sample --out \"a&b\"".to_string(),
    )];
    let page = ReportPage {
        title: "varpost report: <test>",
        verdict: "Not converged: R-hat of 3 components above 1.01",
        passed: Some(false),
        caution: varpost::output::summary::CAUTION,
        columns: &columns,
        rows: &rows,
        max_rows: 20,
        metadata: &meta,
        figures: &figures,
    };
    // The table note links components.csv only when the file is there.
    let names: Vec<String> = (0..30).map(|i| format!("x{i}")).collect();
    let v = vec![1.0; 30];
    let chains = ar1_chains(4, 100, 0.5, 0.0, 4);
    let views: Vec<&[f64]> = chains.iter().map(Vec::as_slice).collect();
    let stats = vec![component_stats(&views).unwrap(); 30];
    let table = ComponentTable {
        names: &names,
        analysis: &v,
        background_std: None,
        laplace_std: None,
        stats: &stats,
    };
    write_components(&dir, &table).unwrap();
    let path = write_report(&dir, &page).unwrap();
    let html = std::fs::read_to_string(&path).unwrap();

    // Every image the page links, found by Python's html.parser (Python standard library), exists
    // and decodes at its size.
    let parsed = run_python(
        r#"
import json, sys
from html.parser import HTMLParser
class P(HTMLParser):
    def __init__(self):
        super().__init__(); self.src = []; self.href = []; self.rows = 0; self.text = []
    def handle_starttag(self, tag, attrs):
        if tag == "img": self.src.append(dict(attrs)["src"])
        if tag == "a": self.href.append(dict(attrs)["href"])
        if tag == "tr": self.rows += 1
    def handle_data(self, d): self.text.append(d)
p = P(); p.feed(open(sys.argv[1], encoding="utf-8").read())
print(json.dumps({"src": p.src, "href": p.href, "rows": p.rows, "text": "".join(p.text)}))
"#,
        &[&path],
    );
    let src = strs(&parsed["src"]);
    let expected: Vec<&str> = pictures.iter().map(|(f, _)| *f).collect();
    assert_eq!(src, expected);
    for (file, size) in &pictures {
        check_png(&dir.join(file), *size);
    }
    assert_eq!(parsed["href"], serde_json::json!(["components.csv"]));
    for href in parsed["href"].as_array().unwrap() {
        assert!(dir.join(href.as_str().unwrap()).is_file(), "{href}");
    }
    // Header row plus the 20 rows shown of 30.
    assert_eq!(parsed["rows"], 21);
    let text = parsed["text"].as_str().unwrap();
    assert!(text.contains("x0 <b>&"), "escaped text reads back as typed");
    assert!(text.contains("varpost report: <test>"));
    assert!(text.contains("--out \"a&b\""));
    assert!(text.contains(varpost::output::summary::CAUTION));
    assert!(text.contains("Picture not available: never drawn"));
    assert!(text.contains("20 least-converged of 30 components"));
    assert!(
        !html.contains("<b>"),
        "raw markup from data must not reach the page"
    );
    assert!(
        !html.contains("http://") && !html.contains("https://"),
        "self-contained"
    );
}

#[test]
fn components_csv_parses_with_the_expected_header() {
    let dir = common::temp_dir("components-csv");
    let n = 4;
    let names: Vec<String> = ["x0", "T(lev=2,lat=10)", "say \"hi\"", "=SUM(A1:A2)"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let col = |k: f64| test_vector(n, k);
    let (a, b, m, s, e, eb, et, r) = (
        col(0.1),
        col(0.2),
        col(0.4),
        col(0.5),
        col(0.6),
        col(0.7),
        col(0.8),
        col(0.9),
    );
    let stats: Vec<ComponentStats> = (0..n)
        .map(|i| ComponentStats {
            mean: m[i],
            sd: s[i],
            rhat: r[i],
            ess_bulk: eb[i],
            ess_tail: et[i],
            mcse_mean: e[i],
            mcse_sd: f64::NAN,
            q05: f64::NAN,
            q95: f64::NAN,
            mcse_q05: f64::NAN,
            mcse_q95: f64::NAN,
        })
        .collect();
    let table = ComponentTable {
        names: &names,
        analysis: &a,
        background_std: Some(&b),
        laplace_std: None,
        stats: &stats,
    };
    let path = write_components(&dir, &table).unwrap();
    // Python's csv module (RFC 4180 dialect) reads it; float() parses each value.
    let got = run_python(
        r#"
import csv, json, math, sys
with open(sys.argv[1], newline="") as f:
    rows = list(csv.reader(f))
head, body = rows[0], rows[1:]
cols = {h: [r[i] for r in body] for i, h in enumerate(head)}
out = {"header": head, "names": cols["name"], "component": [int(v) for v in cols["component"]]}
for h in head[2:]:
    vals = [float(v) for v in cols[h]]
    out[h] = [None if math.isnan(v) else v for v in vals]
print(json.dumps(out, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o)))
"#,
        &[&path],
    );
    // The columns the report's readers expect, in order.
    let header = strs(&got["header"]);
    assert_eq!(header, COMPONENT_COLUMNS);
    assert_eq!(
        header.join(","),
        "component,name,analysis,background_std,laplace_std,posterior_mean,posterior_std,mcse_mean,\
         ess_bulk,ess_tail,rhat"
    );
    // A name a spreadsheet would evaluate comes back as text with a leading single quote (OWASP,
    // "CSV Injection").
    let mut shown = names.clone();
    shown[3] = "'=SUM(A1:A2)".into();
    assert_eq!(strs(&got["names"]), shown);
    assert_eq!(got["component"], serde_json::json!([0, 1, 2, 3]));
    for (h, want) in [
        ("analysis", &a),
        ("background_std", &b),
        ("posterior_mean", &m),
        ("posterior_std", &s),
        ("mcse_mean", &e),
        ("ess_bulk", &eb),
        ("ess_tail", &et),
        ("rhat", &r),
    ] {
        assert_eq!(&f64s(&got[h]), want, "{h}");
    }
    assert_eq!(
        got["laplace_std"],
        serde_json::json!([null, null, null, null])
    );

    let bad = ComponentTable {
        stats: &stats[..3],
        ..table
    };
    let e = write_components(&dir, &bad).unwrap_err();
    assert!(
        e.to_string()
            .contains("component statistics has 3 values for 4 components"),
        "{e}"
    );
}

/// Set for the child process of [`lock_is_refused_while_a_child_holds_it_and_taken_over_once_killed`]:
/// the folder [`lock_holder_child`] locks.
const LOCK_CHILD_DIR: &str = "VARPOST_TEST_LOCK_CHILD_DIR";

/// Not a test of its own: run in a child process by the test below, it takes the lock, says so on
/// stdout and holds it until its stdin closes or it is killed.
#[test]
#[ignore = "run as a child process by lock_is_refused_while_a_child_holds_it_and_taken_over_once_killed"]
fn lock_holder_child() {
    use std::io::{BufRead, Write};
    let Ok(dir) = std::env::var(LOCK_CHILD_DIR) else {
        return;
    };
    let lock =
        varpost::output::lock::RunLock::acquire(Path::new(&dir), "varpost sample --out child")
            .expect("the child takes the lock");
    println!("locked");
    std::io::stdout().flush().unwrap();
    let mut line = String::new();
    let _ = std::io::stdin().lock().read_line(&mut line);
    drop(lock);
}

#[test]
fn lock_is_refused_while_a_child_holds_it_and_taken_over_once_killed() {
    use std::io::{BufRead, BufReader};
    use std::process::Stdio;
    use varpost::output::lock::{RunLock, LOCK_FILE};
    let dir = common::temp_dir("lock-child");
    let mut child = Command::new(std::env::current_exe().unwrap())
        .args([
            "output_files::lock_holder_child",
            "--exact",
            "--ignored",
            "--nocapture",
            "--test-threads=1",
        ])
        .env(LOCK_CHILD_DIR, &dir)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .unwrap();
    let pid = child.id();
    let mut lines = BufReader::new(child.stdout.take().unwrap()).lines();
    assert!(
        lines.any(|l| l.is_ok_and(|l| l.trim_end().ends_with("locked"))),
        "the child process did not take the lock"
    );
    let e = RunLock::acquire(&dir, "varpost map --out x")
        .unwrap_err()
        .to_string();
    assert!(e.contains(&format!("process {pid} ")), "{e}");
    assert!(
        e.contains("`varpost sample --out child`") && e.contains("kill"),
        "{e}"
    );
    // Killed: the kernel drops its flock, but its lock file stays behind with its details.
    child.kill().unwrap();
    child.wait().unwrap();
    assert!(dir.join(LOCK_FILE).exists());
    let lock = RunLock::acquire(&dir, "varpost resume x").unwrap();
    let previous = lock.taken_over().expect("the stale lock is reported");
    assert_eq!(previous.pid, Some(pid));
    assert_eq!(previous.command, "varpost sample --out child");
    assert!(lock.takeover_note().unwrap().contains("no longer running"));
    drop(lock);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A weighted ensemble goes through the report's weighted branch: ensemble.nc carries the normalised
/// weights (read back with netCDF4, the general-purpose reference reader), components.csv the
/// self-normalised weighted moments (closed form below), and the report leaves out the plots that
/// need chains.
#[test]
fn weighted_ensemble_report_writes_weights_and_weighted_moments() {
    use varpost::diagnostics::{weighted_component_stats, RunFacts, Verdict};
    use varpost::output::summary::MapSummary;
    use varpost::output::Summary;
    use varpost::pipeline::report::report_weighted;
    use varpost::sampler::WeightedDraws;

    let dir = common::temp_dir("weighted-report");
    // Weights proportional to 1, 1, 2, 4: normalised 1/8, 1/8, 1/4, 1/2 (closed form).
    let x = vec![
        vec![0.0, 1.0],
        vec![1.0, 1.0],
        vec![2.0, 3.0],
        vec![3.0, 5.0],
    ];
    let w = WeightedDraws::new(x, vec![0.0, 0.0, 2f64.ln(), 4f64.ln()]).unwrap();
    let weights = w.normalized_weights();
    let stats: Vec<ComponentStats> = (0..2)
        .map(|i| weighted_component_stats(&w.component(i), &weights).unwrap())
        .collect();
    // Weighted mean of component 0: 0/8 + 1/8 + 2/4 + 3/2 = 2.125 (closed form).
    assert!((stats[0].mean - 2.125).abs() < 1e-12, "{}", stats[0].mean);
    let verdict = Verdict::judge(&stats, 1, &RunFacts::default());
    let summary = Summary {
        dim: 2,
        problem: "toy".into(),
        description: "two components".into(),
        map: Some(MapSummary {
            cost: 0.0,
            cost_start: 1.0,
            cost_background: None,
            cost_observation: None,
            grad_norm: 0.0,
            grad_norm_start: 1.0,
            iterations: 1,
            converged: true,
            reason: "test".into(),
            whitened: false,
            x: vec![1.5, 2.0],
        }),
        ..Default::default()
    };
    let out = report_weighted(&dir, summary, w, "importance", stats, verdict, "test").unwrap();
    assert!(out.html.exists());
    assert!(dir.join("marginals.png").exists() && dir.join("std.png").exists());
    assert!(!dir.join("trace.png").exists() && !dir.join("autocorrelation.png").exists());
    let html = std::fs::read_to_string(&out.html).unwrap();
    assert!(html.contains("4 weighted draws") && !html.contains("trace.png"));
    let got = run_python(NC_READER, &[&dir.join("ensemble.nc")]);
    let v = &got["netCDF4"]["vars"]["weight"];
    assert_eq!(f64s(&v["data"]), vec![0.125, 0.125, 0.25, 0.5]);
    assert_eq!(strs(&v["dims"]), vec!["member"]);
    let csv = std::fs::read_to_string(dir.join("components.csv")).unwrap();
    assert!(csv.contains("2.125"), "{csv}");
}
