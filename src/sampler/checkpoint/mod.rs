//! The full sampler state on disk, so that a run stopped at any moment (SIGINT, SIGTERM, SIGKILL,
//! a dead adapter) resumes exactly where its last checkpoint left it.
//!
//! File `checkpoint.vpck` in the output folder: one header line
//! `varpost-checkpoint <format version> fnv1a64=<16 hex digits>` and a JSON payload whose FNV-1a hash
//! the header carries. Floats are written as shortest round-trip decimals and parsed exactly
//! (serde_json `float_roundtrip`), so a resumed chain continues bit for bit. Writes are atomic: a
//! temporary file is written and synced, then renamed over the old one, and the folder is synced.

use std::path::{Path, PathBuf};

use super::config::SampleConfig;
pub use super::state::{ChainCheckpoint, RngState};
use super::target::{Fnv64, Target};
use crate::adapt::WarmupPlan;
use crate::error::{Error, Result};
use crate::problem::EvalCounts;
use crate::util::atomic::write_atomic;

mod validate;

/// Version of the checkpoint layout written by this build. A change of the layout raises it and adds
/// a reader for the old version in [`Checkpoint::decode`]; tests/it/fixtures/checkpoint-v1/ holds a
/// file of version 1 that must keep loading.
pub const FORMAT_VERSION: u32 = 2;
const FILE_NAME: &str = "checkpoint.vpck";

/// The checkpoint file of an output folder.
pub fn checkpoint_path(out_dir: &Path) -> PathBuf {
    out_dir.join(FILE_NAME)
}

/// The saved state of a whole sampling run.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Checkpoint {
    /// The varpost version that wrote it.
    pub crate_version: String,
    /// Name of the problem.
    pub problem: String,
    /// Dimension.
    pub dim: usize,
    /// Preconditioner kind.
    pub precond: String,
    /// [`Target::fingerprint`]: problem name, dimension, analysis and preconditioner.
    pub target_fingerprint: u64,
    /// The run's settings.
    pub config: SampleConfig,
    /// Per chain.
    pub chains: Vec<ChainCheckpoint>,
    /// Evaluations during the warm-up so far.
    pub counts_warmup: EvalCounts,
    /// Evaluations during sampling so far.
    pub counts_sampling: EvalCounts,
    /// The pooled warm-up's plan (absent from version 1 and from runs that do not pool).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub plan: Option<WarmupPlan>,
    /// Draws per chain beyond `config.draws`, added by extensions of the run (absent, 0, in files
    /// written before extensions existed and in runs never extended).
    #[serde(default, skip_serializing_if = "is_zero")]
    pub extra_draws: u64,
    /// Whether the run had finished when this was written.
    pub complete: bool,
}

impl Checkpoint {
    /// Writes the checkpoint into `out_dir` atomically and durably.
    pub fn save(&self, out_dir: &Path) -> Result<()> {
        let path = checkpoint_path(out_dir);
        let payload = serde_json::to_vec(self)
            .map_err(|e| Error::format(&path, format!("cannot encode the sampler state: {e}")))?;
        write_atomic(&path, &encode(&payload))
    }

    /// Reads and verifies the checkpoint of `out_dir`; a missing, corrupt or foreign file is an error
    /// that says so.
    pub fn load(out_dir: &Path) -> Result<Self> {
        let path = checkpoint_path(out_dir);
        let bytes = std::fs::read(&path).map_err(|e| {
            if e.kind() == std::io::ErrorKind::NotFound {
                Error::Config(format!(
                    "{} holds no sampler checkpoint ({FILE_NAME}): there is no run to resume there",
                    out_dir.display()
                ))
            } else {
                Error::io(&path, e)
            }
        })?;
        Checkpoint::decode(&path, &bytes)
    }

    /// Decodes and validates the bytes of a checkpoint file (`path` names it in errors). Every failure
    /// is an error naming what is wrong: the header, the version, the checksum, the JSON content, or the
    /// first field that is inconsistent with the others ([`validate`]).
    pub(crate) fn decode(path: &Path, bytes: &[u8]) -> Result<Self> {
        let bad = |m: String| Error::format(path, m);
        let (version, payload) = split_header(bytes).map_err(bad)?;
        let ck = match version {
            // Version 2 added the pooled warm-up's plan and windows, absent (and not needed) in
            // version 1 (varpost 0.1), which reads with the same layout.
            1 | 2 => serde_json::from_slice::<Checkpoint>(payload)
                .map_err(|e| bad(format!("checkpoint content is invalid: {e}")))?,
            v => return Err(bad(unsupported_version(v))),
        };
        validate::validate(&ck).map_err(|m| {
            bad(format!(
                "checkpoint is inconsistent: {m}. It cannot be resumed; start a new run in an empty \
                 folder"
            ))
        })?;
        Ok(ck)
    }

    /// Checks that this checkpoint belongs to `target` and `config`, naming the first difference. All
    /// settings must be equal but `checkpoint_every`.
    pub fn check_matches(&self, target: &Target<'_>, config: &SampleConfig) -> Result<()> {
        let path = PathBuf::from(FILE_NAME);
        let bad = |m: String| Err(Error::format(&path, m));
        let here = env!("CARGO_PKG_VERSION");
        if self.crate_version != here {
            return bad(format!(
                "checkpoint was written by varpost {}, this is {here}: resume with that version",
                self.crate_version
            ));
        }
        if self.problem != target.name() {
            return bad(format!(
                "checkpoint is for problem '{}', not '{}'",
                self.problem,
                target.name()
            ));
        }
        if self.dim != target.dim() {
            return bad(format!(
                "checkpoint is for dimension {}, the problem has dimension {}",
                self.dim,
                target.dim()
            ));
        }
        if self.precond != target.precond().kind() {
            return bad(format!(
                "checkpoint used the {} preconditioner, this run the {}",
                self.precond,
                target.precond().kind()
            ));
        }
        if self.target_fingerprint != target.fingerprint() {
            return bad(
                "checkpoint was made with another analysis or preconditioner (fingerprint \
                        differs): resume with the same analysis and Hessian"
                    .into(),
            );
        }
        // The checkpoint interval does not change what the chains compute, so it may differ; the way
        // of learning the metric is compared by what it means (older files leave it unset).
        let saved = SampleConfig {
            checkpoint_every: config.checkpoint_every,
            learn_metric: Some(self.config.learning()),
            ..self.config.clone()
        };
        let given = SampleConfig {
            learn_metric: Some(config.learning()),
            ..config.clone()
        };
        if saved != given {
            return bad(format!(
                "checkpoint settings differ from this run's: saved {:?}, given {:?}",
                self.config, config
            ));
        }
        if self.chains.len() != config.chains {
            return bad(format!(
                "checkpoint holds {} chains, expected {}",
                self.chains.len(),
                config.chains
            ));
        }
        Ok(())
    }
}

fn is_zero(v: &u64) -> bool {
    *v == 0
}

/// The format version and the payload of a checkpoint file, after checking the header and the
/// checksum.
fn split_header(bytes: &[u8]) -> std::result::Result<(u32, &[u8]), String> {
    let nl = bytes
        .iter()
        .position(|&b| b == b'\n')
        .ok_or("not a varpost checkpoint (no header line)")?;
    let head = std::str::from_utf8(&bytes[..nl])
        .map_err(|_| "not a varpost checkpoint (header is not text)")?;
    let parts: Vec<&str> = head.split(' ').collect();
    if parts.len() != 3 || parts[0] != "varpost-checkpoint" {
        return Err("not a varpost checkpoint (unknown header)".into());
    }
    let version: u32 = parts[1].parse().map_err(|_| {
        format!(
            "checkpoint header has no readable format version ('{}')",
            parts[1]
        )
    })?;
    if !(1..=FORMAT_VERSION).contains(&version) {
        return Err(unsupported_version(version));
    }
    let want = parts[2]
        .strip_prefix("fnv1a64=")
        .and_then(|h| u64::from_str_radix(h, 16).ok())
        .ok_or("checkpoint header has no readable checksum")?;
    let payload = &bytes[nl + 1..];
    let mut h = Fnv64::new();
    h.write(payload);
    if h.finish() != want {
        return Err(
            "checkpoint is corrupt (checksum mismatch): it cannot be resumed; start a new run in \
             an empty folder"
                .into(),
        );
    }
    Ok((version, payload))
}

/// The refusal of a format version this build cannot read.
fn unsupported_version(v: u32) -> String {
    format!(
        "checkpoint format version {v} cannot be read by this build, which reads versions 1 to \
         {FORMAT_VERSION}: resume with the varpost that wrote it"
    )
}

/// The file's bytes: the header line with the payload's checksum, then the payload.
fn encode(payload: &[u8]) -> Vec<u8> {
    let mut h = Fnv64::new();
    h.write(payload);
    let mut out = format!(
        "varpost-checkpoint {FORMAT_VERSION} fnv1a64={:016x}\n",
        h.finish()
    )
    .into_bytes();
    out.extend_from_slice(payload);
    out
}

#[cfg(test)]
mod tests;
