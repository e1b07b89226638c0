//! Reading the draws files: one chain's file ([`DrawsFile`], record by record or component by
//! component) or all chains of an output folder ([`open_chains`]).

use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};

use super::{decode_record, draws_path, parse_header, record_bytes, DrawRecord, HEADER_BYTES};
use crate::error::{Error, Result};

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
    /// Opens a file and reads its header ([`parse_header`]); a file that is no draws file, or whose
    /// header is damaged, is an error that says so.
    pub fn open(path: &Path) -> Result<Self> {
        let io = |e| Error::io(path, e);
        let mut f = File::open(path).map_err(io)?;
        let len = f.metadata().map_err(io)?.len();
        let mut h = [0u8; HEADER_BYTES as usize];
        if len >= HEADER_BYTES {
            f.read_exact(&mut h).map_err(io)?;
        }
        let head = parse_header(&h, len).map_err(|m| Error::format(path, m))?;
        Ok(DrawsFile {
            path: path.to_path_buf(),
            dim: head.dim,
            chain: head.chain,
            records: head.records,
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
            // Only as large as the file: a damaged header cannot ask for a huge buffer.
            buf: if self.records > 0 {
                vec![0u8; record_bytes(self.dim) as usize]
            } else {
                Vec::new()
            },
            index: 0,
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
    index: u64,
}

impl Iterator for RecordIter {
    type Item = Result<DrawRecord>;
    fn next(&mut self) -> Option<Self::Item> {
        if self.left == 0 {
            return None;
        }
        self.left -= 1;
        let k = self.index;
        self.index += 1;
        if let Err(e) = self.input.read_exact(&mut self.buf) {
            self.left = 0;
            return Some(Err(Error::io(&self.path, e)));
        }
        Some(decode_record(&self.buf, self.dim).map_err(|m| {
            self.left = 0;
            Error::format(
                &self.path,
                format!(
                    "record {k} cannot have been written by the sampler ({m}): the file was edited \
                     or damaged"
                ),
            )
        }))
    }
}
