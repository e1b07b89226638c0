//! No adapter process outlives varpost, even when varpost is killed with SIGKILL (where none of its own
//! code runs): an adapter behind a wrapper script whose child keeps running, a rank under an MPI
//! launcher (which puts its ranks in process groups of their own), and an adapter that ignores SIGTERM.
//! Each test runs the real binary, waits until the adapter hangs in its first evaluation, kills varpost
//! with SIGKILL, checks that the kill ended the run, and then that every process whose command line
//! holds the test's unique marker is gone within a bounded wait.

use std::ffi::OsString;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use std::os::unix::process::ExitStatusExt;

fn python() -> String {
    std::env::var("VARPOST_PYTHON").unwrap_or_else(|_| "python3".into())
}

fn faulty(args: &str) -> String {
    format!(
        "{} '{}' {args}",
        python(),
        Path::new(env!("CARGO_MANIFEST_DIR"))
            .join("tests/adapters/faulty.py")
            .display()
    )
}

fn out_dir(name: &str) -> PathBuf {
    let d = Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join(format!("adapter-orphans-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&d);
    std::fs::create_dir_all(&d).unwrap();
    d
}

/// A marker no other process has in its command line.
fn marker(name: &str) -> String {
    format!("orphan-{name}-{}", std::process::id())
}

/// Running processes whose command line contains `marker`, other than `except` (Linux /proc; a zombie
/// has an empty command line, so it does not count).
fn running_with(marker: &str, except: u32) -> Vec<u32> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir("/proc").into_iter().flatten().flatten() {
        let Ok(pid) = entry.file_name().to_string_lossy().parse::<u32>() else {
            continue;
        };
        let Ok(cmd) = std::fs::read(entry.path().join("cmdline")) else {
            continue;
        };
        if pid != except && String::from_utf8_lossy(&cmd).contains(marker) {
            found.push(pid);
        }
    }
    found
}

/// Kills whatever carries the marker when a test ends (passed or failed), so that a failure does not
/// leave processes behind for the next run.
struct Sweep(String);

impl Drop for Sweep {
    fn drop(&mut self) {
        for p in running_with(&self.0, 0) {
            // SAFETY: signals processes this test started (they carry its unique marker).
            unsafe { libc::kill(p as libc::pid_t, libc::SIGKILL) };
        }
    }
}

/// Runs varpost with `args`, waits until `expect` processes carry `marker` and an adapter has begun its
/// first evaluation (which never ends), kills varpost with SIGKILL and checks that nothing with the
/// marker survives.
fn kill_9_leaves_nothing(args: Vec<OsString>, marker: &str, expect: usize, out: &Path) {
    let _sweep = Sweep(marker.to_string());
    let mut child: Child = Command::new(env!("CARGO_BIN_EXE_varpost"))
        .args(&args)
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(out.join("varpost.stderr")).unwrap())
        .spawn()
        .unwrap();
    let vp = child.id();
    let end = Instant::now() + Duration::from_secs(60);
    while running_with(marker, vp).len() < expect {
        if let Some(status) = child.try_wait().unwrap() {
            panic!(
                "varpost ended ({status}) before its adapter hung: {}",
                std::fs::read_to_string(out.join("varpost.stderr")).unwrap_or_default()
            );
        }
        assert!(
            Instant::now() < end,
            "the adapter processes did not appear: {:?}",
            running_with(marker, vp)
        );
        std::thread::sleep(Duration::from_millis(20));
    }
    // faulty.py writes this to stderr (the adapter log) once it is inside the evaluation that hangs.
    while !adapter_logs(out).contains("waiting forever") {
        assert!(child.try_wait().unwrap().is_none(), "the run ended early");
        assert!(Instant::now() < end, "the adapter never began evaluating");
        std::thread::sleep(Duration::from_millis(20));
    }
    assert!(child.try_wait().unwrap().is_none(), "the run ended early");
    // SAFETY: signals the varpost process this test started.
    unsafe { libc::kill(vp as libc::pid_t, libc::SIGKILL) };
    let status = child.wait().unwrap();
    assert_eq!(
        status.signal(),
        Some(libc::SIGKILL),
        "the kill did not end the run: {status}"
    );
    let end = Instant::now() + Duration::from_secs(20);
    loop {
        let left = running_with(marker, vp);
        if left.is_empty() {
            break;
        }
        assert!(
            Instant::now() < end,
            "processes outlived varpost's SIGKILL: {left:?}"
        );
        std::thread::sleep(Duration::from_millis(50));
    }
    let _ = std::fs::remove_dir_all(out);
}

/// Everything the adapters wrote to their logs so far.
fn adapter_logs(out: &Path) -> String {
    let mut all = String::new();
    for e in std::fs::read_dir(out).into_iter().flatten().flatten() {
        if e.file_name().to_string_lossy().starts_with("adapter-") {
            all.push_str(&std::fs::read_to_string(e.path()).unwrap_or_default());
        }
    }
    all
}

fn args(words: &[&str], out: &Path) -> Vec<OsString> {
    // faulty.py's adapter has no prior: the run starts from a given point.
    let start = out.join("start.txt");
    std::fs::write(&start, "0 0 0 0\n").unwrap();
    let mut a: Vec<OsString> = words.iter().map(OsString::from).collect();
    a.extend(["--out".into(), out.into(), "--start".into(), start.into()]);
    a
}

#[test]
fn a_wrapper_scripts_child_does_not_outlive_a_killed_varpost() {
    let out = out_dir("wrapper");
    let m = marker("wrapper");
    let wrapper = out.join("wrapper.sh");
    // The wrapper runs the adapter as its child (no exec): SIGTERM to the wrapper alone (what the kernel's
    // parent-death signal gives) would leave the adapter running.
    std::fs::write(
        &wrapper,
        "#!/bin/sh\n\"$@\"\necho \"wrapper: the adapter ended\" >&2\n",
    )
    .unwrap();
    let adapter = format!(
        "sh '{}' {}",
        wrapper.display(),
        faulty(&format!("hang {m}"))
    );
    kill_9_leaves_nothing(args(&["check", "--adapter", &adapter], &out), &m, 2, &out);
}

#[test]
fn an_mpi_rank_does_not_outlive_a_killed_varpost() {
    let have_mpirun = Command::new("sh")
        .args(["-c", "command -v mpirun"])
        .stdout(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if !have_mpirun {
        eprintln!("note: mpirun not found, the launcher case is not tested here");
        return;
    }
    let out = out_dir("mpirun");
    let m = marker("mpirun");
    // Open MPI refuses to run as root unless told twice (Open MPI 4.1 mpirun(1) man page, from memory).
    let launcher = "env OMPI_ALLOW_RUN_AS_ROOT=1 OMPI_ALLOW_RUN_AS_ROOT_CONFIRM=1 \
                    mpirun -n 1 --allow-run-as-root --oversubscribe";
    let adapter = faulty(&format!("hang {m}"));
    let words = [
        "sample",
        "--launcher",
        launcher,
        "--adapter",
        &adapter,
        "--chains",
        "2",
    ];
    // mpirun and the rank both carry the marker (it is in mpirun's arguments).
    kill_9_leaves_nothing(args(&words, &out), &m, 2, &out);
}

#[test]
fn an_adapter_ignoring_sigterm_does_not_outlive_a_killed_varpost() {
    let out = out_dir("ignore-term");
    let m = marker("ignore-term");
    let adapter = faulty(&format!("ignore_term {m}"));
    kill_9_leaves_nothing(
        args(&["check", "--workers", "2", "--adapter", &adapter], &out),
        &m,
        2,
        &out,
    );
}
