//! One adapter process: spawning it, the handshake, requests with a deadline, and stopping it without
//! leaving a zombie or a stray process behind.
//!
//! Requests and replies go through the adapter's stdin and stdout from the calling thread: both pipes
//! are non-blocking and every read and write waits with `poll` until the request's deadline, so neither
//! a silent adapter nor one that stops reading can block varpost past its timeout. Only stderr has a
//! thread of its own, which copies it to the log file and keeps its last lines for error messages.
//!
//! Each adapter runs in a process group of its own, so that a launcher (`mpirun ...`) and everything it
//! started can be signalled together, and so that the terminal's Ctrl-C reaches varpost only, which then
//! shuts its adapters down in order. On Linux every adapter also gets SIGTERM from the kernel if varpost
//! dies without that chance (the children are forked from one long-lived thread, since the kernel ties
//! this signal to the forking thread). An adapter that sees end-of-file on its stdin must exit.

use std::collections::VecDeque;
use std::fs::{File, OpenOptions};
use std::io::{self, BufRead, BufReader, Read, Write};
use std::os::fd::{AsRawFd, RawFd};
use std::os::unix::process::{CommandExt, ExitStatusExt};
use std::path::{Path, PathBuf};
use std::process::{Child, ChildStdin, ChildStdout, Command, ExitStatus, Stdio};
use std::sync::mpsc::{self, Sender, SyncSender};
use std::sync::{Arc, Mutex, OnceLock};
use std::thread::{self, JoinHandle};
use std::time::{Duration, Instant};

use super::protocol::{self, Encoding, Hello, Op, ProtocolError, Reply, Request};

/// Lines of the adapter's stderr kept for error messages.
const TAIL_LINES: usize = 20;
/// Longest stderr line kept for error messages (the log file has it all).
const TAIL_LINE_CHARS: usize = 400;
/// Longest hello line accepted (component names can make it long).
const MAX_HELLO: usize = 128 << 20;
/// Pipe buffer size asked of the kernel for the adapter's stdin and stdout (Linux).
#[cfg(target_os = "linux")]
const PIPE_SIZE: libc::c_int = 1 << 20;
/// How long an adapter may take to exit after `quit` before it is killed.
const QUIT_GRACE: Duration = Duration::from_secs(2);
/// How long a killed adapter may take to act on SIGTERM before SIGKILL.
const TERM_GRACE: Duration = Duration::from_millis(300);

/// Which encoding to ask for after the handshake.
#[derive(
    Debug,
    Clone,
    Copy,
    PartialEq,
    Eq,
    Default,
    serde::Serialize,
    serde::Deserialize,
    clap::ValueEnum,
)]
#[serde(rename_all = "lowercase")]
pub enum EncodingChoice {
    /// Binary for states of 1000 components or more when the adapter offers it, otherwise text when
    /// offered, otherwise binary.
    #[default]
    Auto,
    /// Text; an error if the adapter does not offer it.
    Text,
    /// Binary; an error if the adapter does not offer it.
    Binary,
}

/// Splits a command line into words like a POSIX shell does for quoting, without running a shell:
/// whitespace separates words, `'...'` is literal, `"..."` allows `\"`, `\\`, `\$`, `` \` ``, and a
/// backslash outside quotes escapes the next character. No expansion of variables, globs or `~`.
pub fn split_command(line: &str) -> Result<Vec<String>, String> {
    let mut words = Vec::new();
    let mut cur = String::new();
    let mut in_word = false;
    let mut chars = line.chars();
    while let Some(c) = chars.next() {
        match c {
            c if c.is_whitespace() => {
                if in_word {
                    words.push(std::mem::take(&mut cur));
                    in_word = false;
                }
            }
            '\'' => {
                in_word = true;
                loop {
                    match chars.next() {
                        Some('\'') => break,
                        Some(ch) => cur.push(ch),
                        None => return Err(format!("unterminated single quote in `{line}`")),
                    }
                }
            }
            '"' => {
                in_word = true;
                loop {
                    match chars.next() {
                        Some('"') => break,
                        Some('\\') => match chars.next() {
                            Some(ch @ ('"' | '\\' | '$' | '`')) => cur.push(ch),
                            Some('\n') => {}
                            Some(ch) => {
                                cur.push('\\');
                                cur.push(ch);
                            }
                            None => return Err(format!("unterminated double quote in `{line}`")),
                        },
                        Some(ch) => cur.push(ch),
                        None => return Err(format!("unterminated double quote in `{line}`")),
                    }
                }
            }
            '\\' => {
                in_word = true;
                match chars.next() {
                    Some('\n') => {}
                    Some(ch) => cur.push(ch),
                    None => return Err(format!("a trailing backslash in `{line}`")),
                }
            }
            c => {
                in_word = true;
                cur.push(c);
            }
        }
    }
    if in_word {
        words.push(cur);
    }
    Ok(words)
}

/// How to start one adapter process.
#[derive(Debug, Clone)]
pub(crate) struct WorkerSpec {
    /// Launcher words followed by the command's words.
    pub argv: Vec<String>,
    /// The command as the user wrote it (launcher included), for messages.
    pub display: String,
    /// Folder for `adapter-<worker>.log`; `None` keeps only the last lines in memory.
    pub log_dir: Option<PathBuf>,
    /// Time allowed from start to the hello line.
    pub handshake_timeout: Duration,
    /// Encoding to ask for.
    pub encoding: EncodingChoice,
}

impl WorkerSpec {
    /// The log file of worker `index`.
    pub fn log_path(&self, index: usize) -> Option<PathBuf> {
        self.log_dir
            .as_ref()
            .map(|d| d.join(format!("adapter-{index}.log")))
    }
}

/// Why a request or a start failed.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum WorkerError {
    /// The process exited, was killed, closed its stdout, or did not answer in time. It is gone; a new one
    /// may be started.
    Died(String),
    /// The adapter answered with something that breaks the protocol: the whole message (quoting what
    /// arrived) and the protocol error itself. The process has been stopped (its stream can no longer be
    /// trusted).
    Protocol(String, ProtocolError),
    /// The process could not be started or the handshake failed.
    Start(String),
}

impl std::fmt::Display for WorkerError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            WorkerError::Died(m) | WorkerError::Start(m) | WorkerError::Protocol(m, _) => {
                write!(f, "{m}")
            }
        }
    }
}

/// What came of waiting for one message from the adapter.
enum ReadOutcome {
    /// A whole message is the first `.0` bytes of the read buffer; [`Pipes::consume`] drops it.
    Message(usize),
    Eof,
    Broken(String),
    Timeout,
}

/// How the adapter's stdout is cut into messages.
#[derive(Clone, Copy)]
enum Framing {
    /// Lines up to `max` bytes.
    Line { max: usize },
    /// Binary frames with a body of at most `max_body` bytes.
    Frame { max_body: usize },
}

/// Waits until `fd` is ready for `events` or `deadline` passes (`false`). `None`: no deadline.
fn wait_ready(fd: RawFd, events: libc::c_short, deadline: Option<Instant>) -> io::Result<bool> {
    loop {
        let ms = match deadline {
            None => -1,
            Some(d) => {
                let now = Instant::now();
                if now >= d {
                    return Ok(false);
                }
                (d - now).as_micros().div_ceil(1000).min(i32::MAX as u128) as libc::c_int
            }
        };
        let mut p = libc::pollfd {
            fd,
            events,
            revents: 0,
        };
        // SAFETY: one pollfd that we own, for the duration of the call.
        let r = unsafe { libc::poll(&mut p, 1, ms) };
        if r < 0 {
            let e = io::Error::last_os_error();
            if e.kind() == io::ErrorKind::Interrupted {
                continue;
            }
            return Err(e);
        }
        if r > 0 {
            // Readable, writable, hung up or in error: the next read or write says which.
            return Ok(true);
        }
    }
}

fn set_nonblocking(fd: RawFd) {
    // SAFETY: fcntl flag calls on a descriptor we own; no memory is passed.
    unsafe {
        let flags = libc::fcntl(fd, libc::F_GETFL);
        if flags >= 0 {
            libc::fcntl(fd, libc::F_SETFL, flags | libc::O_NONBLOCK);
        }
    }
}

/// The adapter's stdin and stdout, both non-blocking, used from the calling thread with deadlines, so
/// that neither a full pipe nor a silent adapter can block varpost past its timeout.
struct Pipes {
    stdin: Option<ChildStdin>,
    stdout: ChildStdout,
    buf: Vec<u8>,
    /// Bytes of `buf` already searched for a newline.
    scanned: usize,
}

/// Largest single read: bounds the zero-filling of the read buffer per call.
const READ_CHUNK: usize = 1 << 20;

impl Pipes {
    fn new(stdin: ChildStdin, stdout: ChildStdout) -> Self {
        set_nonblocking(stdin.as_raw_fd());
        set_nonblocking(stdout.as_raw_fd());
        Pipes {
            stdin: Some(stdin),
            stdout,
            buf: Vec::new(),
            scanned: 0,
        }
    }

    /// Writes all of `data` before `deadline`; `Ok(false)` on timeout, `Err` when the pipe is closed.
    fn write_all(&mut self, data: &[u8], deadline: Option<Instant>) -> io::Result<bool> {
        let Some(stdin) = self.stdin.as_mut() else {
            return Err(io::Error::new(
                io::ErrorKind::BrokenPipe,
                "stdin already closed",
            ));
        };
        let mut off = 0;
        while off < data.len() {
            match stdin.write(&data[off..]) {
                Ok(0) => {
                    return Err(io::Error::new(
                        io::ErrorKind::WriteZero,
                        "the pipe took nothing",
                    ))
                }
                Ok(n) => off += n,
                Err(e) if e.kind() == io::ErrorKind::WouldBlock => {
                    if !wait_ready(stdin.as_raw_fd(), libc::POLLOUT, deadline)? {
                        return Ok(false);
                    }
                }
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => return Err(e),
            }
        }
        Ok(true)
    }

    /// Closes the adapter's stdin (it then reads end-of-file).
    fn close_stdin(&mut self) {
        self.stdin = None;
    }

    /// Drops the first `end` bytes of the buffer (a message that has been read), keeping its capacity
    /// so that large frames do not cost a fresh allocation each time.
    fn consume(&mut self, end: usize) {
        self.scanned = 0;
        if end >= self.buf.len() {
            self.buf.clear();
        } else {
            self.buf.drain(..end);
        }
    }

    /// The length of a complete message at the start of the buffer, if there is one; `Err` for input
    /// that cannot be a message.
    fn extract(&mut self, framing: Framing) -> Result<Option<usize>, String> {
        match framing {
            Framing::Line { max } => {
                if let Some(i) = self.buf[self.scanned..].iter().position(|&b| b == b'\n') {
                    return Ok(Some(self.scanned + i + 1));
                }
                self.scanned = self.buf.len();
                if self.buf.len() > max {
                    return Err(format!(
                        "the adapter wrote a line longer than {max} bytes without a newline; it starts {}",
                        protocol::quote(&self.buf, 240)
                    ));
                }
                Ok(None)
            }
            Framing::Frame { max_body } => {
                if self.buf.len() < 4 {
                    return Ok(None);
                }
                let body =
                    protocol::frame_body_len([self.buf[0], self.buf[1], self.buf[2], self.buf[3]]);
                if body < protocol::FRAME_HEADER - 4 || body > max_body {
                    return Err(format!(
                        "a binary frame announcing {body} bytes (allowed: {} to {max_body}) arrived; is the \
                         adapter printing text to stdout? It starts {}",
                        protocol::FRAME_HEADER - 4,
                        protocol::quote(&self.buf, 124)
                    ));
                }
                if self.buf.len() >= 4 + body {
                    return Ok(Some(4 + body));
                }
                Ok(None)
            }
        }
    }

    /// How many more bytes the message being received needs, as far as known.
    fn wanted(&self, framing: Framing) -> usize {
        match framing {
            Framing::Frame { .. } if self.buf.len() >= 4 => {
                let body =
                    protocol::frame_body_len([self.buf[0], self.buf[1], self.buf[2], self.buf[3]]);
                (4 + body)
                    .saturating_sub(self.buf.len())
                    .clamp(1, READ_CHUNK)
            }
            _ => 1 << 16,
        }
    }

    /// Reads until one whole message has arrived or `deadline` passes.
    fn read_message(&mut self, framing: Framing, deadline: Option<Instant>) -> ReadOutcome {
        loop {
            match self.extract(framing) {
                Ok(Some(m)) => return ReadOutcome::Message(m),
                Ok(None) => {}
                Err(m) => return ReadOutcome::Broken(m),
            }
            let old = self.buf.len();
            self.buf.resize(old + self.wanted(framing), 0);
            let r = self.stdout.read(&mut self.buf[old..]);
            self.buf.truncate(old + *r.as_ref().unwrap_or(&0));
            match r {
                Ok(0) if old == 0 => return ReadOutcome::Eof,
                Ok(0) => {
                    return ReadOutcome::Broken(format!(
                        "the adapter's stdout ended inside a message: {}",
                        protocol::quote(&self.buf, 240)
                    ))
                }
                Ok(_) => {}
                Err(e) if e.kind() == io::ErrorKind::WouldBlock => {
                    match wait_ready(self.stdout.as_raw_fd(), libc::POLLIN, deadline) {
                        Ok(true) => {}
                        Ok(false) => return ReadOutcome::Timeout,
                        Err(e) => {
                            return ReadOutcome::Broken(format!(
                                "waiting for the adapter's stdout failed: {e}"
                            ))
                        }
                    }
                }
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => {
                    return ReadOutcome::Broken(format!("reading the adapter's stdout failed: {e}"))
                }
            }
        }
    }
}

/// The last lines of an adapter's stderr, filled by its own thread.
#[derive(Clone, Default)]
struct StderrTail(Arc<Mutex<VecDeque<String>>>);

impl StderrTail {
    fn push(&self, line: &str) {
        if let Ok(mut t) = self.0.lock() {
            if t.len() == TAIL_LINES {
                t.pop_front();
            }
            let mut l: String = line.trim_end().chars().take(TAIL_LINE_CHARS).collect();
            if l.len() < line.trim_end().len() {
                l.push_str(" ...");
            }
            t.push_back(l);
        }
    }
    fn lines(&self) -> Vec<String> {
        self.0
            .lock()
            .map(|t| t.iter().cloned().collect())
            .unwrap_or_default()
    }
}

/// One running adapter process after a successful handshake.
pub(crate) struct Worker {
    index: usize,
    display: String,
    log_path: Option<PathBuf>,
    child: Option<Child>,
    pipes: Pipes,
    /// How stdout is cut into messages: lines until the handshake ends, then the chosen encoding's.
    framing: Framing,
    /// Whether the start line went out (then a quit message can be sent).
    started: bool,
    /// The request being sent (kept to reuse its allocation).
    out: Vec<u8>,
    stderr_thread: Option<JoinHandle<()>>,
    tail: StderrTail,
    hello: Hello,
    encoding: Encoding,
    next_id: u64,
}

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

fn build_command(argv: &[String]) -> Command {
    let mut cmd = Command::new(&argv[0]);
    cmd.args(&argv[1..])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    cmd.process_group(0);
    #[cfg(target_os = "linux")]
    {
        let parent = std::process::id();
        // SAFETY: the closure runs in the forked child before exec and calls only async-signal-safe
        // system calls (prctl, getppid, _exit).
        unsafe {
            cmd.pre_exec(move || {
                libc::prctl(libc::PR_SET_PDEATHSIG, libc::SIGTERM as libc::c_ulong);
                if libc::getppid() as u32 != parent {
                    libc::_exit(1);
                }
                Ok(())
            });
        }
    }
    cmd
}

fn describe_status(status: Option<ExitStatus>) -> String {
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

/// Whether the child has exited, without reaping it (so its process group id stays ours).
fn has_exited(pid: u32) -> bool {
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

fn wait_exit(pid: u32, within: Duration) -> bool {
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

fn stderr_thread(stderr: impl Read, mut log: Option<File>, tail: StderrTail) {
    let mut r = BufReader::new(stderr);
    let mut line = Vec::new();
    loop {
        line.clear();
        match r.read_until(b'\n', &mut line) {
            Ok(0) | Err(_) => break,
            Ok(_) => {
                if let Some(f) = log.as_mut() {
                    if f.write_all(&line).is_err() {
                        log = None;
                    }
                }
                tail.push(&String::from_utf8_lossy(&line));
            }
        }
    }
    if let Some(f) = log.as_mut() {
        let _ = f.flush();
    }
}

fn open_log(path: &Path, restart: u32) -> Result<File, String> {
    let f = if restart == 0 {
        File::create(path)
    } else {
        OpenOptions::new().append(true).create(true).open(path)
    };
    let mut f = f.map_err(|e| format!("cannot open the adapter log {}: {e}", path.display()))?;
    if restart > 0 {
        let _ = writeln!(
            f,
            "[varpost] --- adapter restarted (start {}) ---",
            restart + 1
        );
    }
    Ok(f)
}

fn choose_encoding(choice: EncodingChoice, hello: &Hello) -> Result<Encoding, String> {
    let offers = |e| hello.encodings.contains(&e);
    match choice {
        EncodingChoice::Text | EncodingChoice::Binary => {
            let e = if choice == EncodingChoice::Text {
                Encoding::Text
            } else {
                Encoding::Binary
            };
            if offers(e) {
                Ok(e)
            } else {
                Err(format!(
                    "the {} encoding was asked for but the adapter offers only: {}",
                    e.name(),
                    hello
                        .encodings
                        .iter()
                        .map(|e| e.name())
                        .collect::<Vec<_>>()
                        .join(", ")
                ))
            }
        }
        EncodingChoice::Auto => Ok(
            if offers(Encoding::Binary) && (hello.dim >= 1000 || !offers(Encoding::Text)) {
                Encoding::Binary
            } else if offers(Encoding::Text) {
                Encoding::Text
            } else {
                Encoding::Binary
            },
        ),
    }
}

impl Worker {
    /// Starts worker `index` (its `restart`-th restart; 0 for the first start) and does the handshake.
    pub fn start(spec: &WorkerSpec, index: usize, restart: u32) -> Result<Worker, WorkerError> {
        let mut w = Worker::spawn(spec, index, restart)?;
        w.handshake(spec)?;
        Ok(w)
    }

    fn spawn(spec: &WorkerSpec, index: usize, restart: u32) -> Result<Worker, WorkerError> {
        if spec.argv.is_empty() {
            return Err(WorkerError::Start("the adapter command is empty".into()));
        }
        let log_path = spec.log_path(index);
        let log = match &log_path {
            Some(p) => Some(open_log(p, restart).map_err(WorkerError::Start)?),
            None => None,
        };
        let mut child = spawn_child(build_command(&spec.argv)).map_err(|e| {
            WorkerError::Start(format!(
                "cannot start the adapter `{}`: {e} (is `{}` installed and on PATH, or given with its path?)",
                spec.display, spec.argv[0]
            ))
        })?;
        let (stdin, stdout, stderr) =
            (child.stdin.take(), child.stdout.take(), child.stderr.take());
        #[cfg(target_os = "linux")]
        {
            // Larger pipes mean fewer system calls and context switches for big binary frames; the
            // kernel may refuse (a per-user limit), which only costs speed.
            let fds = [
                stdin.as_ref().map(|p| p.as_raw_fd()),
                stdout.as_ref().map(|p| p.as_raw_fd()),
            ];
            for fd in fds.into_iter().flatten() {
                // SAFETY: fcntl on a pipe descriptor we own; no memory is passed.
                unsafe { libc::fcntl(fd, libc::F_SETPIPE_SZ, PIPE_SIZE) };
            }
        }
        let (Some(stdin), Some(stdout), Some(stderr)) = (stdin, stdout, stderr) else {
            kill_and_reap(&mut child, Duration::ZERO);
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
            kill_and_reap(&mut child, Duration::ZERO);
            return Err(WorkerError::Start(
                "could not start the thread draining the adapter's stderr".into(),
            ));
        };
        let placeholder = Hello {
            protocol: protocol::PROTOCOL_VERSION,
            dim: 0,
            encodings: vec![],
            offers: Default::default(),
            names: None,
            label: None,
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
            hello: placeholder,
            encoding: Encoding::Text,
            next_id: 1,
        })
    }
}

/// Stops a process group: SIGTERM, up to `grace` to act on it, SIGKILL, then reaps the leader.
fn kill_and_reap(child: &mut Child, grace: Duration) -> Option<ExitStatus> {
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

impl Worker {
    fn handshake(&mut self, spec: &WorkerSpec) -> Result<(), WorkerError> {
        let deadline = Instant::now() + spec.handshake_timeout;
        let line = match self.pipes.read_message(self.framing, Some(deadline)) {
            ReadOutcome::Message(end) => {
                let line = self.pipes.buf[..end].to_vec();
                self.pipes.consume(end);
                line
            }
            ReadOutcome::Eof => {
                // Gone before saying hello: a crash at start-up, which a new start may not repeat
                // (e.g. a launcher that lost a race for its session directory).
                let status = self.reap_after_eof();
                return Err(WorkerError::Died(self.describe(&format!(
                    "{} before its hello line",
                    describe_status(status)
                ))));
            }
            ReadOutcome::Broken(m) => {
                self.stop(TERM_GRACE);
                return Err(WorkerError::Start(
                    self.describe(&format!("sent no valid hello line: {m}")),
                ));
            }
            ReadOutcome::Timeout => {
                self.stop(TERM_GRACE);
                return Err(WorkerError::Start(self.describe(&format!(
                    "sent no hello line within {:.1} s and was stopped (raise the handshake timeout if it \
                     starts slowly, and check that it flushes stdout after the hello)",
                    spec.handshake_timeout.as_secs_f64()
                ))));
            }
        };
        let hello = match protocol::decode_hello(&line) {
            Ok(h) => h,
            Err(e) => {
                self.stop(TERM_GRACE);
                return Err(WorkerError::Start(
                    self.describe(&format!("failed the handshake: {e}")),
                ));
            }
        };
        let encoding = match choose_encoding(spec.encoding, &hello) {
            Ok(e) => e,
            Err(m) => {
                self.stop(TERM_GRACE);
                return Err(WorkerError::Start(self.describe(&m)));
            }
        };
        let sent = self
            .pipes
            .write_all(&protocol::encode_start(encoding), Some(deadline));
        if !matches!(sent, Ok(true)) {
            let status = self.reap_after_eof();
            return Err(WorkerError::Start(self.describe(&format!(
                "{} during the handshake",
                describe_status(status)
            ))));
        }
        self.started = true;
        self.framing = match encoding {
            Encoding::Text => Framing::Line {
                max: protocol::max_text_line(hello.dim),
            },
            Encoding::Binary => Framing::Frame {
                max_body: protocol::max_frame_body(hello.dim),
            },
        };
        self.hello = hello;
        self.encoding = encoding;
        Ok(())
    }

    /// The adapter's hello.
    pub fn hello(&self) -> &Hello {
        &self.hello
    }

    /// The encoding in use after the handshake.
    pub fn encoding(&self) -> Encoding {
        self.encoding
    }

    /// Sends one request and waits up to `timeout` for its reply. On [`WorkerError::Died`] and
    /// [`WorkerError::Protocol`] the process has been stopped and reaped.
    pub fn call(
        &mut self,
        req: &Request<'_>,
        timeout: Option<Duration>,
    ) -> Result<Reply, WorkerError> {
        let op = req.op;
        let id = self.next_id;
        self.next_id += 1;
        self.out.clear();
        protocol::encode_request(self.encoding, id, req, &mut self.out);
        let deadline = timeout.map(|t| Instant::now() + t);
        let outcome = match self.pipes.write_all(&self.out, deadline) {
            Ok(true) => self.pipes.read_message(self.framing, deadline),
            Ok(false) => ReadOutcome::Timeout,
            // The adapter closed its stdin: it is exiting, or has.
            Err(_) => ReadOutcome::Eof,
        };
        match outcome {
            ReadOutcome::Message(end) => {
                let decoded = protocol::decode_reply(
                    self.encoding,
                    &self.pipes.buf[..end],
                    op,
                    self.hello.dim,
                );
                let result = match decoded {
                    Ok((got, reply)) if got == id => Ok(reply),
                    Ok((got, _)) => Err(ProtocolError::Malformed(format!(
                        "the reply carries id {got} but answers request id {id}; received {}",
                        protocol::quote(&self.pipes.buf[..end], 240)
                    ))),
                    Err(e) => Err(e),
                };
                self.pipes.consume(end);
                result.map_err(|e| self.protocol_failure(op, e))
            }
            ReadOutcome::Eof => Err(self.died(op)),
            ReadOutcome::Broken(m) => {
                // A stream cut inside a message usually means the process died while writing.
                let pid = self.child.as_ref().map(|c| c.id());
                if pid.is_some_and(|p| wait_exit(p, Duration::from_millis(200))) {
                    Err(self.died(op))
                } else {
                    Err(self.protocol_failure(op, ProtocolError::Malformed(m)))
                }
            }
            ReadOutcome::Timeout => {
                let secs = timeout.map_or(0.0, |t| t.as_secs_f64());
                self.stop(TERM_GRACE);
                Err(WorkerError::Died(self.describe(&format!(
                    "did not answer a {} request within {secs:.1} s and was killed (raise the evaluation \
                     timeout if one evaluation can take longer)",
                    op.name()
                ))))
            }
        }
    }

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
    fn stop(&mut self, grace: Duration) -> Option<ExitStatus> {
        self.pipes.close_stdin();
        let status = self.child.as_mut().and_then(|c| kill_and_reap(c, grace));
        self.child = None;
        status
    }

    /// The adapter closed its stdout: give it a moment to exit by itself, then reap it.
    fn reap_after_eof(&mut self) -> Option<ExitStatus> {
        self.pipes.close_stdin();
        let status = self.child.as_mut().and_then(|c| {
            wait_exit(c.id(), Duration::from_secs(1));
            kill_and_reap(c, TERM_GRACE)
        });
        self.child = None;
        status
    }

    fn died(&mut self, op: Op) -> WorkerError {
        let status = self.reap_after_eof();
        WorkerError::Died(self.describe(&format!(
            "{} during a {} request",
            describe_status(status),
            op.name()
        )))
    }

    fn protocol_failure(&mut self, op: Op, e: ProtocolError) -> WorkerError {
        self.stop(TERM_GRACE);
        let m = self.describe(&format!(
            "broke the protocol answering a {} request: {e}",
            op.name()
        ));
        WorkerError::Protocol(m, e)
    }

    /// "the adapter `CMD` (worker i) WHAT; last lines of its stderr: ...".
    fn describe(&mut self, what: &str) -> String {
        // Let the stderr thread drain what the process wrote before it ended.
        if let Some(h) = self.stderr_thread.take() {
            let end = Instant::now() + Duration::from_millis(300);
            while !h.is_finished() && Instant::now() < end {
                thread::sleep(Duration::from_millis(5));
            }
            if !h.is_finished() {
                self.stderr_thread = Some(h);
            }
        }
        let lines = self.tail.lines();
        let log = match &self.log_path {
            Some(p) => format!(" (full log: {})", p.display()),
            None => String::new(),
        };
        let tail = if lines.is_empty() {
            format!("; it wrote nothing to stderr{log}")
        } else {
            format!(
                "; last lines of its stderr{log}:\n    {}",
                lines.join("\n    ")
            )
        };
        format!(
            "the adapter `{}` (worker {}) {what}{tail}",
            self.display, self.index
        )
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_like_a_shell() {
        // POSIX shell quoting rules (IEEE Std 1003.1-2017, Shell Command Language, 2.2 Quoting).
        let w = split_command(r#"python3  'my dir/a.py' "x \"y\" \$z" a\ b --k=v"#).unwrap();
        assert_eq!(
            w,
            vec!["python3", "my dir/a.py", r#"x "y" $z"#, "a b", "--k=v"]
        );
        assert_eq!(split_command("a ''").unwrap(), vec!["a", ""]);
        assert_eq!(split_command("   ").unwrap(), Vec::<String>::new());
        assert!(split_command("a 'b").is_err());
        assert!(split_command("a \"b").is_err());
        assert!(split_command("a \\").is_err());
    }
}
