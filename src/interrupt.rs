//! A shared interrupt flag, set by SIGINT / SIGTERM and polled by long-running loops.
//!
//! The first signal only sets the flag: the loops notice it at their next iteration, save their state
//! and return [`crate::error::Error::Interrupted`]. A second SIGINT or SIGTERM while the flag is already
//! set ends the process at once (for a run that does not react).

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use crate::error::{Error, Result};

/// A cheap, cloneable handle on one interrupt flag.
#[derive(Debug, Clone, Default)]
pub struct Interrupt {
    flag: Arc<AtomicBool>,
}

impl Interrupt {
    /// A flag that nothing sets but [`Interrupt::trigger`] (for library use and tests).
    pub fn new() -> Self {
        Interrupt::default()
    }

    /// A flag set by SIGINT and SIGTERM. Call once per process.
    pub fn from_signals() -> Result<Self> {
        let it = Interrupt::new();
        for sig in [signal_hook::consts::SIGINT, signal_hook::consts::SIGTERM] {
            // Registered first so that it sees the flag as it was before this signal: a second signal
            // exits with status 1; the first one only sets the flag.
            signal_hook::flag::register_conditional_shutdown(sig, 1, Arc::clone(&it.flag))
                .and_then(|_| signal_hook::flag::register(sig, Arc::clone(&it.flag)))
                .map_err(|e| {
                    Error::System(format!("cannot install the handler for signal {sig}: {e}"))
                })?;
        }
        Ok(it)
    }

    /// Whether an interrupt was asked for.
    pub fn is_set(&self) -> bool {
        self.flag.load(Ordering::Relaxed)
    }

    /// Asks the loops polling this flag to stop.
    pub fn trigger(&self) {
        self.flag.store(true, Ordering::Relaxed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // A real SIGTERM sent to this process sets the flag instead of ending the process.
    #[test]
    fn a_signal_sets_the_flag() {
        let it = Interrupt::from_signals().unwrap();
        assert!(!it.is_set());
        signal_hook::low_level::raise(signal_hook::consts::SIGTERM).unwrap();
        assert!(it.is_set());
    }

    #[test]
    fn trigger_is_seen_by_clones() {
        let a = Interrupt::new();
        let b = a.clone();
        assert!(!b.is_set());
        a.trigger();
        assert!(b.is_set());
    }
}
