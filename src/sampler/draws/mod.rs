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
//! a run resumes. Everything read is checked ([`parse_header`], [`decode_record`]): a header or a record
//! that cannot have been written by the sampler (an edited or damaged file) is an error naming the
//! record and the field, never a panic and never a draw taken at face value.
//!
//! [`writer`] appends, [`reader`] reads; this file holds the layout both share.

pub mod reader;
pub mod writer;

pub use reader::{component_per_chain, open_chains, DrawsFile, RecordIter};
pub use writer::DrawsWriter;

use std::path::{Path, PathBuf};

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
const ALL_FLAGS: u32 = FLAG_ACCEPTED | FLAG_DIVERGENT | FLAG_NONFINITE;

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

/// Bytes of one record in dimension `dim`.
pub(crate) fn record_bytes(dim: usize) -> u64 {
    8 * (dim as u64 + 5)
}

/// The header of chain `chain`'s file in dimension `dim`.
pub(crate) fn header(dim: usize, chain: usize) -> [u8; HEADER_BYTES as usize] {
    let mut h = [0u8; HEADER_BYTES as usize];
    h[0..8].copy_from_slice(MAGIC);
    h[8..12].copy_from_slice(&VERSION.to_le_bytes());
    h[12..16].copy_from_slice(&(dim as u32).to_le_bytes());
    h[16..20].copy_from_slice(&(chain as u32).to_le_bytes());
    h[20..24].copy_from_slice(&(record_bytes(dim) as u32).to_le_bytes());
    h
}

/// What a header says: the dimension and the chain, and the complete records a file of `len` bytes
/// holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Header {
    pub dim: usize,
    pub chain: usize,
    pub records: u64,
}

/// Reads the header of a file of `len` bytes whose first bytes are `h`.
pub(crate) fn parse_header(h: &[u8], len: u64) -> Result<Header, String> {
    if len < HEADER_BYTES || h.len() < HEADER_BYTES as usize {
        return Err("too short to be a varpost draws file (no header)".into());
    }
    if &h[0..8] != MAGIC {
        return Err("not a varpost draws file (wrong magic bytes)".into());
    }
    let word = |a: usize| u32::from_le_bytes([h[a], h[a + 1], h[a + 2], h[a + 3]]);
    let version = word(8);
    if version != VERSION {
        return Err(format!(
            "draws file version {version}; this build reads version {VERSION}"
        ));
    }
    let dim = word(12) as usize;
    if dim == 0 {
        return Err("the header gives dimension 0: the file is damaged".into());
    }
    if u64::from(word(20)) != record_bytes(dim) {
        return Err("record size in the header does not match the dimension".into());
    }
    if h[24..32].iter().any(|&b| b != 0) {
        return Err("the header's reserved bytes are not zero: the file is damaged".into());
    }
    Ok(Header {
        dim,
        chain: word(16) as usize,
        records: (len - HEADER_BYTES) / record_bytes(dim),
    })
}

/// Appends the bytes of record `r` to `buf`.
pub(crate) fn encode_record(r: &DrawRecord, buf: &mut Vec<u8>) {
    for v in
        r.x.iter()
            .chain([&r.log_density, &r.accept_prob, &r.energy, &r.step_size])
    {
        buf.extend_from_slice(&v.to_le_bytes());
    }
    buf.extend_from_slice(&r.flags.to_le_bytes());
    buf.extend_from_slice(&r.n_steps.to_le_bytes());
}

/// Decodes one record of dimension `dim` from `b` (exactly [`record_bytes`] long) and checks that the
/// sampler could have written it: finite draw and log-density, an acceptance probability in [0, 1], an
/// energy that is finite or NaN, a step size that is positive and finite or NaN, known flags. The
/// message names the field.
pub(crate) fn decode_record(b: &[u8], dim: usize) -> Result<DrawRecord, String> {
    if b.len() as u64 != record_bytes(dim) {
        return Err(format!(
            "a record of dimension {dim} has {} bytes, not {}",
            b.len(),
            record_bytes(dim)
        ));
    }
    let f = |k: usize| {
        let mut a = [0u8; 8];
        a.copy_from_slice(&b[8 * k..8 * k + 8]);
        f64::from_le_bytes(a)
    };
    let w = |a: usize| u32::from_le_bytes([b[a], b[a + 1], b[a + 2], b[a + 3]]);
    let r = DrawRecord {
        x: (0..dim).map(f).collect(),
        log_density: f(dim),
        accept_prob: f(dim + 1),
        energy: f(dim + 2),
        step_size: f(dim + 3),
        flags: w(8 * (dim + 4)),
        n_steps: w(8 * (dim + 4) + 4),
    };
    check_record(&r)?;
    Ok(r)
}

/// The checks of [`decode_record`].
fn check_record(r: &DrawRecord) -> Result<(), String> {
    if let Some(i) = r.x.iter().position(|v| !v.is_finite()) {
        return Err(format!("component {i} of the draw is {}", r.x[i]));
    }
    if !r.log_density.is_finite() {
        return Err(format!("the log-density is {}", r.log_density));
    }
    if !(0.0..=1.0).contains(&r.accept_prob) {
        return Err(format!(
            "the acceptance probability is {}, not in [0, 1]",
            r.accept_prob
        ));
    }
    if r.energy.is_infinite() {
        return Err(format!("the energy is {}", r.energy));
    }
    if !(r.step_size.is_nan() || (r.step_size.is_finite() && r.step_size > 0.0)) {
        return Err(format!(
            "the step size is {}, neither positive and finite nor NaN (none)",
            r.step_size
        ));
    }
    if r.flags & !ALL_FLAGS != 0 {
        return Err(format!("the flags {:#x} have unknown bits", r.flags));
    }
    Ok(())
}

#[cfg(test)]
mod tests;
