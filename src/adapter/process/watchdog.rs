//! A watchdog per pool that ends the adapters' sessions when varpost dies without the chance to do it
//! itself (`kill -9`, an abort): a small `sh` process reading a pipe whose write end only varpost holds.
//!
//! varpost writes `+SID` when it starts an adapter (SID: the adapter's session, whose leader is the
//! process varpost started) and `-SID` when it has ended that session itself, just before reaping its
//! leader (so the id cannot have been reused yet). When the pipe reaches end-of-file — every holder of
//! the write end is gone, which for a CLOEXEC descriptor means varpost has exited — the watchdog sends
//! SIGTERM to every process of every session still listed, waits a second, and sends SIGKILL. The
//! watchdog runs in a process group of its own, so a Ctrl-C at the terminal does not reach it.

use std::fmt;
use std::fs::File;
use std::io::{self, Write};
use std::os::fd::{AsRawFd, FromRawFd, OwnedFd};
use std::process::{Child, Command, Stdio};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use super::pipes::{set_nonblocking, wait_ready};

/// The watchdog's program: collect the listed sessions until end-of-file, then end them.
const SCRIPT: &str = r#"
trap '' INT HUP
s=' '
while read -r l; do
  case $l in
    +*) s="$s${l#+} " ;;
    -*) n=' '; for p in $s; do [ "$p" = "${l#-}" ] || n="$n$p "; done; s=$n ;;
  esac
done
[ "$s" = ' ' ] && exit 0
k() {
  for p in $s; do kill -"$1" "-$p" 2>/dev/null; done
  for f in /proc/[0-9]*/stat; do
    x=
    read -r x 2>/dev/null < "$f"
    [ -n "$x" ] || continue
    g=$1
    set -- ${x##*)}
    for p in $s; do
      if [ "$4" = "$p" ]; then q=${f#/proc/}; kill -"$g" "${q%/stat}" 2>/dev/null; fi
    done
    set -- "$g"
  done
}
k TERM
sleep 1
k KILL
k KILL
"#;

/// The running watchdog and the write end of its pipe.
pub(crate) struct Watchdog {
    /// The write end; `None` once closed.
    pipe: Mutex<Option<File>>,
    child: Mutex<Option<Child>>,
}

impl fmt::Debug for Watchdog {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("Watchdog")
    }
}

/// A pipe whose both ends are close-on-exec (no adapter inherits either).
fn cloexec_pipe() -> io::Result<(OwnedFd, OwnedFd)> {
    let mut fds = [0 as libc::c_int; 2];
    // SAFETY: pipe2 writes two descriptors into `fds`, which we then own.
    let r = unsafe { libc::pipe2(fds.as_mut_ptr(), libc::O_CLOEXEC) };
    if r != 0 {
        return Err(io::Error::last_os_error());
    }
    // SAFETY: both descriptors were just created and are owned by nobody else.
    Ok(unsafe { (OwnedFd::from_raw_fd(fds[0]), OwnedFd::from_raw_fd(fds[1])) })
}

impl Watchdog {
    /// Starts the watchdog process.
    pub fn start() -> io::Result<Watchdog> {
        let (read, write) = cloexec_pipe()?;
        let mut cmd = Command::new("/bin/sh");
        cmd.arg("-c")
            .arg(SCRIPT)
            .arg("varpost-watchdog")
            .stdin(Stdio::from(read))
            .stdout(Stdio::null())
            .stderr(Stdio::null());
        std::os::unix::process::CommandExt::process_group(&mut cmd, 0);
        let child = cmd.spawn()?;
        // Writes never block varpost for long, even if the watchdog were stopped.
        set_nonblocking(write.as_raw_fd());
        Ok(Watchdog {
            pipe: Mutex::new(Some(File::from(write))),
            child: Mutex::new(Some(child)),
        })
    }

    /// The watchdog ends session `sid` if varpost dies.
    pub fn watch(&self, sid: u32) {
        self.send(&format!("+{sid}\n"));
    }

    /// varpost has ended session `sid` itself.
    pub fn forget(&self, sid: u32) {
        self.send(&format!("-{sid}\n"));
    }

    fn send(&self, line: &str) {
        let Ok(mut guard) = self.pipe.lock() else {
            return;
        };
        let Some(pipe) = guard.as_mut() else {
            return;
        };
        let deadline = Instant::now() + Duration::from_millis(500);
        // A line is shorter than PIPE_BUF, so it is written whole or not at all.
        loop {
            match pipe.write(line.as_bytes()) {
                Err(e) if e.kind() == io::ErrorKind::WouldBlock => {
                    if !matches!(
                        wait_ready(pipe.as_raw_fd(), libc::POLLOUT, Some(deadline)),
                        Ok(true)
                    ) {
                        return;
                    }
                }
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                _ => return,
            }
        }
    }

    /// Whether the watchdog process is still running (for tests).
    #[cfg(test)]
    pub fn is_running(&self) -> bool {
        let Ok(mut c) = self.child.lock() else {
            return false;
        };
        c.as_mut().is_some_and(|c| matches!(c.try_wait(), Ok(None)))
    }
}

impl Drop for Watchdog {
    fn drop(&mut self) {
        // Closing the write end is end-of-file for the watchdog; with no session left listed it exits.
        if let Ok(pipe) = self.pipe.get_mut() {
            pipe.take();
        }
        let Ok(Some(mut child)) = self.child.get_mut().map(Option::take) else {
            return;
        };
        let end = Instant::now() + Duration::from_secs(3);
        while matches!(child.try_wait(), Ok(None)) && Instant::now() < end {
            std::thread::sleep(Duration::from_millis(5));
        }
        if matches!(child.try_wait(), Ok(None)) {
            let _ = child.kill();
        }
        let _ = child.wait();
    }
}

#[cfg(test)]
mod tests {
    use super::super::terminate::{session_members, test_session, wait_outside_group, STUBBORN};
    use super::*;

    fn wait_empty(sid: u32) -> bool {
        let end = Instant::now() + Duration::from_secs(10);
        while !session_members(sid).unwrap().is_empty() {
            if Instant::now() > end {
                return false;
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        true
    }

    #[test]
    fn listed_sessions_are_ended_at_end_of_file_and_forgotten_ones_are_not() {
        let w = Watchdog::start().unwrap();
        assert!(w.is_running());
        let listed = test_session(STUBBORN.0, STUBBORN.1);
        let forgotten = test_session(
            "sleep 1000 & exec sleep 1001",
            &["sleep 1000", "sleep 1001"],
        );
        wait_outside_group(listed.0.id());
        w.watch(listed.0.id());
        w.watch(forgotten.0.id());
        w.forget(forgotten.0.id());
        // Dropping closes the only write end: what varpost's death does.
        drop(w);
        assert!(
            wait_empty(listed.0.id()),
            "a listed session survived the watchdog"
        );
        assert_eq!(
            session_members(forgotten.0.id()).unwrap().len(),
            2,
            "a forgotten session was touched"
        );
    }
}
