#!/usr/bin/env python3
"""Lorenz-96 strong-constraint 4D-Var served to varpost: an example of wrapping a model in Python.

With its defaults this is the same cost function as varpost's built-in `lorenz96` problem on the shipped
demo scenario (it reads the same files, demo-data/lorenz96), so

    varpost check --adapter "python3 adapters/python/lorenz96.py" --out DIR
    varpost check --problem lorenz96 --out DIR

test the same gradient. Standard library only.

Model (Lorenz 1996): dx_i/dt = (x_{i+1} - x_{i-2}) x_{i-1} - x_i + F on a ring, one classical RK4 step of
length dt per model step. Cost over the initial state x:
    J(x) = 1/2 (x - xb)^T B^-1 (x - xb) + 1/2 sum_k sum_s (y_ks - h(x_k[s]))^2 / sigma_ks^2,
B = sigma_b^2 times a SOAR correlation (1 + d/L) exp(-d/L) in the distance d along the ring, h the
identity or the square. The gradient is the hand-written adjoint of the RK4 step.

Options: --data DIR (a scenario folder: scenario.json, background.csv, observations.csv),
--obs-op linear|square (overrides the scenario's observation operator).
"""

import argparse
import csv
import json
import math
import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
import varpost_adapter as va  # noqa: E402

DEFAULT_DATA = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "demo-data", "lorenz96")


class Model:
    def __init__(self, n, forcing, dt):
        self.n, self.forcing, self.dt = n, forcing, dt

    def tendency(self, x):
        n = self.n
        return [(x[(i + 1) % n] - x[(i + n - 2) % n]) * x[(i + n - 1) % n] - x[i] + self.forcing
                for i in range(n)]

    def tendency_adj(self, x, a, acc):
        """Adds (df(x))^T a to acc."""
        n = self.n
        for i in range(n):
            ip1, im1, im2 = (i + 1) % n, (i + n - 1) % n, (i + n - 2) % n
            acc[ip1] += a[i] * x[im1]
            acc[im2] -= a[i] * x[im1]
            acc[im1] += a[i] * (x[ip1] - x[im2])
            acc[i] -= a[i]

    def stages(self, x):
        h, n = self.dt, self.n
        k1 = self.tendency(x)
        x2 = [x[i] + 0.5 * h * k1[i] for i in range(n)]
        k2 = self.tendency(x2)
        x3 = [x[i] + 0.5 * h * k2[i] for i in range(n)]
        k3 = self.tendency(x3)
        x4 = [x[i] + h * k3[i] for i in range(n)]
        k4 = self.tendency(x4)
        nxt = [x[i] + h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]) for i in range(n)]
        return (list(x), x2, x3, x4), nxt

    def step(self, x):
        return self.stages(x)[1]

    def step_adj(self, x, a):
        """The adjoint of one RK4 step at x applied to a."""
        (s1, s2, s3, s4), _ = self.stages(x)
        h, n = self.dt, self.n
        ax = list(a)
        a_k4 = [h / 6.0 * v for v in a]
        a_k3 = [h / 3.0 * v for v in a]
        a_k2 = list(a_k3)
        a_k1 = list(a_k4)
        a_w = [0.0] * n
        self.tendency_adj(s4, a_k4, a_w)
        for i in range(n):
            ax[i] += a_w[i]
            a_k3[i] += h * a_w[i]
        a_w = [0.0] * n
        self.tendency_adj(s3, a_k3, a_w)
        for i in range(n):
            ax[i] += a_w[i]
            a_k2[i] += 0.5 * h * a_w[i]
        a_w = [0.0] * n
        self.tendency_adj(s2, a_k2, a_w)
        for i in range(n):
            ax[i] += a_w[i]
            a_k1[i] += 0.5 * h * a_w[i]
        self.tendency_adj(s1, a_k1, ax)
        return ax

    def run(self, x0, steps):
        traj = [list(x0)]
        for _ in range(steps):
            traj.append(self.step(traj[-1]))
        return traj


def cholesky(a):
    """Lower Cholesky factor of a symmetric positive definite matrix (list of rows)."""
    n = len(a)
    lo = [[0.0] * n for _ in range(n)]
    for j in range(n):
        s = a[j][j] - sum(lo[j][k] * lo[j][k] for k in range(j))
        if s <= 0.0:
            raise ValueError("B is not positive definite")
        lo[j][j] = math.sqrt(s)
        for i in range(j + 1, n):
            lo[i][j] = (a[i][j] - sum(lo[i][k] * lo[j][k] for k in range(j))) / lo[j][j]
    return lo


def solve_lower(lo, b):
    n = len(b)
    x = [0.0] * n
    for i in range(n):
        x[i] = (b[i] - sum(lo[i][k] * x[k] for k in range(i))) / lo[i][i]
    return x


def solve_lower_t(lo, b):
    n = len(b)
    x = [0.0] * n
    for i in reversed(range(n)):
        x[i] = (b[i] - sum(lo[k][i] * x[k] for k in range(i + 1, n))) / lo[i][i]
    return x


class Lorenz96:
    def __init__(self, data_dir, obs_op=None):
        with open(os.path.join(data_dir, "scenario.json")) as f:
            cfg = json.load(f)["config"]
        m = cfg["model"]
        self.model = Model(int(m["n"]), float(m["forcing"]), float(m["dt"]))
        self.window = int(cfg["window"])
        self.obs_op = obs_op or cfg["obs_op"]
        if self.obs_op not in ("linear", "square"):
            raise SystemExit("unknown observation operator %r: use linear or square" % self.obs_op)
        n = self.model.n
        self.xb = [math.nan] * n
        with open(os.path.join(data_dir, "background.csv")) as f:
            for row in csv.DictReader(f):
                self.xb[int(row["site"])] = float(row["value"])
        self.obs_at = [[] for _ in range(self.window + 1)]
        with open(os.path.join(data_dir, "observations.csv")) as f:
            for row in csv.DictReader(f):
                sigma = float(row["sigma"])
                self.obs_at[int(row["step"])].append((int(row["site"]), float(row["value"]), 1.0 / (sigma * sigma)))
        sb, corr = float(cfg["sigma_b"]), float(cfg["corr_len"])
        b = [[0.0] * n for _ in range(n)]
        for i in range(n):
            for j in range(n):
                d = abs(i - j)
                d = min(d, n - d) / corr
                b[i][j] = sb * sb * (1.0 + d) * math.exp(-d)
        self.var = [b[i][i] for i in range(n)]
        self.chol = cholesky(b)
        self.log_det = sum(2.0 * math.log(self.chol[i][i]) for i in range(n))

    def h(self, x):
        return x if self.obs_op == "linear" else x * x

    def dh(self, x):
        return 1.0 if self.obs_op == "linear" else 2.0 * x

    def evaluate(self, x, want_grad):
        n = self.model.n
        dxb = [a - b for a, b in zip(x, self.xb)]
        binv_d = solve_lower_t(self.chol, solve_lower(self.chol, dxb))
        jb = 0.5 * sum(a * b for a, b in zip(dxb, binv_d))
        traj = self.model.run(x, self.window)
        jo = 0.0
        forcing = [[0.0] * n for _ in traj]
        for k, obs in enumerate(self.obs_at):
            for site, y, w in obs:
                xs = traj[k][site]
                d = y - self.h(xs)
                jo += 0.5 * w * d * d
                forcing[k][site] -= w * d * self.dh(xs)
        if not want_grad:
            return jb, jo, None
        a = list(forcing[-1])
        for k in reversed(range(len(traj) - 1)):
            a = self.model.step_adj(traj[k], a)
            for i in range(n):
                a[i] += forcing[k][i]
        return jb, jo, [binv_d[i] + a[i] for i in range(n)]

    def cost_grad(self, x):
        jb, jo, g = self.evaluate(x, True)
        return jb + jo, g

    def cost(self, x):
        jb, jo, _ = self.evaluate(x, False)
        return jb + jo

    def split(self, x):
        jb, jo, _ = self.evaluate(x, False)
        return jb, jo

    def prior(self):
        lo, n = self.chol, self.model.n
        return va.Prior(
            self.xb, self.var, self.log_det,
            b_half=lambda z: [sum(lo[i][k] * z[k] for k in range(i + 1)) for i in range(n)],
            b_half_t=lambda v: [sum(lo[k][i] * v[k] for k in range(i, n)) for i in range(n)],
            b_half_solve=lambda v: solve_lower(lo, v),
            b_half_t_solve=lambda v: solve_lower_t(lo, v),
        )


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", default=DEFAULT_DATA, help="scenario folder (default: the shipped demo)")
    ap.add_argument("--obs-op", choices=("linear", "square"), help="override the observation operator")
    args = ap.parse_args()
    p = Lorenz96(args.data, args.obs_op)
    n = p.model.n
    va.serve(n, p.cost_grad, cost=p.cost, split=p.split, prior=p.prior(),
             names=["x%d" % i for i in range(n)],
             label="Lorenz-96 4D-Var (Python example), n = %d, window %d, %s observations"
                   % (n, p.window, p.obs_op))


if __name__ == "__main__":
    main()
