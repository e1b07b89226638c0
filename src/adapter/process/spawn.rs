//! Starting an adapter process: the command with its pipes, its own process group and the parent-death
//! signal, forked from one long-lived thread; then the thread that drains its stderr.

use std::io;
use std::os::fd::AsRawFd;
use std::os::unix::process::CommandExt;
use std::process::{Child, Command, Stdio};
use std::sync::mpsc::{self, Sender, SyncSender};
use std::sync::{Mutex, OnceLock};
use std::thread;

use super::pipes::{Framing, Pipes};
use super::stderr::{stderr_thread, StderrTail};
use super::terminate::{end_and_reap, TERM_GRACE};
use super::{Worker, WorkerError, WorkerSpec};
use crate::adapter::protocol::{self, Encoding, Hello};

/// Longest hello line accepted (component names can make it long).
const MAX_HELLO: usize = 128 << 20;
/// Pipe buffer size asked of the kernel for the adapter's stdin and stdout (Linux).
#[cfg(target_os = "linux")]
const PIPE_SIZE: libc::c_int = 1 << 20;

/// Forks every adapter from one thread that lives as long as the process, so that the parent-death
/// signal set in the child fires when varpost exits, not when some worker thread ends.
fn spawn_child(cmd: Command) -> io::Result<Child> {
    type Job = (Command, SyncSender<io::Result<Child>>);
    static SPAWNER: OnceLock<Mutex<Sender<Job>>> = OnceLock::new();
    let spawner = SPAWNER.get_or_init(|| {
        let (tx, rx) = mpsc::channel::<Job>();
        let started = thread::Builder::new()
            .name("varpost-adapter-spawner".into())
            .spawn(move || {
                for (mut cmd, back) in rx {
                    let _ = back.send(cmd.spawn());
                }
            });
        // If the thread could not start, its receiver is gone and `spawn_child` forks directly.
        drop(started);
        Mutex::new(tx)
    });
    let (back_tx, back_rx) = mpsc::sync_channel(1);
    let Ok(tx) = spawner.lock() else {
        return Err(io::Error::other("the adapter spawner lock is poisoned"));
    };
    match tx.send((cmd, back_tx)) {
        Ok(()) => {
            drop(tx);
            back_rx
                .recv()
                .unwrap_or_else(|_| Err(io::Error::other("the adapter spawner thread stopped")))
        }
        // No spawner thread: fork from this one.
        Err(mpsc::SendError((mut cmd, _))) => cmd.spawn(),
    }
}

/// The adapter's command: piped stdin, stdout and stderr, a session of its own (its pid is then its
/// session and process group id), and on Linux SIGTERM when varpost dies.
fn build_command(argv: &[String]) -> Command {
    let mut cmd = Command::new(&argv[0]);
    cmd.args(&argv[1..])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    let parent = std::process::id();
    // SAFETY: the closure runs in the forked child before exec and calls only async-signal-safe
    // system calls (setsid, prctl, getppid, _exit).
    unsafe {
        cmd.pre_exec(move || {
            if libc::setsid() < 0 {
                return Err(io::Error::last_os_error());
            }
            #[cfg(target_os = "linux")]
            libc::prctl(libc::PR_SET_PDEATHSIG, libc::SIGTERM as libc::c_ulong);
            // varpost died between the fork and the line above: the signal will never come.
            if libc::getppid() as u32 != parent {
                libc::_exit(1);
            }
            Ok(())
        });
    }
    cmd
}

/// Asks the kernel for larger pipes: fewer system calls and context switches for big binary frames. The
/// kernel may refuse (a per-user limit), which only costs speed.
#[cfg(target_os = "linux")]
fn enlarge_pipes(child: &Child) {
    let fds = [
        child.stdin.as_ref().map(|p| p.as_raw_fd()),
        child.stdout.as_ref().map(|p| p.as_raw_fd()),
    ];
    for fd in fds.into_iter().flatten() {
        // SAFETY: fcntl on a pipe descriptor we own; no memory is passed.
        unsafe { libc::fcntl(fd, libc::F_SETPIPE_SZ, PIPE_SIZE) };
    }
}

#[cfg(not(target_os = "linux"))]
fn enlarge_pipes(_child: &Child) {}

impl Worker {
    /// Starts the process of worker `index` (its `restart`-th restart) with its pipes and stderr thread;
    /// the handshake comes next.
    pub(super) fn spawn(
        spec: &WorkerSpec,
        index: usize,
        restart: u32,
    ) -> Result<Worker, WorkerError> {
        if spec.argv.is_empty() {
            return Err(WorkerError::Start("the adapter command is empty".into()));
        }
        let log_path = spec.log_path(index);
        let log = spec.log(index).map_err(WorkerError::Start)?;
        if let (Some(l), true) = (&log, restart > 0) {
            if let Ok(mut l) = l.lock() {
                l.write(
                    format!(
                        "[varpost] --- adapter restarted (start {}) ---\n",
                        restart + 1
                    )
                    .as_bytes(),
                );
            }
        }
        let mut child = spawn_child(build_command(&spec.argv)).map_err(|e| {
            WorkerError::Start(format!(
                "cannot start the adapter `{}`: {e} (is `{}` installed and on PATH, or given with its path?)",
                spec.display, spec.argv[0]
            ))
        })?;
        if let Some(w) = &spec.watchdog {
            w.watch(child.id());
        }
        enlarge_pipes(&child);
        let (stdin, stdout, stderr) =
            (child.stdin.take(), child.stdout.take(), child.stderr.take());
        let (Some(stdin), Some(stdout), Some(stderr)) = (stdin, stdout, stderr) else {
            end_and_reap(&mut child, TERM_GRACE, spec.watchdog.as_deref());
            return Err(WorkerError::Start(
                "the adapter's pipes could not be set up".into(),
            ));
        };
        let tail = StderrTail::default();
        let t = tail.clone();
        let stderr_handle = thread::Builder::new()
            .name(format!("adapter-{index}-stderr"))
            .spawn(move || stderr_thread(stderr, log, t));
        let Ok(stderr_handle) = stderr_handle else {
            end_and_reap(&mut child, TERM_GRACE, spec.watchdog.as_deref());
            return Err(WorkerError::Start(
                "could not start the thread draining the adapter's stderr".into(),
            ));
        };
        Ok(Worker {
            index,
            display: spec.display.clone(),
            log_path,
            child: Some(child),
            pipes: Pipes::new(stdin, stdout),
            framing: Framing::Line { max: MAX_HELLO },
            started: false,
            out: Vec::new(),
            stderr_thread: Some(stderr_handle),
            tail,
            hello: placeholder_hello(),
            encoding: Encoding::Text,
            next_id: 1,
            watchdog: spec.watchdog.clone(),
        })
    }
}

/// What a worker holds before its hello arrives.
fn placeholder_hello() -> Hello {
    Hello {
        protocol: protocol::PROTOCOL_VERSION,
        dim: 0,
        encodings: vec![],
        offers: Default::default(),
        names: None,
        label: None,
    }
}
