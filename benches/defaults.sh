#!/usr/bin/env bash
# Runs benches/defaults.py (the default sampler against nuts-rs on the lorenz96 cases) with release
# builds and writes its section into BENCHMARKS.md, replacing the section of an earlier run.
# Usage: bash benches/defaults.sh [--quick]   (--quick: 200 warm-up and 200 draws, prints only)
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --bin varpost >&2
cargo build --release -p varpost-bench >&2
target_dir="${CARGO_TARGET_DIR:-target}"
py="${VARPOST_PYTHON:-python3}"
out=$(mktemp)
trap 'rm -f "$out"' EXIT
"$py" benches/defaults.py "$target_dir/release/varpost" "$target_dir/release/varpost-bench" "$@" > "$out"
if [[ " $* " == *" --quick "* ]]; then
  cat "$out"
  exit 0
fi
"$py" - "$out" <<'PY'
import re, sys
new = open(sys.argv[1]).read().strip() + "\n"
text = open("BENCHMARKS.md").read()
head = "## Default sampler against nuts-rs"
if head in text:
    start = text.index(head)
    nxt = text.find("\n## ", start + len(head))
    text = text[:start] + new + (text[nxt + 1:] if nxt >= 0 else "")
else:
    text = text.rstrip() + "\n\n" + new
open("BENCHMARKS.md", "w").write(text)
PY
echo "== wrote the default-sampler section of BENCHMARKS.md" >&2
