//! The Lorenz-96 4D-Var cost function J and its gradient by the adjoint of the RK4 step, over the
//! control vector x0 or, with the forcing estimated, [x0; F].

use super::model::Lorenz96Model;
use super::scenario::Scenario;
use crate::error::{EvalError, Result};
use crate::problem::batch::parallel_costs;
use crate::problem::prior::{DensePrior, Prior};
use crate::problem::{check_len, CostSplit, Problem};

/// The Lorenz-96 4D-Var cost function.
pub struct Lorenz96 {
    scenario: Scenario,
    prior: DensePrior,
    /// Observations grouped by step: obs_at[k] lists (site, value, 1/σ²).
    obs_at: Vec<Vec<(usize, f64, f64)>>,
}

impl Lorenz96 {
    /// The cost function of a scenario.
    pub fn new(scenario: Scenario) -> Result<Self> {
        let c = &scenario.config;
        c.validate()?;
        let prior = c.control_prior(scenario.background.clone())?;
        let mut obs_at = vec![Vec::new(); c.window + 1];
        for o in &scenario.observations {
            obs_at[o.step].push((o.site, o.value, 1.0 / (o.sigma * o.sigma)));
        }
        Ok(Lorenz96 {
            scenario,
            prior,
            obs_at,
        })
    }

    /// The scenario the cost was built from.
    pub fn scenario(&self) -> &Scenario {
        &self.scenario
    }

    /// The prior of the control vector as a dense matrix form: N(xb, B), or with the forcing estimated
    /// N([xb; F_b], diag(B, σ_F²)).
    pub fn dense_prior(&self) -> &DensePrior {
        &self.prior
    }

    fn split(
        &self,
        u: &[f64],
        grad: Option<&mut [f64]>,
    ) -> std::result::Result<CostSplit, EvalError> {
        let config = &self.scenario.config;
        let op = config.obs_op;
        let n = config.model.n;
        let dim = config.control_dim();
        check_len("the control vector", u, dim)?;
        if let Some(g) = &grad {
            check_len("the gradient buffer", g, dim)?;
        }
        // With the forcing estimated, u = [x0; F] and the model runs with that F.
        let model = match config.forcing_prior {
            Some(_) => Lorenz96Model {
                forcing: u[n],
                ..config.model
            },
            None => config.model,
        };
        let x = &u[..n];
        let dxb: Vec<f64> = u
            .iter()
            .zip(self.prior.mean())
            .map(|(a, b)| a - b)
            .collect();
        let mut binv_d = vec![0.0; dim];
        self.prior.solve(&dxb, &mut binv_d);
        let jb = 0.5 * dxb.iter().zip(&binv_d).map(|(a, b)| a * b).sum::<f64>();
        let traj = model.run(x, config.window);
        let mut jo = 0.0;
        // The adjoint forcing (not the model's F): src[k] = ∂Jo/∂x_k.
        let mut src = vec![vec![0.0; n]; traj.len()];
        for (k, obs) in self.obs_at.iter().enumerate() {
            for &(site, y, w) in obs {
                let xs = traj[k][site];
                let d = y - op.apply(xs);
                jo += 0.5 * w * d * d;
                src[k][site] -= w * d * op.derivative(xs);
            }
        }
        if let Some(g) = grad {
            let (a, af) = self.adjoint(&model, &traj, &src);
            for i in 0..n {
                g[i] = binv_d[i] + a[i];
            }
            if dim > n {
                g[n] = binv_d[n] + af;
            }
        }
        Ok(CostSplit {
            background: jb,
            observation: jo,
        })
    }

    /// The adjoint run backwards over the window: ∂Jo/∂x0 and, with the forcing estimated, ∂Jo/∂F, the
    /// sum over the steps of the step adjoint's F part (zero when F is fixed).
    fn adjoint(
        &self,
        model: &Lorenz96Model,
        traj: &[Vec<f64>],
        src: &[Vec<f64>],
    ) -> (Vec<f64>, f64) {
        let n = model.n;
        let with_f = self.scenario.config.forcing_prior.is_some();
        let mut a = src[traj.len() - 1].clone();
        let mut af = 0.0;
        for k in (0..traj.len() - 1).rev() {
            a = match with_f {
                true => {
                    let (ax, f) = model.step_adj_forcing(&traj[k], &a);
                    af += f;
                    ax
                }
                false => model.step_adj(&traj[k], &a),
            };
            for i in 0..n {
                a[i] += src[k][i];
            }
        }
        (a, af)
    }
}

impl Problem for Lorenz96 {
    fn dim(&self) -> usize {
        self.scenario.config.control_dim()
    }
    /// x0 … x{n−1}, and "F" for the forcing when it is estimated.
    fn component_names(&self) -> Option<Vec<String>> {
        let n = self.scenario.config.model.n;
        let mut names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
        if self.dim() > n {
            names.push("F".into());
        }
        Some(names)
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let s = self.split(x, Some(grad))?;
        Ok(s.background + s.observation)
    }
    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        let s = self.split(x, None)?;
        Ok(s.background + s.observation)
    }
    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        Ok(Some(self.split(x, None)?))
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<std::result::Result<f64, EvalError>> {
        parallel_costs(self, xs)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        Some(&self.prior)
    }
}
