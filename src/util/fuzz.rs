//! In-process fuzzing for the decoders' tests (`fuzz_*`, ignored by default; run with
//! `cargo test --release --lib -- --ignored fuzz_`): generated and mutated inputs from a seeded
//! generator, each decoded inside `catch_unwind`, and the count of inputs and panics printed. A decoder
//! may refuse an input with an error, but must never panic.
//!
//! Mutations of valid encodings: bit flips, truncations, splices of two inputs, huge counts written over
//! a word, NaN and infinities written over an 8-byte slot, inserted, deleted and repeated byte ranges,
//! and, for text, numbers replaced by extreme ones.

use std::panic::{catch_unwind, AssertUnwindSafe};

use rand::RngExt;
use rand_chacha::ChaCha8Rng;

/// Inputs of one fuzz test.
pub(crate) const INPUTS: u64 = 1_000_000;

/// Feeds `inputs` inputs made by `make` to `decode` (which says whether it accepted the input), each
/// inside `catch_unwind`; prints the counts of inputs, accepted inputs and panics, and fails on the
/// first panic, showing the start of the input that caused it.
pub(crate) fn run(
    name: &str,
    inputs: u64,
    rng: &mut ChaCha8Rng,
    mut make: impl FnMut(&mut ChaCha8Rng) -> Vec<u8>,
    mut decode: impl FnMut(&[u8]) -> bool,
) {
    let (mut panics, mut accepted) = (0u64, 0u64);
    let mut first: Option<Vec<u8>> = None;
    for _ in 0..inputs {
        let input = make(rng);
        match catch_unwind(AssertUnwindSafe(|| decode(&input))) {
            Ok(ok) => accepted += u64::from(ok),
            Err(_) => {
                panics += 1;
                first.get_or_insert(input);
            }
        }
    }
    println!("{name}: {inputs} inputs, {accepted} accepted, {panics} panics");
    if let Some(input) = first {
        let head = &input[..input.len().min(256)];
        panic!(
            "{name}: {panics} of {inputs} inputs panicked; the first ({} bytes) begins {:?}",
            input.len(),
            String::from_utf8_lossy(head)
        );
    }
}

/// A mutation of `base` by one to three random operations; `corpus` gives the other half of splices.
pub(crate) fn mutate(rng: &mut ChaCha8Rng, base: &[u8], corpus: &[Vec<u8>]) -> Vec<u8> {
    let mut b = base.to_vec();
    for _ in 0..rng.random_range(1..=3) {
        let len = b.len();
        match rng.random_range(0..8u32) {
            0 if len > 0 => {
                for _ in 0..rng.random_range(1..=8) {
                    let i = rng.random_range(0..len);
                    b[i] ^= 1 << rng.random_range(0..8u32);
                }
            }
            1 => b.truncate(rng.random_range(0..=len)),
            2 if !corpus.is_empty() => {
                let other = &corpus[rng.random_range(0..corpus.len())];
                let (i, j) = (rng.random_range(0..=len), rng.random_range(0..=other.len()));
                b.truncate(i);
                b.extend_from_slice(&other[j..]);
            }
            3 if len >= 4 => {
                let words: [u64; 6] = [u64::MAX, u32::MAX as u64, 1 << 31, 1 << 40, 0, 0x7fff_ffff];
                let w = words[rng.random_range(0..words.len())].to_le_bytes();
                let k = if rng.random_bool(0.5) && len >= 8 {
                    8
                } else {
                    4
                };
                let i = rng.random_range(0..=len - k);
                b[i..i + k].copy_from_slice(&w[..k]);
            }
            4 if len >= 8 => {
                let v = [
                    f64::NAN,
                    f64::INFINITY,
                    f64::NEG_INFINITY,
                    -0.0,
                    f64::MAX,
                    5e-324,
                ];
                let x = v[rng.random_range(0..v.len())].to_le_bytes();
                let i = rng.random_range(0..=len - 8);
                b[i..i + 8].copy_from_slice(&x);
            }
            5 => {
                let i = rng.random_range(0..=len);
                let extra: Vec<u8> = (0..rng.random_range(1..=16))
                    .map(|_| rng.random())
                    .collect();
                b.splice(i..i, extra);
            }
            6 if len > 0 => {
                let i = rng.random_range(0..len);
                let j = rng.random_range(i..=len.min(i + 64));
                if rng.random_bool(0.5) {
                    b.drain(i..j);
                } else {
                    let chunk = b[i..j].to_vec();
                    b.splice(j..j, chunk);
                }
            }
            _ => replace_number(rng, &mut b),
        }
    }
    b
}

/// Replaces one run of ASCII digits (a number in a text format) by an extreme or invalid one.
fn replace_number(rng: &mut ChaCha8Rng, b: &mut Vec<u8>) {
    const WITH: [&str; 10] = [
        "18446744073709551615",
        "18446744073709551616",
        "99999999999999999999999999",
        "-1",
        "1e308",
        "1e400",
        "0",
        "NaN",
        "null",
        "-0.0",
    ];
    let starts: Vec<usize> = (0..b.len())
        .filter(|&i| b[i].is_ascii_digit() && (i == 0 || !b[i - 1].is_ascii_digit()))
        .collect();
    if starts.is_empty() {
        return;
    }
    let i = starts[rng.random_range(0..starts.len())];
    let mut j = i;
    while j < b.len() && b[j].is_ascii_digit() {
        j += 1;
    }
    let w = WITH[rng.random_range(0..WITH.len())];
    b.splice(i..j, w.bytes());
}
