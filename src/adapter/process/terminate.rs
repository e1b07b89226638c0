//! Stopping an adapter: signals to its whole process group, waiting for the exit without reaping (so
//! that the group id stays ours until we are done), reaping, and naming how it ended.

use std::os::unix::process::ExitStatusExt;
use std::process::{Child, ExitStatus};
use std::thread;
use std::time::{Duration, Instant};

use super::Worker;
use crate::adapter::protocol::{self, Op, Request};

/// How long an adapter may take to exit after `quit` before it is killed.
pub(super) const QUIT_GRACE: Duration = Duration::from_secs(2);
/// How long a killed adapter may take to act on SIGTERM before SIGKILL.
pub(super) const TERM_GRACE: Duration = Duration::from_millis(300);

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

    /// Waits until `deadline` for the adapter to exit after [`Worker::begin_quit`], then kills what is
    /// left of its process group and reaps it.
    pub fn finish_quit(&mut self, deadline: Instant) {
        if let Some(child) = self.child.as_mut() {
            wait_exit(
                child.id(),
                deadline.saturating_duration_since(Instant::now()),
            );
            kill_and_reap(child, Duration::ZERO);
            self.child = None;
        }
    }

    /// Stops the process now (it misbehaved): SIGTERM, a short grace, SIGKILL, reap.
    pub(super) fn stop(&mut self, grace: Duration) -> Option<ExitStatus> {
        self.pipes.close_stdin();
        let status = self.child.as_mut().and_then(|c| kill_and_reap(c, grace));
        self.child = None;
        status
    }

    /// The adapter closed its stdout: give it a moment to exit by itself, then reap it.
    pub(super) fn reap_after_eof(&mut self) -> Option<ExitStatus> {
        self.pipes.close_stdin();
        let status = self.child.as_mut().and_then(|c| {
            wait_exit(c.id(), Duration::from_secs(1));
            kill_and_reap(c, TERM_GRACE)
        });
        self.child = None;
        status
    }
}

impl Drop for Worker {
    fn drop(&mut self) {
        if self.child.is_some() {
            self.begin_quit();
            self.finish_quit(Instant::now() + QUIT_GRACE);
        }
    }
}

/// Stops a process group: SIGTERM, up to `grace` to act on it, SIGKILL, then reaps the leader.
pub(super) fn kill_and_reap(child: &mut Child, grace: Duration) -> Option<ExitStatus> {
    let pid = child.id();
    if !has_exited(pid) && !grace.is_zero() {
        signal_group(pid, libc::SIGTERM);
        wait_exit(pid, grace);
    }
    // Also reaches what the adapter started in its group (e.g. the ranks under a launcher); the group
    // id cannot be reused before the leader is reaped below.
    signal_group(pid, libc::SIGKILL);
    child.wait().ok()
}

/// Whether the child has exited, without reaping it (so its process group id stays ours).
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

fn signal_group(pid: u32, sig: libc::c_int) {
    // SAFETY: plain system calls on a process group / process we started and have not reaped.
    unsafe {
        libc::kill(-(pid as libc::pid_t), sig);
        libc::kill(pid as libc::pid_t, sig);
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
