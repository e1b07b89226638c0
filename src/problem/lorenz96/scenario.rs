//! Synthetic Lorenz-96 scenarios: the truth run, the background and the observations drawn from a seed.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

use super::config::{Lorenz96Config, SynthMode};
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
}

/// n independent standard normal draws.
pub(crate) fn normal_draws(rng: &mut ChaCha8Rng, n: usize) -> Vec<f64> {
    (0..n).map(|_| StandardNormal.sample(rng)).collect()
}

impl Scenario {
    /// Generates a synthetic scenario from its settings and seed (see [`SynthMode`]).
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
        let (background, truth0) = match config.synth {
            SynthMode::Demo => ((0..n).map(|i| x[i] + eb[i]).collect::<Vec<_>>(), x),
            SynthMode::Calibration => {
                let xb: Vec<f64> = (0..n).map(|i| x[i] + eb[i]).collect();
                let et = sqrt_draw(&mut rng);
                let t = (0..n).map(|i| xb[i] + et[i]).collect();
                (xb, t)
            }
        };
        let truth = model.run(&truth0, config.window);
        if let Some(k) = truth.iter().position(|x| x.iter().any(|v| !v.is_finite())) {
            return Err(Error::Config(format!(
                "settings dt={} and forcing={}: the truth run blew up (non-finite state at step {k} \
                 of the window); use a smaller dt (0.05 is the standard step for forcing 8)",
                model.dt, model.forcing
            )));
        }
        let mut observations = Vec::new();
        let mut step = config.obs_every;
        while step <= config.window {
            for site in (0..n).step_by(config.obs_stride) {
                let z: f64 = StandardNormal.sample(&mut rng);
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
        Ok(Scenario {
            config: config.clone(),
            background,
            observations,
            truth: Some(truth),
        })
    }
}
