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

mod config;
mod cost;
mod files;
mod model;
mod obs;
mod scenario;

pub use config::{Lorenz96Config, SynthMode, MAX_SPINUP};
pub use cost::Lorenz96;
pub use model::Lorenz96Model;
pub use obs::{ObsOperator, Observation};
pub(crate) use scenario::normal_draws;
pub use scenario::Scenario;

/// Describes the observation operator for summaries.
pub fn describe(c: &Lorenz96Config) -> String {
    format!(
        "Lorenz-96, n = {}, F = {}, dt = {}, window {} steps, observation operator {}",
        c.model.n,
        c.model.forcing,
        c.model.dt,
        c.window,
        c.obs_op.name()
    )
}
