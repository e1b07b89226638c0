//! The adapter's stderr: a thread of its own copies it to the log file `adapter-<worker>.log` and keeps
//! its last lines for error messages.

use std::collections::VecDeque;
use std::fs::{File, OpenOptions};
use std::io::{BufRead, BufReader, Read, Write};
use std::path::Path;
use std::sync::{Arc, Mutex};

/// Lines of the adapter's stderr kept for error messages.
const TAIL_LINES: usize = 20;
/// Longest stderr line kept for error messages (the log file has it all).
const TAIL_LINE_CHARS: usize = 400;

/// The last lines of an adapter's stderr, filled by its own thread.
#[derive(Clone, Default)]
pub(super) struct StderrTail(Arc<Mutex<VecDeque<String>>>);

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

    pub(super) fn lines(&self) -> Vec<String> {
        self.0
            .lock()
            .map(|t| t.iter().cloned().collect())
            .unwrap_or_default()
    }
}

/// Copies the adapter's stderr to the log and the tail until it ends.
pub(super) fn stderr_thread(stderr: impl Read, mut log: Option<File>, tail: StderrTail) {
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

/// Opens worker's log: a fresh file at the first start, appended to (with a note) at a restart.
pub(super) fn open_log(path: &Path, restart: u32) -> Result<File, String> {
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
