//! The Lorenz-96 4D-Var cost function J and its gradient by the adjoint of the RK4 step.

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
        let prior = c.dense_prior(scenario.background.clone())?;
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

    /// The background prior N(xb, B) as a dense matrix form.
    pub fn dense_prior(&self) -> &DensePrior {
        &self.prior
    }

    fn split(
        &self,
        x: &[f64],
        grad: Option<&mut [f64]>,
    ) -> std::result::Result<CostSplit, EvalError> {
        let model = self.scenario.config.model;
        let op = self.scenario.config.obs_op;
        let n = model.n;
        check_len("the control vector", x, n)?;
        if let Some(g) = &grad {
            check_len("the gradient buffer", g, n)?;
        }
        let dxb: Vec<f64> = x
            .iter()
            .zip(self.prior.mean())
            .map(|(a, b)| a - b)
            .collect();
        let mut binv_d = vec![0.0; n];
        self.prior.solve(&dxb, &mut binv_d);
        let jb = 0.5 * dxb.iter().zip(&binv_d).map(|(a, b)| a * b).sum::<f64>();
        let traj = model.run(x, self.scenario.config.window);
        let mut jo = 0.0;
        // forcing[k] = ∂Jo/∂x_k
        let mut forcing = vec![vec![0.0; n]; traj.len()];
        for (k, obs) in self.obs_at.iter().enumerate() {
            for &(site, y, w) in obs {
                let xs = traj[k][site];
                let d = y - op.apply(xs);
                jo += 0.5 * w * d * d;
                forcing[k][site] -= w * d * op.derivative(xs);
            }
        }
        if let Some(g) = grad {
            let mut a = forcing[traj.len() - 1].clone();
            for k in (0..traj.len() - 1).rev() {
                a = model.step_adj(&traj[k], &a);
                for i in 0..n {
                    a[i] += forcing[k][i];
                }
            }
            for i in 0..n {
                g[i] = binv_d[i] + a[i];
            }
        }
        Ok(CostSplit {
            background: jb,
            observation: jo,
        })
    }
}

impl Problem for Lorenz96 {
    fn dim(&self) -> usize {
        self.scenario.config.model.n
    }
    fn component_names(&self) -> Option<Vec<String>> {
        Some((0..self.dim()).map(|i| format!("x{i}")).collect())
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
