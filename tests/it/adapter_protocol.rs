//! The adapter protocol's messages: every message round-trips in both encodings, bit for bit, and the
//! decoders survive arbitrary bytes.

use std::borrow::Cow;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use varpost::adapter::protocol::{
    decode_hello, decode_reply, decode_request, decode_start, encode_hello, encode_reply,
    encode_request, encode_start, Capabilities, Encoding, Hello, Op, Reply, Request,
};

const ENCODINGS: [Encoding; 2] = [Encoding::Text, Encoding::Binary];

/// Values that a lossy float printer or parser gets wrong: the shortest decimal form of 0.1 + 0.2, the
/// smallest subnormal, the largest finite double, negative zero, and the non-finite values (IEEE 754-2008
/// binary64 facts; common practice, no source).
fn awkward(n: usize, shift: f64) -> Vec<f64> {
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
    (0..n)
        .map(|i| special[i % special.len()] * if i % 3 == 0 { 1.0 } else { shift })
        .collect()
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter()
        .map(|x| {
            if x.is_nan() {
                f64::NAN.to_bits()
            } else {
                x.to_bits()
            }
        })
        .collect()
}

fn reply_bits(r: &Reply) -> (String, Vec<u64>) {
    match r {
        Reply::CostGrad { cost, grad } => {
            ("cost_grad".into(), [bits(&[*cost]), bits(grad)].concat())
        }
        Reply::Cost { cost } => ("cost".into(), bits(&[*cost])),
        Reply::HessVec { hv } => ("hess_vec".into(), bits(hv)),
        Reply::Split { jb, jo } => ("split".into(), bits(&[*jb, *jo])),
        Reply::Background { xb, var, log_det } => (
            "background".into(),
            [bits(xb), bits(var), bits(&[*log_det])].concat(),
        ),
        Reply::Vector { out } => ("vector".into(), bits(out)),
        Reply::Error {
            message,
            recoverable,
        } => (format!("error {message} {recoverable}"), vec![]),
    }
}

#[test]
fn every_request_round_trips_in_both_encodings() {
    let n = 23;
    let x = awkward(n, 1.0);
    let v = awkward(n, -7.25);
    for enc in ENCODINGS {
        for (k, op) in Op::ALL.into_iter().enumerate() {
            let req = Request::new(op, &x, &v);
            let mut buf = Vec::new();
            let id = 1 + k as u64 * 1_000_000_007;
            encode_request(enc, id, &req, &mut buf);
            let (got_id, got) = decode_request(enc, &buf, n).expect("decodes");
            assert_eq!(got_id, id, "{enc:?} {op:?}");
            assert_eq!(got.op, op);
            let (want_x, want_v): (&[f64], &[f64]) = match op {
                Op::CostGrad | Op::Cost | Op::Split => (&x, &[]),
                Op::HessVec => (&x, &v),
                Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve => (&[], &v),
                Op::Background | Op::Quit => (&[], &[]),
            };
            assert_eq!(bits(&got.x), bits(want_x), "{enc:?} {op:?} x");
            assert_eq!(bits(&got.v), bits(want_v), "{enc:?} {op:?} v");
            if enc == Encoding::Text {
                assert_eq!(
                    buf.iter().filter(|&&b| b == b'\n').count(),
                    1,
                    "one line per message"
                );
            }
        }
    }
}

#[test]
fn every_reply_round_trips_in_both_encodings() {
    let n = 17;
    let a = awkward(n, 3.0);
    let b = awkward(n, -0.5);
    let replies = [
        (
            Op::CostGrad,
            Reply::CostGrad {
                cost: 0.1 + 0.2,
                grad: a.clone(),
            },
        ),
        (
            Op::CostGrad,
            Reply::CostGrad {
                cost: f64::NAN,
                grad: b.clone(),
            },
        ),
        (Op::Cost, Reply::Cost { cost: 5e-324 }),
        (
            Op::Cost,
            Reply::Cost {
                cost: f64::NEG_INFINITY,
            },
        ),
        (Op::HessVec, Reply::HessVec { hv: b.clone() }),
        (
            Op::Split,
            Reply::Split {
                jb: 1.0 / 3.0,
                jo: f64::MAX,
            },
        ),
        (
            Op::Background,
            Reply::Background {
                xb: a.clone(),
                var: b.clone(),
                log_det: -12.75,
            },
        ),
        (Op::BHalf, Reply::Vector { out: a.clone() }),
        (Op::BHalfT, Reply::Vector { out: b.clone() }),
        (Op::BHalfSolve, Reply::Vector { out: a.clone() }),
        (Op::BHalfTSolve, Reply::Vector { out: b.clone() }),
        (
            Op::CostGrad,
            Reply::Error {
                message: "model blew up: \"dt\" too large\nat step 3 — ∞".into(),
                recoverable: true,
            },
        ),
        (
            Op::Split,
            Reply::Error {
                message: "no observations".into(),
                recoverable: false,
            },
        ),
    ];
    for enc in ENCODINGS {
        for (k, (op, reply)) in replies.iter().enumerate() {
            let mut buf = Vec::new();
            let id = u64::MAX - k as u64;
            encode_reply(enc, id, *op, reply, &mut buf);
            let (got_id, got) = decode_reply(enc, &buf, *op, n).expect("decodes");
            assert_eq!(got_id, id);
            assert_eq!(reply_bits(&got), reply_bits(reply), "{enc:?} {op:?}");
        }
    }
}

#[test]
fn hello_and_start_round_trip() {
    let hello = Hello {
        protocol: 1,
        dim: 3,
        encodings: vec![Encoding::Binary, Encoding::Text],
        offers: Capabilities {
            hess_vec: true,
            split: true,
            prior: true,
            prior_solve: true,
        },
        names: Some(vec!["T(1)".into(), "u \"east\"".into(), "q".into()]),
        label: Some("advection 4D-Var".into()),
    };
    assert_eq!(decode_hello(&encode_hello(&hello)).unwrap(), hello);
    let minimal = br#"{"hello":"varpost-adapter","protocol":1,"dim":40}"#;
    let h = decode_hello(minimal).unwrap();
    assert_eq!(
        (h.dim, h.encodings.clone(), h.offers),
        (40, vec![Encoding::Text], Capabilities::default())
    );
    for enc in ENCODINGS {
        assert_eq!(decode_start(&encode_start(enc)).unwrap(), enc);
    }
}

#[test]
fn handshake_errors_name_the_problem() {
    let e = decode_hello(br#"{"hello":"varpost-adapter","protocol":2,"dim":4}"#)
        .unwrap_err()
        .to_string();
    assert!(e.contains("version 2") && e.contains("version 1"), "{e}");
    let e = decode_hello(b"Reading namelist...\n")
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("Reading namelist...") && e.contains("stderr"),
        "{e}"
    );
    let e =
        decode_hello(br#"{"hello":"varpost-adapter","protocol":1,"dim":4,"offers":["hessian"]}"#)
            .unwrap_err()
            .to_string();
    assert!(e.contains("unknown capability \"hessian\""), "{e}");
    let e = decode_hello(br#"{"hello":"varpost-adapter","protocol":1,"dim":2,"names":["a"]}"#)
        .unwrap_err()
        .to_string();
    assert!(e.contains("length 1, expected 2"), "{e}");
}

#[test]
fn text_replies_accept_the_bare_nonfinite_tokens_of_common_json_writers() {
    // Python's json.dumps writes NaN, Infinity and -Infinity by default (Python documentation, json module,
    // "allow_nan"; from memory).
    let (_, r) = decode_reply(
        Encoding::Text,
        br#"{"id":3,"cost":NaN,"grad":[Infinity,-Infinity]}"#,
        Op::CostGrad,
        2,
    )
    .unwrap();
    let Reply::CostGrad { cost, grad } = r else {
        panic!("wrong reply kind")
    };
    assert!(cost.is_nan() && grad == vec![f64::INFINITY, f64::NEG_INFINITY]);
    // Integers are numbers too.
    let (_, r) = decode_reply(
        Encoding::Text,
        br#"{"id":1,"cost":3,"grad":[1,-2]}"#,
        Op::CostGrad,
        2,
    )
    .unwrap();
    assert_eq!(
        r,
        Reply::CostGrad {
            cost: 3.0,
            grad: vec![1.0, -2.0]
        }
    );
}

#[test]
fn wrong_replies_are_errors_that_say_what_arrived() {
    let e = decode_reply(
        Encoding::Text,
        br#"{"id":1,"cost":1.0,"grad":[1.0]}"#,
        Op::CostGrad,
        2,
    )
    .unwrap_err();
    assert_eq!(e.to_string(), "gradient has length 1, expected 2");
    let e = decode_reply(Encoding::Text, br#"{"id":1,"cost":1.0}"#, Op::CostGrad, 2)
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("no \"grad\" field") && e.contains(r#"{\"id\":1,\"cost\":1.0}"#),
        "{e}"
    );
    let e = decode_reply(Encoding::Text, b"Step 3 done", Op::Cost, 2)
        .unwrap_err()
        .to_string();
    assert!(e.contains("Step 3 done"), "{e}");
    let mut buf = Vec::new();
    encode_reply(
        Encoding::Binary,
        5,
        Op::Cost,
        &Reply::Cost { cost: 1.0 },
        &mut buf,
    );
    let e = decode_reply(Encoding::Binary, &buf, Op::CostGrad, 2)
        .unwrap_err()
        .to_string();
    assert!(e.contains("does not answer a cost_grad request"), "{e}");
}

/// Arbitrary bytes, and valid messages with random bytes changed, never make a decoder panic. Each
/// round feeds one input to every decoder (hello, start, requests and replies in both encodings):
/// 20,000 rounds in the quick run, `VARPOST_FUZZ_ROUNDS` (1,000,000 in `bash benches/fuzz.sh`) there.
#[test]
fn decoders_never_panic_on_arbitrary_bytes() {
    let rounds: u64 = std::env::var("VARPOST_FUZZ_ROUNDS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(20_000);
    let mut rng = ChaCha8Rng::seed_from_u64(20261202);
    let n = 3;
    let mut valid: Vec<(Encoding, Vec<u8>)> = Vec::new();
    for enc in ENCODINGS {
        for op in Op::ALL {
            let mut b = Vec::new();
            encode_request(
                enc,
                7,
                &Request {
                    op,
                    x: Cow::Owned(vec![1.5; n]),
                    v: Cow::Owned(vec![-2.0; n]),
                },
                &mut b,
            );
            valid.push((enc, b));
        }
        let mut b = Vec::new();
        encode_reply(
            enc,
            7,
            Op::CostGrad,
            &Reply::CostGrad {
                cost: 1.0,
                grad: vec![0.5; n],
            },
            &mut b,
        );
        valid.push((enc, b));
        let mut b = Vec::new();
        encode_reply(
            enc,
            7,
            Op::Background,
            &Reply::Background {
                xb: vec![1.0; n],
                var: vec![2.0; n],
                log_det: 0.1,
            },
            &mut b,
        );
        valid.push((enc, b));
    }
    valid.push((
        Encoding::Text,
        encode_hello(&Hello {
            protocol: 1,
            dim: n,
            encodings: vec![Encoding::Text],
            offers: Capabilities {
                hess_vec: true,
                ..Default::default()
            },
            names: None,
            label: None,
        }),
    ));
    let alphabet = b"{}[]\":,0123456789.eE+-nainfNaIy \n\\id\x00\xff";
    for round in 0..rounds {
        let bytes: Vec<u8> = match round % 3 {
            0 => (0..rng.random_range(0..64))
                .map(|_| rng.random::<u8>())
                .collect(),
            1 => (0..rng.random_range(0..80))
                .map(|_| alphabet[rng.random_range(0..alphabet.len())])
                .collect(),
            _ => {
                let (_, v) = &valid[rng.random_range(0..valid.len())];
                let mut v = v.clone();
                for _ in 0..rng.random_range(1..4) {
                    let i = rng.random_range(0..v.len());
                    v[i] = rng.random::<u8>();
                }
                if rng.random::<bool>() {
                    v.truncate(rng.random_range(0..v.len()));
                }
                v
            }
        };
        let _ = decode_hello(&bytes);
        let _ = decode_start(&bytes);
        for enc in ENCODINGS {
            let _ = decode_request(enc, &bytes, n);
            for op in Op::ALL {
                let _ = decode_reply(enc, &bytes, op, n);
            }
        }
    }
    println!(
        "protocol decoders (hello, start, requests and replies, text and binary): {rounds} inputs each, 0 panics"
    );
}

/// The code blocks of adapters/PROTOCOL.md between the fence lines opening with `lang`.
fn doc_blocks(lang: &str) -> Vec<String> {
    let doc = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/adapters/PROTOCOL.md"))
        .unwrap();
    let mut blocks = Vec::new();
    let mut cur: Option<String> = None;
    for line in doc.lines() {
        match (&mut cur, line.trim_start().starts_with("```")) {
            (None, true) if line.trim() == format!("```{lang}") => cur = Some(String::new()),
            (Some(_), true) => blocks.push(cur.take().unwrap_or_default()),
            (Some(b), false) => {
                b.push_str(line);
                b.push('\n');
            }
            _ => {}
        }
    }
    blocks
}

#[test]
fn the_documented_text_examples_decode() {
    let blocks = doc_blocks("json");
    let requests = blocks
        .iter()
        .find(|b| b.contains("\"op\":\"b_half_t_solve\""))
        .unwrap();
    for line in requests.lines() {
        decode_request(Encoding::Text, line.as_bytes(), 3)
            .unwrap_or_else(|e| panic!("{line}: {e}"));
    }
    let replies = blocks.iter().find(|b| b.contains("\"hv\"")).unwrap();
    let ops = [
        Op::CostGrad,
        Op::Cost,
        Op::HessVec,
        Op::Split,
        Op::Background,
        Op::BHalf,
        Op::CostGrad,
    ];
    for (line, op) in replies.lines().zip(ops) {
        decode_reply(Encoding::Text, line.as_bytes(), op, 3)
            .unwrap_or_else(|e| panic!("{line}: {e}"));
    }
}

#[test]
fn the_documented_binary_frame_decodes() {
    let doc = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/adapters/PROTOCOL.md"))
        .unwrap();
    let line = doc
        .lines()
        .find(|l| l.starts_with("1c 00 00 00"))
        .expect("the example frame");
    let bytes: Vec<u8> = line
        .split_whitespace()
        .map(|h| u8::from_str_radix(h, 16).unwrap())
        .collect();
    let (id, req) = decode_request(Encoding::Binary, &bytes, 2).unwrap();
    assert_eq!(
        (id, req.op, req.x.to_vec()),
        (7, Op::CostGrad, vec![1.0, -2.0])
    );
    let mut enc = Vec::new();
    encode_request(
        Encoding::Binary,
        7,
        &Request::new(Op::CostGrad, &[1.0, -2.0], &[]),
        &mut enc,
    );
    assert_eq!(enc, bytes);
}
