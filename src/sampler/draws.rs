//! The per-chain draws files: append-only, fixed-size little-endian records, so that a run killed at
//! any moment keeps every record already written, and a reader can pick one component without loading
//! the rest.
//!
//! Layout (all little-endian):
//!
//! ```text
//! header (32 bytes): magic "VPDRAWS\0" | version u32 | dim u32 | chain u32 | record bytes u32 | 0 u64
//! record (8 (dim + 5) bytes): x[0..dim] f64 (model space) | log π f64 | acceptance probability f64 |
//!                             energy f64 (HMC, else NaN) | step size f64 (NaN if none) |
//!                             flags u32 (1 accepted, 2 divergent, 4 non-finite) | steps u32
//! ```
//!
//! A trailing partial record (a kill in the middle of a write) is ignored by the reader and cut off when
//! a run resumes.

use std::fs::{File, OpenOptions};
use std::io::{BufReader, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

const MAGIC: &[u8; 8] = b"VPDRAWS\0";
/// Version of the draws file layout.
pub const VERSION: u32 = 1;
const HEADER_BYTES: u64 = 32;

/// Flag bits of a record.
pub const FLAG_ACCEPTED: u32 = 1;
/// The step was a divergent HMC trajectory.
pub const FLAG_DIVERGENT: u32 = 2;
/// The proposal could not be evaluated.
pub const FLAG_NONFINITE: u32 = 4;

/// The file of chain `chain` in the output folder.
pub fn draws_path(out_dir: &Path, chain: usize) -> PathBuf {
    out_dir.join(format!("chain-{chain}.draws"))
}

/// One kept draw.
#[derive(Debug, Clone, PartialEq)]
pub struct DrawRecord {
    /// The draw in model space.
    pub x: Vec<f64>,
    /// log π at the draw (= −J).
    pub log_density: f64,
    /// Acceptance probability of the step that led here.
    pub accept_prob: f64,
    /// HMC energy after the step (NaN for other kernels).
    pub energy: f64,
    /// Step size used (NaN for kernels without one).
    pub step_size: f64,
    /// [`FLAG_ACCEPTED`] | [`FLAG_DIVERGENT`] | [`FLAG_NONFINITE`].
    pub flags: u32,
    /// Leapfrog steps (HMC) or gradient evaluations of the step.
    pub n_steps: u32,
}

fn record_bytes(dim: usize) -> u64 {
    8 * (dim as u64 + 5)
}

fn header(dim: usize, chain: usize) -> [u8; HEADER_BYTES as usize] {
    let mut h = [0u8; HEADER_BYTES as usize];
    h[0..8].copy_from_slice(MAGIC);
    h[8..12].copy_from_slice(&VERSION.to_le_bytes());
    h[12..16].copy_from_slice(&(dim as u32).to_le_bytes());
    h[16..20].copy_from_slice(&(chain as u32).to_le_bytes());
    h[20..24].copy_from_slice(&(record_bytes(dim) as u32).to_le_bytes());
    h
}

/// Appends records to one chain's file.
pub struct DrawsWriter {
    path: PathBuf,
    out: BufWriter<File>,
    dim: usize,
    records: u64,
    buf: Vec<u8>,
}

impl DrawsWriter {
    /// Creates (or empties) the file and writes its header.
    pub fn create(path: &Path, dim: usize, chain: usize) -> Result<Self> {
        let io = |e| Error::io(path, e);
        let mut f = File::create(path).map_err(io)?;
        f.write_all(&header(dim, chain)).map_err(io)?;
        f.sync_data().map_err(io)?;
        Ok(DrawsWriter::wrap(path, f, dim, 0))
    }

    /// Reopens a file for a resumed run: checks the header, cuts the file after `records` records (the
    /// count the checkpoint saw written) and appends from there. A file with fewer records than that is
    /// an error: the draws and the checkpoint do not belong together.
    pub fn resume(path: &Path, dim: usize, chain: usize, records: u64) -> Result<Self> {
        let io = |e| Error::io(path, e);
        let info = DrawsFile::open(path)?;
        if info.dim != dim || info.chain != chain {
            return Err(Error::format(
                path,
                format!(
                    "draws file is for chain {} of dimension {}, the checkpoint expects chain {chain} \
                     of dimension {dim}",
                    info.chain, info.dim
                ),
            ));
        }
        if info.records < records {
            return Err(Error::format(
                path,
                format!(
                    "draws file holds {} complete records but the checkpoint counts {records}: the \
                     file was truncated or replaced; the run cannot be resumed from this folder",
                    info.records
                ),
            ));
        }
        let f = OpenOptions::new().write(true).open(path).map_err(io)?;
        let len = HEADER_BYTES + records * record_bytes(dim);
        f.set_len(len).map_err(io)?;
        f.sync_data().map_err(io)?;
        let mut f = f;
        f.seek(SeekFrom::Start(len)).map_err(io)?;
        Ok(DrawsWriter::wrap(path, f, dim, records))
    }

    fn wrap(path: &Path, f: File, dim: usize, records: u64) -> Self {
        DrawsWriter {
            path: path.to_path_buf(),
            out: BufWriter::new(f),
            dim,
            records,
            buf: Vec::with_capacity(record_bytes(dim) as usize),
        }
    }

    /// Appends one record (buffered; [`DrawsWriter::sync`] makes it durable).
    pub fn append(&mut self, r: &DrawRecord) -> Result<()> {
        if r.x.len() != self.dim {
            return Err(Error::format(
                &self.path,
                format!(
                    "a draw of length {} cannot go into a file of dimension {}",
                    r.x.len(),
                    self.dim
                ),
            ));
        }
        self.buf.clear();
        for v in
            r.x.iter()
                .chain([&r.log_density, &r.accept_prob, &r.energy, &r.step_size])
        {
            self.buf.extend_from_slice(&v.to_le_bytes());
        }
        self.buf.extend_from_slice(&r.flags.to_le_bytes());
        self.buf.extend_from_slice(&r.n_steps.to_le_bytes());
        self.out
            .write_all(&self.buf)
            .map_err(|e| Error::io(&self.path, e))?;
        self.records += 1;
        Ok(())
    }

    /// Flushes the buffer and syncs the file to disk.
    pub fn sync(&mut self) -> Result<()> {
        let io = |e| Error::io(&self.path, e);
        self.out.flush().map_err(io)?;
        self.out.get_ref().sync_data().map_err(io)
    }

    /// Records written so far (including buffered ones).
    pub fn records(&self) -> u64 {
        self.records
    }
}

/// A draws file opened for reading.
#[derive(Debug, Clone)]
pub struct DrawsFile {
    path: PathBuf,
    /// Dimension of the draws.
    pub dim: usize,
    /// Chain index.
    pub chain: usize,
    /// Complete records in the file.
    pub records: u64,
}

impl DrawsFile {
    /// Opens a file and reads its header.
    pub fn open(path: &Path) -> Result<Self> {
        let io = |e| Error::io(path, e);
        let mut f = File::open(path).map_err(io)?;
        let len = f.metadata().map_err(io)?.len();
        let mut h = [0u8; HEADER_BYTES as usize];
        if len < HEADER_BYTES {
            return Err(Error::format(
                path,
                "too short to be a varpost draws file (no header)",
            ));
        }
        f.read_exact(&mut h).map_err(io)?;
        if &h[0..8] != MAGIC {
            return Err(Error::format(
                path,
                "not a varpost draws file (wrong magic bytes)",
            ));
        }
        let word = |a: usize| u32::from_le_bytes([h[a], h[a + 1], h[a + 2], h[a + 3]]);
        let version = word(8);
        if version != VERSION {
            return Err(Error::format(
                path,
                format!("draws file version {version}; this build reads version {VERSION}"),
            ));
        }
        let dim = word(12) as usize;
        let chain = word(16) as usize;
        if u64::from(word(20)) != record_bytes(dim) {
            return Err(Error::format(
                path,
                "record size in the header does not match the dimension",
            ));
        }
        let records = (len - HEADER_BYTES) / record_bytes(dim);
        Ok(DrawsFile {
            path: path.to_path_buf(),
            dim,
            chain,
            records,
        })
    }

    /// Iterates over the records in order.
    pub fn iter(&self) -> Result<RecordIter> {
        let io = |e| Error::io(&self.path, e);
        let mut f = File::open(&self.path).map_err(io)?;
        f.seek(SeekFrom::Start(HEADER_BYTES)).map_err(io)?;
        Ok(RecordIter {
            path: self.path.clone(),
            input: BufReader::new(f),
            dim: self.dim,
            left: self.records,
            buf: vec![0u8; record_bytes(self.dim) as usize],
        })
    }

    /// The draws of the given components, one vector per component, in record order (one pass).
    pub fn components(&self, which: &[usize]) -> Result<Vec<Vec<f64>>> {
        if let Some(&i) = which.iter().find(|&&i| i >= self.dim) {
            return Err(Error::Config(format!(
                "component {i} does not exist: the draws have dimension {}",
                self.dim
            )));
        }
        let mut out = vec![Vec::with_capacity(self.records as usize); which.len()];
        for r in self.iter()? {
            let r = r?;
            for (o, &i) in out.iter_mut().zip(which) {
                o.push(r.x[i]);
            }
        }
        Ok(out)
    }
}

/// Opens the draws files of chains 0..`chains` of an output folder, checking that they belong
/// together (same dimension, chain numbers in order). Chains of a partial run may hold different
/// numbers of records.
pub fn open_chains(out_dir: &Path, chains: usize) -> Result<Vec<DrawsFile>> {
    let files = (0..chains)
        .map(|c| DrawsFile::open(&draws_path(out_dir, c)))
        .collect::<Result<Vec<_>>>()?;
    for (c, f) in files.iter().enumerate() {
        if f.chain != c || f.dim != files[0].dim {
            return Err(Error::format(
                &f.path,
                format!(
                    "draws file says chain {} of dimension {}, expected chain {c} of dimension {}",
                    f.chain, f.dim, files[0].dim
                ),
            ));
        }
    }
    Ok(files)
}

/// The draws of one component for every chain of an output folder: `[chain][draw]`.
pub fn component_per_chain(
    out_dir: &Path,
    chains: usize,
    component: usize,
) -> Result<Vec<Vec<f64>>> {
    open_chains(out_dir, chains)?
        .iter()
        .map(|f| Ok(f.components(&[component])?.remove(0)))
        .collect()
}

/// Iterator over the records of a [`DrawsFile`].
pub struct RecordIter {
    path: PathBuf,
    input: BufReader<File>,
    dim: usize,
    left: u64,
    buf: Vec<u8>,
}

impl Iterator for RecordIter {
    type Item = Result<DrawRecord>;
    fn next(&mut self) -> Option<Self::Item> {
        if self.left == 0 {
            return None;
        }
        self.left -= 1;
        if let Err(e) = self.input.read_exact(&mut self.buf) {
            self.left = 0;
            return Some(Err(Error::io(&self.path, e)));
        }
        let b = &self.buf;
        let f = |k: usize| {
            let a = 8 * k;
            f64::from_le_bytes([
                b[a],
                b[a + 1],
                b[a + 2],
                b[a + 3],
                b[a + 4],
                b[a + 5],
                b[a + 6],
                b[a + 7],
            ])
        };
        let n = self.dim;
        let w = |a: usize| u32::from_le_bytes([b[a], b[a + 1], b[a + 2], b[a + 3]]);
        Some(Ok(DrawRecord {
            x: (0..n).map(f).collect(),
            log_density: f(n),
            accept_prob: f(n + 1),
            energy: f(n + 2),
            step_size: f(n + 3),
            flags: w(8 * (n + 4)),
            n_steps: w(8 * (n + 4) + 4),
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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

    #[test]
    fn round_trip_resume_cuts_and_partial_records_are_ignored() {
        let dir = std::env::temp_dir().join(format!("varpost-draws-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
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
}
