#!/usr/bin/env bash
# The project's one test command (README, .ci/run): installs what the tests need where it is missing,
# re-runs every reference script and checks its committed fixture still matches, then runs cargo test.
set -euo pipefail
cd "$(dirname "$0")/.."

# System packages used by the adapter tests (compilers for the C/Fortran examples, Open MPI's launcher).
need=()
command -v gcc >/dev/null || need+=(gcc)
command -v gfortran >/dev/null || need+=(gfortran)
command -v mpirun >/dev/null || need+=(openmpi-bin)
if [ ${#need[@]} -gt 0 ]; then
  echo "== installing system packages: ${need[*]}"
  sudo_=""; [ "$(id -u)" -eq 0 ] || sudo_="sudo"
  $sudo_ apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $sudo_ apt-get install -y -qq "${need[@]}" >/dev/null
fi

# Python reference libraries, in a virtual environment of the project's own (nothing in the home folder).
venv="$PWD/target/test-venv"
if [ ! -x "$venv/bin/python" ]; then
  echo "== creating $venv"
  python3 -m venv "$venv"
fi
if ! "$venv/bin/python" -c "import numpy, scipy, arviz, netCDF4" 2>/dev/null; then
  echo "== installing Python reference packages (tests/reference/requirements.txt)"
  "$venv/bin/pip" install -q --disable-pip-version-check -r tests/reference/requirements.txt
fi
export VARPOST_PYTHON="$venv/bin/python"
export MPLCONFIGDIR="$PWD/target/mplconfig" XDG_CACHE_HOME="$PWD/target/xdg-cache"

# Every reference script re-run; its fixture must still match what it produces now.
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
for script in tests/reference/*.py; do
  name=$(basename "$script" .py)
  [ "$name" = compare_json ] && continue
  echo "== reference: $script"
  "$VARPOST_PYTHON" "$script" "$tmp/$name.json"
  "$VARPOST_PYTHON" tests/reference/compare_json.py "tests/reference/$name.json" "$tmp/$name.json"
done

echo "== cargo test"
log="$tmp/cargo-test.log"
set +e
cargo test "$@" 2>&1 | tee "$log"
status=${PIPESTATUS[0]}
set -e

# The benchmark harness in its quick mode, so that it keeps building and running (figures not judged).
echo "== benchmark harness (quick)"
set +e
cargo run -p varpost-bench -- --quick
bench_status=$?
set -e

# One closing line over every test binary (the last binary cargo runs may hold no tests).
passed=$(grep -E '^test result:' "$log" | sed -E 's/.* ([0-9]+) passed.*/\1/' | awk '{s+=$1} END {print s+0}')
failed=$(grep -E '^test result:' "$log" | sed -E 's/.* ([0-9]+) failed.*/\1/' | awk '{s+=$1} END {print s+0}')
if [ "$bench_status" -ne 0 ]; then
  echo "the benchmark harness (quick mode) failed with status $bench_status"
  failed=$((failed + 1))
  [ "$status" -ne 0 ] || status=$bench_status
fi
echo "tests: $passed passed, $failed failed"
exit "$status"
