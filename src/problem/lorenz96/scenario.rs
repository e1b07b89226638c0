//! Synthetic Lorenz-96 scenarios: the truth run, the background and the observations drawn from a seed.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::config::{Lorenz96Config, SynthMode};
use super::model::Lorenz96Model;
use super::obs::Observation;
use crate::error::{Error, Result};
use crate::problem::prior::Prior;

/// A complete Lorenz-96 4D-Var scenario: settings, background, observations, and the truth where known.
#[derive(Debug, Clone)]
pub struct Scenario {
    pub config: Lorenz96Config,
    pub background: Vec<f64>,
    pub observations: Vec<Observation>,
    /// The true trajectory over the window (steps 0..=window), where the scenario is synthetic.
    pub truth: Option<Vec<Vec<f64>>>,
    /// The forcing F of the truth run, where the truth is known: the setting `forcing`, except with
    /// `synth=calibration` and the forcing estimated, where it is a draw from the forcing prior.
    pub truth_forcing: Option<f64>,
}

/// n independent standard normal draws.
pub(crate) fn normal_draws(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

impl Scenario {
    /// Generates a synthetic scenario from its settings and seed (see [`SynthMode`]).
    ///
    /// With the forcing estimated, `synth=demo` runs the truth with F = `forcing` (the prior mean
    /// `forcing_prior_mean` defaults to the same value); `synth=calibration` draws the truth's F from
    /// N(F_b, σ_F²) after the truth's x0, so that (x0, F) is a draw from the joint prior.
    pub fn synthesize(config: &Lorenz96Config) -> Result<Self> {
        config.validate()?;
        let model = config.model;
        let n = model.n;
        let prior = config.dense_prior(vec![0.0; n])?;
        let mut rng = ChaCha8Rng::seed_from_u64(config.seed);
        // Spin-up from rest plus a small seeded perturbation, onto the attractor.
        let mut x: Vec<f64> = normal_draws(&mut rng, n)
            .iter()
            .map(|z| model.forcing + 0.01 * z)
            .collect();
        for _ in 0..config.spinup {
            x = model.step(&x);
        }
        let sqrt_draw = |rng: &mut ChaCha8Rng| {
            let z = normal_draws(rng, n);
            let mut e = vec![0.0; n];
            prior.mul_sqrt(&z, &mut e);
            e
        };
        let eb = sqrt_draw(&mut rng);
        let (background, truth0, truth_f) = match config.synth {
            SynthMode::Demo => {
                let xb = (0..n).map(|i| x[i] + eb[i]).collect::<Vec<_>>();
                (xb, x, model.forcing)
            }
            SynthMode::Calibration => {
                let xb: Vec<f64> = (0..n).map(|i| x[i] + eb[i]).collect();
                let et = sqrt_draw(&mut rng);
                let t = (0..n).map(|i| xb[i] + et[i]).collect();
                let f = match config.forcing_prior {
                    None => model.forcing,
                    Some(fp) => fp.mean + fp.sd * normal_draws(&mut rng, 1)[0],
                };
                (xb, t, f)
            }
        };
        let truth = truth_run(config, &truth0, truth_f)?;
        let observations = observe(config, &truth, &mut rng);
        Ok(Scenario {
            config: config.clone(),
            background,
            observations,
            truth: Some(truth),
            truth_forcing: Some(truth_f),
        })
    }

    /// The truth in control-vector form, where known: x0, followed by the truth's F when the forcing
    /// is estimated.
    pub fn truth_control(&self) -> Option<Vec<f64>> {
        let mut t = self.truth.as_ref()?.first()?.clone();
        if self.config.forcing_prior.is_some() {
            t.push(self.truth_forcing.unwrap_or(self.config.model.forcing));
        }
        Some(t)
    }
}

/// The truth trajectory over the window from x0 with forcing `f`; refuses a run that blows up.
fn truth_run(config: &Lorenz96Config, x0: &[f64], f: f64) -> Result<Vec<Vec<f64>>> {
    let model = Lorenz96Model {
        forcing: f,
        ..config.model
    };
    let truth = model.run(x0, config.window);
    if let Some(k) = truth.iter().position(|x| x.iter().any(|v| !v.is_finite())) {
        let drawn = match f == config.model.forcing {
            true => String::new(),
            false => format!(" (with the truth's forcing {f} drawn from its prior)"),
        };
        return Err(Error::Config(format!(
            "settings dt={} and forcing={}: the truth run{drawn} blew up (non-finite state at step {k} \
             of the window); use a smaller dt (0.05 is the standard step for forcing 8)",
            model.dt, config.model.forcing
        )));
    }
    Ok(truth)
}

/// Observations of h(truth) every `obs_every` steps at every `obs_stride`-th site, with N(0, σ_o²) noise.
fn observe(config: &Lorenz96Config, truth: &[Vec<f64>], rng: &mut ChaCha8Rng) -> Vec<Observation> {
    let mut observations = Vec::new();
    let mut step = config.obs_every;
    while step <= config.window {
        for site in (0..config.model.n).step_by(config.obs_stride) {
            let z: f64 = StandardNormal.sample(rng);
            let value = config.obs_op.apply(truth[step][site]) + config.sigma_o * z;
            observations.push(Observation {
                step,
                site,
                value,
                sigma: config.sigma_o,
            });
        }
        step += config.obs_every;
    }
    observations
}
