"""Simulation-based calibration of varpost's kernels on a small Lorenz-96 problem with the forcing
estimated (Talts, Betancourt, Simpson, Vehtari & Gelman 2018, "Validating Bayesian inference algorithms
with simulation-based calibration").

For replication r: `varpost synth --set synth=calibration --set seed=r` draws the truth (x0, F) from the
prior the cost assumes (x0 ~ N(xb, B), F ~ N(F_b, sd_F^2)) and observations from it with noise from R;
`varpost sample --set data=DIR` then draws L thinned draws from the posterior with each kernel. The rank
of the truth among the L draws, per component, is uniform on 0..L when the sampler is right. Ranks are
binned and tested for uniformity with Pearson's chi-square (scipy.stats.chisquare).

Run through benches/sbc.sh; prints a markdown section and writes it, with the raw ranks, under --work.
"""

import argparse
import concurrent.futures
import json
import os
import subprocess
import sys
import time

import numpy as np
from scipy.io import netcdf_file
from scipy.stats import chisquare


def parse_args():
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--varpost", required=True, help="the varpost binary (a release build)")
    p.add_argument("--work", required=True, help="folder for the replications' runs")
    p.add_argument("--reps", type=int, default=400, help="replications per kernel")
    p.add_argument("--first-seed", type=int, default=0, help="replication r uses seed first-seed + r")
    p.add_argument("--kernels", default="hmc,mala,laplace-mh")
    p.add_argument("--draws", type=int, default=99, help="L: kept draws per replication")
    p.add_argument("--thin", type=int, default=10, help="keep one iteration in this many")
    p.add_argument("--warmup", type=int, default=500)
    p.add_argument("--bins", type=int, default=10, help="bins of the rank histogram")
    p.add_argument("--jobs", type=int, default=2, help="replications run at once")
    p.add_argument(
        "--set",
        action="append",
        default=None,
        help="problem settings (key=value); default: the small problem of BENCHMARKS.md",
    )
    return p.parse_args()


DEFAULT_SETTINGS = [
    "n=10",
    "corr_len=1",
    "window=8",
    "obs_every=2",
    "obs_stride=2",
    "sigma_o=0.5",
    "estimate_forcing=true",
    "synth=calibration",
]


def run(cmd):
    """Runs a command; exit code 5 (chains not converged by varpost's 4-chain rule) is accepted."""
    out = subprocess.run(cmd, capture_output=True, text=True)
    if out.returncode not in (0, 5):
        raise RuntimeError(f"{' '.join(cmd)} exited with {out.returncode}:\n{out.stderr[-2000:]}")
    return out.returncode


def truth_of(scen):
    """The truth in control-vector form: x0 from truth.csv (step 0), then F from scenario.json."""
    cfg = json.load(open(os.path.join(scen, "scenario.json")))
    rows = np.loadtxt(os.path.join(scen, "truth.csv"), delimiter=",", skiprows=1)
    x0 = rows[rows[:, 0] == 0]
    x0 = x0[np.argsort(x0[:, 1]), 2]
    if "truth_forcing" in cfg:
        x0 = np.append(x0, cfg["truth_forcing"])
    return x0


def draws_of(run_dir):
    with netcdf_file(os.path.join(run_dir, "ensemble.nc"), "r", mmap=False) as f:
        return np.array(f.variables["state"][:], dtype=float)


def replication_or_failure(args, settings, kernel, r):
    """A replication, or the error that stopped it (counted and reported, never silently dropped)."""
    try:
        return replication(args, settings, kernel, r)
    except RuntimeError as e:
        print(f"replication {r} ({kernel}) failed: {e}", file=sys.stderr)
        return None


def replication(args, settings, kernel, r):
    base = os.path.join(args.work, f"rep-{r:04d}")
    scen = os.path.join(base, "scenario")
    if not os.path.exists(os.path.join(scen, "truth.csv")):
        cmd = [args.varpost, "synth", "--out", scen]
        for s in settings + [f"seed={args.first_seed + r}"]:
            cmd += ["--set", s]
        run(cmd)
    out = os.path.join(base, kernel)
    start = time.time()
    code = run(
        [args.varpost, "sample", "--problem", "lorenz96", "--set", f"data={scen}",
         "--kernel", kernel, "--chains", "1", "--draws", str(args.draws), "--thin", str(args.thin),
         "--warmup", str(args.warmup), "--seed", str(1000 + args.first_seed + r), "--log-format", "none",
         "--skip-check", "--out", out]
    )
    seconds = time.time() - start
    truth = truth_of(scen)
    draws = draws_of(out)
    if draws.shape != (args.draws, truth.size):
        raise RuntimeError(f"{out}: draws of shape {draws.shape}, expected ({args.draws}, {truth.size})")
    summary = json.load(open(os.path.join(out, "summary.json")))
    ranks = (draws < truth[None, :]).sum(axis=0)
    ess = summary["posterior"]["ess_bulk"]
    evals = summary["evaluations"]["cost"] + summary["evaluations"]["gradient"]
    return ranks, ess, evals, seconds, code


def uniformity(ranks, draws, bins):
    """Pearson chi-square p-value per component of the rank histogram over `bins` equal bins of 0..L."""
    edges = np.linspace(0, draws + 1, bins + 1)
    out = []
    for c in range(ranks.shape[1]):
        counts, _ = np.histogram(ranks[:, c], bins=edges)
        out.append(float(chisquare(counts).pvalue))
    return out


def main():
    args = parse_args()
    settings = args.set or DEFAULT_SETTINGS
    if (args.draws + 1) % args.bins != 0:
        sys.exit(f"--bins {args.bins} must divide L + 1 = {args.draws + 1} so that every bin holds as many ranks")
    os.makedirs(args.work, exist_ok=True)
    results = {}
    names = None
    for kernel in args.kernels.split(","):
        start = time.time()
        with concurrent.futures.ThreadPoolExecutor(max_workers=args.jobs) as pool:
            done = list(pool.map(lambda r: replication_or_failure(args, settings, kernel, r),
                                 range(args.reps)))
        reps = [x for x in done if x is not None]
        failed = [args.first_seed + r for r, x in enumerate(done) if x is None]
        ranks = np.array([x[0] for x in reps])
        ess = np.array([x[1] for x in reps])
        if names is None:
            first = next(r for r, x in enumerate(done) if x is not None)
            names = json.load(open(os.path.join(args.work, f"rep-{first:04d}", kernel, "summary.json")))[
                "component_names"]
        p = uniformity(ranks, args.draws, args.bins)
        results[kernel] = {
            "p": p,
            "p_min": min(p),
            "ess_bulk_median": float(np.median(ess)),
            "ess_bulk_min": float(ess.min()),
            "reps_ess_below_20": int((ess.min(axis=1) < 20).sum()),
            "evaluations_per_rep": float(np.mean([x[2] for x in reps])),
            "seconds": time.time() - start,
            "ranks": ranks.tolist(),
            "failed_seeds": failed,
        }
        print(f"{kernel}: min p {min(p):.3g}, median bulk ESS {np.median(ess):.0f}, "
              f"{time.time() - start:.0f} s", file=sys.stderr)
    with open(os.path.join(args.work, "sbc.json"), "w") as f:
        json.dump({"settings": settings, "args": vars(args), "names": names, "results": results}, f)
    section = markdown(args, settings, names, results)
    with open(os.path.join(args.work, "section.md"), "w") as f:
        f.write(section)
    print(section)


def markdown(args, settings, names, results):
    k = len(names) * len(results)
    lines = [
        f"Replications: {args.reps} per kernel; per replication 1 chain, {args.warmup} warm-up iterations, "
        f"L = {args.draws} draws kept with thinning {args.thin}; ranks binned into {args.bins} bins of "
        f"{(args.draws + 1) // args.bins}; settings `{' '.join(settings)}` (plus `seed=r`, "
        f"r = {args.first_seed} … {args.first_seed + args.reps - 1}).",
        "",
        "| kernel | min p | " + " | ".join(f"p({n})" for n in names) + " | median (min) bulk ESS of the L draws | replications with a bulk ESS < 20 | evaluations per replication | wall time |",
        "| --- | --- | " + " | ".join("---" for _ in names) + " | --- | --- | --- | --- |",
    ]
    for kernel, r in results.items():
        lines.append(
            f"| {kernel} | {r['p_min']:.3g} {'PASS' if r['p_min'] > 0.01 else 'MISS'} | "
            + " | ".join(f"{v:.3g}" for v in r["p"])
            + f" | {r['ess_bulk_median']:.0f} ({r['ess_bulk_min']:.0f}) | {r['reps_ess_below_20']}"
            + f" | {r['evaluations_per_rep']:.0f} | {r['seconds']:.0f} s |"
        )
    lines += [
        "",
        "Failed replications (not in the ranks): "
        + ", ".join(f"{kk} {len(r['failed_seeds'])}" + (f" (seeds {r['failed_seeds']})" if r["failed_seeds"] else "")
                    for kk, r in results.items())
        + ".",
        "",
        f"{k} tests in all: at a level of 0.01 each, about {0.01 * k:.2f} of them would fall below it by "
        f"chance with a calibrated sampler (Bonferroni level for the table: {0.01 / k:.2g}).",
        "",
    ]
    return "\n".join(lines)


if __name__ == "__main__":
    main()
