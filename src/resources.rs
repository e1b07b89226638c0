//! What this machine can hold: a size check made before any large allocation, so that a setting or an
//! adapter's hello asking for more memory than the machine has is refused with a message saying how much
//! it would need, instead of aborting on allocation.

use crate::error::{Error, Result};

/// Bytes of memory this process may plan to use: the machine's total memory (Linux `/proc/meminfo`),
/// or 16 GiB where it cannot be read.
pub fn memory_limit() -> u128 {
    std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|t| {
            t.lines()
                .find(|l| l.starts_with("MemTotal:"))
                .and_then(|l| l.split_whitespace().nth(1))
                .and_then(|kb| kb.parse::<u128>().ok())
        })
        .map(|kb| kb * 1024)
        .unwrap_or(16 << 30)
}

/// Human-readable bytes ("1.5 GiB").
pub fn format_bytes(bytes: u128) -> String {
    const UNITS: [&str; 6] = ["bytes", "KiB", "MiB", "GiB", "TiB", "PiB"];
    let mut v = bytes as f64;
    let mut u = 0;
    while v >= 1024.0 && u + 1 < UNITS.len() {
        v /= 1024.0;
        u += 1;
    }
    if u == 0 {
        format!("{bytes} bytes")
    } else {
        format!("{v:.1} {}", UNITS[u])
    }
}

/// Refuses `what` when holding `bytes` would exceed this machine's memory; `fix` says what to change.
/// Sizes are given as u128 so that products of large settings cannot overflow before the check.
pub fn ensure_fits(what: &str, bytes: u128, fix: &str) -> Result<()> {
    let limit = memory_limit();
    if bytes > limit {
        return Err(Error::Config(format!(
            "{what} would need {} of memory but this machine has {}: {fix}",
            format_bytes(bytes),
            format_bytes(limit)
        )));
    }
    Ok(())
}

/// Bytes of `count` f64 values, as u128.
pub fn f64_bytes(count: u128) -> u128 {
    count.saturating_mul(8)
}

/// Reads a text file of at most `max_bytes` (a start point, a run record, a summary): a larger file, or
/// one that never ends (a device such as /dev/zero), is refused instead of filling the memory.
pub fn read_bounded(path: &std::path::Path, max_bytes: u64) -> Result<String> {
    use std::io::Read;
    let f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut buf = Vec::new();
    f.take(max_bytes + 1)
        .read_to_end(&mut buf)
        .map_err(|e| Error::io(path, e))?;
    if buf.len() as u64 > max_bytes {
        return Err(Error::format(
            path,
            format!(
                "the file is larger than {} and cannot be what varpost expects here",
                format_bytes(max_bytes as u128)
            ),
        ));
    }
    String::from_utf8(buf).map_err(|_| Error::format(path, "not a text file (invalid UTF-8)"))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn huge_sizes_are_refused_with_the_amount() {
        let e = ensure_fits(
            "a state of 1e12 values",
            f64_bytes(1_000_000_000_000),
            "use fewer",
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("7.3 TiB") && e.contains("use fewer"), "{e}");
        ensure_fits("a small vector", f64_bytes(1000), "-").unwrap();
    }

    #[test]
    fn endless_files_are_refused() {
        let e = read_bounded(std::path::Path::new("/dev/zero"), 1 << 20).unwrap_err();
        assert!(e.to_string().contains("larger than 1.0 MiB"), "{e}");
    }
}
