//! A persistent record of evaluations, so that a run killed or interrupted before sampling can be
//! resumed without running the model again.
//!
//! The stages before sampling (gradient test, analysis, Hessian, Laplace check) are deterministic: run
//! again from the same settings they ask for the same points, bit for bit. [`Replay`] appends every
//! evaluation it makes to a file (`DIR/evaluations.vprec`) and, when the file already holds an
//! evaluation at exactly the same point, returns the recorded result instead of calling the problem.
//! So a resumed run reproduces the uninterrupted one exactly and spends model runs only where the
//! first run stopped. A torn last record (a kill during a write) is ignored; a record whose checksum
//! does not match stops the load with an error.
//!
//! Record layout (little-endian): kind u8 (1 cost, 2 cost+gradient, 3 Hessian-vector), n u32, the
//! point x (n f64), for kind 3 the direction v (n f64), then the result: the cost (f64) for kinds 1
//! and 2, the gradient or product (n f64) for kinds 2 and 3; then the FNV-1a hash (u64) of all the
//! record's bytes before it.

use std::collections::HashMap;
use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Read, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Mutex;

use super::{CostSplit, Prior, Problem};
use crate::error::{Error, EvalError, Result};
use crate::hash::Fnv64;

const MAGIC: &[u8; 8] = b"VPREC01\n";

#[derive(Clone, Copy, PartialEq, Eq, Hash)]
enum Kind {
    Cost = 1,
    Grad = 2,
    HessVec = 3,
}

type Key = (Kind, Vec<u64>);

struct Store {
    path: PathBuf,
    file: BufWriter<File>,
    known: HashMap<Key, (f64, Vec<f64>)>,
}

/// Wraps a problem; records and replays evaluations while a record file is attached and active.
pub struct Replay<P> {
    inner: P,
    store: Mutex<Option<Store>>,
    active: AtomicBool,
    replayed: AtomicU64,
}

fn key(kind: Kind, x: &[f64], v: Option<&[f64]>) -> Key {
    let mut bits: Vec<u64> = x.iter().map(|a| a.to_bits()).collect();
    if let Some(v) = v {
        bits.extend(v.iter().map(|a| a.to_bits()));
    }
    (kind, bits)
}

impl<P: Problem> Replay<P> {
    /// A pass-through wrapper with no record attached.
    pub fn new(inner: P) -> Self {
        Replay {
            inner,
            store: Mutex::new(None),
            active: AtomicBool::new(false),
            replayed: AtomicU64::new(0),
        }
    }

    /// The wrapped problem.
    pub fn inner(&self) -> &P {
        &self.inner
    }

    /// Attaches the record file at `path` (created if missing) and starts recording and replaying.
    /// Returns how many evaluations the file already held.
    pub fn attach(&self, path: &Path) -> Result<usize> {
        let n = self.inner.dim();
        let mut known = HashMap::new();
        let mut valid_len = MAGIC.len() as u64;
        if path.exists() {
            let mut bytes = Vec::new();
            File::open(path)
                .and_then(|mut f| f.read_to_end(&mut bytes))
                .map_err(|e| Error::io(path, e))?;
            if bytes.len() < MAGIC.len() || &bytes[..MAGIC.len()] != MAGIC {
                return Err(Error::format(
                    path,
                    "not a varpost evaluation record (bad header); move it away to start afresh",
                ));
            }
            let mut pos = MAGIC.len();
            while let Some((len, kind, x, v, cost, out)) =
                parse_record(&bytes[pos..], n).map_err(|m| Error::format(path, m))?
            {
                known.insert(key(kind, &x, v.as_deref()), (cost, out));
                pos += len;
            }
            valid_len = pos as u64;
        }
        let file = OpenOptions::new()
            .create(true)
            .append(false)
            .write(true)
            .truncate(false)
            .open(path)
            .map_err(|e| Error::io(path, e))?;
        // Cut a torn tail so new records follow the last complete one.
        file.set_len(valid_len.max(MAGIC.len() as u64))
            .map_err(|e| Error::io(path, e))?;
        let mut file = BufWriter::new(file);
        use std::io::Seek;
        file.seek(std::io::SeekFrom::Start(0))
            .map_err(|e| Error::io(path, e))?;
        file.write_all(MAGIC).map_err(|e| Error::io(path, e))?;
        file.seek(std::io::SeekFrom::Start(valid_len.max(MAGIC.len() as u64)))
            .map_err(|e| Error::io(path, e))?;
        let count = known.len();
        if let Ok(mut s) = self.store.lock() {
            *s = Some(Store {
                path: path.to_path_buf(),
                file,
                known,
            });
        }
        self.active.store(true, Ordering::SeqCst);
        Ok(count)
    }

    /// Stops recording and replaying (the sampler's own checkpoints take over); flushes the file.
    pub fn detach(&self) -> Result<()> {
        self.active.store(false, Ordering::SeqCst);
        if let Ok(mut s) = self.store.lock() {
            if let Some(mut st) = s.take() {
                st.file.flush().map_err(|e| Error::io(&st.path, e))?;
            }
        }
        Ok(())
    }

    /// Evaluations served from the record instead of the problem.
    pub fn replayed(&self) -> u64 {
        self.replayed.load(Ordering::Relaxed)
    }

    fn lookup(&self, k: &Key) -> Option<(f64, Vec<f64>)> {
        if !self.active.load(Ordering::SeqCst) {
            return None;
        }
        let s = self.store.lock().ok()?;
        let hit = s.as_ref()?.known.get(k).cloned();
        if hit.is_some() {
            self.replayed.fetch_add(1, Ordering::Relaxed);
        }
        hit
    }

    fn record(
        &self,
        kind: Kind,
        x: &[f64],
        v: Option<&[f64]>,
        cost: f64,
        out: &[f64],
    ) -> std::result::Result<(), EvalError> {
        if !self.active.load(Ordering::SeqCst) {
            return Ok(());
        }
        let mut bytes = Vec::with_capacity(16 + 8 * (2 * x.len() + 2));
        bytes.push(kind as u8);
        bytes.extend((x.len() as u32).to_le_bytes());
        x.iter().for_each(|a| bytes.extend(a.to_le_bytes()));
        if let Some(v) = v {
            v.iter().for_each(|a| bytes.extend(a.to_le_bytes()));
        }
        if kind != Kind::HessVec {
            bytes.extend(cost.to_le_bytes());
        }
        if kind != Kind::Cost {
            out.iter().for_each(|a| bytes.extend(a.to_le_bytes()));
        }
        let mut h = Fnv64::new();
        h.write(&bytes);
        bytes.extend(h.finish().to_le_bytes());
        let mut s = self.store.lock().map_err(|_| EvalError::Failed {
            message: "evaluation record lock poisoned".into(),
            recoverable: false,
        })?;
        if let Some(st) = s.as_mut() {
            let r = st.file.write_all(&bytes).and_then(|_| st.file.flush());
            if let Err(e) = r {
                return Err(EvalError::Failed {
                    message: format!(
                        "cannot append to the evaluation record {}: {e}",
                        st.path.display()
                    ),
                    recoverable: false,
                });
            }
            st.known.insert(key(kind, x, v), (cost, out.to_vec()));
        }
        Ok(())
    }
}

type Parsed = (usize, Kind, Vec<f64>, Option<Vec<f64>>, f64, Vec<f64>);

/// One record from the start of `b`: Ok(None) at the end or at a torn (incomplete) last record.
fn parse_record(b: &[u8], n: usize) -> std::result::Result<Option<Parsed>, String> {
    if b.len() < 5 {
        return Ok(None);
    }
    let kind = match b[0] {
        1 => Kind::Cost,
        2 => Kind::Grad,
        3 => Kind::HessVec,
        k => return Err(format!("unknown record kind {k}: the file is corrupt")),
    };
    let m = u32::from_le_bytes([b[1], b[2], b[3], b[4]]) as usize;
    if m != n {
        return Err(format!("records of dimension {m}, but the problem has dimension {n}: the file belongs to another problem"));
    }
    let vecs = match kind {
        Kind::Cost => 1,
        Kind::Grad => 2,
        Kind::HessVec => 3,
    };
    let scalars = usize::from(kind != Kind::HessVec);
    let len = 5 + 8 * (vecs * n + scalars) + 8;
    if b.len() < len {
        return Ok(None);
    }
    let mut h = Fnv64::new();
    h.write(&b[..len - 8]);
    let mut sum = [0u8; 8];
    sum.copy_from_slice(&b[len - 8..len]);
    if h.finish() != u64::from_le_bytes(sum) {
        return Err("a record's checksum does not match: the file is corrupt".into());
    }
    let f = |i: usize| {
        let mut a = [0u8; 8];
        a.copy_from_slice(&b[5 + 8 * i..13 + 8 * i]);
        f64::from_le_bytes(a)
    };
    let x: Vec<f64> = (0..n).map(f).collect();
    let mut i = n;
    let v = (kind == Kind::HessVec).then(|| {
        let v = (i..i + n).map(f).collect();
        i += n;
        v
    });
    let cost = if scalars == 1 {
        i += 1;
        f(i - 1)
    } else {
        0.0
    };
    let out = if kind == Kind::Cost {
        Vec::new()
    } else {
        (i..i + n).map(f).collect()
    };
    Ok(Some((len, kind, x, v, cost, out)))
}

impl<P: Problem> Problem for Replay<P> {
    fn dim(&self) -> usize {
        self.inner.dim()
    }
    fn component_names(&self) -> Option<Vec<String>> {
        self.inner.component_names()
    }
    fn cost_grad(&self, x: &[f64], grad: &mut [f64]) -> std::result::Result<f64, EvalError> {
        let k = key(Kind::Grad, x, None);
        if let Some((c, g)) = self.lookup(&k) {
            grad.copy_from_slice(&g);
            return Ok(c);
        }
        let c = self.inner.cost_grad(x, grad)?;
        self.record(Kind::Grad, x, None, c, grad)?;
        Ok(c)
    }
    fn cost(&self, x: &[f64]) -> std::result::Result<f64, EvalError> {
        if let Some((c, _)) = self.lookup(&key(Kind::Cost, x, None)) {
            return Ok(c);
        }
        let c = self.inner.cost(x)?;
        self.record(Kind::Cost, x, None, c, &[])?;
        Ok(c)
    }
    fn cost_batch(&self, xs: &[&[f64]]) -> Vec<std::result::Result<f64, EvalError>> {
        let mut out: Vec<Option<std::result::Result<f64, EvalError>>> = xs
            .iter()
            .map(|x| self.lookup(&key(Kind::Cost, x, None)).map(|(c, _)| Ok(c)))
            .collect();
        let missing: Vec<usize> = (0..xs.len()).filter(|&i| out[i].is_none()).collect();
        let todo: Vec<&[f64]> = missing.iter().map(|&i| xs[i]).collect();
        let fresh = self.inner.cost_batch(&todo);
        for (&i, r) in missing.iter().zip(fresh) {
            let r = r.and_then(|c| self.record(Kind::Cost, xs[i], None, c, &[]).map(|_| c));
            out[i] = Some(r);
        }
        out.into_iter()
            .map(|r| r.expect("every point evaluated"))
            .collect()
    }
    fn has_hess_vec(&self) -> bool {
        self.inner.has_hess_vec()
    }
    fn hess_vec(
        &self,
        x: &[f64],
        v: &[f64],
        out: &mut [f64],
    ) -> std::result::Result<(), EvalError> {
        if let Some((_, o)) = self.lookup(&key(Kind::HessVec, x, Some(v))) {
            out.copy_from_slice(&o);
            return Ok(());
        }
        self.inner.hess_vec(x, v, out)?;
        self.record(Kind::HessVec, x, Some(v), 0.0, out)
    }
    fn cost_split(&self, x: &[f64]) -> std::result::Result<Option<CostSplit>, EvalError> {
        self.inner.cost_split(x)
    }
    fn prior(&self) -> Option<&dyn Prior> {
        self.inner.prior()
    }
}

#[cfg(test)]
mod tests {
    use rand::{RngExt, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    use super::*;
    use crate::util::fuzz;

    /// The bytes of a valid record of `kind` in dimension `n`, as `Replay::record` writes them.
    fn valid_record(rng: &mut ChaCha8Rng, kind: u8, n: usize) -> Vec<u8> {
        let mut b = vec![kind];
        b.extend((n as u32).to_le_bytes());
        let vecs = match kind {
            1 => 1,
            2 => 2,
            _ => 3,
        };
        let scalars = usize::from(kind != 3);
        for _ in 0..vecs * n + scalars {
            b.extend(rng.random_range(-10.0..10.0f64).to_le_bytes());
        }
        let mut h = Fnv64::new();
        h.write(&b);
        b.extend(h.finish().to_le_bytes());
        b
    }

    /// Reads records from `b` as [`Replay::attach`] does, stopping at the end, a torn record or an
    /// error.
    fn read_all(b: &[u8], n: usize) -> usize {
        let mut pos = 0;
        let mut count = 0;
        while let Ok(Some((len, ..))) = parse_record(&b[pos..], n) {
            pos += len;
            count += 1;
        }
        count
    }

    #[test]
    fn records_round_trip_and_damage_is_an_error_or_a_torn_tail() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let mut b = Vec::new();
        for kind in [1, 2, 3] {
            b.extend(valid_record(&mut rng, kind, 3));
        }
        assert_eq!(read_all(&b, 3), 3);
        // A torn last record is the end, not an error.
        assert_eq!(read_all(&b[..b.len() - 5], 3), 2);
        // Another dimension, an unknown kind, a flipped bit: errors.
        let e = parse_record(&b, 4).err().unwrap();
        assert!(e.contains("dimension 3"), "{e}");
        let mut bad = b.clone();
        bad[0] = 9;
        assert!(parse_record(&bad, 3).err().unwrap().contains("kind 9"));
        bad[0] = 1;
        bad[9] ^= 4;
        assert!(parse_record(&bad, 3).err().unwrap().contains("checksum"));
    }

    /// Valid record sequences and mutations of them through `parse_record`, in the problem's
    /// dimension or another one.
    #[test]
    #[ignore]
    fn fuzz_evaluation_record_reader() {
        let mut rng = ChaCha8Rng::seed_from_u64(0x7ec0);
        let corpus: Vec<Vec<u8>> = (0..64)
            .map(|k| {
                let n = 1 + k % 4;
                (0..rng.random_range(1..=4))
                    .flat_map(|_| {
                        let kind = rng.random_range(1..=3u8);
                        valid_record(&mut rng, kind, n)
                    })
                    .collect()
            })
            .collect();
        let make = |rng: &mut ChaCha8Rng| {
            let base = &corpus[rng.random_range(0..corpus.len())];
            let mut b = fuzz::mutate(rng, base, &corpus);
            // The dimension the reader expects, in the first byte of the input.
            b.insert(0, rng.random_range(1..=5u8));
            b
        };
        fuzz::run(
            "fuzz_evaluation_record_reader",
            fuzz::INPUTS,
            &mut rng,
            make,
            |b| {
                // Accepted: at least one whole record read.
                b.split_first()
                    .is_some_and(|(&n, rest)| read_all(rest, usize::from(n)) > 0)
            },
        );
    }
}
