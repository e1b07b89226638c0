//! A lock on an output folder, so that two runs never write into the same folder at once.
//!
//! The lock is an advisory `flock(2)` on DIR/.varpost.lock, taken without waiting: two runs starting at
//! the same moment cannot both get it. The file holds, as text, who holds the lock (process id, host,
//! command, start time), so that a refused run can say which run is in the way. The kernel releases the
//! lock when its holder dies, however it dies; a run that finds the file of a dead run takes the lock
//! over and says so. A file whose flock is still held but whose recorded process is gone from this host
//! (a child that inherited the descriptor outlives a killed run) is replaced as well. The lock is
//! released, and the file removed, when the [`RunLock`] is dropped.

use std::fmt;
use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::os::unix::fs::MetadataExt;
use std::os::unix::io::AsRawFd;
use std::path::{Path, PathBuf};
use std::time::Duration;

use crate::error::{Error, Result};

/// The lock file's name inside the output folder.
pub const LOCK_FILE: &str = ".varpost.lock";

/// Who holds (or held) a lock, as recorded in the lock file.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LockHolder {
    /// The process id, where the file gives a readable one.
    pub pid: Option<u32>,
    /// The host name ("unknown" where not recorded).
    pub host: String,
    /// The command line of the run ("unknown" where not recorded).
    pub command: String,
    /// When the run took the lock, ISO 8601 in UTC ("unknown" where not recorded).
    pub since: String,
}

impl LockHolder {
    /// This process, running `command`.
    fn this_process(command: &str) -> Self {
        LockHolder {
            pid: Some(std::process::id()),
            host: hostname(),
            command: command.replace(['\n', '\r'], " "),
            since: super::utc_now(),
        }
    }

    /// The lock file's text: one `key value` line per field.
    fn to_text(&self) -> String {
        let pid = self.pid.map_or("unknown".to_string(), |p| p.to_string());
        format!(
            "pid {pid}\nhost {}\ncommand {}\nsince {}\n",
            self.host, self.command, self.since
        )
    }

    /// Reads a lock file's text; `None` when it is empty (its writer has not written it yet).
    fn parse(text: &str) -> Option<Self> {
        if text.trim().is_empty() {
            return None;
        }
        let field = |key: &str| {
            text.lines()
                .find_map(|l| l.strip_prefix(key)?.strip_prefix(' '))
                .map(|v| v.trim().to_string())
                .filter(|v| !v.is_empty())
        };
        let unknown = || "unknown".to_string();
        Some(LockHolder {
            pid: field("pid").and_then(|p| p.parse().ok()),
            host: field("host").unwrap_or_else(unknown),
            command: field("command").unwrap_or_else(unknown),
            since: field("since").unwrap_or_else(unknown),
        })
    }

    /// Whether the recorded process is known to be gone: it ran on this host and no process of its id
    /// exists now.
    fn is_dead(&self) -> bool {
        match self.pid {
            Some(pid) if self.host == hostname() => !process_exists(pid),
            _ => false,
        }
    }
}

impl fmt::Display for LockHolder {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.pid {
            Some(pid) => write!(f, "process {pid}")?,
            None => write!(f, "a process")?,
        }
        write!(
            f,
            " on host {} running `{}`, since {}",
            self.host, self.command, self.since
        )
    }
}

/// A held lock on an output folder; released (and its file removed) on drop.
#[derive(Debug)]
pub struct RunLock {
    file: File,
    path: PathBuf,
    previous: Option<LockHolder>,
}

impl RunLock {
    /// Takes the lock on `dir` (created if missing) for a run of `command`, without waiting.
    ///
    /// Fails with a message naming the run that holds it (process id, host, command, since when) and
    /// what to do. A lock left by a run that died is taken over: see [`RunLock::taken_over`].
    pub fn acquire(dir: &Path, command: &str) -> Result<RunLock> {
        std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
        let path = dir.join(LOCK_FILE);
        let mut replaced_dead: Option<LockHolder> = None;
        // A few rounds: the file can be removed or replaced between our open and our flock.
        for _ in 0..50 {
            let mut file = open_lock_file(&path)?;
            if !try_flock(&file).map_err(|e| Error::io(&path, e))? {
                let holder = read_holder(&mut file, &path)?;
                match holder {
                    Some(h) if h.is_dead() => {
                        // Held through a descriptor that outlived its run: replace the file.
                        remove_if_same(&path, &file);
                        replaced_dead = Some(h);
                        continue;
                    }
                    _ => return Err(refusal(dir, holder.as_ref())),
                }
            }
            if !same_file(&path, &file) {
                // Removed or replaced by its previous holder after we opened it: try again.
                continue;
            }
            let mut lock = RunLock {
                previous: read_text(&mut file, &path)?
                    .as_deref()
                    .and_then(LockHolder::parse)
                    .or(replaced_dead),
                file,
                path,
            };
            lock.record(command)?;
            return Ok(lock);
        }
        Err(Error::Config(format!(
            "cannot take the lock {}: it keeps being replaced by another process; make sure no \
             other run uses the folder, then start again",
            path.display()
        )))
    }

    /// The lock file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The run whose lock was taken over, where the folder was locked by a run that died (killed, or
    /// crashed) without releasing it.
    pub fn taken_over(&self) -> Option<&LockHolder> {
        self.previous.as_ref()
    }

    /// A sentence for the user when a stale lock was taken over, else `None`.
    pub fn takeover_note(&self) -> Option<String> {
        self.previous.as_ref().map(|h| {
            format!(
                "note: took over the lock on {} left by {h}, which is no longer running; if that \
                 run was stopped part-way, its files in the folder may be incomplete",
                self.path.parent().unwrap_or(Path::new(".")).display()
            )
        })
    }

    /// Writes this process's details into the lock file.
    fn record(&mut self, command: &str) -> Result<()> {
        let text = LockHolder::this_process(command).to_text();
        let io = |e| Error::io(&self.path, e);
        self.file.set_len(0).map_err(io)?;
        self.file.seek(SeekFrom::Start(0)).map_err(io)?;
        self.file.write_all(text.as_bytes()).map_err(io)?;
        self.file.sync_data().map_err(io)
    }
}

impl Drop for RunLock {
    fn drop(&mut self) {
        // Removed while still locked, so that a run waiting on the old file sees it replaced; the
        // flock goes when the file is closed.
        remove_if_same(&self.path, &self.file);
    }
}

/// The error for a folder locked by `holder`.
fn refusal(dir: &Path, holder: Option<&LockHolder>) -> Error {
    let (who, stop) = match holder {
        Some(h) => (
            h.to_string(),
            h.pid.map_or(String::new(), |p| format!(" (kill {p})")),
        ),
        None => (
            "another process that is just starting".to_string(),
            String::new(),
        ),
    };
    Error::Config(format!(
        "the output folder {} is in use by another varpost run: {who}. Wait for it to finish, stop \
         it{stop}, or choose another output folder (--out). If you are sure no run uses the folder, \
         remove {}",
        dir.display(),
        dir.join(LOCK_FILE).display()
    ))
}

fn open_lock_file(path: &Path) -> Result<File> {
    OpenOptions::new()
        .read(true)
        .write(true)
        .create(true)
        .truncate(false)
        .open(path)
        .map_err(|e| Error::io(path, e))
}

/// flock(LOCK_EX | LOCK_NB): Ok(true) when taken, Ok(false) when another open file holds it.
fn try_flock(file: &File) -> std::io::Result<bool> {
    loop {
        // SAFETY: flock on a descriptor this process owns for the duration of the call.
        let r = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
        if r == 0 {
            return Ok(true);
        }
        let e = std::io::Error::last_os_error();
        match e.raw_os_error() {
            Some(libc::EWOULDBLOCK) => return Ok(false),
            Some(libc::EINTR) => continue,
            _ => return Err(e),
        }
    }
}

/// The whole file as text, or `None` when it is empty.
fn read_text(file: &mut File, path: &Path) -> Result<Option<String>> {
    let mut text = String::new();
    file.seek(SeekFrom::Start(0))
        .and_then(|_| file.read_to_string(&mut text))
        .map_err(|e| Error::io(path, e))?;
    Ok(Some(text).filter(|t| !t.is_empty()))
}

/// The holder recorded in a file locked by someone else; waits briefly for a holder that has taken the
/// lock but not yet written its details.
fn read_holder(file: &mut File, path: &Path) -> Result<Option<LockHolder>> {
    for _ in 0..20 {
        if let Some(h) = read_text(file, path)?
            .as_deref()
            .and_then(LockHolder::parse)
        {
            return Ok(Some(h));
        }
        std::thread::sleep(Duration::from_millis(25));
    }
    Ok(None)
}

/// Whether `path` still names the file `file` is open on.
fn same_file(path: &Path, file: &File) -> bool {
    match (std::fs::metadata(path), file.metadata()) {
        (Ok(a), Ok(b)) => a.dev() == b.dev() && a.ino() == b.ino(),
        _ => false,
    }
}

/// Removes `path` if it still names the file `file` is open on (never another run's new lock file).
fn remove_if_same(path: &Path, file: &File) {
    if same_file(path, file) {
        let _ = std::fs::remove_file(path);
    }
}

/// This machine's host name.
fn hostname() -> String {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most that many bytes.
    let r = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    if r != 0 {
        return "unknown".into();
    }
    let end = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
    String::from_utf8_lossy(&buf[..end]).into_owned()
}

/// Whether a process with this id exists (kill with signal 0 checks without signalling).
fn process_exists(pid: u32) -> bool {
    let Ok(pid) = libc::pid_t::try_from(pid) else {
        return false;
    };
    if pid <= 0 {
        return false;
    }
    // SAFETY: signal 0 sends nothing; it only checks that the process exists.
    let r = unsafe { libc::kill(pid, 0) };
    r == 0 || std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn temp(name: &str) -> PathBuf {
        let d = std::env::temp_dir().join(format!("varpost-lock-{}-{name}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        d
    }

    #[test]
    fn a_second_acquisition_is_refused_naming_the_first() {
        let dir = temp("twice");
        let first = RunLock::acquire(&dir, "varpost sample --out runs/a").unwrap();
        assert!(first.taken_over().is_none());
        let e = RunLock::acquire(&dir, "varpost map")
            .unwrap_err()
            .to_string();
        let pid = std::process::id().to_string();
        assert!(e.contains(&format!("process {pid}")), "{e}");
        assert!(
            e.contains("`varpost sample --out runs/a`") && e.contains("since 20"),
            "{e}"
        );
        assert!(e.contains("choose another output folder"), "{e}");
        drop(first);
        assert!(
            !dir.join(LOCK_FILE).exists(),
            "the lock file is removed on release"
        );
        let again = RunLock::acquire(&dir, "varpost map").unwrap();
        assert!(again.taken_over().is_none());
        drop(again);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn the_lock_file_of_a_dead_process_is_taken_over() {
        let dir = temp("dead");
        std::fs::create_dir_all(&dir).unwrap();
        // A process that has exited: its id names no process (until reused, which takes a full wrap
        // of the pid space).
        let mut child = std::process::Command::new("true").spawn().unwrap();
        let dead = child.id();
        child.wait().unwrap();
        let stale = LockHolder {
            pid: Some(dead),
            host: hostname(),
            command: "varpost sample --out x".into(),
            since: "2020-01-01T00:00:00Z".into(),
        };
        assert!(stale.is_dead());
        std::fs::write(dir.join(LOCK_FILE), stale.to_text()).unwrap();
        let lock = RunLock::acquire(&dir, "varpost resume x").unwrap();
        assert_eq!(lock.taken_over(), Some(&stale));
        let note = lock.takeover_note().unwrap();
        assert!(note.contains(&format!("process {dead}")) && note.contains("no longer running"));
        let text = std::fs::read_to_string(lock.path()).unwrap();
        let now = LockHolder::parse(&text).unwrap();
        assert_eq!(now.pid, Some(std::process::id()));
        assert_eq!(now.command, "varpost resume x");
        drop(lock);
        std::fs::remove_dir_all(&dir).unwrap();
    }

    #[test]
    fn a_live_holder_on_another_host_is_never_called_dead() {
        let h = LockHolder {
            pid: Some(1),
            host: format!("{}-elsewhere", hostname()),
            command: "c".into(),
            since: "s".into(),
        };
        assert!(!h.is_dead());
        assert_eq!(LockHolder::parse(&h.to_text()), Some(h));
        assert_eq!(LockHolder::parse(""), None);
    }
}
