#!/usr/bin/env bash
# Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari & Gelman 2018) of the kernels hmc,
# mala and laplace-mh on a small Lorenz-96 problem with the forcing estimated: builds varpost in
# release, runs benches/sbc.py (replications of synth=calibration + sample, ranks of the truth, chi-square
# uniformity tests with scipy) and replaces the "Calibration" section of BENCHMARKS.md with its table.
# Not part of `cargo test`. Extra arguments go to benches/sbc.py (e.g. --reps 20 for a quick look; the
# section is then not written). About 5 minutes on 2 shared cores with the defaults (400 replications per
# kernel), plus the release build.
set -euo pipefail
cd "$(dirname "$0")/.."

venv="$PWD/target/test-venv"
if ! "$venv/bin/python" -c "import numpy, scipy" 2>/dev/null; then
  echo "== $venv lacks numpy/scipy; create it with bash scripts/test.sh (or python3 -m venv + pip install numpy scipy)" >&2
  exit 1
fi
echo "== building varpost (release)" >&2
cargo build --release --bin varpost >&2
target_dir="${CARGO_TARGET_DIR:-target}"
work="$target_dir/sbc"
rm -rf "$work"
start=$(date +%s)
"$venv/bin/python" benches/sbc.py --varpost "$target_dir/release/varpost" --work "$work" "$@"
elapsed=$(( $(date +%s) - start ))

if [ "$#" -gt 0 ]; then
  echo "== non-default arguments: BENCHMARKS.md left as it is; the table is in $work/section.md" >&2
  exit 0
fi
commit=$(git rev-parse --short HEAD)
{
  echo "## Calibration: simulation-based calibration of the kernels"
  echo
  echo "Talts, Betancourt, Simpson, Vehtari & Gelman (2018), \"Validating Bayesian inference algorithms with"
  echo "simulation-based calibration\": when the truth is a draw from the prior the cost assumes and the"
  echo "observations are drawn from it, the rank of the truth among L independent posterior draws is uniform"
  echo "on 0..L for every component. Each replication r runs \`varpost synth --set synth=calibration"
  echo "--set estimate_forcing=true --set seed=r\` (x0 ~ N(xb, B), F ~ N(F_b, 1), observations with noise"
  echo "from R), then \`varpost sample --set data=DIR\` with one chain per kernel; the p-values are Pearson's"
  echo "chi-square test of uniform bin counts (scipy.stats.chisquare). Target: p > 0.01 for every component"
  echo "of every kernel. Reproduce with \`bash benches/sbc.sh\` (commit $commit, $(date -u '+%Y-%m-%d'),"
  echo "$(nproc) shared cores, $elapsed s in all)."
  echo
  cat "$work/section.md"
} > "$work/benchmarks-section.md"
"$venv/bin/python" - "$work/benchmarks-section.md" <<'PY'
import re, sys
section = open(sys.argv[1]).read()
text = open("BENCHMARKS.md").read()
head = "## Calibration: simulation-based calibration of the kernels"
if head in text:
    start = text.index(head)
    nxt = text.find("\n## ", start + len(head))
    text = text[:start] + section + ("" if nxt < 0 else text[nxt + 1:])
else:
    text = text.rstrip("\n") + "\n\n" + section
open("BENCHMARKS.md", "w").write(text)
PY
echo "== wrote the calibration section of BENCHMARKS.md" >&2
