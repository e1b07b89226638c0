//! Helpers shared by the benchmarks.
#![allow(dead_code)]

/// Peak resident set size in bytes, from /proc/self/status (Linux).
pub fn peak_rss() -> Option<u64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: u64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024)
}
