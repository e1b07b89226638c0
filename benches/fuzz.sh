#!/usr/bin/env bash
# In-process fuzzing of the decoders: every `fuzz_*` unit test of the library (ignored in ordinary test
# runs), in release mode with overflow checks and debug assertions on, so that an arithmetic overflow on
# a huge length or count is a panic the fuzzer counts rather than a silent wrap. Each test prints how many
# inputs it fed and how many panics it saw (must be 0). Built in target/fuzz, apart from the ordinary
# release build.
#
#   bash benches/fuzz.sh            # all fuzz tests
#   bash benches/fuzz.sh text       # only those whose name starts with `fuzz_text`
set -euo pipefail
cd "$(dirname "$0")/.."
export CARGO_PROFILE_RELEASE_OVERFLOW_CHECKS=true
export CARGO_PROFILE_RELEASE_DEBUG_ASSERTIONS=true
export CARGO_TARGET_DIR="${CARGO_TARGET_DIR:-target/fuzz}"
cargo test --release --lib -- --ignored "fuzz_${1:-}" --nocapture
# The protocol decoders through their public entry points (hello, start, requests and replies in both
# encodings), one million rounds each.
VARPOST_FUZZ_ROUNDS=1000000 cargo test --release --test it decoders_never_panic -- --nocapture
