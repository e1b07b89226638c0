//! In-process fuzzing of every decoder of the adapter protocol: text messages, binary frames (and the
//! cutting of the adapter's stdout into messages), and the handshake lines. Each test feeds at least
//! [`INPUTS`] inputs made by mutating valid messages (bit flips, truncations, splices, huge numbers,
//! NaN tokens, deep nesting, broken length fields) from a seeded ChaCha8 generator, each inside
//! `catch_unwind`, and asserts that no decoder panicked. The tests are `#[ignore]`d: run them in release
//! with `bash benches/fuzz.sh`.

use std::borrow::Cow;
use std::panic::{self, AssertUnwindSafe};

// A panic inside `catch_unwind` is still printed by the default hook: with no panics, nothing is.

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::adapter::process::pipes::{find_message, Framing};

/// Inputs per fuzz test.
const INPUTS: usize = 1_000_000;

/// Tokens put in place of a number or inserted anywhere.
const TOKENS: &[&str] = &[
    "1e999",
    "-1e999",
    "1e-400",
    "18446744073709551616",
    "18446744073709551615",
    "340282366920938463463374607431768211456",
    "-9223372036854775809",
    "4611686018427387904",
    "1e12",
    "0",
    "-0",
    "0.5",
    "1.7976931348623157e308",
    "5e-324",
    "NaN",
    "Infinity",
    "-Infinity",
    "\"nan\"",
    "\"inf\"",
    "\"-inf\"",
    "null",
    "true",
    "[]",
    "{}",
    "\"\"",
    "\"\\u0000\"",
    "\"\\ud800\"",
    ",",
    ":",
    "\"",
    "\\",
    "\n",
    "\r\n",
    "\"op\":\"quit\"",
    "\"dim\":",
    "\"error\":",
];

/// Interesting single bytes.
const BYTES: &[u8] = b"\x00\xff\x80\x7f\"\\{}[],:\n\r 0123456789.eE+-nN";

/// Varied values for the seed messages: awkward doubles (IEEE 754 binary64 facts; common practice, no
/// source).
fn values(n: usize, shift: f64) -> Vec<f64> {
    let special = [
        0.1 + 0.2,
        5e-324,
        f64::MAX,
        -0.0,
        f64::NAN,
        f64::INFINITY,
        f64::NEG_INFINITY,
        1.0 / 3.0,
        -2.5e-310,
        123456789.0,
    ];
    (0..n).map(|i| special[i % special.len()] * shift).collect()
}

/// Every reply kind, for dimension `n`.
fn replies(n: usize) -> Vec<(Op, Reply)> {
    let v = values(n, 1.5);
    vec![
        (
            Op::CostGrad,
            Reply::CostGrad {
                cost: 2.5,
                grad: v.clone(),
            },
        ),
        (Op::Cost, Reply::Cost { cost: -0.0 }),
        (Op::HessVec, Reply::HessVec { hv: v.clone() }),
        (
            Op::Split,
            Reply::Split {
                jb: 1.0,
                jo: f64::NAN,
            },
        ),
        (
            Op::Background,
            Reply::Background {
                xb: v.clone(),
                var: values(n, 2.0),
                log_det: 0.25,
            },
        ),
        (Op::BHalf, Reply::Vector { out: v }),
        (
            Op::Cost,
            Reply::Error {
                message: "model blew up \"here\"\n".into(),
                recoverable: true,
            },
        ),
    ]
}

/// Valid requests and replies of dimensions 1, 3 and 8 in encoding `enc`.
fn message_corpus(enc: Encoding) -> Vec<Vec<u8>> {
    let mut corpus = Vec::new();
    for n in [1, 3, 8] {
        for (k, op) in Op::ALL.into_iter().enumerate() {
            let (x, v) = (values(n, 1.0), values(n, -3.0));
            let mut b = Vec::new();
            encode_request(
                enc,
                k as u64 * 977,
                &Request {
                    op,
                    x: Cow::Owned(x),
                    v: Cow::Owned(v),
                },
                &mut b,
            );
            corpus.push(b);
        }
        for (id, (op, reply)) in replies(n).into_iter().enumerate() {
            let mut b = Vec::new();
            encode_reply(enc, id as u64 + u64::MAX / 2, op, &reply, &mut b);
            corpus.push(b);
        }
    }
    if enc == Encoding::Text {
        corpus.push(br#"{"id":3,"cost":NaN,"grad":[Infinity,-Infinity,1]}"#.to_vec());
        corpus.push(br#"{"id":1,"error":"NaN here","recoverable":false}"#.to_vec());
    }
    corpus
}

/// Valid hello and start lines.
fn hello_corpus() -> Vec<Vec<u8>> {
    let full = Hello {
        protocol: PROTOCOL_VERSION,
        dim: 3,
        encodings: vec![Encoding::Binary, Encoding::Text],
        offers: Capabilities {
            hess_vec: true,
            split: true,
            prior: true,
            prior_solve: true,
        },
        names: Some(vec!["T(1)".into(), "u \"east\"".into(), "q\u{e9}".into()]),
        label: Some("advection 4D-Var \\ case 3".into()),
    };
    let minimal = Hello {
        names: None,
        label: None,
        offers: Capabilities::default(),
        encodings: vec![Encoding::Text],
        ..full.clone()
    };
    vec![
        encode_hello(&full),
        encode_hello(&minimal),
        br#"{"hello":"varpost-adapter","protocol":1,"dim":1e3,"encodings":["binary"]}"#.to_vec(),
        br#"{"hello":"varpost-adapter","protocol":1,"dim":4,"offers":["prior","prior_solve"]}"#
            .to_vec(),
        encode_start(Encoding::Text),
        encode_start(Encoding::Binary),
    ]
}

/// One random change to `input`; `corpus` gives material to splice in.
fn mutate_once(rng: &mut ChaCha8Rng, input: &mut Vec<u8>, corpus: &[Vec<u8>]) {
    let at = |rng: &mut ChaCha8Rng, len: usize| rng.random_range(0..=len);
    match rng.random_range(0..11) {
        0 if !input.is_empty() => {
            for _ in 0..rng.random_range(1..5) {
                let i = rng.random_range(0..input.len());
                input[i] ^= 1 << rng.random_range(0..8);
            }
        }
        1 if !input.is_empty() => {
            let i = rng.random_range(0..input.len());
            input[i] = if rng.random::<bool>() {
                BYTES[rng.random_range(0..BYTES.len())]
            } else {
                rng.random()
            };
        }
        2 => {
            let cut = at(rng, input.len());
            input.truncate(cut);
        }
        3 => {
            let a = at(rng, input.len());
            let b = at(rng, input.len()).max(a);
            input.drain(a..b);
        }
        4 => {
            let tok = TOKENS[rng.random_range(0..TOKENS.len())];
            let i = at(rng, input.len());
            input.splice(i..i, tok.bytes());
        }
        5 => {
            let other = &corpus[rng.random_range(0..corpus.len())];
            let (a, b) = (at(rng, input.len()), at(rng, other.len()));
            input.truncate(a);
            input.extend_from_slice(&other[b..]);
        }
        6 => {
            let a = at(rng, input.len());
            let b = at(rng, input.len()).max(a);
            let piece = input[a..b].to_vec();
            for _ in 0..rng.random_range(1..8) {
                input.splice(b..b, piece.iter().copied());
            }
        }
        7 => replace_number(rng, input),
        8 => nest(rng, input),
        9 => {
            for _ in 0..rng.random_range(1..32) {
                let i = at(rng, input.len());
                input.insert(i, rng.random());
            }
        }
        _ => binary_field(rng, input),
    }
}

/// Replaces a run of digits (a number, an id, a length) by a token such as a huge number or NaN.
fn replace_number(rng: &mut ChaCha8Rng, input: &mut Vec<u8>) {
    let starts: Vec<usize> = (0..input.len())
        .filter(|&i| input[i].is_ascii_digit() && (i == 0 || !input[i - 1].is_ascii_digit()))
        .collect();
    if starts.is_empty() {
        return;
    }
    let a = starts[rng.random_range(0..starts.len())];
    let end = a + input[a..]
        .iter()
        .take_while(|b| b.is_ascii_digit() || matches!(b, b'.' | b'e' | b'E' | b'-' | b'+'))
        .count();
    let tok = TOKENS[rng.random_range(0..TOKENS.len())];
    input.splice(a..end, tok.bytes());
}

/// Inserts deeply nested arrays or objects (up to tens of thousands of levels).
fn nest(rng: &mut ChaCha8Rng, input: &mut Vec<u8>) {
    let depth = if rng.random_range(0..4) == 0 {
        rng.random_range(1..40_000)
    } else {
        rng.random_range(1..300)
    };
    let (open, close): (&[u8], &[u8]) = if rng.random::<bool>() {
        (b"[", b"]")
    } else {
        (b"{\"a\":", b"}")
    };
    let mut nested = Vec::with_capacity(depth * (open.len() + close.len()) + 1);
    for _ in 0..depth {
        nested.extend_from_slice(open);
    }
    nested.push(b'1');
    if rng.random::<bool>() {
        for _ in 0..depth {
            nested.extend_from_slice(close);
        }
    }
    let i = rng.random_range(0..=input.len());
    input.splice(i..i, nested);
}

/// Changes a binary frame's header field: length, tag, flags, or a payload double's bits.
fn binary_field(rng: &mut ChaCha8Rng, input: &mut [u8]) {
    if input.len() < FRAME_HEADER {
        return;
    }
    match rng.random_range(0..4) {
        0 => {
            let body = (input.len() - 4) as u32;
            let edges = [
                0,
                11,
                12,
                13,
                body.wrapping_sub(1),
                body.wrapping_add(1),
                body.wrapping_add(8),
                u32::MAX,
                rng.random(),
            ];
            let v = edges[rng.random_range(0..edges.len())];
            input[..4].copy_from_slice(&v.to_le_bytes());
        }
        1 => {
            input[4] = [
                0,
                1,
                9,
                15,
                16,
                0x7f,
                0x80,
                0x81,
                0x89,
                0x8f,
                0xfe,
                0xff,
                rng.random(),
            ][rng.random_range(0..13)]
        }
        2 => input[5] = rng.random(),
        _ => {
            let slots = (input.len() - FRAME_HEADER) / 8;
            if slots > 0 {
                let i = FRAME_HEADER + 8 * rng.random_range(0..slots);
                let bits = [
                    f64::NAN.to_bits(),
                    f64::INFINITY.to_bits(),
                    0x7ff0_0000_0000_0001,
                    u64::MAX,
                    rng.random(),
                ];
                input[i..i + 8]
                    .copy_from_slice(&bits[rng.random_range(0..bits.len())].to_le_bytes());
            }
        }
    }
}

/// Feeds `INPUTS` mutated inputs to `decode` (given the input and its number, for varying the
/// decoder's parameters), each under `catch_unwind`; returns (inputs, decoder calls, panics).
fn fuzz(
    name: &str,
    seed: u64,
    corpus: &[Vec<u8>],
    decode: impl Fn(&[u8], usize) -> usize,
) -> (usize, usize, usize) {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let (mut calls, mut panics) = (0usize, 0usize);
    let mut first_panics: Vec<Vec<u8>> = Vec::new();
    for k in 0..INPUTS {
        let mut input = corpus[rng.random_range(0..corpus.len())].clone();
        for _ in 0..rng.random_range(1..4) {
            mutate_once(&mut rng, &mut input, corpus);
        }
        match panic::catch_unwind(AssertUnwindSafe(|| decode(&input, k))) {
            Ok(n) => calls += n,
            Err(_) => {
                panics += 1;
                if first_panics.len() < 5 {
                    first_panics.push(input);
                }
            }
        }
    }
    println!("{name}: {INPUTS} inputs, {calls} decoder calls, {panics} panics (seed {seed})");
    for p in &first_panics {
        println!("  panicked on {}", quote(p, 300));
    }
    (INPUTS, calls, panics)
}

/// Dimensions the decoders are asked for: small ones, and ones whose products overflow.
const DIMS: [usize; 5] = [1, 3, 8, 1 << 62, usize::MAX];

#[test]
#[ignore = "fuzzing: run with benches/fuzz.sh"]
fn fuzz_text_messages() {
    let corpus = message_corpus(Encoding::Text);
    let (_, _, panics) = fuzz("fuzz_text_messages", 0x7e57_0001, &corpus, |input, k| {
        let dim = DIMS[k % DIMS.len()];
        let _ = decode_request(Encoding::Text, input, dim);
        let _ = decode_reply(Encoding::Text, input, Op::ALL[k % Op::ALL.len()], dim);
        let _ = decode_reply(Encoding::Text, input, Op::ALL[(k / 7) % Op::ALL.len()], 3);
        let _ = json::quote_bare_nonfinite(input);
        let mut scanned = k % 5;
        let _ = find_message(input, &mut scanned, Framing::Line { max: k % 300 });
        5
    });
    assert_eq!(panics, 0);
}

#[test]
#[ignore = "fuzzing: run with benches/fuzz.sh"]
fn fuzz_binary_frames() {
    let corpus = message_corpus(Encoding::Binary);
    let (_, _, panics) = fuzz("fuzz_binary_frames", 0x7e57_0002, &corpus, |input, k| {
        let dim = DIMS[k % DIMS.len()];
        let _ = decode_request(Encoding::Binary, input, dim);
        let _ = decode_reply(Encoding::Binary, input, Op::ALL[k % Op::ALL.len()], dim);
        let _ = decode_reply(Encoding::Binary, input, Op::ALL[(k / 7) % Op::ALL.len()], 3);
        let _ = binary::split_frame(input);
        let mut scanned = 0;
        let _ = find_message(
            input,
            &mut scanned,
            Framing::Frame {
                max_body: max_frame_body(dim),
            },
        );
        let _ = find_message(input, &mut scanned, Framing::Frame { max_body: k % 100 });
        6
    });
    assert_eq!(panics, 0);
}

#[test]
#[ignore = "fuzzing: run with benches/fuzz.sh"]
fn fuzz_hello() {
    let corpus = hello_corpus();
    let (_, _, panics) = fuzz("fuzz_hello", 0x7e57_0003, &corpus, |input, _| {
        let _ = decode_hello(input);
        let _ = decode_start(input);
        2
    });
    assert_eq!(panics, 0);
}

#[test]
fn the_fuzz_corpora_are_valid_and_the_mutations_change_them() {
    for enc in [Encoding::Text, Encoding::Binary] {
        for m in message_corpus(enc) {
            let ok = decode_request(enc, &m, 1).is_ok()
                || decode_request(enc, &m, 3).is_ok()
                || decode_request(enc, &m, 8).is_ok()
                || Op::ALL.iter().any(|op| {
                    [1, 3, 8]
                        .iter()
                        .any(|n| decode_reply(enc, &m, *op, *n).is_ok())
                });
            assert!(ok, "{enc:?}: {}", quote(&m, 200));
        }
    }
    for m in hello_corpus() {
        assert!(
            decode_hello(&m).is_ok() || decode_start(&m).is_ok(),
            "{}",
            quote(&m, 200)
        );
    }
    let corpus = message_corpus(Encoding::Binary);
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let changed = (0..200)
        .filter(|_| {
            let mut m = corpus[0].clone();
            mutate_once(&mut rng, &mut m, &corpus);
            m != corpus[0]
        })
        .count();
    assert!(
        changed > 150,
        "{changed} of 200 mutations changed the input"
    );
}
