//! Stopping an adapter: everything in its session (the process varpost started, a launcher's ranks, a
//! wrapper script's children) gets SIGTERM, a short grace, then SIGKILL; the leader is reaped last, so
//! that the session id stays ours until the session is empty. Also names how a process ended.

use std::os::unix::process::ExitStatusExt;
use std::process::{Child, ExitStatus};
use std::thread;
use std::time::{Duration, Instant};

use super::watchdog::Watchdog;
use super::Worker;
use crate::adapter::protocol::{self, Op, Request};

/// How long an adapter may take to exit after `quit` before it is stopped.
pub(super) const QUIT_GRACE: Duration = Duration::from_secs(2);
/// How long a stopped adapter may take to act on SIGTERM before SIGKILL.
pub(super) const TERM_GRACE: Duration = Duration::from_millis(300);
/// How long an adapter that closed its stdout may take to exit by itself before it is stopped.
pub(super) const EOF_WAIT: Duration = Duration::from_secs(1);
/// How long to wait for the stderr thread to copy the last output once the process has ended.
const STDERR_DRAIN: Duration = Duration::from_millis(500);

/// How an adapter's process ended.
#[derive(Debug, Clone, Copy)]
pub(super) struct Ended {
    /// The leader's exit status, if it could be read.
    pub status: Option<ExitStatus>,
    /// Whether the leader was still running when varpost began stopping it (then a SIGTERM or SIGKILL
    /// in `status` is varpost's, not the adapter's own doing).
    pub stopped: bool,
}

/// Ends the session led by `child` (SIGTERM to what still runs, up to `grace`, SIGKILL), tells the
/// watchdog, then reaps the leader.
pub(super) fn end_and_reap(
    child: &mut Child,
    grace: Duration,
    watchdog: Option<&Watchdog>,
) -> Ended {
    let sid = child.id();
    let stopped = !has_exited(sid);
    end_session(sid, grace);
    if let Some(w) = watchdog {
        // Before the reaping below frees the session id for reuse.
        w.forget(sid);
    }
    Ended {
        status: child.wait().ok(),
        stopped,
    }
}

/// SIGTERM to every running process of session `sid`, up to `grace` for them to exit, then SIGKILL.
fn end_session(sid: u32, grace: Duration) {
    if !session_running(sid) {
        return;
    }
    signal_session(sid, libc::SIGTERM);
    let end = Instant::now() + grace;
    while session_running(sid) && Instant::now() < end {
        thread::sleep(Duration::from_millis(5));
    }
    // A process may fork while it is being killed: repeat until nothing of the session runs.
    for _ in 0..100 {
        if !session_running(sid) {
            return;
        }
        signal_session(sid, libc::SIGKILL);
        thread::sleep(Duration::from_millis(2));
    }
}

/// Whether any process of session `sid` is running (not a zombie).
fn session_running(sid: u32) -> bool {
    match session_members(sid) {
        Some(m) => !m.is_empty(),
        None => !has_exited(sid),
    }
}

fn signal_session(sid: u32, sig: libc::c_int) {
    // SAFETY: plain system calls. The group and session ids are our unreaped child's pid, which cannot
    // be reused while it is unreaped; the members were listed as being in that session just now.
    unsafe {
        libc::kill(-(sid as libc::pid_t), sig);
        libc::kill(sid as libc::pid_t, sig);
        for p in session_members(sid).unwrap_or_default() {
            libc::kill(p as libc::pid_t, sig);
        }
    }
}

/// The running (non-zombie) processes of session `sid`, from /proc; `None` where /proc cannot be read.
/// Finds what left the leader's process group (MPI launchers put each rank in a group of its own) but
/// stayed in its session.
pub(crate) fn session_members(sid: u32) -> Option<Vec<u32>> {
    let dir = std::fs::read_dir("/proc").ok()?;
    let mut found = Vec::new();
    for entry in dir.flatten() {
        let Ok(pid) = entry.file_name().to_string_lossy().parse::<u32>() else {
            continue;
        };
        let Ok(stat) = std::fs::read_to_string(entry.path().join("stat")) else {
            continue;
        };
        if stat_session(&stat).is_some_and(|(state, s)| s == sid && state != 'Z' && state != 'X') {
            found.push(pid);
        }
    }
    Some(found)
}

/// The state letter and session id in a /proc/PID/stat line ("pid (comm) state ppid pgrp session ...";
/// comm may hold spaces and parentheses, so the fields are counted from the last ')').
fn stat_session(stat: &str) -> Option<(char, u32)> {
    let rest = &stat[stat.rfind(')')? + 1..];
    let mut fields = rest.split_whitespace();
    let state = fields.next()?.chars().next()?;
    let session = fields.nth(2)?.parse().ok()?;
    Some((state, session))
}

/// Whether the child has exited, without reaping it (so its session and group ids stay ours).
pub(super) fn has_exited(pid: u32) -> bool {
    // SAFETY: waitid writes only into `info`, which we own; WNOWAIT leaves the child waitable.
    unsafe {
        let mut info: libc::siginfo_t = std::mem::zeroed();
        let r = libc::waitid(
            libc::P_PID,
            pid as libc::id_t,
            &mut info,
            libc::WEXITED | libc::WNOHANG | libc::WNOWAIT,
        );
        r != 0 || info.si_pid() != 0
    }
}

/// Waits up to `within` for the child to exit (without reaping it); whether it did.
pub(super) fn wait_exit(pid: u32, within: Duration) -> bool {
    let end = Instant::now() + within;
    loop {
        if has_exited(pid) {
            return true;
        }
        if Instant::now() >= end {
            return false;
        }
        thread::sleep(Duration::from_millis(5));
    }
}

/// "exited with status 3", "was killed by signal 11 (SIGSEGV)".
pub(super) fn describe_status(status: Option<ExitStatus>) -> String {
    match status {
        None => "is in an unknown state".into(),
        Some(s) => match (s.code(), s.signal()) {
            (Some(c), _) => format!("exited with status {c}"),
            (None, Some(sig)) => format!("was killed by signal {sig} ({})", signal_name(sig)),
            _ => format!("ended ({s})"),
        },
    }
}

/// How the process ended, not blaming the adapter for a signal varpost sent.
pub(super) fn describe_end(ended: Ended) -> String {
    if ended.stopped {
        "did not exit by itself and was stopped by varpost".into()
    } else {
        describe_status(ended.status)
    }
}

/// "closed its output (stdout) WHEN and exited with status 3", or, when it had to be stopped, "... but
/// was still running N s later, so varpost stopped it".
pub(super) fn closed_output(ended: Ended, when: &str) -> String {
    if ended.stopped {
        format!(
            "closed its output (stdout) {when} but was still running {} s later, so varpost stopped it",
            EOF_WAIT.as_secs_f64()
        )
    } else {
        format!(
            "closed its output (stdout) {when} and {}",
            describe_status(ended.status)
        )
    }
}

fn signal_name(sig: i32) -> &'static str {
    match sig {
        libc::SIGHUP => "SIGHUP",
        libc::SIGINT => "SIGINT",
        libc::SIGQUIT => "SIGQUIT",
        libc::SIGILL => "SIGILL",
        libc::SIGABRT => "SIGABRT",
        libc::SIGBUS => "SIGBUS",
        libc::SIGFPE => "SIGFPE",
        libc::SIGKILL => "SIGKILL",
        libc::SIGSEGV => "SIGSEGV",
        libc::SIGPIPE => "SIGPIPE",
        libc::SIGTERM => "SIGTERM",
        _ => "see `kill -l`",
    }
}

impl Worker {
    /// Asks the adapter to quit and closes its stdin; [`Worker::finish_quit`] then waits for it.
    pub fn begin_quit(&mut self) {
        if self.started && self.child.is_some() {
            let mut buf = Vec::new();
            let quit = Request::new(Op::Quit, &[], &[]);
            protocol::encode_request(self.encoding, self.next_id, &quit, &mut buf);
            let _ = self
                .pipes
                .write_all(&buf, Some(Instant::now() + Duration::from_millis(200)));
        }
        self.pipes.close_stdin();
    }

    /// Waits until `deadline` for the adapter to exit after [`Worker::begin_quit`], then stops what is
    /// left of its session and reaps it.
    pub fn finish_quit(&mut self, deadline: Instant) {
        if let Some(child) = self.child.as_mut() {
            wait_exit(
                child.id(),
                deadline.saturating_duration_since(Instant::now()),
            );
            end_and_reap(child, TERM_GRACE, self.watchdog.as_deref());
            self.child = None;
        }
    }

    /// Stops the process now (it misbehaved): SIGTERM, a short grace, SIGKILL, reap.
    pub(super) fn stop(&mut self, grace: Duration) -> Option<Ended> {
        self.pipes.close_stdin();
        let watchdog = self.watchdog.clone();
        let ended = self
            .child
            .as_mut()
            .map(|c| end_and_reap(c, grace, watchdog.as_deref()));
        self.child = None;
        ended
    }

    /// The adapter closed its stdout: give it a moment to exit by itself, then stop what is left and
    /// reap it.
    pub(super) fn reap_after_eof(&mut self) -> Ended {
        self.pipes.close_stdin();
        if let Some(c) = self.child.as_ref() {
            wait_exit(c.id(), EOF_WAIT);
        }
        self.stop(TERM_GRACE).unwrap_or(Ended {
            status: None,
            stopped: false,
        })
    }

    /// Waits a moment for the stderr thread to copy the last output to the log.
    pub(super) fn drain_stderr(&mut self) {
        if let Some(h) = self.stderr_thread.take() {
            let end = Instant::now() + STDERR_DRAIN;
            while !h.is_finished() && Instant::now() < end {
                thread::sleep(Duration::from_millis(2));
            }
            if h.is_finished() {
                let _ = h.join();
            } else {
                self.stderr_thread = Some(h);
            }
        }
    }
}

impl Drop for Worker {
    fn drop(&mut self) {
        if self.child.is_some() {
            self.begin_quit();
            self.finish_quit(Instant::now() + QUIT_GRACE);
        }
        self.drain_stderr();
    }
}

/// A shell ignoring SIGTERM (its children inherit that) with two children: one in a process group of
/// its own (as MPI launchers put their ranks), one in the shell's; and the marks of it being ready.
#[cfg(test)]
pub(super) const STUBBORN: (&str, &[&str]) = (
    "trap '' TERM; python3 -c 'import os, time; os.setpgid(0, 0); time.sleep(1000)' & sleep 1000",
    &["time.sleep(1000)", "sleep 1000"],
);

/// A test's session, ended when the test ends (also when it fails).
#[cfg(test)]
pub(super) struct TestSession(pub Child);

#[cfg(test)]
impl Drop for TestSession {
    fn drop(&mut self) {
        end_and_reap(&mut self.0, Duration::ZERO, None);
    }
}

/// Starts `sh -c SCRIPT` in a session of its own (for tests of stopping sessions) and waits until it
/// has a member whose command line contains each of `ready`.
#[cfg(test)]
pub(super) fn test_session(script: &str, ready: &[&str]) -> TestSession {
    use std::os::unix::process::CommandExt;
    let mut cmd = std::process::Command::new("/bin/sh");
    cmd.arg("-c").arg(script);
    // SAFETY: setsid is async-signal-safe.
    unsafe {
        cmd.pre_exec(|| {
            libc::setsid();
            Ok(())
        });
    }
    let session = TestSession(cmd.spawn().expect("sh starts"));
    let sid = session.0.id();
    let cmdlines = || -> Vec<String> {
        let members = session_members(sid).unwrap_or_default();
        let read = |p: u32| std::fs::read(format!("/proc/{p}/cmdline")).unwrap_or_default();
        members
            .into_iter()
            .map(|p| String::from_utf8_lossy(&read(p)).replace('\0', " "))
            .collect()
    };
    let end = Instant::now() + Duration::from_secs(20);
    while !ready
        .iter()
        .all(|r| cmdlines().iter().any(|c| c.contains(r)))
    {
        assert!(
            Instant::now() < end,
            "the test session did not start: {:?}",
            cmdlines()
        );
        thread::sleep(Duration::from_millis(5));
    }
    session
}

/// Waits until a member of session `sid` has left the leader's process group (for tests).
#[cfg(test)]
pub(super) fn wait_outside_group(sid: u32) {
    let end = Instant::now() + Duration::from_secs(20);
    let outside = || {
        let members = session_members(sid).unwrap_or_default();
        members
            .iter()
            .any(|p| process_group(*p).is_some_and(|g| g != sid))
    };
    while !outside() {
        assert!(Instant::now() < end, "no member left the leader's group");
        thread::sleep(Duration::from_millis(5));
    }
}

/// The process group of process `pid` (for tests).
#[cfg(test)]
pub(super) fn process_group(pid: u32) -> Option<u32> {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).ok()?;
    let rest = &stat[stat.rfind(')')? + 1..];
    rest.split_whitespace().nth(2)?.parse().ok()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_whole_session_is_stopped_even_where_it_ignores_sigterm() {
        let mut session = test_session(STUBBORN.0, STUBBORN.1);
        let child = &mut session.0;
        let sid = child.id();
        wait_outside_group(sid);
        let ended = end_and_reap(child, Duration::from_millis(100), None);
        assert!(ended.stopped);
        assert_eq!(ended.status.and_then(|s| s.signal()), Some(libc::SIGKILL));
        let end = Instant::now() + Duration::from_secs(5);
        while !session_members(sid).unwrap().is_empty() {
            assert!(Instant::now() < end, "the session survived");
            thread::sleep(Duration::from_millis(10));
        }
    }

    #[test]
    fn stat_lines_with_awkward_names_are_read() {
        // proc(5), /proc/[pid]/stat: pid (comm) state ppid pgrp session tty_nr ...
        let line = "4242 (my (odd) name) S 1 4240 4200 0 -1 4194560 107 0 0 0";
        assert_eq!(stat_session(line), Some(('S', 4200)));
        assert_eq!(stat_session("12 (x) Z 1 12 12"), Some(('Z', 12)));
        assert_eq!(stat_session("garbage"), None);
        assert_eq!(stat_session("1 (x) R 0"), None);
    }

    #[test]
    fn this_process_is_found_in_its_session() {
        // SAFETY: getsid(0) only reads this process's session id.
        let sid = unsafe { libc::getsid(0) } as u32;
        let members = session_members(sid).expect("/proc is readable on Linux");
        assert!(members.contains(&std::process::id()), "{members:?}");
    }
}
