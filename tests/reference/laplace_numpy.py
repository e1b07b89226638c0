"""Reference Laplace posterior of two small linear-Gaussian 4D-Var-like problems, with numpy and scipy.

Each case draws (seeded) a background xb, a background-error covariance B, an observation operator G,
observation-error variances r and observations y, and computes densely:
  posterior covariance (B^-1 + G^T R^-1 G)^-1 (scipy.linalg.cho_factor / cho_solve), its diagonal,
  posterior mean, log det of the covariance, and the eigenvalues of the prior-preconditioned misfit
  Hessian S^T G^T R^-1 G S with B = S S^T (scipy.linalg.eigh; they do not depend on the square root).
Cases: "diagonal" (B = diag(sigma^2), sigma spread over two decades) and "correlated"
(B_ij = sigma_i sigma_j exp(-|i - j| / 4)). Writes JSON to the path given as first argument
(default tests/reference/laplace_numpy.json).
"""
import json
import os
import sys

import numpy as np
import scipy.linalg

here = os.path.dirname(os.path.abspath(__file__))
out = sys.argv[1] if len(sys.argv) > 1 else os.path.join(here, "laplace_numpy.json")


def case(seed, n, m, correlated):
    rng = np.random.default_rng(seed)
    sigma = np.logspace(-1, 1, n)
    if correlated:
        idx = np.arange(n)
        b = np.outer(sigma, sigma) * np.exp(-np.abs(idx[:, None] - idx[None, :]) / 4.0)
    else:
        b = np.diag(sigma**2)
    xb = rng.normal(size=n)
    g = rng.normal(size=(m, n)) / np.sqrt(n)
    r = 0.05 + 0.1 * rng.random(m)
    y = g @ (xb + sigma * rng.normal(size=n)) + np.sqrt(r) * rng.normal(size=m)

    binv = scipy.linalg.cho_solve(scipy.linalg.cho_factor(b, lower=True), np.eye(n))
    precision = binv + g.T @ (g / r[:, None])
    factor = scipy.linalg.cho_factor(precision, lower=True)
    cov = scipy.linalg.cho_solve(factor, np.eye(n))
    mean = xb + cov @ (g.T @ ((y - g @ xb) / r))
    s = np.linalg.cholesky(b)
    misfit = s.T @ g.T @ (g / r[:, None]) @ s
    eig = scipy.linalg.eigh(0.5 * (misfit + misfit.T), eigvals_only=True)[::-1]
    log_det = -2.0 * np.sum(np.log(np.diag(factor[0])))
    return {
        "n": n,
        "m": m,
        "xb": xb.tolist(),
        "b": b.ravel().tolist(),
        "g": g.ravel().tolist(),
        "r": r.tolist(),
        "y": y.tolist(),
        "mean": mean.tolist(),
        "variance": np.diag(cov).tolist(),
        "log_det_cov": float(log_det),
        "eigenvalues": eig[:m].tolist(),
    }


result = {
    "source": "numpy 2.2.6 / scipy 1.15.3 dense Cholesky posterior and eigh",
    "diagonal": case(20261202, 50, 12, False),
    "correlated": case(7, 40, 9, True),
}
with open(out, "w") as f:
    json.dump(result, f, indent=1)
