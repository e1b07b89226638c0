//! The memory a built-in problem will hold at its peak, estimated from its settings before anything is
//! allocated, so that a setting asking for more than the machine has is refused with the amount, the
//! part that needs most of it and the setting to lower, instead of aborting on allocation.

use crate::error::Result;
use crate::resources::{ensure_fits, format_bytes};

/// Bytes of a `Vec` header (pointer, capacity, length) on 64-bit targets, counted for vectors of
/// vectors.
pub const VEC_HEADER: u128 = 24;

/// How many evaluations of a problem may run at once: one per thread of the pool that runs chains and
/// batches.
pub fn concurrent_evaluations() -> u128 {
    rayon::current_num_threads().max(1) as u128
}

/// One part of a problem's memory.
#[derive(Debug, Clone, PartialEq)]
struct Part {
    what: String,
    bytes: u128,
    fix: String,
}

/// The parts of a problem's peak memory, each with what it is and the setting that shrinks it.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MemoryPlan {
    parts: Vec<Part>,
}

impl MemoryPlan {
    /// An empty plan.
    pub fn new() -> Self {
        MemoryPlan::default()
    }

    /// Adds `bytes` held by `what`; `fix` names the settings that shrink it ("lower n").
    pub fn part(mut self, what: impl Into<String>, bytes: u128, fix: impl Into<String>) -> Self {
        self.parts.push(Part {
            what: what.into(),
            bytes,
            fix: fix.into(),
        });
        self
    }

    /// The total in bytes (saturating: products of huge settings cannot wrap around).
    pub fn total(&self) -> u128 {
        self.parts
            .iter()
            .fold(0u128, |acc, p| acc.saturating_add(p.bytes))
    }

    /// Refuses the plan when it exceeds this machine's memory. The message names `problem` (e.g.
    /// "lorenz96 with n = 100000"), the amount, the largest part and how to shrink it.
    pub fn check(&self, problem: &str) -> Result<()> {
        let Some(largest) = self.parts.iter().max_by_key(|p| p.bytes) else {
            return Ok(());
        };
        let fix = format!(
            "most of it ({}) is {}; {}",
            format_bytes(largest.bytes),
            largest.what,
            largest.fix
        );
        ensure_fits(problem, self.total(), &fix)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_largest_part_is_named_with_its_fix() {
        let plan = MemoryPlan::new()
            .part("a small table", 1000, "lower a")
            .part("a huge matrix", u128::MAX / 2, "lower n")
            .part("another huge one", u128::MAX / 2 + 10, "lower m");
        assert_eq!(plan.total(), u128::MAX);
        let e = plan.check("a problem").unwrap_err().to_string();
        assert!(e.starts_with("a problem would need"), "{e}");
        assert!(e.contains("another huge one; lower m"), "{e}");
        MemoryPlan::new()
            .part("a vector", 800, "lower n")
            .check("a small problem")
            .unwrap();
    }
}
