#!/usr/bin/env bash
# Builds the benchmark harness in release, runs the full benchmark and writes BENCHMARKS.md: the machine,
# the commit, the date, then the harness's table and targets. Extra arguments go to the harness.
set -euo pipefail
cd "$(dirname "$0")/.."

echo "== building the harness (release)" >&2
start=$(date +%s)
cargo build --release -p varpost-bench >&2
echo "== build: $(( $(date +%s) - start )) s" >&2

target_dir="${CARGO_TARGET_DIR:-target}"
tmp=$(mktemp)
trap 'rm -f "$tmp"' EXIT
start=$(date +%s)
"$target_dir/release/varpost-bench" "$@" > "$tmp"
elapsed=$(( $(date +%s) - start ))
echo "== benchmark: $elapsed s" >&2

cpu=$(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2- | sed 's/^ *//')
commit=$(git rev-parse --short HEAD)
dirty=""
git diff --quiet HEAD -- . ':!BENCHMARKS.md' || dirty=" (with uncommitted changes)"
{
  echo "# Benchmarks"
  echo
  echo "Efficiency a user can check: effective sample size per model evaluation of varpost's kernels and"
  echo "preconditioners, side by side with a general-purpose NUTS sampler (nuts-rs 0.19.1) on the same"
  echo "cost function and gradient. Regenerate with \`bash benches/run.sh\`; the harness is"
  echo "\`benches/harness\` (\`cargo run --release -p varpost-bench\`)."
  echo
  echo "- Machine: $(nproc) cores, $(uname -m), $cpu"
  echo "- Commit: $commit$dirty"
  echo "- Date: $(date -u '+%Y-%m-%d %H:%M UTC')"
  echo "- Load average when the run ended: $(cut -d' ' -f1-3 /proc/loadavg) (the machine is shared; wall times and the parallel speed-up depend on it)"
  echo "- Wall time of the whole run: $elapsed s"
  echo
  echo "## Results"
  echo
  cat "$tmp"
  # Sections written by the other benchmark scripts (fuzzing, calibration, the default sampler) stay.
  if [ -f BENCHMARKS.md ]; then
    awk '/^## /{keep = ($0 != "## Results" && $0 != "## Targets")} keep' BENCHMARKS.md | sed '1s/^/\n/'
  fi
} > BENCHMARKS.md.new
mv BENCHMARKS.md.new BENCHMARKS.md
echo "== wrote BENCHMARKS.md" >&2
