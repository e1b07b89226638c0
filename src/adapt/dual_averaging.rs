//! Dual-averaging step-size adaptation (Nesterov 2009, as used for MCMC by Hoffman & Gelman 2014).
//!
//! After the m-th iteration with acceptance probability α_m, with target δ:
//!
//! ```text
//! H̄_m      = (1 − 1/(m + t0)) H̄_{m−1} + (δ − α_m) / (m + t0)
//! log ε_m  = μ − √m / γ · H̄_m
//! log ε̄_m  = m^(−κ) log ε_m + (1 − m^(−κ)) log ε̄_{m−1}
//! ```
//!
//! ε_m is the step size for the next warm-up iteration; ε̄ (the averaged iterate) is the step size kept
//! for sampling. Defaults γ = 0.05, t0 = 10, κ = 0.75, μ = log(10 ε0).
//!
//! Reference: Hoffman & Gelman 2014, "The No-U-Turn Sampler", JMLR 15, section 3.2 and Algorithm 5.

use crate::error::{Error, Result};

/// The constants of the controller (Hoffman & Gelman 2014, section 3.2).
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct DualAveragingSettings {
    /// Shrinkage strength γ (default 0.05).
    pub gamma: f64,
    /// Stabilising offset t0 for the early iterations (default 10).
    pub t0: f64,
    /// Decay exponent κ of the averaging weights, in (0.5, 1] (default 0.75).
    pub kappa: f64,
    /// μ = log(mu_factor · ε0): the point the iterates shrink towards (default factor 10).
    pub mu_factor: f64,
}

impl Default for DualAveragingSettings {
    fn default() -> Self {
        DualAveragingSettings {
            gamma: 0.05,
            t0: 10.0,
            kappa: 0.75,
            mu_factor: 10.0,
        }
    }
}

/// The state of the controller.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct DualAveraging {
    settings: DualAveragingSettings,
    target: f64,
    mu: f64,
    m: u64,
    h_bar: f64,
    log_eps: f64,
    log_eps_bar: f64,
}

impl DualAveraging {
    /// Starts at step size `eps0`, aiming at mean acceptance probability `target` in (0, 1).
    pub fn new(eps0: f64, target: f64, settings: DualAveragingSettings) -> Result<Self> {
        if !(eps0.is_finite() && eps0 > 0.0) {
            return Err(Error::Config(format!(
                "initial step size {eps0} must be positive and finite"
            )));
        }
        if !(target > 0.0 && target < 1.0) {
            return Err(Error::Config(format!(
                "target acceptance {target} must lie strictly between 0 and 1"
            )));
        }
        let s = settings;
        if !(s.gamma > 0.0 && s.t0 >= 0.0 && s.kappa > 0.5 && s.kappa <= 1.0 && s.mu_factor > 0.0) {
            return Err(Error::Config(format!(
                "dual-averaging settings {s:?} are out of range (need gamma > 0, t0 >= 0, \
                 0.5 < kappa <= 1, mu_factor > 0)"
            )));
        }
        Ok(DualAveraging {
            settings,
            target,
            mu: (s.mu_factor * eps0).ln(),
            m: 0,
            h_bar: 0.0,
            log_eps: eps0.ln(),
            log_eps_bar: 0.0,
        })
    }

    /// Feeds the acceptance probability of the last iteration (a NaN counts as 0).
    pub fn update(&mut self, accept_prob: f64) {
        let alpha = if accept_prob.is_finite() {
            accept_prob.clamp(0.0, 1.0)
        } else {
            0.0
        };
        let s = &self.settings;
        self.m += 1;
        let m = self.m as f64;
        let w = 1.0 / (m + s.t0);
        self.h_bar = (1.0 - w) * self.h_bar + w * (self.target - alpha);
        self.log_eps = self.mu - m.sqrt() / s.gamma * self.h_bar;
        let eta = m.powf(-s.kappa);
        self.log_eps_bar = eta * self.log_eps + (1.0 - eta) * self.log_eps_bar;
    }

    /// The step size for the next warm-up iteration.
    pub fn current(&self) -> f64 {
        self.log_eps.exp()
    }

    /// The averaged step size, the one to sample with; before any update, the initial step size.
    pub fn averaged(&self) -> f64 {
        if self.m == 0 {
            self.log_eps.exp()
        } else {
            self.log_eps_bar.exp()
        }
    }

    /// Checks a state read from a file: settings in range, a target in (0, 1), at most `max_updates`
    /// updates, finite iterates and positive, finite step sizes. The message names the first bad field.
    pub fn check(&self, max_updates: u64) -> std::result::Result<(), String> {
        let s = &self.settings;
        let finite = [s.gamma, s.t0, s.kappa, s.mu_factor]
            .iter()
            .all(|v| v.is_finite());
        if !(finite
            && s.gamma > 0.0
            && s.t0 >= 0.0
            && s.kappa > 0.5
            && s.kappa <= 1.0
            && s.mu_factor > 0.0)
        {
            return Err(format!("settings {s:?} are out of range"));
        }
        if !(self.target > 0.0 && self.target < 1.0) {
            return Err(format!("target {} is not in (0, 1)", self.target));
        }
        if self.m > max_updates {
            return Err(format!(
                "m is {} updates, more than the {max_updates} warm-up iterations done",
                self.m
            ));
        }
        let fields = [
            ("mu", self.mu),
            ("h_bar", self.h_bar),
            ("log_eps", self.log_eps),
            ("log_eps_bar", self.log_eps_bar),
        ];
        if let Some((name, v)) = fields.iter().find(|(_, v)| !v.is_finite()) {
            return Err(format!("{name} is {v}, not a finite number"));
        }
        if !(self.current().is_normal() && self.averaged().is_normal()) {
            return Err(format!(
                "step sizes {:e} (current) and {:e} (averaged) are not both positive and finite",
                self.current(),
                self.averaged()
            ));
        }
        Ok(())
    }

    /// The target acceptance probability.
    pub fn target(&self) -> f64 {
        self.target
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // A toy acceptance curve α(ε) = exp(−ε²) (monotone in ε); dual averaging must settle where
    // α(ε) = δ, i.e. ε = sqrt(−ln δ). The fixed point of the recursion is E[α] = δ (Hoffman & Gelman
    // 2014, section 3.2); the curve is ours.
    #[test]
    fn settles_where_the_acceptance_curve_meets_the_target() {
        let mut da = DualAveraging::new(1.0, 0.65, DualAveragingSettings::default()).unwrap();
        for _ in 0..3000 {
            let eps = da.current();
            da.update((-eps * eps).exp());
        }
        let want = (-(0.65f64).ln()).sqrt();
        assert!(
            (da.averaged() - want).abs() < 0.01 * want,
            "{} vs {want}",
            da.averaged()
        );
    }

    #[test]
    fn rejects_bad_settings() {
        assert!(DualAveraging::new(0.0, 0.5, DualAveragingSettings::default()).is_err());
        assert!(DualAveraging::new(1.0, 1.0, DualAveragingSettings::default()).is_err());
        let bad = DualAveragingSettings {
            kappa: 0.3,
            ..Default::default()
        };
        assert!(DualAveraging::new(1.0, 0.5, bad).is_err());
    }
}
