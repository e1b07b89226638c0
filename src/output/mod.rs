//! What a run writes: summary.json and the plain-text tables beside it.

pub mod summary;
pub mod table;

pub use summary::Summary;

use std::path::Path;

use crate::error::{Error, Result};

/// Writes `text` to `path` atomically: a temporary file in the same folder, then a rename, so a reader
/// (or a crash) never sees half a file.
pub fn write_atomic(path: &Path, text: &[u8]) -> Result<()> {
    let dir = path.parent().unwrap_or(Path::new("."));
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.tmp"));
    std::fs::write(&tmp, text).map_err(|e| Error::io(&tmp, e))?;
    std::fs::rename(&tmp, path).map_err(|e| Error::io(path, e))
}
