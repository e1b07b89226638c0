#!/usr/bin/env bash
# In-process fuzzing of every decoder of outside input: the ignored unit tests named fuzz_* (protocol
# messages, hello, checkpoints, draws files, evaluation records, run records), one million generated or
# mutated inputs each, in release mode. Not part of the quick test run.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo test --release --lib -- --ignored fuzz_ --nocapture --test-threads 1
# The protocol decoders (hello, start, requests and replies in both encodings), one million inputs each.
VARPOST_FUZZ_ROUNDS=1000000 cargo test --release --test it decoders_never_panic -- --nocapture
