//! Reproducibility: same seed, same output whatever the thread count; a run stopped by an interrupt,
//! a fatal evaluation error or a real SIGKILL and then resumed gives output bit-identical to the
//! uninterrupted run; foreign or corrupt checkpoints are refused with a clear error.

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use common::sampling::*;
use common::temp_dir;
use varpost::error::Error;
use varpost::problem::Counted;
use varpost::sampler::checkpoint::checkpoint_path;
use varpost::sampler::{run, Checkpoint, KernelKind, Progress, SampleConfig, SampleResult, Target};
use varpost::Interrupt;

fn cfg(kernel: KernelKind) -> SampleConfig {
    SampleConfig {
        kernel,
        chains: 3,
        warmup: 100,
        draws: 300,
        thin: 2,
        checkpoint_every: 40,
        seed: 2024,
        ..Default::default()
    }
}

fn run_gauss(
    g: Gaussian,
    cfg: &SampleConfig,
    dir: &Path,
    resume: bool,
    it: &Interrupt,
) -> varpost::Result<SampleResult> {
    run_gauss_with(g, cfg, dir, resume, it, &|_, _, _| {})
}

/// Samples the Gaussian `g` (preconditioned by its exact Hessian) into `dir`, resuming from the
/// checkpoint there if `resume`.
fn run_gauss_with(
    g: Gaussian,
    cfg: &SampleConfig,
    dir: &Path,
    resume: bool,
    it: &Interrupt,
    progress: &dyn Progress,
) -> varpost::Result<SampleResult> {
    let h = g.a.clone();
    let m = g.mean.clone();
    let c = Counted::new(g);
    let t = Target::new(&c, "gauss4", m, Gaussian::precond(&h))?;
    let ck = if resume {
        Some(Checkpoint::load(dir)?)
    } else {
        None
    };
    run(&t, cfg, dir, ck, it, progress)
}

/// Interrupts `it` when chain `chain` has done `at` iterations, as SIGINT would.
fn stop_at(it: &Interrupt, chain: usize, at: u64) -> impl Fn(usize, u64, u64) + Sync {
    let it = it.clone();
    move |c, done, _| {
        if c == chain && done == at {
            it.trigger()
        }
    }
}

/// The files of a run folder, name and bytes, sorted by name.
fn files(dir: &Path) -> Vec<(String, Vec<u8>)> {
    let mut v: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| !p.to_string_lossy().ends_with(".tmp"))
        .map(|p| {
            (
                p.file_name().unwrap().to_string_lossy().into_owned(),
                std::fs::read(&p).unwrap(),
            )
        })
        .collect();
    v.sort();
    v
}

fn same_numbers(a: &SampleResult, b: &SampleResult) {
    let bits = |v: &[f64]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
    assert_eq!(bits(&a.mean), bits(&b.mean));
    assert_eq!(bits(&a.variance), bits(&b.variance));
    assert_eq!(a.draws, b.draws);
    for (x, y) in a.chains.iter().zip(&b.chains) {
        assert_eq!(x.stats, y.stats);
        assert_eq!(x.step_size.map(f64::to_bits), y.step_size.map(f64::to_bits));
    }
}

#[test]
fn same_seed_same_output_with_one_or_two_threads() {
    for kernel in [
        KernelKind::Mala,
        KernelKind::Hmc,
        KernelKind::LaplaceMh,
        KernelKind::Nuts,
    ] {
        let mut out = Vec::new();
        for threads in [1, 2] {
            let dir = temp_dir(&format!("threads-{}-{threads}", kernel.name()));
            let pool = rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap();
            let c = cfg(kernel);
            let r = pool
                .install(|| run_gauss(Gaussian::correlated(4), &c, &dir, false, &Interrupt::new()))
                .unwrap();
            out.push((r, files(&dir)));
            std::fs::remove_dir_all(&dir).unwrap();
        }
        same_numbers(&out[0].0, &out[1].0);
        assert_eq!(out[0].0.counts_sampling, out[1].0.counts_sampling);
        assert_eq!(
            out[0].1,
            out[1].1,
            "{}: files differ between 1 and 2 threads",
            kernel.name()
        );
        assert_eq!(out[0].1.len(), 4); // three draws files and the checkpoint
    }
}

/// Interrupts from the progress callback (as SIGINT would set the flag), at a point in the warm-up and
/// one while sampling, then resumes; the result must equal the uninterrupted run bit for bit.
#[test]
fn interrupted_and_resumed_equals_uninterrupted() {
    let with_metric = SampleConfig {
        adapt_metric: true,
        ..cfg(KernelKind::Hmc)
    };
    for c in [
        cfg(KernelKind::Mala),
        cfg(KernelKind::Hmc),
        cfg(KernelKind::LaplaceMh),
        with_metric,
    ] {
        let kernel = c.kernel;
        let (ref_dir, reference) =
            reference_run(&format!("ref-{}-{}", kernel.name(), c.adapt_metric), &c);
        let dir = temp_dir(&format!("int-{}-{}", kernel.name(), c.adapt_metric));
        let mut resume = false;
        for at in [57u64, 433] {
            let it = Interrupt::new();
            let g = Gaussian::correlated(4);
            let e = run_gauss_with(g, &c, &dir, resume, &it, &stop_at(&it, 1, at)).unwrap_err();
            assert!(matches!(e, Error::Interrupted(_)), "{e}");
            assert!(e.to_string().contains("resumed"), "{e}");
            resume = true;
        }
        let r = run_gauss(Gaussian::correlated(4), &c, &dir, true, &Interrupt::new()).unwrap();
        same_numbers(&reference, &r);
        assert_eq!(reference.counts_warmup, r.counts_warmup);
        assert_eq!(reference.counts_sampling, r.counts_sampling);
        assert_eq!(
            files(&ref_dir),
            files(&dir),
            "{}: resumed files differ",
            kernel.name()
        );
        // Resuming a finished run returns its result without sampling again.
        let again = run_gauss(Gaussian::correlated(4), &c, &dir, true, &Interrupt::new()).unwrap();
        same_numbers(&reference, &again);
        assert_eq!(again.counts_sampling, reference.counts_sampling);
        std::fs::remove_dir_all(&ref_dir).unwrap();
        std::fs::remove_dir_all(&dir).unwrap();
    }
}

/// A non-recoverable failure (a dead model process) stops the run with an error that names the chain
/// and says the state is saved; resumed with a working problem, the draws equal the uninterrupted run.
#[test]
fn fatal_error_saves_state_and_resume_continues_exactly() {
    let c = cfg(KernelKind::Mala);
    let (ref_dir, _) = reference_run("fatal-ref", &c);
    let dir = temp_dir("fatal");
    let mut g = Gaussian::correlated(4);
    g.fatal_after = Some(700);
    let e = run_gauss(g, &c, &dir, false, &Interrupt::new()).unwrap_err();
    let msg = e.full_message();
    assert!(matches!(e, Error::Eval { .. }), "{msg}");
    assert!(
        msg.contains("model process died") && msg.contains("chain") && msg.contains("saved"),
        "{msg}"
    );
    run_gauss(Gaussian::correlated(4), &c, &dir, true, &Interrupt::new()).unwrap();
    let draws = |d: &Path| {
        files(d)
            .into_iter()
            .filter(|(n, _)| n.ends_with(".draws"))
            .collect::<Vec<_>>()
    };
    assert_eq!(draws(&ref_dir), draws(&dir));
    std::fs::remove_dir_all(&ref_dir).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
}

#[test]
fn foreign_and_corrupt_checkpoints_are_refused() {
    let c = cfg(KernelKind::Hmc);
    let dir = temp_dir("foreign");
    let it = Interrupt::new();
    let e = run_gauss_with(
        Gaussian::correlated(4),
        &c,
        &dir,
        false,
        &it,
        &stop_at(&it, 0, 10),
    );
    assert!(matches!(e, Err(Error::Interrupted(_))));
    // A fresh run into a folder that holds a checkpoint.
    let e = run_gauss(Gaussian::correlated(4), &c, &dir, false, &Interrupt::new()).unwrap_err();
    assert!(
        e.to_string().contains("checkpoint of an earlier run"),
        "{e}"
    );
    // Another dimension.
    let e = run_gauss(Gaussian::correlated(3), &c, &dir, true, &Interrupt::new()).unwrap_err();
    assert!(e.to_string().contains("dimension"), "{e}");
    // Other settings.
    let other = SampleConfig {
        draws: 301,
        ..c.clone()
    };
    let e = run_gauss(
        Gaussian::correlated(4),
        &other,
        &dir,
        true,
        &Interrupt::new(),
    )
    .unwrap_err();
    assert!(e.to_string().contains("settings differ"), "{e}");
    // Another analysis.
    let mut g = Gaussian::correlated(4);
    g.mean[2] += 1.0;
    let e = run_gauss(g, &c, &dir, true, &Interrupt::new()).unwrap_err();
    assert!(e.to_string().contains("fingerprint"), "{e}");
    // The checkpoint interval may change: it does not change the draws.
    let every = SampleConfig {
        checkpoint_every: 7,
        ..c.clone()
    };
    run_gauss(
        Gaussian::correlated(4),
        &every,
        &dir,
        true,
        &Interrupt::new(),
    )
    .unwrap();
    // One flipped byte in the payload.
    let p = checkpoint_path(&dir);
    let mut bytes = std::fs::read(&p).unwrap();
    let k = bytes.len() - 20;
    bytes[k] ^= 0x01;
    std::fs::write(&p, &bytes).unwrap();
    let e = Checkpoint::load(&dir).unwrap_err();
    assert!(
        matches!(e, Error::Format { .. }) && e.to_string().contains("corrupt"),
        "{e}"
    );
    std::fs::remove_dir_all(&dir).unwrap();
}

const KILL_DIR: &str = "VARPOST_TEST_KILL_DIR";

fn kill_cfg() -> SampleConfig {
    SampleConfig {
        kernel: KernelKind::Hmc,
        chains: 2,
        warmup: 100,
        draws: 1500,
        // Segments longer than the 8 KiB write buffer, so that a kill usually leaves records (and a
        // partial record) past the checkpoint, which the resume must cut off.
        checkpoint_every: 200,
        seed: 77,
        ..Default::default()
    }
}

/// In a child process: its folder and the slowed-down problem it samples.
fn child_setup() -> Option<(PathBuf, Gaussian)> {
    let dir = PathBuf::from(std::env::var(KILL_DIR).ok()?);
    let mut g = Gaussian::correlated(4);
    g.sleep_us = 300;
    Some((dir, g))
}

/// Starts this test binary again, running only the ignored test `name`, on folder `dir`.
fn spawn_child(name: &str, dir: &Path) -> std::process::Child {
    Command::new(std::env::current_exe().unwrap())
        .args(["--ignored", "--exact", name, "--test-threads", "1"])
        .env(KILL_DIR, dir)
        .env("RAYON_NUM_THREADS", "2")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap()
}

/// The uninterrupted run with settings `cfg`, in a fresh folder `name`.
fn reference_run(name: &str, cfg: &SampleConfig) -> (PathBuf, SampleResult) {
    let dir = temp_dir(name);
    let r = run_gauss(Gaussian::correlated(4), cfg, &dir, false, &Interrupt::new()).unwrap();
    (dir, r)
}

/// Not a test by itself: the child process of `sigkill_at_any_moment_then_resume_is_bit_identical`,
/// which starts this test binary again to run only this function.
#[test]
#[ignore]
fn kill_child() {
    let Some((dir, g)) = child_setup() else {
        return;
    };
    let resume = checkpoint_path(&dir).exists();
    run_gauss(g, &kill_cfg(), &dir, resume, &Interrupt::new()).unwrap();
}

/// A real SIGKILL (std::process::Child::kill) at three moments of a run, each time resumed in a new
/// process; the final folder must equal the uninterrupted run's byte for byte.
#[test]
fn sigkill_at_any_moment_then_resume_is_bit_identical() {
    let (ref_dir, _) = reference_run("kill-ref", &kill_cfg());
    let dir = temp_dir("kill");
    let spawn = || spawn_child("sampler_resume::kill_child", &dir);
    let mut killed = 0;
    for delay_ms in [200u64, 550, 900] {
        let mut child = spawn();
        let start = Instant::now();
        while start.elapsed() < Duration::from_millis(delay_ms) {
            std::thread::sleep(Duration::from_millis(5));
        }
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap();
            killed += 1;
        }
        child.wait().unwrap();
        if let Ok(ck) = Checkpoint::load(&dir) {
            let at: Vec<(u64, u64)> = ck.chains.iter().map(|c| (c.iteration, c.records)).collect();
            let lens: Vec<u64> = (0..2)
                .map(|c| {
                    std::fs::metadata(dir.join(format!("chain-{c}.draws"))).map_or(0, |m| m.len())
                })
                .collect();
            eprintln!("killed after {delay_ms} ms: checkpoint at (iteration, records) {at:?}, file bytes {lens:?}");
        }
    }
    assert!(
        killed >= 2,
        "the run finished before it could be killed: make it longer"
    );
    let status = spawn().wait().unwrap();
    assert!(status.success());
    let ck = Checkpoint::load(&dir).unwrap();
    assert!(ck.complete);
    assert_eq!(files(&ref_dir), files(&dir));
    std::fs::remove_dir_all(&ref_dir).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Not a test by itself: the child process of `sigint_saves_state_and_resume_is_bit_identical`. It
/// installs the SIGINT/SIGTERM handlers and must come back with `Error::Interrupted`.
#[test]
#[ignore]
fn signal_child() {
    let Some((dir, g)) = child_setup() else {
        return;
    };
    let it = Interrupt::from_signals().unwrap();
    let e = run_gauss(g, &kill_cfg(), &dir, false, &it).unwrap_err();
    assert!(matches!(e, Error::Interrupted(_)), "{e}");
    std::fs::write(dir.join("interrupted.txt"), e.to_string()).unwrap();
}

/// A real SIGINT (sent with the `kill` utility) makes the run save its state and stop with
/// `Error::Interrupted`; resumed, the folder equals the uninterrupted run's byte for byte.
#[test]
fn sigint_saves_state_and_resume_is_bit_identical() {
    let (ref_dir, _) = reference_run("sigint-ref", &kill_cfg());
    let dir = temp_dir("sigint");
    let mut child = spawn_child("sampler_resume::signal_child", &dir);
    std::thread::sleep(Duration::from_millis(400));
    assert!(
        child.try_wait().unwrap().is_none(),
        "the run ended before the signal"
    );
    let sent = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .unwrap();
    assert!(sent.success());
    assert!(child.wait().unwrap().success());
    let msg = std::fs::read_to_string(dir.join("interrupted.txt")).unwrap();
    assert!(msg.contains("resumed"), "{msg}");
    std::fs::remove_file(dir.join("interrupted.txt")).unwrap();
    let ck = Checkpoint::load(&dir).unwrap();
    assert!(!ck.complete && ck.chains[0].iteration > 0);
    run_gauss(
        Gaussian::correlated(4),
        &kill_cfg(),
        &dir,
        true,
        &Interrupt::new(),
    )
    .unwrap();
    assert_eq!(files(&ref_dir), files(&dir));
    std::fs::remove_dir_all(&ref_dir).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The settings of the checkpoint fixtures in tests/it/fixtures/: a run of the 3-dimensional Gaussian
/// with two HMC chains and a refined metric, stopped while sampling.
fn fixture_cfg() -> SampleConfig {
    SampleConfig {
        kernel: KernelKind::Hmc,
        chains: 2,
        warmup: 60,
        draws: 40,
        checkpoint_every: 20,
        adapt_metric: true,
        seed: 11,
        ..Default::default()
    }
}

/// Not a test by itself: writes a fixture of the current checkpoint format into the folder named by
/// `VARPOST_FIXTURE_OUT` (a run interrupted at iteration 75 of chain 0). Run it before changing the
/// format, and commit the folder as tests/it/fixtures/checkpoint-v<version>/.
#[test]
#[ignore]
fn write_checkpoint_fixture() {
    let Ok(out) = std::env::var("VARPOST_FIXTURE_OUT") else {
        return;
    };
    let dir = PathBuf::from(out);
    let it = Interrupt::new();
    let e = run_gauss_with(
        Gaussian::correlated(3),
        &fixture_cfg(),
        &dir,
        false,
        &it,
        &stop_at(&it, 0, 75),
    )
    .unwrap_err();
    assert!(matches!(e, Error::Interrupted(_)), "{e}");
}

/// The checkpoint fixture of format version 1 (see tests/it/fixtures/README.md), copied into a fresh
/// folder `name`.
fn fixture_v1(name: &str) -> PathBuf {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/it/fixtures/checkpoint-v1");
    let dir = temp_dir(name);
    for f in ["checkpoint.vpck", "chain-0.draws", "chain-1.draws"] {
        std::fs::copy(src.join(f), dir.join(f)).unwrap();
    }
    dir
}

/// A checkpoint of format version 1, written by varpost 0.1.0 before the format had a reader per
/// version, still loads, and resuming it gives the folder of the uninterrupted run byte for byte.
/// (Should the sampler's numbers ever be changed on purpose, the last comparison no longer holds and
/// the fixture must be rewritten with `write_checkpoint_fixture`.)
#[test]
fn checkpoint_format_v1_fixture_loads_and_resumes() {
    let dir = fixture_v1("fixture-v1");
    let ck = Checkpoint::load(&dir).unwrap();
    assert_eq!((ck.dim, ck.chains.len(), ck.complete), (3, 2, false));
    let at: Vec<(u64, u64)> = ck.chains.iter().map(|c| (c.iteration, c.records)).collect();
    assert_eq!(at, vec![(75, 15), (60, 0)]);
    run_gauss(
        Gaussian::correlated(3),
        &fixture_cfg(),
        &dir,
        true,
        &Interrupt::new(),
    )
    .unwrap();
    let (ref_dir, _) = reference_run_of("fixture-v1-ref", Gaussian::correlated(3), &fixture_cfg());
    assert_eq!(
        files(&ref_dir),
        files(&dir),
        "the resumed version-1 checkpoint continues differently from an uninterrupted run"
    );
    std::fs::remove_dir_all(&ref_dir).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
}

/// The uninterrupted run of `g` with settings `cfg`, in a fresh folder `name`.
fn reference_run_of(name: &str, g: Gaussian, cfg: &SampleConfig) -> (PathBuf, SampleResult) {
    let dir = temp_dir(name);
    let r = run_gauss(g, cfg, &dir, false, &Interrupt::new()).unwrap();
    (dir, r)
}

/// Writes `payload` as the checkpoint of `dir` with a correct checksum (as a careful hand edit would).
fn write_with_checksum(dir: &Path, payload: &serde_json::Value) {
    let body = serde_json::to_vec(payload).unwrap();
    let mut h = varpost::sampler::target::Fnv64::new();
    h.write(&body);
    let mut bytes = format!("varpost-checkpoint 1 fnv1a64={:016x}\n", h.finish()).into_bytes();
    bytes.extend_from_slice(&body);
    std::fs::write(checkpoint_path(dir), bytes).unwrap();
}

/// Well-formed checkpoints with a correct checksum but inconsistent content are refused with an error
/// that names the field, never a panic and never a resumed run.
#[test]
fn edited_checkpoints_are_refused_naming_the_field() {
    type Edit = fn(&mut serde_json::Value);
    let cases: [(&str, Edit, &str); 10] = [
        (
            "moments short",
            |v| {
                v["chains"][0]["moments"]["mean"]
                    .as_array_mut()
                    .unwrap()
                    .pop();
            },
            "chains[0].moments: mean has 2 entries, expected 3",
        ),
        (
            "negative step",
            |v| v["chains"][0]["step_size"] = (-0.5).into(),
            "chains[0].step_size is -0.5",
        ),
        (
            "huge iteration",
            |v| v["chains"][0]["iteration"] = u64::MAX.into(),
            "chains[0].iteration is 18446744073709551615",
        ),
        (
            "state too long",
            |v| {
                v["chains"][1]["state"]["u"]
                    .as_array_mut()
                    .unwrap()
                    .push(0.5.into())
            },
            "chains[1].state.u has 4 entries, expected 3",
        ),
        (
            "gradient short",
            |v| {
                v["chains"][0]["state"]["grad"]
                    .as_array_mut()
                    .unwrap()
                    .pop();
            },
            "chains[0].state.grad has 2 entries",
        ),
        (
            "metric short",
            |v| {
                v["chains"][0]["warmup"]["metric"]
                    .as_array_mut()
                    .unwrap()
                    .pop();
            },
            "chains[0].warmup: metric has 2 entries",
        ),
        (
            "records",
            |v| v["chains"][0]["records"] = 14.into(),
            "chains[0].records is 14",
        ),
        (
            "one chain missing",
            |v| {
                v["chains"].as_array_mut().unwrap().pop();
            },
            "chains: the file holds 1 chains",
        ),
        (
            "step size overflows",
            |v| v["chains"][0]["warmup"]["controller"]["log_eps_bar"] = 1e300.into(),
            "chains[0].warmup: controller: step sizes",
        ),
        (
            "no number",
            |v| v["chains"][0]["step_size"] = serde_json::Value::Null,
            "content is invalid",
        ),
    ];
    let dir = fixture_v1("edited");
    let text = std::fs::read(checkpoint_path(&dir)).unwrap();
    let nl = text.iter().position(|&b| b == b'\n').unwrap();
    let original: serde_json::Value = serde_json::from_slice(&text[nl + 1..]).unwrap();
    for (what, edit, expected) in cases {
        let mut v = original.clone();
        edit(&mut v);
        write_with_checksum(&dir, &v);
        let e = Checkpoint::load(&dir).unwrap_err();
        let msg = e.to_string();
        assert!(matches!(e, Error::Format { .. }), "{what}: {msg}");
        assert!(msg.contains(expected), "{what}: {msg}");
        assert!(
            msg.contains("start a new run") || msg.contains("invalid"),
            "{what}: {msg}"
        );
        // Nor does a resume get past it.
        let r = run_gauss(
            Gaussian::correlated(3),
            &fixture_cfg(),
            &dir,
            true,
            &Interrupt::new(),
        );
        assert!(r.is_err(), "{what}: resumed");
    }
    // The unedited content re-encoded loads again.
    write_with_checksum(&dir, &original);
    Checkpoint::load(&dir).unwrap();
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Runs `cfg` on the correlated Gaussian into `dir` with extension `ext`, resuming if `resume`.
fn extend_gauss(
    cfg: &SampleConfig,
    dir: &Path,
    resume: bool,
    ext: &varpost::sampler::Extension,
) -> (SampleResult, varpost::sampler::Ended) {
    let g = Gaussian::correlated(4);
    let h = g.a.clone();
    let m = g.mean.clone();
    let c = Counted::new(g);
    let t = Target::new(&c, "gauss4", m, Gaussian::precond(&h)).unwrap();
    let ck = resume.then(|| Checkpoint::load(dir).unwrap());
    varpost::sampler::run_extended(&t, cfg, dir, ck, ext, &Interrupt::new(), &|_, _, _| {}).unwrap()
}

/// A finished run extended by E draws per chain holds the same draws as a run of draws + E from the
/// start; a budget of model runs for the chains stops them before it is spent.
#[test]
fn an_extended_run_draws_what_a_longer_run_draws_and_a_budget_stops_it() {
    use varpost::sampler::{Ended, Extension, Limits};
    let short = cfg(KernelKind::Hmc);
    let long = SampleConfig {
        draws: short.draws + 70,
        ..short.clone()
    };
    let (long_dir, reference) = reference_run("ext-long", &long);
    let dir = temp_dir("ext-short");
    let (_, ended) = extend_gauss(&short, &dir, false, &Extension::default());
    assert_eq!(ended, Ended::Finished);
    let more = Extension {
        extra_draws: Some(70),
        ..Default::default()
    };
    let (r, ended) = extend_gauss(&short, &dir, true, &more);
    assert_eq!(ended, Ended::Finished);
    same_numbers(&reference, &r);
    for c in 0..3 {
        let f = format!("chain-{c}.draws");
        assert!(
            std::fs::read(long_dir.join(&f)).unwrap() == std::fs::read(dir.join(&f)).unwrap(),
            "{f} differs"
        );
    }
    assert_eq!(Checkpoint::load(&dir).unwrap().extra_draws, 70);
    // Taking draws back is refused.
    let g = Gaussian::correlated(4);
    let h = g.a.clone();
    let mean = g.mean.clone();
    let c = Counted::new(g);
    let t = Target::new(&c, "gauss4", mean, Gaussian::precond(&h)).unwrap();
    let fewer = Extension {
        extra_draws: Some(10),
        ..Default::default()
    };
    let ck = Checkpoint::load(&dir).unwrap();
    let e = varpost::sampler::run_extended(
        &t,
        &short,
        &dir,
        Some(ck),
        &fewer,
        &Interrupt::new(),
        &|_, _, _| {},
    )
    .unwrap_err();
    assert!(e.to_string().contains("cannot take back"), "{e}");
    // A budget: the chains stop within it.
    let budget_dir = temp_dir("ext-budget");
    let used = reference.counts_warmup.model_runs() + reference.counts_sampling.model_runs();
    let max = used / 2;
    let capped = Extension {
        extra_draws: None,
        limits: Limits {
            max_chain_runs: Some(max),
            ..Default::default()
        },
    };
    let (r, ended) = extend_gauss(&long, &budget_dir, false, &capped);
    assert_eq!(ended, Ended::MaxEvaluations);
    let spent = r.counts_warmup.model_runs() + r.counts_sampling.model_runs();
    assert!(spent <= max, "{spent} model runs, budget {max}");
    assert!(r.draws < reference.draws);
    for d in [long_dir, dir, budget_dir] {
        std::fs::remove_dir_all(d).ok();
    }
}
