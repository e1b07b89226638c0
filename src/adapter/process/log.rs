//! The adapter's log file `adapter-<worker>.log`, of bounded size: it keeps the first [`LOG_HEAD`] bytes
//! of what the adapter wrote to stderr and, after them, a rolling tail of its most recent output (at
//! least [`LOG_TAIL`], at most twice that), with a line saying how many bytes were dropped in between. A
//! chatty adapter therefore cannot fill the disk, and both how a run began and how it ended stay in the
//! log. One log serves all the processes a worker place starts (restarts append to it).

use std::fs::File;
use std::io;
use std::os::unix::fs::FileExt;
use std::path::Path;
use std::sync::{Arc, Mutex};

use crate::resources::format_bytes;

/// Bytes kept from the beginning of an adapter's stderr.
pub const LOG_HEAD: u64 = 4 << 20;
/// Bytes of the most recent stderr kept at least (at most twice this) after the beginning.
pub const LOG_TAIL: u64 = 2 << 20;

/// A log shared by the processes of one worker place (and their stderr threads).
pub(crate) type SharedLog = Arc<Mutex<LimitedLog>>;

/// A log file that keeps a head and a rolling tail.
#[derive(Debug)]
pub(crate) struct LimitedLog {
    file: File,
    head: u64,
    tail: u64,
    /// Current length of the file.
    len: u64,
    /// Where the head ends, once it is full.
    head_end: Option<u64>,
    /// Where the tail's bytes begin (after the head and, once bytes were dropped, the note).
    tail_start: u64,
    /// Bytes dropped between head and tail so far.
    dropped: u64,
    /// A write failed (disk full, ...): the log stops, the run does not.
    broken: bool,
}

impl LimitedLog {
    /// Creates (truncates) the log at `path`, keeping `head` bytes and a tail of `tail` to `2 tail` bytes.
    pub fn create(path: &Path, head: u64, tail: u64) -> io::Result<LimitedLog> {
        let file = File::options()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(path)?;
        Ok(LimitedLog {
            file,
            head,
            tail: tail.max(1),
            len: 0,
            head_end: None,
            tail_start: 0,
            dropped: 0,
            broken: false,
        })
    }

    /// A shared log at `path` with the standard limits.
    pub fn shared(path: &Path) -> Result<SharedLog, String> {
        LimitedLog::create(path, LOG_HEAD, LOG_TAIL)
            .map(|l| Arc::new(Mutex::new(l)))
            .map_err(|e| format!("cannot open the adapter log {}: {e}", path.display()))
    }

    /// Appends `data`, dropping older tail bytes as needed.
    pub fn write(&mut self, data: &[u8]) {
        if self.broken || data.is_empty() {
            return;
        }
        if self.append(data).is_err() {
            self.broken = true;
        }
    }

    fn append(&mut self, mut data: &[u8]) -> io::Result<()> {
        if self.head_end.is_none() {
            let room = (self.head - self.len).min(data.len() as u64) as usize;
            self.file.write_all_at(&data[..room], self.len)?;
            self.len += room as u64;
            data = &data[room..];
            if data.is_empty() {
                return Ok(());
            }
            self.head_end = Some(self.len);
            self.tail_start = self.len;
        }
        self.file.write_all_at(data, self.len)?;
        self.len += data.len() as u64;
        if self.len - self.tail_start > 2 * self.tail {
            self.compact()?;
        }
        Ok(())
    }

    /// Keeps the last `tail` bytes of the tail, after a note saying how many bytes were dropped.
    fn compact(&mut self) -> io::Result<()> {
        let head_end = self.head_end.unwrap_or(self.len);
        let keep_from = self.len - self.tail;
        let mut kept = vec![0u8; self.tail as usize];
        self.file.read_exact_at(&mut kept, keep_from)?;
        self.dropped += keep_from - self.tail_start;
        let note = format!(
            "\n[varpost] {} bytes of this adapter's stderr were dropped here: the log keeps the first {} \
             and the last {} to {}\n",
            self.dropped,
            format_bytes(self.head as u128),
            format_bytes(self.tail as u128),
            format_bytes(2 * self.tail as u128)
        );
        self.file.write_all_at(note.as_bytes(), head_end)?;
        self.tail_start = head_end + note.len() as u64;
        self.file.write_all_at(&kept, self.tail_start)?;
        self.len = self.tail_start + self.tail;
        self.file.set_len(self.len)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{RngExt, SeedableRng};

    /// Splits a log with a head of `head` bytes into (head, dropped count, tail) by its note.
    fn parts(log: &[u8], head: usize) -> (Vec<u8>, u64, Vec<u8>) {
        let text = String::from_utf8_lossy(log).into_owned();
        let Some(at) = text.find("\n[varpost] ") else {
            let h = head.min(log.len());
            return (log[..h].to_vec(), 0, log[h..].to_vec());
        };
        let rest = &text[at + "\n[varpost] ".len()..];
        let n: u64 = rest.split(' ').next().unwrap().parse().unwrap();
        let end = at + "\n[varpost] ".len() + rest.find('\n').unwrap() + 1;
        (log[..at].to_vec(), n, log[end..].to_vec())
    }

    #[test]
    fn the_log_keeps_its_head_and_a_rolling_tail_and_counts_what_it_dropped() {
        let path = std::env::temp_dir().join(format!("varpost-log-test-{}", std::process::id()));
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
        let mut log = LimitedLog::create(&path, 100, 40).unwrap();
        let mut all = Vec::new();
        for round in 0..400 {
            let chunk: Vec<u8> = (0..rng.random_range(1..30))
                .map(|i| b'a' + ((round + i) % 26) as u8)
                .collect();
            log.write(&chunk);
            all.extend_from_slice(&chunk);
            let bytes = std::fs::read(&path).unwrap();
            let (head, dropped, tail) = parts(&bytes, 100);
            if all.len() <= 100 {
                assert_eq!(bytes, all);
                continue;
            }
            assert_eq!(head, all[..100], "round {round}");
            assert!(all.ends_with(&tail), "round {round}");
            assert!(tail.len() <= 80, "round {round}: tail of {}", tail.len());
            assert_eq!(
                100 + dropped as usize + tail.len(),
                all.len(),
                "round {round}"
            );
        }
        let (_, dropped, tail) = parts(&std::fs::read(&path).unwrap(), 100);
        assert!(dropped > 0 && tail.len() >= 40);
        let _ = std::fs::remove_file(&path);
    }
}
