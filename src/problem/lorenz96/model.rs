//! The Lorenz-96 model (Lorenz 1996, "Predictability: a problem partly solved"): the tendency, the
//! classical fourth-order Runge–Kutta step, its tangent-linear and its adjoint, with the derivatives
//! with respect to the forcing F that joint estimation of the state and F needs.

/// The Lorenz-96 model with an RK4 step, its tangent-linear and its adjoint.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Lorenz96Model {
    /// Number of sites on the ring.
    pub n: usize,
    /// Forcing F.
    pub forcing: f64,
    /// Time step (0.05 ≈ 6 hours).
    pub dt: f64,
}

impl Default for Lorenz96Model {
    fn default() -> Self {
        Lorenz96Model {
            n: 40,
            forcing: 8.0,
            dt: 0.05,
        }
    }
}

/// The three intermediate RK4 stage states of one step, kept for the tangent-linear and adjoint.
struct Stages {
    x: Vec<f64>,
    x2: Vec<f64>,
    x3: Vec<f64>,
    x4: Vec<f64>,
}

impl Lorenz96Model {
    fn tendency(&self, x: &[f64], out: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let ip1 = x[(i + 1) % n];
            let im1 = x[(i + n - 1) % n];
            let im2 = x[(i + n - 2) % n];
            out[i] = (ip1 - im2) * im1 - x[i] + self.forcing;
        }
    }

    /// d f(x) applied to dx.
    fn tendency_tl(&self, x: &[f64], dx: &[f64], out: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let (ip1, im1, im2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
            out[i] = (dx[ip1] - dx[im2]) * x[im1] + (x[ip1] - x[im2]) * dx[im1] - dx[i];
        }
    }

    /// Adds (d f(x))ᵀ a to acc.
    fn tendency_adj(&self, x: &[f64], a: &[f64], acc: &mut [f64]) {
        let n = self.n;
        for i in 0..n {
            let (ip1, im1, im2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
            acc[ip1] += a[i] * x[im1];
            acc[im2] -= a[i] * x[im1];
            acc[im1] += a[i] * (x[ip1] - x[im2]);
            acc[i] -= a[i];
        }
    }

    fn stages(&self, x: &[f64]) -> (Stages, Vec<f64>) {
        let n = self.n;
        let h = self.dt;
        let mut k1 = vec![0.0; n];
        let mut k2 = vec![0.0; n];
        let mut k3 = vec![0.0; n];
        let mut k4 = vec![0.0; n];
        self.tendency(x, &mut k1);
        let x2: Vec<f64> = (0..n).map(|i| x[i] + 0.5 * h * k1[i]).collect();
        self.tendency(&x2, &mut k2);
        let x3: Vec<f64> = (0..n).map(|i| x[i] + 0.5 * h * k2[i]).collect();
        self.tendency(&x3, &mut k3);
        let x4: Vec<f64> = (0..n).map(|i| x[i] + h * k3[i]).collect();
        self.tendency(&x4, &mut k4);
        let next = (0..n)
            .map(|i| x[i] + h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]))
            .collect();
        (
            Stages {
                x: x.to_vec(),
                x2,
                x3,
                x4,
            },
            next,
        )
    }

    /// One RK4 step.
    pub fn step(&self, x: &[f64]) -> Vec<f64> {
        self.stages(x).1
    }

    /// The tangent-linear of one RK4 step at x, applied to dx.
    pub fn step_tl(&self, x: &[f64], dx: &[f64]) -> Vec<f64> {
        let (s, _) = self.stages(x);
        self.step_tl_stages(&s, dx, 0.0)
    }

    /// The tangent-linear of one RK4 step at (x, F) with respect to both, applied to (dx, dF): the
    /// forcing enters every stage's tendency (∂f/∂F = 1 at every site), so dF is added to each of the
    /// four stage increments.
    pub fn step_tl_forcing(&self, x: &[f64], dx: &[f64], df: f64) -> Vec<f64> {
        let (s, _) = self.stages(x);
        self.step_tl_stages(&s, dx, df)
    }

    /// Adds dF (∂f/∂F times the forcing increment) to a stage increment.
    fn add_forcing(d: &mut [f64], df: f64) {
        if df != 0.0 {
            d.iter_mut().for_each(|v| *v += df);
        }
    }

    fn step_tl_stages(&self, s: &Stages, dx: &[f64], df: f64) -> Vec<f64> {
        let n = self.n;
        let h = self.dt;
        let mut d1 = vec![0.0; n];
        let mut d2 = vec![0.0; n];
        let mut d3 = vec![0.0; n];
        let mut d4 = vec![0.0; n];
        self.tendency_tl(&s.x, dx, &mut d1);
        Self::add_forcing(&mut d1, df);
        let w2: Vec<f64> = (0..n).map(|i| dx[i] + 0.5 * h * d1[i]).collect();
        self.tendency_tl(&s.x2, &w2, &mut d2);
        Self::add_forcing(&mut d2, df);
        let w3: Vec<f64> = (0..n).map(|i| dx[i] + 0.5 * h * d2[i]).collect();
        self.tendency_tl(&s.x3, &w3, &mut d3);
        Self::add_forcing(&mut d3, df);
        let w4: Vec<f64> = (0..n).map(|i| dx[i] + h * d3[i]).collect();
        self.tendency_tl(&s.x4, &w4, &mut d4);
        Self::add_forcing(&mut d4, df);
        (0..n)
            .map(|i| dx[i] + h / 6.0 * (d1[i] + 2.0 * d2[i] + 2.0 * d3[i] + d4[i]))
            .collect()
    }

    /// The adjoint of one RK4 step at x, applied to a (the adjoint of the step's output).
    pub fn step_adj(&self, x: &[f64], a: &[f64]) -> Vec<f64> {
        let (s, _) = self.stages(x);
        self.step_adj_stages(&s, a).0
    }

    /// The adjoint of one RK4 step at (x, F) with respect to both, applied to a: returns the adjoint of
    /// x and the adjoint of F. The latter sums, over the four stages, the adjoint of each stage's
    /// tendency contracted with ∂f/∂F = (1, …, 1).
    pub fn step_adj_forcing(&self, x: &[f64], a: &[f64]) -> (Vec<f64>, f64) {
        let (s, _) = self.stages(x);
        self.step_adj_stages(&s, a)
    }

    fn step_adj_stages(&self, s: &Stages, a: &[f64]) -> (Vec<f64>, f64) {
        let n = self.n;
        let h = self.dt;
        let mut ax = a.to_vec();
        let a_k4: Vec<f64> = a.iter().map(|v| h / 6.0 * v).collect();
        let mut a_k3: Vec<f64> = a.iter().map(|v| h / 3.0 * v).collect();
        let mut a_k2: Vec<f64> = a_k3.clone();
        let mut a_k1: Vec<f64> = a_k4.clone();
        // F adds 1 at every site of every stage tendency, so its adjoint is the sum of the adjoints
        // of the four tendencies (each taken once complete).
        let sum = |v: &[f64]| v.iter().sum::<f64>();
        let mut af = sum(&a_k4);
        // k4 = f'(x4) (dx + h k3)
        let mut a_w = vec![0.0; n];
        self.tendency_adj(&s.x4, &a_k4, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k3[i] += h * a_w[i];
        }
        // k3 = f'(x3) (dx + h/2 k2)
        af += sum(&a_k3);
        a_w.iter_mut().for_each(|v| *v = 0.0);
        self.tendency_adj(&s.x3, &a_k3, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k2[i] += 0.5 * h * a_w[i];
        }
        // k2 = f'(x2) (dx + h/2 k1)
        af += sum(&a_k2);
        a_w.iter_mut().for_each(|v| *v = 0.0);
        self.tendency_adj(&s.x2, &a_k2, &mut a_w);
        for i in 0..n {
            ax[i] += a_w[i];
            a_k1[i] += 0.5 * h * a_w[i];
        }
        // k1 = f'(x) dx
        af += sum(&a_k1);
        self.tendency_adj(&s.x, &a_k1, &mut ax);
        (ax, af)
    }

    /// The trajectory x_0 … x_steps from x0.
    pub fn run(&self, x0: &[f64], steps: usize) -> Vec<Vec<f64>> {
        let mut traj = Vec::with_capacity(steps + 1);
        traj.push(x0.to_vec());
        for k in 0..steps {
            let next = self.step(&traj[k]);
            traj.push(next);
        }
        traj
    }
}
