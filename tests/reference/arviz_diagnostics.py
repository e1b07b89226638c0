"""Reference values for varpost's convergence diagnostics, computed with ArviZ, SciPy and NumPy.

Writes its first argument (default tests/reference/arviz_diagnostics.json): fixed, seeded sets of chains
with ArviZ's rank-normalised split R-hat, bulk and tail ESS, Monte Carlo standard errors (mean, sd,
5% and 95% quantiles), sample mean / sd / quantiles; BFMI of some energy sequences; PSIS k-hat and
smoothed weights of some log-weight sets; SciPy's normal and beta quantile functions at fixed points.

Draws are rounded to a few decimals before any statistic is computed, so the file stays small and the
numbers read back from it are exactly the ones the statistics were computed from.
Non-finite results are written as the strings "nan", "inf", "-inf" (JSON has no such numbers).
"""
import json
import logging
import math
import sys
import warnings

import arviz as az
import numpy as np
import scipy
from scipy import stats

# The constant cases divide zero by zero on purpose (that is the behaviour being recorded), and ArviZ
# logs a shape warning for the single-chain case.
warnings.simplefilter("ignore", RuntimeWarning)
az._log.setLevel(logging.ERROR)  # ArviZ keeps its logger outside logging.getLogger

OUT = sys.argv[1] if len(sys.argv) > 1 else "tests/reference/arviz_diagnostics.json"
rng = np.random.default_rng(20210401)


def num(x):
    x = float(x)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    return x


def ar1(n_chains, n_draws, rho, burn=200):
    """Stationary AR(1) with unit marginal variance."""
    out = np.empty((n_chains, n_draws))
    for c in range(n_chains):
        x = rng.standard_normal()
        eps = rng.standard_normal(burn + n_draws) * math.sqrt(1.0 - rho * rho)
        for t in range(burn + n_draws):
            x = rho * x + eps[t]
            if t >= burn:
                out[c, t - burn] = x
    return out


def chain_case(name, chains):
    chains = np.asarray(chains, dtype=float)
    flat = chains.ravel()
    return {
        "name": name,
        "chains": [[float(v) for v in row] for row in chains],
        "mean": num(np.mean(flat)),
        "sd": num(np.std(flat, ddof=1)),
        "q05": num(np.quantile(flat, 0.05)),
        "q95": num(np.quantile(flat, 0.95)),
        "rhat": num(az.rhat(chains, method="rank")),
        "ess_bulk": num(az.ess(chains, method="bulk")),
        "ess_tail": num(az.ess(chains, method="tail")),
        "mcse_mean": num(az.mcse(chains, method="mean")),
        "mcse_sd": num(az.mcse(chains, method="sd")),
        "mcse_q05": num(az.mcse(chains, method="quantile", prob=0.05)),
        "mcse_q95": num(az.mcse(chains, method="quantile", prob=0.95)),
    }


cases = []
cases.append(chain_case("iid_normal", np.round(rng.standard_normal((4, 200)), 6)))
ar = np.round(ar1(4, 200, 0.9), 6)
cases.append(chain_case("ar1_rho_0.9", ar))
stuck = rng.standard_normal((4, 200))
stuck[3] = 1.5 + 0.3 * ar1(1, 200, 0.98)[0]
cases.append(chain_case("one_stuck_shifted_chain", np.round(stuck, 6)))
cases.append(chain_case("heavy_tailed_cauchy", np.round(rng.standard_cauchy((4, 200)), 4)))
cases.append(chain_case("small_s_odd_draws", np.round(rng.standard_normal((4, 11)), 6)))
cases.append(chain_case("ties_poisson", rng.poisson(3.0, (4, 100)).astype(float)))
cases.append(chain_case("single_chain_ar1", np.round(ar1(1, 300, 0.5), 6)))
cases.append(chain_case("constant", np.full((4, 50), 1.5)))
cases.append(chain_case("constant_per_chain", np.repeat([[0.0], [1.0], [2.0], [3.0]], 50, axis=1)))

# Autocorrelation of one chain (ArviZ computes it by FFT with zero padding).
acf_chain = ar[0]
autocorr = {
    "chain": [float(v) for v in acf_chain],
    "autocov": [float(v) for v in az.autocov(acf_chain)[:30]],
    "autocorr": [float(v) for v in az.autocorr(acf_chain)[:30]],
}

# BFMI: energies of well-mixed (iid) and poorly mixed (slowly varying) momentum resampling.
energy = np.empty((3, 200))
energy[0] = rng.standard_normal(200) * 3.0 + 10.0
energy[1] = 10.0 + 3.0 * ar1(1, 200, 0.5)[0]
energy[2] = 10.0 + 3.0 * ar1(1, 200, 0.97)[0]
energy = np.round(energy, 6)
bfmi = {"energy": [[float(v) for v in row] for row in energy], "bfmi": [num(v) for v in az.bfmi(energy)]}


def psis_case(name, log_target, log_proposal):
    log_target = np.round(log_target, 8)
    log_proposal = np.round(log_proposal, 8)
    lw = log_target - log_proposal
    smoothed, khat = az.psislw(lw.copy(), reff=1.0)
    w = np.exp(smoothed)
    raw = np.exp(lw - lw.max())
    raw /= raw.sum()
    return {
        "name": name,
        "log_target": [float(v) for v in log_target],
        "log_proposal": [float(v) for v in log_proposal],
        "khat": num(khat),
        # Summaries of the smoothed normalised weights: their ESS 1 / sum w^2, the largest one, and a
        # linear functional sum_i w_i (i + 1) / S that depends on every weight and its position.
        "smoothed_ess": num(1.0 / np.sum(w**2)),
        "smoothed_max": num(np.max(w)),
        "smoothed_moment": num(np.sum(w * np.arange(1, len(w) + 1)) / len(w)),
        "raw_kish_ess": num(1.0 / np.sum(raw**2)),
    }


S = 400
psis = []
# Gaussian target N(0, 1) and a slightly wider Gaussian proposal N(0, 1.2^2): bounded weights.
x = rng.standard_normal(S) * 1.2
psis.append(psis_case("gaussian_matched", stats.norm.logpdf(x), stats.norm.logpdf(x, scale=1.2)))
# Heavy-tailed target (Cauchy) and a much narrower Gaussian proposal N(0, 0.3^2).
x = rng.standard_normal(S) * 0.3
psis.append(psis_case("heavy_target_narrow_proposal", stats.cauchy.logpdf(x), stats.norm.logpdf(x, scale=0.3)))
# Gaussian target with a narrower Gaussian proposal N(0, 0.6^2): weights unbounded, thick tail.
x = rng.standard_normal(S) * 0.6
psis.append(psis_case("gaussian_narrow_proposal", stats.norm.logpdf(x), stats.norm.logpdf(x, scale=0.6)))

ps = [1e-300, 1e-100, 1e-20, 1e-10, 1e-5, 0.001, 0.01, 0.025, 0.05, 0.075, 0.0751, 0.1, 0.2, 0.3, 0.4,
      0.5, 0.6, 0.7, 0.8, 0.9, 0.925, 0.95, 0.975, 0.99, 0.999, 1 - 1e-10, 1.0 / 3.0, 0.123456789]
norm_ppf = {"p": ps, "z": [num(stats.norm.ppf(p)) for p in ps]}

beta_ppf = []
for a, b in [(1.0, 1.0), (2.5, 0.5), (11.0, 191.0), (191.0, 11.0), (40.0, 762.0), (0.5, 0.5), (5.0, 3.0)]:
    for p in (0.001, 0.1586553, 0.5, 0.8413447, 0.999):
        beta_ppf.append({"a": a, "b": b, "p": p, "x": num(stats.beta.ppf(p, a, b))})

out = {
    "versions": {"arviz": az.__version__, "numpy": np.__version__, "scipy": scipy.__version__},
    "chain_cases": cases,
    "autocorrelation": autocorr,
    "bfmi": bfmi,
    "psis": psis,
    "norm_ppf": norm_ppf,
    "beta_ppf": beta_ppf,
}
with open(OUT, "w") as f:
    json.dump(out, f, separators=(",", ":"))
    f.write("\n")
