//! Tests of the checkpoint file: refusals of missing, corrupt, foreign and inconsistent files, and the
//! fuzzing of the decoder.

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::Value;

use super::*;
use crate::adapt::Warmup;
use crate::sampler::state::{ChainCheckpoint, RngState};
use crate::sampler::{ChainRng, ChainState, KernelKind, Welford};
use crate::util::fuzz;

/// The version-1 fixture (see tests/it/fixtures/README.md).
const FIXTURE: &[u8] = include_bytes!("../../../tests/it/fixtures/checkpoint-v1/checkpoint.vpck");

#[test]
fn a_missing_checkpoint_says_so() {
    let e = Checkpoint::load(Path::new("/nonexistent-varpost-folder")).unwrap_err();
    assert!(e.to_string().contains("no run to resume"), "{e}");
}

#[test]
fn corrupt_and_foreign_files_are_refused() {
    let p = PathBuf::from("x");
    assert!(Checkpoint::decode(&p, b"hello")
        .unwrap_err()
        .to_string()
        .contains("header"));
    let e = Checkpoint::decode(&p, b"varpost-checkpoint 1 fnv1a64=0000000000000000\n{}");
    assert!(e.unwrap_err().to_string().contains("checksum"));
    let e = Checkpoint::decode(&p, b"varpost-checkpoint 99 fnv1a64=0\n{}");
    assert!(e.unwrap_err().to_string().contains("version 99"));
    let e = Checkpoint::decode(&p, b"varpost-checkpoint x fnv1a64=0\n{}");
    assert!(e.unwrap_err().to_string().contains("format version ('x')"));
}

/// A consistent checkpoint of a run that has just started: `chains` chains of `kernel` in dimension
/// `dim`, as [`crate::sampler::run`] saves it before the first iteration.
fn fresh(kernel: KernelKind, dim: usize, chains: usize) -> Checkpoint {
    let config = SampleConfig {
        kernel,
        chains,
        warmup: 10,
        draws: 5,
        ..Default::default()
    };
    let spec = config.build_kernel().unwrap().spec(dim);
    let chains = (0..chains)
        .map(|c| {
            let mut rng = ChainRng::seed_from_u64(config.seed);
            rng.set_stream(c as u64);
            let warmup = match spec.step_size {
                Some(s) => Warmup::init(10, dim, s.initial, s.target_accept, true, false),
                None => Warmup::init(10, dim, 1.0, 0.5, false, false),
            }
            .unwrap();
            ChainCheckpoint {
                iteration: 0,
                records: 0,
                state: ChainState {
                    u: vec![0.1; dim],
                    log_density: -1.5,
                    grad: if spec.uses_gradient {
                        vec![-0.1; dim]
                    } else {
                        Vec::new()
                    },
                },
                rng: RngState::save(&rng),
                step_size: warmup.finish(),
                warmup,
                stats: Default::default(),
                moments: Welford::new(dim),
                window: Vec::new(),
            }
        })
        .collect();
    Checkpoint {
        crate_version: env!("CARGO_PKG_VERSION").into(),
        problem: "test".into(),
        dim,
        precond: "identity".into(),
        target_fingerprint: 1,
        config,
        chains,
        counts_warmup: Default::default(),
        counts_sampling: Default::default(),
        plan: None,
        extra_draws: 0,
        complete: false,
    }
}

fn bytes_of(ck: &Checkpoint) -> Vec<u8> {
    encode(&serde_json::to_vec(ck).unwrap())
}

#[test]
fn consistent_checkpoints_load_and_the_fixture_is_one() {
    let p = PathBuf::from("x");
    for kernel in [KernelKind::Mala, KernelKind::Hmc, KernelKind::LaplaceMh] {
        let ck = fresh(kernel, 3, 2);
        assert_eq!(Checkpoint::decode(&p, &bytes_of(&ck)).unwrap(), ck);
    }
    let ck = Checkpoint::decode(&p, FIXTURE).unwrap();
    assert_eq!(Checkpoint::decode(&p, &bytes_of(&ck)).unwrap(), ck);
}

#[test]
fn swapped_chains_and_a_wrong_gradient_are_refused() {
    let p = PathBuf::from("x");
    let mut ck = fresh(KernelKind::Mala, 2, 2);
    ck.chains.swap(0, 1);
    let e = Checkpoint::decode(&p, &bytes_of(&ck))
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("chains[0].rng") && e.contains("start a new run"),
        "{e}"
    );
    let mut ck = fresh(KernelKind::LaplaceMh, 2, 1);
    ck.chains[0].state.grad = vec![0.0, 0.0];
    let e = Checkpoint::decode(&p, &bytes_of(&ck))
        .unwrap_err()
        .to_string();
    assert!(
        e.contains("chains[0].state.grad has 2 entries, expected 0"),
        "{e}"
    );
    let mut ck = fresh(KernelKind::Hmc, 2, 1);
    ck.complete = true;
    let e = Checkpoint::decode(&p, &bytes_of(&ck))
        .unwrap_err()
        .to_string();
    assert!(e.contains("complete is true"), "{e}");
    let mut ck = fresh(KernelKind::Hmc, 2, 1);
    ck.config.thin = 0;
    let e = Checkpoint::decode(&p, &bytes_of(&ck))
        .unwrap_err()
        .to_string();
    assert!(e.contains("config: ") && e.contains("thin"), "{e}");
}

/// Every JSON pointer into `v` (the root included).
fn pointers(v: &Value, at: String, out: &mut Vec<String>) {
    match v {
        Value::Array(a) => a
            .iter()
            .enumerate()
            .for_each(|(i, x)| pointers(x, format!("{at}/{i}"), out)),
        Value::Object(o) => o
            .iter()
            .for_each(|(k, x)| pointers(x, format!("{at}/{k}"), out)),
        _ => {}
    }
    out.push(at);
}

/// One to three edits of the JSON value: a node set to an extreme value, an array shortened,
/// lengthened or emptied, a key removed or added.
fn edit_value(rng: &mut ChaCha8Rng, v: &mut Value, ptrs: &[String]) {
    let extremes = || -> [Value; 12] {
        [
            u64::MAX.into(),
            (-1).into(),
            0.into(),
            1e308.into(),
            (-1e308).into(),
            5e-324.into(),
            0.5.into(),
            Value::Null,
            true.into(),
            "x".into(),
            Value::Array(Vec::new()),
            Value::Object(Default::default()),
        ]
    };
    for _ in 0..rng.random_range(1..=3) {
        let p = &ptrs[rng.random_range(0..ptrs.len())];
        let Some(node) = v.pointer_mut(p) else {
            continue;
        };
        match node {
            Value::Array(a) if rng.random_bool(0.5) => match rng.random_range(0..3) {
                0 => drop(a.pop()),
                1 if !a.is_empty() => a.push(a[0].clone()),
                _ => a.clear(),
            },
            Value::Object(o) if rng.random_bool(0.5) => {
                if rng.random_bool(0.5) {
                    let keys: Vec<String> = o.keys().cloned().collect();
                    if !keys.is_empty() {
                        o.remove(&keys[rng.random_range(0..keys.len())]);
                    }
                } else {
                    o.insert("extra".into(), 1.into());
                }
            }
            _ => {
                let x = extremes();
                *node = x[rng.random_range(0..x.len())].clone();
            }
        }
    }
}

/// Mutated checkpoints through the decoder and the validation: byte mutations of the file (mostly
/// refused by the checksum), byte mutations of the payload with the checksum recomputed (reaching the
/// JSON parser), and edits of the JSON content with the checksum recomputed (reaching the validation).
#[test]
#[ignore]
fn fuzz_checkpoint_decoder() {
    let mut rng = ChaCha8Rng::seed_from_u64(0xc4ec);
    let templates: Vec<Checkpoint> = vec![
        Checkpoint::decode(Path::new("fixture"), FIXTURE).unwrap(),
        fresh(KernelKind::Mala, 2, 3),
        fresh(KernelKind::LaplaceMh, 1, 1),
        fresh(KernelKind::Hmc, 4, 2),
    ];
    let values: Vec<Value> = templates
        .iter()
        .map(|t| serde_json::to_value(t).unwrap())
        .collect();
    let ptrs: Vec<Vec<String>> = values
        .iter()
        .map(|v| {
            let mut out = Vec::new();
            pointers(v, String::new(), &mut out);
            out
        })
        .collect();
    let corpus: Vec<Vec<u8>> = templates.iter().map(bytes_of).collect();
    let payloads: Vec<Vec<u8>> = templates
        .iter()
        .map(|t| serde_json::to_vec(t).unwrap())
        .collect();
    let make = |rng: &mut ChaCha8Rng| {
        let t = rng.random_range(0..templates.len());
        match rng.random_range(0..10) {
            0..=2 => fuzz::mutate(rng, &corpus[t], &corpus),
            3..=5 => encode(&fuzz::mutate(rng, &payloads[t], &payloads)),
            _ => {
                let mut v = values[t].clone();
                edit_value(rng, &mut v, &ptrs[t]);
                encode(&serde_json::to_vec(&v).unwrap())
            }
        }
    };
    let path = Path::new("fuzz");
    fuzz::run(
        "fuzz_checkpoint_decoder",
        fuzz::INPUTS,
        &mut rng,
        make,
        |b| Checkpoint::decode(path, b).is_ok(),
    );
}

#[test]
fn the_run_length_counts_the_extension() {
    let p = PathBuf::from("x");
    // Warm-up 10 and 5 draws: 15 iterations; extended by 7 draws: 22.
    for (extra, total) in [(0u64, 15u64), (7, 22)] {
        let mut ck = fresh(KernelKind::Mala, 2, 1);
        ck.extra_draws = extra;
        ck.complete = true;
        let e = Checkpoint::decode(&p, &bytes_of(&ck))
            .unwrap_err()
            .to_string();
        assert!(e.contains(&format!("iteration is 0 of {total}")), "{e}");
        // It round-trips, and a run never extended writes no such field.
        ck.complete = false;
        let back = Checkpoint::decode(&p, &bytes_of(&ck)).unwrap();
        assert_eq!(back.extra_draws, extra);
        let text = String::from_utf8(bytes_of(&ck)).unwrap();
        assert_eq!(text.contains("extra_draws"), extra > 0);
    }
}
