//! The consistency checks of a decoded checkpoint. The checksum guards against corruption, not against
//! a well-formed file whose numbers do not fit together (edited by hand, written by a faulty build):
//! every vector must have the run's dimension, every step size must be positive and finite, and the
//! iteration and record counts must fit the run's settings and each other. Each refusal names the field
//! (`chains[1].moments: mean has 2 entries, expected 3`), so that no resumed run panics or quietly
//! continues from a wrong state.

use rand::SeedableRng;

use super::Checkpoint;
use crate::sampler::state::{ChainCheckpoint, PhaseStats};
use crate::sampler::ChainRng;

/// What every chain of the run must agree with.
struct Expect {
    dim: usize,
    /// Where the warm-up ends.
    warmup: u64,
    /// The warm-up's longest length (the schedule's `total`).
    warmup_max: u64,
    thin: u64,
    total: u64,
    uses_gradient: bool,
    seed: [u8; 32],
}

/// Checks a decoded checkpoint; the message names the first inconsistent field.
pub(super) fn validate(ck: &Checkpoint) -> Result<(), String> {
    if ck.dim == 0 {
        return Err("dim is 0".into());
    }
    let config = &ck.config;
    let kernel = config.build_kernel().map_err(|e| format!("config: {e}"))?;
    if ck.chains.len() != config.chains {
        return Err(format!(
            "chains: the file holds {} chains, its settings (config.chains) ask for {}",
            ck.chains.len(),
            config.chains
        ));
    }
    if let Some(p) = &ck.plan {
        p.check(config.warmup, ck.dim)
            .map_err(|m| format!("plan: {m}"))?;
    }
    let warmup = ck.plan.as_ref().map_or(config.warmup, |p| p.end);
    let expect = Expect {
        dim: ck.dim,
        warmup,
        warmup_max: config.warmup,
        thin: config.thin,
        total: warmup
            + config
                .draws
                .saturating_add(ck.extra_draws)
                .saturating_mul(config.thin),
        uses_gradient: kernel.spec(ck.dim).uses_gradient,
        seed: ChainRng::seed_from_u64(config.seed).get_seed(),
    };
    for (c, chain) in ck.chains.iter().enumerate() {
        check_chain(c, chain, &expect).map_err(|m| format!("chains[{c}].{m}"))?;
        if ck.complete && chain.iteration != expect.total {
            return Err(format!(
                "complete is true, but chains[{c}].iteration is {} of {}",
                chain.iteration, expect.total
            ));
        }
    }
    Ok(())
}

/// Checks chain `c`; the message starts with the field's name within the chain.
fn check_chain(c: usize, ch: &ChainCheckpoint, e: &Expect) -> Result<(), String> {
    if ch.iteration > e.total {
        return Err(format!(
            "iteration is {}, beyond the run's {} iterations (warm-up and draws × thin, extensions \
             included)",
            ch.iteration, e.total
        ));
    }
    let in_warmup = ch.iteration.min(e.warmup);
    let kept = (ch.iteration - in_warmup) / e.thin;
    if ch.records != kept {
        return Err(format!(
            "records is {}, but {} iterations with a warm-up of {} and thin {} keep {kept} draws",
            ch.records, ch.iteration, e.warmup, e.thin
        ));
    }
    ch.moments
        .check(e.dim)
        .map_err(|m| format!("moments: {m}"))?;
    if ch.moments.count() != ch.records {
        return Err(format!(
            "moments: n is {}, but the chain has kept {} draws",
            ch.moments.count(),
            ch.records
        ));
    }
    check_phase(&ch.stats.warmup, in_warmup).map_err(|m| format!("stats.warmup.{m}"))?;
    check_phase(&ch.stats.sampling, ch.iteration - in_warmup)
        .map_err(|m| format!("stats.sampling.{m}"))?;
    check_state(ch, e).map_err(|m| format!("state.{m}"))?;
    if !(ch.step_size.is_finite() && ch.step_size > 0.0) {
        return Err(format!(
            "step_size is {}, not positive and finite",
            ch.step_size
        ));
    }
    if ch
        .window
        .iter()
        .any(|u| u.len() != e.dim || !u.iter().all(|v| v.is_finite()))
    {
        return Err("window: a position has the wrong length or a non-finite entry".into());
    }
    ch.warmup
        .check(e.dim, e.warmup_max, in_warmup)
        .map_err(|m| format!("warmup: {m}"))?;
    if ch.rng.seed() != e.seed || ch.rng.stream() != c as u64 {
        return Err(format!(
            "rng: the random stream is not chain {c}'s stream of the run's seed (stream {})",
            ch.rng.stream()
        ));
    }
    Ok(())
}

/// The counters of a phase in which `iterations` iterations were done.
fn check_phase(p: &PhaseStats, iterations: u64) -> Result<(), String> {
    if p.iterations != iterations {
        return Err(format!(
            "iterations is {}, expected {iterations}",
            p.iterations
        ));
    }
    let counts = [
        ("accepted", p.accepted),
        ("divergences", p.divergences),
        ("rejected_nonfinite", p.rejected_nonfinite),
    ];
    if let Some((name, v)) = counts.iter().find(|(_, v)| *v > iterations) {
        return Err(format!(
            "{name} is {v}, more than the {iterations} iterations"
        ));
    }
    let sum = p.accept_prob_sum;
    if !(sum >= 0.0 && sum <= iterations as f64) {
        return Err(format!(
            "accept_prob_sum is {sum}, not between 0 and the {iterations} iterations"
        ));
    }
    Ok(())
}

/// The chain's position, log-density and gradient.
fn check_state(ch: &ChainCheckpoint, e: &Expect) -> Result<(), String> {
    let s = &ch.state;
    let grad_len = if e.uses_gradient { e.dim } else { 0 };
    for (name, v, len) in [("u", &s.u, e.dim), ("grad", &s.grad, grad_len)] {
        if v.len() != len {
            return Err(format!("{name} has {} entries, expected {len}", v.len()));
        }
        if let Some(i) = v.iter().position(|x| !x.is_finite()) {
            return Err(format!("{name}[{i}] is {}, not a finite number", v[i]));
        }
    }
    if !s.log_density.is_finite() {
        return Err(format!(
            "log_density is {}, not a finite number",
            s.log_density
        ));
    }
    Ok(())
}
