//! A long call run beside a thread that shows its progress (bars, plain lines or nothing, see
//! [`crate::output::progress`]): the stage, the model runs so far and the chains' iterations.
//!
//! The call's end is signalled to that thread by a guard dropped on every way out of the call, panics
//! included, and a panic in the call is caught there ([`super::guard::catch`]); so the progress thread
//! always stops and the process never waits for it forever.

use std::io::Write;
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicU8, Ordering};
use std::time::{Duration, Instant, SystemTime};

use super::guard;
use crate::error::Result;
use crate::output::progress::{Bar, LogFormat, PlainLog, Progress, Snapshot};

/// How often the progress thread looks at the counts (and so how soon it stops after the call).
const TICK: Duration = Duration::from_millis(100);
/// Longest time between two plain progress lines.
const PLAIN_EVERY: Duration = Duration::from_secs(30);

const RUNNING: u8 = 0;
const SUCCEEDED: u8 = 1;
const FAILED: u8 = 2;

/// The chains' iterations, told by the sampler's progress callback (from the chains' threads).
#[derive(Debug)]
pub struct ChainProgress {
    done: Vec<AtomicU64>,
    /// Iterations per chain: the warm-up ends early once it has settled, so the sampler tells it.
    per_chain: AtomicU64,
    /// Sampling iterations per chain (draws × thin); the rest of `per_chain` is warm-up.
    sampling: u64,
    started: AtomicBool,
}

impl ChainProgress {
    /// `chains` chains of `per_chain` iterations each, the first `warmup` of them warm-up.
    pub fn new(chains: usize, warmup: u64, per_chain: u64) -> Self {
        ChainProgress {
            done: (0..chains).map(|_| AtomicU64::new(0)).collect(),
            per_chain: AtomicU64::new(per_chain),
            sampling: per_chain.saturating_sub(warmup),
            started: AtomicBool::new(false),
        }
    }

    /// Chain `chain` has done `done` of its `total` iterations (warm-up included).
    pub fn advance(&self, chain: usize, done: u64, total: u64) {
        if let Some(d) = self.done.get(chain) {
            d.store(done, Ordering::Relaxed);
        }
        self.per_chain.store(total, Ordering::Relaxed);
        self.started.store(true, Ordering::Relaxed);
    }

    fn iterations(&self) -> (u64, u64) {
        let done = self.done.iter().map(|d| d.load(Ordering::Relaxed)).sum();
        let per_chain = self.per_chain.load(Ordering::Relaxed);
        (done, per_chain * self.done.len() as u64)
    }

    /// The chains' stage, once they have started.
    fn stage(&self) -> Option<&'static str> {
        if !self.started.load(Ordering::Relaxed) {
            return None;
        }
        let slowest = self.done.iter().map(|d| d.load(Ordering::Relaxed)).min();
        let warmup = self
            .per_chain
            .load(Ordering::Relaxed)
            .saturating_sub(self.sampling);
        Some(if slowest.unwrap_or(0) < warmup {
            "warm-up"
        } else {
            "sampling"
        })
    }
}

/// What the progress thread shows.
pub struct Watch<'a> {
    /// Label of the plain lines, e.g. "varpost sample".
    pub label: &'a str,
    /// The stage before the chains start (or the only stage, without chains).
    pub stage: &'a str,
    /// Model runs so far, where counted.
    pub runs: Option<&'a (dyn Fn() -> u64 + Sync)>,
    /// The chains, for a run that has them.
    pub chains: Option<&'a ChainProgress>,
}

impl Watch<'_> {
    fn snapshot(&self) -> Snapshot {
        let chain_stage = self.chains.and_then(ChainProgress::stage);
        Snapshot {
            stage: chain_stage.unwrap_or(self.stage).to_string(),
            runs: self.runs.map(|r| r()),
            iterations: self.chains.map(ChainProgress::iterations),
        }
    }
}

/// Marks the call as ended when dropped: on a normal return after the outcome was stored (then it
/// changes nothing), and while unwinding from a panic (then the call failed).
struct EndOnDrop<'a>(&'a AtomicU8);

impl Drop for EndOnDrop<'_> {
    fn drop(&mut self) {
        let _ = self
            .0
            .compare_exchange(RUNNING, FAILED, Ordering::AcqRel, Ordering::Acquire);
    }
}

/// Runs `work` on this thread while another shows its progress; a panic in `work` becomes
/// [`crate::Error::Internal`].
pub fn run_watched<T>(
    progress: Progress,
    watch: &Watch<'_>,
    work: impl FnOnce() -> Result<T>,
) -> Result<T> {
    let state = AtomicU8::new(RUNNING);
    std::thread::scope(|scope| {
        // Without a thread for it (the system refused one) the run goes on without progress output.
        let _ = std::thread::Builder::new()
            .name("progress".into())
            .spawn_scoped(scope, || show(progress, watch, &state));
        let _end = EndOnDrop(&state);
        let r = guard::catch(work);
        state.store(
            if r.is_ok() { SUCCEEDED } else { FAILED },
            Ordering::Release,
        );
        r
    })
}

/// The progress thread: updates the bars or prints plain lines until the call has ended.
fn show(progress: Progress, watch: &Watch<'_>, state: &AtomicU8) {
    if progress.format() == LogFormat::None {
        return;
    }
    let start = Instant::now();
    let bars = Bars::new(progress, watch);
    let mut log = (progress.format() == LogFormat::Plain)
        .then(|| PlainLog::new(watch.label, PLAIN_EVERY, start));
    loop {
        let now_state = state.load(Ordering::Acquire);
        let snap = watch.snapshot();
        if let Some(b) = &bars {
            b.show(&snap);
        }
        if let Some(log) = log.as_mut() {
            let (now, wall) = (Instant::now(), SystemTime::now());
            let line = match now_state {
                RUNNING => log.update(now, wall, &snap),
                SUCCEEDED => Some(log.finish(now, wall, &snap, "finished")),
                _ => Some(log.finish(now, wall, &snap, "stopped (see the error below)")),
            };
            if let Some(line) = line {
                // A closed stderr must not stop the run.
                let _ = writeln!(std::io::stderr(), "{line}");
            }
        }
        if now_state != RUNNING {
            if let Some(b) = &bars {
                b.finish(if now_state == SUCCEEDED {
                    "finished"
                } else {
                    "stopped (see the error below)"
                });
            }
            return;
        }
        std::thread::sleep(TICK);
    }
}

/// The bars of the bar format: model runs (a spinner with the rate) and the chains' iterations; the
/// first of them names the stage.
struct Bars {
    runs: Option<Bar>,
    chains: Option<Bar>,
}

impl Bars {
    fn new(progress: Progress, watch: &Watch<'_>) -> Option<Bars> {
        if !progress.is_shown() {
            return None;
        }
        let group = progress.group();
        Some(Bars {
            runs: watch.runs.map(|_| group.stage("model runs", "runs", None)),
            chains: watch
                .chains
                .map(|c| group.stage("chains", "iterations", Some(c.iterations().1))),
        })
    }

    fn show(&self, snap: &Snapshot) {
        if let (Some(b), Some(r)) = (&self.runs, snap.runs) {
            b.set_position(r);
        }
        if let (Some(b), Some((done, _))) = (&self.chains, snap.iterations) {
            b.set_position(done);
        }
        if let Some(b) = self.runs.as_ref().or(self.chains.as_ref()) {
            b.set_message(format!("stage: {}", snap.stage));
        }
    }

    fn finish(&self, outcome: &str) {
        if let Some(b) = self.runs.as_ref().or(self.chains.as_ref()) {
            b.set_message(outcome.to_string());
        }
        self.runs.iter().chain(&self.chains).for_each(Bar::finish);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::error::Error;

    #[test]
    fn chain_stages_follow_the_slowest_chain() {
        let c = ChainProgress::new(2, 10, 30);
        assert_eq!(c.stage(), None);
        c.advance(0, 12, 30);
        assert_eq!(c.stage(), Some("warm-up"));
        c.advance(1, 10, 30);
        assert_eq!(c.stage(), Some("sampling"));
        assert_eq!(c.iterations(), (22, 60));
        c.advance(7, 1, 30); // a chain the run does not have is ignored
        assert_eq!(c.iterations(), (22, 60));
    }

    #[test]
    fn a_panicking_call_ends_the_progress_thread_and_becomes_an_error() {
        let chains = ChainProgress::new(1, 0, 1);
        let watch = Watch {
            label: "test",
            stage: "work",
            runs: None,
            chains: Some(&chains),
        };
        let e = run_watched::<()>(Progress::hidden(), &watch, || {
            chains.advance(0, 1, 1);
            panic!("in the call")
        })
        .unwrap_err();
        assert!(matches!(e, Error::Internal(_)) && e.to_string().contains("in the call"));
        assert_eq!(
            run_watched(Progress::hidden(), &watch, || Ok(3)).unwrap(),
            3
        );
    }
}
