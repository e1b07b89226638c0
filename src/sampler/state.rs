//! The state of one chain as the runner keeps it and a checkpoint saves it: the counters by phase, the
//! position of the random stream, and the whole per-chain record ([`ChainCheckpoint`]). Both the chain
//! runner ([`super::chain`]) and the checkpoint file ([`super::checkpoint`]) depend on this module, and
//! it depends on neither.

use rand::SeedableRng;

use super::welford::Welford;
use super::{ChainRng, ChainState, StepInfo};
use crate::adapt::Warmup;

/// Counters of one phase of one chain.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct PhaseStats {
    /// Iterations done.
    pub iterations: u64,
    /// Sum of the acceptance probabilities.
    pub accept_prob_sum: f64,
    /// Accepted proposals.
    pub accepted: u64,
    /// Divergent HMC trajectories.
    pub divergences: u64,
    /// Proposals rejected because they could not be evaluated.
    pub rejected_nonfinite: u64,
    /// Leapfrog steps / gradient evaluations done by the kernel.
    pub steps: u64,
}

impl PhaseStats {
    /// Counts one iteration.
    pub(crate) fn add(&mut self, info: &StepInfo) {
        self.iterations += 1;
        self.accept_prob_sum += info.accept_prob;
        self.accepted += u64::from(info.accepted);
        self.divergences += u64::from(info.divergent);
        self.rejected_nonfinite += u64::from(info.nonfinite);
        self.steps += u64::from(info.n_steps);
    }
    /// Mean acceptance probability (NaN before any iteration).
    pub fn acceptance(&self) -> f64 {
        self.accept_prob_sum / self.iterations as f64
    }
}

/// Counters of one chain, by phase.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ChainStats {
    /// During the warm-up.
    pub warmup: PhaseStats,
    /// During sampling.
    pub sampling: PhaseStats,
}

/// The position of a ChaCha8 stream: its seed, stream number and word position.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct RngState {
    seed: [u8; 32],
    stream: u64,
    /// The 128-bit word position as (high, low) halves.
    word_pos: [u64; 2],
}

impl RngState {
    /// Captures a generator's position.
    pub fn save(rng: &ChainRng) -> Self {
        let w = rng.get_word_pos();
        RngState {
            seed: rng.get_seed(),
            stream: rng.get_stream(),
            word_pos: [(w >> 64) as u64, w as u64],
        }
    }
    /// The seed of the stream.
    pub fn seed(&self) -> [u8; 32] {
        self.seed
    }
    /// The stream number.
    pub fn stream(&self) -> u64 {
        self.stream
    }
    /// A generator at the saved position.
    pub fn restore(&self) -> ChainRng {
        let mut rng = ChainRng::from_seed(self.seed);
        rng.set_stream(self.stream);
        rng.set_word_pos((u128::from(self.word_pos[0]) << 64) | u128::from(self.word_pos[1]));
        rng
    }
}

/// One chain's saved state.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ChainCheckpoint {
    /// Iterations done (warm-up included).
    pub iteration: u64,
    /// Records in the chain's draws file that belong to the run.
    pub records: u64,
    /// The current state.
    pub state: ChainState,
    /// The chain's random stream.
    pub rng: RngState,
    /// The warm-up schedule.
    pub warmup: Warmup,
    /// The step size of the sampling phase (valid once the warm-up is done).
    pub step_size: f64,
    /// Acceptance, divergence and rejection counters.
    pub stats: ChainStats,
    /// Running moments of the kept draws (model space).
    pub moments: Welford,
    /// Whitened positions of the current window of the pooled warm-up (absent from older files).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub window: Vec<Vec<f64>>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn rng_state_round_trips_mid_block() {
        let mut a = ChainRng::seed_from_u64(7);
        a.set_stream(3);
        let _: Vec<u32> = (0..5).map(|_| rand::Rng::next_u32(&mut a)).collect();
        let mut b = RngState::save(&a).restore();
        for _ in 0..100 {
            assert_eq!(rand::Rng::next_u64(&mut a), rand::Rng::next_u64(&mut b));
        }
    }
}
