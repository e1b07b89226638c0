//! The adapter's stdin and stdout, both non-blocking, used from the calling thread with deadlines, so
//! that neither a full pipe nor a silent adapter can block varpost past its timeout; and the cutting of
//! stdout into messages (lines, or binary frames).

use std::io::{self, Read, Write};
use std::os::fd::{AsRawFd, RawFd};
use std::process::{ChildStdin, ChildStdout};
use std::time::Instant;

use crate::adapter::protocol;

/// Largest single read: bounds the zero-filling of the read buffer per call.
const READ_CHUNK: usize = 1 << 20;

/// What came of waiting for one message from the adapter.
pub(super) enum ReadOutcome {
    /// A whole message is the first `.0` bytes of the read buffer; [`Pipes::consume`] drops it.
    Message(usize),
    Eof,
    Broken(String),
    Timeout,
}

/// How the adapter's stdout is cut into messages.
#[derive(Clone, Copy, Debug)]
pub(crate) enum Framing {
    /// Lines up to `max` bytes.
    Line { max: usize },
    /// Binary frames with a body of at most `max_body` bytes.
    Frame { max_body: usize },
}

/// Waits until `fd` is ready for `events` or `deadline` passes (`false`). `None`: no deadline.
pub(super) fn wait_ready(
    fd: RawFd,
    events: libc::c_short,
    deadline: Option<Instant>,
) -> io::Result<bool> {
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

pub(super) fn set_nonblocking(fd: RawFd) {
    // SAFETY: fcntl flag calls on a descriptor we own; no memory is passed.
    unsafe {
        let flags = libc::fcntl(fd, libc::F_GETFL);
        if flags >= 0 {
            libc::fcntl(fd, libc::F_SETFL, flags | libc::O_NONBLOCK);
        }
    }
}

/// The length of a complete message at the start of `buf`, if there is one; `Err` for input that cannot
/// be a message. `scanned` is how much of `buf` is already known to hold no newline (updated).
pub(crate) fn find_message(
    buf: &[u8],
    scanned: &mut usize,
    framing: Framing,
) -> Result<Option<usize>, String> {
    match framing {
        Framing::Line { max } => {
            let from = (*scanned).min(buf.len());
            if let Some(i) = buf[from..].iter().position(|&b| b == b'\n') {
                return Ok(Some(from + i + 1));
            }
            *scanned = buf.len();
            if buf.len() > max {
                return Err(format!(
                    "the adapter wrote a line longer than {max} bytes without a newline; it starts {}",
                    protocol::quote(buf, 240)
                ));
            }
            Ok(None)
        }
        Framing::Frame { max_body } => {
            if buf.len() < 4 {
                return Ok(None);
            }
            let body = protocol::frame_body_len([buf[0], buf[1], buf[2], buf[3]]);
            if body < protocol::FRAME_HEADER - 4 || body > max_body {
                return Err(format!(
                    "a binary frame announcing {body} bytes (allowed: {} to {max_body}) arrived; is the \
                     adapter printing text to stdout? It starts {}",
                    protocol::FRAME_HEADER - 4,
                    protocol::quote(buf, 124)
                ));
            }
            Ok((buf.len() >= 4 + body).then_some(4 + body))
        }
    }
}

/// The adapter's two protocol pipes and what has been read but not yet used.
pub(super) struct Pipes {
    stdin: Option<ChildStdin>,
    stdout: ChildStdout,
    pub(super) buf: Vec<u8>,
    /// Bytes of `buf` already searched for a newline.
    scanned: usize,
}

impl Pipes {
    pub(super) fn new(stdin: ChildStdin, stdout: ChildStdout) -> Self {
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
    pub(super) fn write_all(&mut self, data: &[u8], deadline: Option<Instant>) -> io::Result<bool> {
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
    pub(super) fn close_stdin(&mut self) {
        self.stdin = None;
    }

    /// Drops the first `end` bytes of the buffer (a message that has been read), keeping its capacity
    /// so that large frames do not cost a fresh allocation each time.
    pub(super) fn consume(&mut self, end: usize) {
        self.scanned = 0;
        if end >= self.buf.len() {
            self.buf.clear();
        } else {
            self.buf.drain(..end);
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
    pub(super) fn read_message(
        &mut self,
        framing: Framing,
        deadline: Option<Instant>,
    ) -> ReadOutcome {
        loop {
            match find_message(&self.buf, &mut self.scanned, framing) {
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
                    if let Some(outcome) = self.wait_readable(deadline) {
                        return outcome;
                    }
                }
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => {
                    return ReadOutcome::Broken(format!("reading the adapter's stdout failed: {e}"))
                }
            }
        }
    }

    /// Waits for stdout to have data; `Some` ends the read (timeout or failure).
    fn wait_readable(&self, deadline: Option<Instant>) -> Option<ReadOutcome> {
        match wait_ready(self.stdout.as_raw_fd(), libc::POLLIN, deadline) {
            Ok(true) => None,
            Ok(false) => Some(ReadOutcome::Timeout),
            Err(e) => Some(ReadOutcome::Broken(format!(
                "waiting for the adapter's stdout failed: {e}"
            ))),
        }
    }
}
