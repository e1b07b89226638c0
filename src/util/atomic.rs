//! Durable atomic file writes: the content goes to a temporary file in the same folder, which is
//! synced to disk, renamed over the final name, and the folder is synced so that the rename itself
//! survives a crash. A reader (or a crash at any moment) sees the old file or the new one, never half
//! a file, and once a write has returned the new file is on disk.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// Writes `bytes` to `path` atomically and durably (see the module docs). Creates the folder.
pub(crate) fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    let tmp = temp_sibling(path)?;
    let written =
        File::create(&tmp).and_then(|mut f| f.write_all(bytes).and_then(|()| f.sync_all()));
    if let Err(e) = written {
        let _ = std::fs::remove_file(&tmp);
        return Err(Error::io(&tmp, e));
    }
    commit(&tmp, path)
}

/// The temporary file a writer fills before [`commit`] renames it to `path`: a hidden file in the same
/// folder (so the rename stays on one file system) that keeps the extension, for writers that choose
/// the format by it. Creates the folder.
pub(crate) fn temp_sibling(path: &Path) -> Result<PathBuf> {
    let dir = parent_dir(path);
    std::fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .ok_or_else(|| Error::Config(format!("{} is not a file name", path.display())))?;
    Ok(dir.join(format!(".tmp-{name}")))
}

/// Makes a finished temporary file durable and renames it onto its final name, then syncs the folder;
/// removes the temporary file if that fails.
pub(crate) fn commit(tmp: &Path, path: &Path) -> Result<()> {
    let synced = File::open(tmp).and_then(|f| f.sync_all());
    if let Err(e) = synced {
        let _ = std::fs::remove_file(tmp);
        return Err(Error::io(tmp, e));
    }
    std::fs::rename(tmp, path).map_err(|e| {
        let _ = std::fs::remove_file(tmp);
        Error::io(path, e)
    })?;
    let dir = parent_dir(path);
    File::open(dir)
        .and_then(|d| d.sync_all())
        .map_err(|e| Error::io(dir, e))
}

/// The folder of `path` ("." for a bare file name).
fn parent_dir(path: &Path) -> &Path {
    match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn replaces_the_file_and_leaves_no_temporary() {
        let dir = std::env::temp_dir().join(format!("varpost-util-atomic-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        let path = dir.join("sub").join("a.bin");
        write_atomic(&path, b"first").unwrap();
        write_atomic(&path, b"second").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"second");
        let names: Vec<_> = std::fs::read_dir(dir.join("sub"))
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names, vec![std::ffi::OsString::from("a.bin")]);
        // A folder in the way of the final name: the error names it and no temporary file is left.
        std::fs::create_dir_all(dir.join("sub").join("b.bin").join("x")).unwrap();
        let e = write_atomic(&dir.join("sub").join("b.bin"), b"x").unwrap_err();
        assert!(e.to_string().contains("b.bin"), "{e}");
        assert!(!dir.join("sub").join(".tmp-b.bin").exists());
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
