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
cargo test --all-targets "$@"

# The benchmark harness in its quick mode, so that it keeps building and running (figures not judged).
echo "== benchmark harness (quick)"
cargo run -p varpost-bench -- --quick
