//! Strong-constraint 4D-Var on the Lorenz-96 model.
//!
//! Model (Lorenz 1996, "Predictability: a problem partly solved"): dx_i/dt = (x_{i+1} − x_{i−2}) x_{i−1}
//! − x_i + F on a ring of N sites, integrated with the classical fourth-order Runge–Kutta scheme. The
//! defaults N = 40, F = 8, dt = 0.05 (taken as 6 hours, Lorenz & Emanuel 1998) are the standard setting.
//!
//! Cost over the control vector x0 (the state at the start of the window):
//! J(x0) = ½ (x0 − xb)ᵀ B⁻¹ (x0 − xb) + ½ Σ_k Σ_s (y_{k,s} − h(x_k[s]))² / σ_{k,s}²,
//! with x_k = M_k(x0) the model state after k steps, h the observation operator (identity, or the square
//! x² where the posterior stops being Gaussian), B a SOAR correlation on the ring times σ_b², and a
//! diagonal R. The gradient comes from the hand-written adjoint of the RK4 step (tangent-linear and
//! adjoint are tested against each other and against finite differences).
//!
//! With `estimate_forcing=true` the control vector is [x0; F]: the forcing is estimated with the
//! initial state under its own Gaussian prior, independent of B (see `forcing`).
//!
//! Files: `model` (tendency, RK4 step, tangent-linear, adjoint), `obs` (observations and h), `config`
//! (settings, ranges, memory, B), `forcing` (the forcing prior), `scenario` (synthetic truth, background
//! and observations), `files` (scenario folders), `cost` (J and its gradient).

mod config;
mod cost;
mod files;
mod forcing;
mod model;
mod obs;
mod scenario;

pub use config::{Lorenz96Config, SynthMode, MAX_SPINUP};
pub use cost::Lorenz96;
pub use forcing::{ForcingPrior, DEFAULT_FORCING_PRIOR_SD};
pub use model::Lorenz96Model;
pub use obs::{ObsOperator, Observation};
pub(crate) use scenario::normal_draws;
pub use scenario::Scenario;

/// Describes the problem for summaries: the model, the window, the observation operator, and the
/// forcing prior where the forcing is estimated.
pub fn describe(c: &Lorenz96Config) -> String {
    let forcing = match c.forcing_prior {
        None => String::new(),
        Some(p) => format!(", F estimated with prior N({}, {}^2)", p.mean, p.sd),
    };
    format!(
        "Lorenz-96, n = {}, F = {}, dt = {}, window {} steps, observation operator {}{forcing}",
        c.model.n,
        c.model.forcing,
        c.model.dt,
        c.window,
        c.obs_op.name()
    )
}

#[cfg(test)]
mod tests;
