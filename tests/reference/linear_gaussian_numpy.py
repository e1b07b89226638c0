"""Dense reference posterior of the linear-Gaussian problem, computed with numpy and scipy.

Reads the problem's matrices from tests/reference/linear_gaussian_problem.json (exported by varpost with
default settings; the Rust test checks that export is still what the built-in problem builds), forms
G = A C, and computes the posterior covariance (B^-1 + G^T R^-1 G)^-1 by a dense Cholesky solve
(scipy.linalg.cho_factor / cho_solve) and the mean xb + Sigma G^T R^-1 (y - G xb). Writes JSON to the
path given as first argument (default tests/reference/linear_gaussian_numpy.json).
"""
import json
import os
import sys

import numpy as np
import scipy.linalg

here = os.path.dirname(os.path.abspath(__file__))
out = sys.argv[1] if len(sys.argv) > 1 else os.path.join(here, "linear_gaussian_numpy.json")
with open(os.path.join(here, "linear_gaussian_problem.json")) as f:
    p = json.load(f)

a = np.array(p["a"])
c = np.array(p["c"])
g = a @ c
b = np.array(p["b"])
r = np.array(p["r"])
y = np.array(p["y"])
xb = np.array(p["xb"])

precision = np.diag(1.0 / b) + g.T @ np.diag(1.0 / r) @ g
factor = scipy.linalg.cho_factor(precision, lower=True)
cov = scipy.linalg.cho_solve(factor, np.eye(len(b)))
mean = xb + cov @ (g.T @ ((y - g @ xb) / r))
# The cost at the mean, for a check of the cost function itself.
cost = 0.5 * np.sum((mean - xb) ** 2 / b) + 0.5 * np.sum((y - g @ mean) ** 2 / r)

with open(out, "w") as f:
    json.dump(
        {
            "source": "numpy/scipy dense posterior of linear_gaussian_problem.json",
            "mean": [float(v) for v in mean],
            "variance": [float(v) for v in np.diag(cov)],
            "cost_at_mean": float(cost),
        },
        f,
        indent=1,
    )
