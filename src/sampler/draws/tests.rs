//! Tests of the draws files: round trip, resume, damaged and edited files, and the fuzzing of the
//! reader.

use std::fs::OpenOptions;
use std::io::Write;

use rand::{RngExt, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::*;
use crate::util::fuzz;

fn rec(k: usize) -> DrawRecord {
    DrawRecord {
        x: vec![k as f64, -(k as f64) / 3.0],
        log_density: -0.5 * k as f64,
        accept_prob: 0.25,
        energy: f64::NAN,
        step_size: 0.1,
        flags: FLAG_ACCEPTED,
        n_steps: 7,
    }
}

fn temp(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("varpost-draws-{name}-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[test]
fn round_trip_resume_cuts_and_partial_records_are_ignored() {
    let dir = temp("round-trip");
    let p = draws_path(&dir, 1);
    let mut w = DrawsWriter::create(&p, 2, 1).unwrap();
    for k in 0..5 {
        w.append(&rec(k)).unwrap();
    }
    w.sync().unwrap();
    drop(w);
    // A half-written record at the end.
    let mut f = OpenOptions::new().append(true).open(&p).unwrap();
    f.write_all(&[1, 2, 3]).unwrap();
    drop(f);
    let r = DrawsFile::open(&p).unwrap();
    assert_eq!((r.dim, r.chain, r.records), (2, 1, 5));
    let got: Vec<DrawRecord> = r.iter().unwrap().map(|x| x.unwrap()).collect();
    assert_eq!(got[3].x, rec(3).x);
    assert_eq!(got[3].n_steps, 7);
    assert!(got[3].energy.is_nan());
    let mut w = DrawsWriter::resume(&p, 2, 1, 3).unwrap();
    w.append(&rec(9)).unwrap();
    w.sync().unwrap();
    let c = DrawsFile::open(&p).unwrap().components(&[0]).unwrap();
    assert_eq!(c[0], vec![0.0, 1.0, 2.0, 9.0]);
    assert!(DrawsWriter::resume(&p, 2, 1, 10).is_err());
    assert!(DrawsWriter::resume(&p, 3, 1, 1).is_err());
    std::fs::write(&p, b"garbage that is long enough to hold a header....").unwrap();
    assert!(DrawsFile::open(&p)
        .unwrap_err()
        .to_string()
        .contains("magic"));
    std::fs::remove_dir_all(&dir).unwrap();
}

/// Writes records 0..3 of [`rec`], lets `edit` change the bytes, and returns the reader's error.
fn read_edited(dir: &Path, edit: impl Fn(&mut Vec<u8>)) -> String {
    let p = draws_path(dir, 0);
    let mut w = DrawsWriter::create(&p, 2, 0).unwrap();
    for k in 0..3 {
        w.append(&rec(k)).unwrap();
    }
    w.sync().unwrap();
    drop(w);
    let mut bytes = std::fs::read(&p).unwrap();
    edit(&mut bytes);
    std::fs::write(&p, &bytes).unwrap();
    let read = DrawsFile::open(&p).and_then(|f| f.iter()?.collect::<crate::Result<Vec<_>>>());
    read.unwrap_err().to_string()
}

#[test]
fn edited_records_and_headers_are_errors_naming_the_field() {
    let dir = temp("edited");
    let rb = record_bytes(2) as usize;
    let slot = |bytes: &mut Vec<u8>, record: usize, field: usize, v: f64| {
        let at = 32 + record * rb + 8 * field;
        bytes[at..at + 8].copy_from_slice(&v.to_le_bytes());
    };
    let e = read_edited(&dir, |b| slot(b, 1, 3, 2.0));
    assert!(
        e.contains("record 1") && e.contains("acceptance probability is 2"),
        "{e}"
    );
    let e = read_edited(&dir, |b| slot(b, 2, 0, f64::NAN));
    assert!(
        e.contains("record 2") && e.contains("component 0 of the draw is NaN"),
        "{e}"
    );
    let e = read_edited(&dir, |b| slot(b, 0, 5, -1.0));
    assert!(e.contains("step size is -1"), "{e}");
    let e = read_edited(&dir, |b| slot(b, 0, 4, f64::INFINITY));
    assert!(e.contains("energy is inf"), "{e}");
    let e = read_edited(&dir, |b| b[32 + rb + 8 * 6] = 0x40);
    assert!(e.contains("flags 0x40 have unknown bits"), "{e}");
    let e = read_edited(&dir, |b| b[12..16].copy_from_slice(&0u32.to_le_bytes()));
    assert!(e.contains("dimension 0"), "{e}");
    let e = read_edited(&dir, |b| b[28] = 1);
    assert!(e.contains("reserved bytes"), "{e}");
    // A header whose dimension and record size agree but promise more than the file holds: no records,
    // no huge buffer.
    let huge = 1usize << 28;
    let p = draws_path(&dir, 3);
    std::fs::write(&p, header(huge, 3)).unwrap();
    let f = DrawsFile::open(&p).unwrap();
    assert_eq!((f.dim, f.records), (huge, 0));
    assert_eq!(f.components(&[huge - 1]).unwrap(), vec![Vec::<f64>::new()]);
    // A truncated record is cut off as before: the complete ones read.
    let p = draws_path(&dir, 0);
    let mut w = DrawsWriter::create(&p, 2, 0).unwrap();
    for k in 0..3 {
        w.append(&rec(k)).unwrap();
    }
    w.sync().unwrap();
    drop(w);
    let bytes = std::fs::read(&p).unwrap();
    std::fs::write(&p, &bytes[..32 + rb + 5]).unwrap();
    let f = DrawsFile::open(&p).unwrap();
    assert_eq!(f.records, 1);
    assert_eq!(f.components(&[1]).unwrap(), vec![vec![0.0]]);
    std::fs::remove_dir_all(&dir).unwrap();
}

/// A valid file: random dimension, chain and records as the sampler writes them.
fn valid_file(rng: &mut ChaCha8Rng) -> Vec<u8> {
    let dim = rng.random_range(1..=4usize);
    let mut b = header(dim, rng.random_range(0..4)).to_vec();
    for _ in 0..rng.random_range(0..=4) {
        let hmc = rng.random_bool(0.5);
        let r = DrawRecord {
            x: (0..dim).map(|_| rng.random_range(-3.0..3.0)).collect(),
            log_density: rng.random_range(-50.0..0.0),
            accept_prob: rng.random(),
            energy: if hmc {
                rng.random_range(0.0..50.0)
            } else {
                f64::NAN
            },
            step_size: if rng.random_bool(0.8) {
                rng.random_range(0.01..1.0)
            } else {
                f64::NAN
            },
            flags: rng.random_range(0..=ALL_FLAGS),
            n_steps: rng.random_range(0..100),
        };
        encode_record(&r, &mut b);
    }
    b
}

/// The reader's work on the bytes of a whole file: the header, then every complete record; whether
/// all of it was accepted.
fn read_bytes(b: &[u8]) -> bool {
    let Ok(h) = parse_header(&b[..b.len().min(32)], b.len() as u64) else {
        return false;
    };
    let rb = record_bytes(h.dim) as usize;
    (0..h.records as usize).all(|k| {
        let at = HEADER_BYTES as usize + k * rb;
        decode_record(&b[at..at + rb], h.dim).is_ok()
    })
}

/// Valid files and mutations of them through the reader; every thousandth input also goes through the
/// file itself ([`DrawsFile::open`] and the record iterator).
#[test]
#[ignore]
fn fuzz_draws_reader() {
    let mut rng = ChaCha8Rng::seed_from_u64(0xd4a5);
    let corpus: Vec<Vec<u8>> = (0..64).map(|_| valid_file(&mut rng)).collect();
    let dir = temp("fuzz");
    let path = draws_path(&dir, 0);
    let mut made = 0u64;
    let make = |rng: &mut ChaCha8Rng| {
        let base = if rng.random_bool(0.1) {
            valid_file(rng)
        } else {
            corpus[rng.random_range(0..corpus.len())].clone()
        };
        if rng.random_bool(0.05) {
            base
        } else {
            fuzz::mutate(rng, &base, &corpus)
        }
    };
    fuzz::run("fuzz_draws_reader", fuzz::INPUTS, &mut rng, make, |b| {
        let ok = read_bytes(b);
        made += 1;
        if made % 1000 == 0 {
            std::fs::write(&path, b).unwrap();
            if let Ok(f) = DrawsFile::open(&path) {
                if let Ok(it) = f.iter() {
                    it.for_each(drop);
                }
                let _ = f.components(&[0]);
            }
        }
        ok
    });
    std::fs::remove_dir_all(&dir).unwrap();
}
