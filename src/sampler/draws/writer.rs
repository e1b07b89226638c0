//! Appending records to a chain's draws file, and reopening it where a resumed run continues.

use std::fs::{File, OpenOptions};
use std::io::{BufWriter, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use super::{encode_record, header, record_bytes, DrawRecord, DrawsFile, HEADER_BYTES};
use crate::error::{Error, Result};

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
        encode_record(r, &mut self.buf);
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
