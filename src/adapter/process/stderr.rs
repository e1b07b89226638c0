//! The adapter's stderr: a thread of its own copies it, in chunks, to the worker's log (of bounded size,
//! see `log`) and keeps its last lines, each cut to a bounded length, for error messages. Neither a
//! chatty adapter nor one that writes a huge line without a newline can make varpost hold much of it.

use std::collections::VecDeque;
use std::io::{self, Read};
use std::sync::{Arc, Mutex};

use super::log::SharedLog;

/// Lines of the adapter's stderr kept for error messages.
const TAIL_LINES: usize = 20;
/// Longest stderr line kept for error messages (the log file has more).
const TAIL_LINE_CHARS: usize = 400;
/// Bytes of an unfinished line held until its newline arrives.
const PARTIAL_MAX: usize = 4 * TAIL_LINE_CHARS;
/// Size of one read from the pipe.
const CHUNK: usize = 64 << 10;

#[derive(Default)]
struct Tail {
    lines: VecDeque<String>,
    /// The line being received.
    partial: Vec<u8>,
    /// Whether bytes of the line being received were left out.
    cut: bool,
}

impl Tail {
    fn end_line(&mut self) {
        let text = String::from_utf8_lossy(&self.partial);
        let text = text.trim_end();
        let mut l: String = text.chars().take(TAIL_LINE_CHARS).collect();
        if self.cut || l.len() < text.len() {
            l.push_str(" ...");
        }
        if self.lines.len() == TAIL_LINES {
            self.lines.pop_front();
        }
        self.lines.push_back(l);
        self.partial.clear();
        self.cut = false;
    }

    fn feed(&mut self, mut chunk: &[u8]) {
        while !chunk.is_empty() {
            let (piece, newline) = match chunk.iter().position(|&b| b == b'\n') {
                Some(i) => (&chunk[..i], true),
                None => (chunk, false),
            };
            let room = PARTIAL_MAX.saturating_sub(self.partial.len());
            self.partial
                .extend_from_slice(&piece[..piece.len().min(room)]);
            self.cut |= piece.len() > room;
            chunk = &chunk[piece.len() + newline as usize..];
            if newline {
                self.end_line();
            }
        }
    }
}

/// The last lines of an adapter's stderr, filled by its own thread.
#[derive(Clone, Default)]
pub(super) struct StderrTail(Arc<Mutex<Tail>>);

impl StderrTail {
    fn feed(&self, chunk: &[u8]) {
        if let Ok(mut t) = self.0.lock() {
            t.feed(chunk);
        }
    }

    /// Keeps an unfinished last line (the output ended without a newline).
    fn finish(&self) {
        if let Ok(mut t) = self.0.lock() {
            if !t.partial.is_empty() || t.cut {
                t.end_line();
            }
        }
    }

    pub(super) fn lines(&self) -> Vec<String> {
        self.0
            .lock()
            .map(|t| t.lines.iter().cloned().collect())
            .unwrap_or_default()
    }
}

/// Copies the adapter's stderr to the log and the tail until it ends.
pub(super) fn stderr_thread(mut stderr: impl Read, log: Option<SharedLog>, tail: StderrTail) {
    let mut buf = vec![0u8; CHUNK];
    loop {
        match stderr.read(&mut buf) {
            Ok(0) => break,
            Ok(n) => {
                if let Some(Ok(mut l)) = log.as_ref().map(|l| l.lock()) {
                    l.write(&buf[..n]);
                }
                tail.feed(&buf[..n]);
            }
            Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
            Err(_) => break,
        }
    }
    tail.finish();
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_tail_keeps_the_last_lines_each_cut_to_a_bounded_length() {
        let t = StderrTail::default();
        for k in 0..30 {
            t.feed(format!("line {k}\n").as_bytes());
        }
        // A line of 1 MB without a newline, split across chunks, then the end of the output.
        for _ in 0..16 {
            t.feed(&[b'x'; 1 << 16]);
        }
        t.finish();
        let lines = t.lines();
        assert_eq!(lines.len(), TAIL_LINES);
        assert_eq!(lines[0], "line 11");
        assert_eq!(lines[18], "line 29");
        assert!(lines[19].starts_with("xxx") && lines[19].ends_with(" ..."));
        assert_eq!(lines[19].len(), TAIL_LINE_CHARS + 4);
        let held = t.0.lock().unwrap().partial.capacity();
        assert!(held <= 2 * PARTIAL_MAX, "{held}");
    }
}
