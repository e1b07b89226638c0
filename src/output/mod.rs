//! What a run writes: summary.json, the per-component tables, ensemble.nc, the plots and the HTML report.

pub mod ensemble;
pub mod html;
pub mod lock;
pub mod plots;
pub mod progress;
pub mod summary;
pub mod table;

pub use summary::Summary;

use crate::diagnostics::ComponentStats;
pub(crate) use crate::util::atomic::{commit, temp_sibling, write_atomic};

/// Component indices ordered least-converged first: by R-hat descending, then bulk ESS ascending. A
/// non-finite R-hat or ESS (a stuck chain, too few draws) counts as worst.
pub fn worst_first(stats: &[ComponentStats]) -> Vec<usize> {
    let key = |s: &ComponentStats| {
        (
            if s.rhat.is_finite() {
                s.rhat
            } else {
                f64::INFINITY
            },
            if s.ess_bulk.is_finite() {
                s.ess_bulk
            } else {
                f64::NEG_INFINITY
            },
        )
    };
    let mut order: Vec<usize> = (0..stats.len()).collect();
    order.sort_by(|&a, &b| {
        let (ra, ea) = key(&stats[a]);
        let (rb, eb) = key(&stats[b]);
        rb.total_cmp(&ra).then(ea.total_cmp(&eb)).then(a.cmp(&b))
    });
    order
}

/// The current time in UTC as ISO 8601 (`2026-01-31T12:00:00Z`), for `history` attributes and reports.
pub fn utc_now() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs() as i64)
        .unwrap_or(0);
    utc_iso8601(secs)
}

/// Seconds since 1970-01-01T00:00:00Z as ISO 8601 in UTC. The calendar conversion is the
/// days-to-civil algorithm of H. Hinnant (2013), "chrono-Compatible Low-Level Date Algorithms".
fn utc_iso8601(secs: i64) -> String {
    let (days, rem) = (secs.div_euclid(86_400), secs.rem_euclid(86_400));
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iso8601_matches_python_datetime() {
        // Expected strings printed by Python's datetime.fromtimestamp(t, timezone.utc) (Python
        // standard library), including a leap day and the end of a century.
        assert_eq!(utc_iso8601(0), "1970-01-01T00:00:00Z");
        assert_eq!(utc_iso8601(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(utc_iso8601(1_700_000_000), "2023-11-14T22:13:20Z");
        assert_eq!(utc_iso8601(4_102_444_799), "2099-12-31T23:59:59Z");
    }

    #[test]
    fn worst_first_orders_by_rhat_then_ess() {
        // Ordering rule of the report (common practice, no source): higher R-hat is worse, then lower
        // ESS, and an undefined diagnostic is worst of all.
        let rhat = [1.001, 1.2, f64::NAN, 1.001, 1.05];
        let ess = [900.0, 30.0, 400.0, 200.0, 100.0];
        let stats: Vec<ComponentStats> = rhat
            .iter()
            .zip(ess)
            .map(|(&rhat, ess_bulk)| ComponentStats {
                mean: 0.0,
                sd: 1.0,
                rhat,
                ess_bulk,
                ess_tail: ess_bulk,
                mcse_mean: 0.1,
                mcse_sd: 0.1,
                q05: -1.6,
                q95: 1.6,
                mcse_q05: 0.1,
                mcse_q95: 0.1,
            })
            .collect();
        assert_eq!(worst_first(&stats), vec![2, 1, 4, 3, 0]);
    }

    #[test]
    fn atomic_write_leaves_no_temporary_file() {
        let dir = std::env::temp_dir().join(format!("varpost-atomic-{}", std::process::id()));
        let path = dir.join("a.txt");
        write_atomic(&path, b"one").unwrap();
        write_atomic(&path, b"two").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"two");
        let names: Vec<_> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(names, vec![std::ffi::OsString::from("a.txt")]);
        std::fs::remove_dir_all(&dir).unwrap();
    }
}
