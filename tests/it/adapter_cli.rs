//! The real binary with `--adapter`: a gradient test through the Python example, clear errors from a
//! crashing adapter and from bad options, and no adapter process left behind — after a normal end, after
//! a hung adapter was killed, and after Ctrl-C (SIGINT to varpost's process group).

use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use varpost::adapter::{AdapterConfig, AdapterProblem};
use varpost::Problem;

fn python() -> String {
    std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into())
}

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn faulty(args: &str) -> String {
    format!(
        "{} '{}' {args}",
        python(),
        root().join("tests/adapters/faulty.py").display()
    )
}

fn tmp(name: &str) -> PathBuf {
    let d = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join(format!("adapter-cli-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    d
}

fn varpost() -> Command {
    Command::new(env!("CARGO_BIN_EXE_varpost"))
}

/// Processes whose command line contains `marker` (Linux /proc).
fn running_with(marker: &str) -> Vec<u32> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir("/proc").into_iter().flatten().flatten() {
        let Ok(pid) = entry.file_name().to_string_lossy().parse::<u32>() else {
            continue;
        };
        let Ok(cmd) = std::fs::read(entry.path().join("cmdline")) else {
            continue;
        };
        if String::from_utf8_lossy(&cmd).contains(marker) {
            found.push(pid);
        }
    }
    found
}

fn wait_until(what: &str, timeout: Duration, mut f: impl FnMut() -> bool) {
    let end = Instant::now() + timeout;
    while !f() {
        assert!(Instant::now() < end, "timed out waiting until {what}");
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// Whether a process is gone and reaped: a zombie still has its /proc entry.
fn reaped(pid: u32) -> bool {
    !Path::new(&format!("/proc/{pid}")).exists()
}

#[test]
fn check_through_the_python_example() {
    let out = tmp("check");
    let o = varpost()
        .args(["check", "--adapter"])
        .arg(format!(
            "{} '{}'",
            python(),
            root().join("adapters/python/lorenz96.py").display()
        ))
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success(),
        "{stdout}\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        stdout.contains("gradient correct") && stdout.contains("Python example"),
        "{stdout}"
    );
    assert!(out.join("adapter-0.log").exists());
}

#[test]
fn a_crashing_adapter_and_bad_options_give_clear_errors() {
    let out = tmp("crash");
    std::fs::create_dir_all(&out).unwrap();
    let start = out.join("start.txt");
    std::fs::write(&start, "0 0 0 0\n").unwrap();
    let o = varpost()
        .args([
            "map",
            "--restarts",
            "1",
            "--adapter",
            &faulty("crash_always"),
            "--out",
        ])
        .arg(&out)
        .arg("--start")
        .arg(&start)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(
        err.contains("exited with status 3") && err.contains("ran out of memory"),
        "{err}"
    );
    let o = varpost()
        .args([
            "map",
            "--problem",
            "lorenz96",
            "--adapter",
            "python3 x.py",
            "--out",
        ])
        .arg(&out)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2), "clap refuses both");
    let o = varpost()
        .args([
            "check",
            "--adapter",
            &faulty("ok"),
            "--encoding",
            "morse",
            "--out",
        ])
        .arg(&out)
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{err}");
    assert!(err.contains("--encoding morse"), "{err}");
}

#[test]
fn no_adapter_process_is_left_after_a_normal_end_or_a_kill() {
    let marker = format!("leftover-check-{}", std::process::id());
    let mut c = AdapterConfig::new(faulty(&format!("ok {marker}")));
    c.workers = 3;
    let p = AdapterProblem::start(&c).unwrap();
    let pids = running_with(&marker);
    assert_eq!(pids.len(), 3);
    p.cost(&[0.0; 4]).unwrap();
    drop(p);
    assert!(
        pids.iter().all(|p| reaped(*p)),
        "adapters still running or unreaped after drop"
    );

    let marker = format!("hang-check-{}", std::process::id());
    let mut c = AdapterConfig::new(faulty(&format!("hang {marker}")));
    c.eval_timeout = Some(Duration::from_millis(300));
    c.max_restarts = 2;
    let p = AdapterProblem::start(&c).unwrap();
    let first = running_with(&marker);
    assert_eq!(first.len(), 1);
    assert!(p.cost(&[0.0; 4]).is_err());
    assert!(
        running_with(&marker).is_empty(),
        "a hung adapter survived its kill"
    );
    assert!(reaped(first[0]), "the killed adapter was not reaped");
    drop(p);
}

#[test]
fn ctrl_c_leaves_no_adapter_running() {
    let marker = format!("sigint-check-{}", std::process::id());
    let out = tmp("sigint");
    std::fs::create_dir_all(&out).unwrap();
    let start = out.join("start.txt");
    std::fs::write(&start, "0 0 0 0\n").unwrap();
    // varpost in a process group of its own, as a shell puts a foreground job; the adapters hang, so only
    // the interrupt can end the run.
    let child = varpost()
        .args([
            "map",
            "--workers",
            "2",
            "--adapter",
            &faulty(&format!("hang {marker}")),
            "--out",
        ])
        .arg(&out)
        .arg("--start")
        .arg(&start)
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .process_group(0)
        .spawn()
        .unwrap();
    let mut child = KillOnDrop(child);
    let vp = child.0.id();
    // The marker is in varpost's own command line too (inside --adapter).
    let adapters = || {
        running_with(&marker)
            .into_iter()
            .filter(|p| *p != vp)
            .collect::<Vec<_>>()
    };
    wait_until("both adapters run", Duration::from_secs(20), || {
        adapters().len() == 2
    });
    // Let the run reach its evaluation, where the adapter hangs.
    std::thread::sleep(Duration::from_millis(500));
    assert!(
        child.0.try_wait().unwrap().is_none(),
        "varpost ended before the interrupt"
    );
    // What the terminal does on Ctrl-C: SIGINT to the whole foreground process group. Where varpost
    // handles the first one by finishing the evaluation in flight (here: never), a second one ends it.
    let ctrl_c = || {
        // SAFETY: signals a process group this test created.
        unsafe { libc::kill(-(vp as libc::pid_t), libc::SIGINT) };
    };
    ctrl_c();
    let mut ended = || child.0.try_wait().ok().flatten().is_some();
    let end = Instant::now() + Duration::from_secs(3);
    while !ended() && Instant::now() < end {
        std::thread::sleep(Duration::from_millis(20));
    }
    if !ended() {
        ctrl_c();
        wait_until(
            "varpost ends after a second Ctrl-C",
            Duration::from_secs(5),
            &mut ended,
        );
    }
    wait_until("the adapters are gone", Duration::from_secs(5), || {
        adapters().is_empty()
    });
}

/// Stops the varpost run if the test fails before the interrupt.
struct KillOnDrop(std::process::Child);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        if self.0.try_wait().ok().flatten().is_none() {
            let _ = self.0.kill();
            let _ = self.0.wait();
        }
    }
}
