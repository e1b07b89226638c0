//! Value parsers of the numeric and named options: every value is checked when the command line is
//! parsed (finite, in range, a duration that fits), so that a bad one is refused with its name and its
//! allowed range before anything runs.

use std::time::Duration;

use clap::ValueEnum;

use crate::adapter::EncodingChoice;
use crate::precond::LaplaceMethod;

/// The longest duration an adapter time limit may be given as (about 31.7 years): far above any run,
/// far below what `Duration` and the clock arithmetic on it can hold.
pub const MAX_SECONDS: f64 = 1e9;

/// A number, refusing NaN and infinities; `what` describes the allowed range for the message.
fn finite(s: &str, what: &str) -> Result<f64, String> {
    let v: f64 = s
        .trim()
        .parse()
        .map_err(|_| format!("not a number; give {what}"))?;
    if v.is_finite() {
        Ok(v)
    } else {
        Err(format!("not a finite number; give {what}"))
    }
}

/// A number strictly between 0 and 1.
pub fn open_unit(s: &str) -> Result<f64, String> {
    const WHAT: &str = "a number strictly between 0 and 1";
    let v = finite(s, WHAT)?;
    if v > 0.0 && v < 1.0 {
        Ok(v)
    } else {
        Err(format!("out of range; give {WHAT}"))
    }
}

/// A finite number, 0 or more.
pub fn non_negative(s: &str) -> Result<f64, String> {
    const WHAT: &str = "a finite number, 0 or more";
    let v = finite(s, WHAT)?;
    if v >= 0.0 {
        Ok(v)
    } else {
        Err(format!("negative; give {WHAT}"))
    }
}

/// A finite positive number.
pub fn positive(s: &str) -> Result<f64, String> {
    const WHAT: &str = "a finite number above 0";
    let v = finite(s, WHAT)?;
    if v > 0.0 {
        Ok(v)
    } else {
        Err(format!("out of range; give {WHAT}"))
    }
}

/// The target effective sample size: a whole number from 0 (the fixed --draws) to 1e9.
pub fn target_ess(s: &str) -> Result<u64, String> {
    const WHAT: &str = "a whole number from 0 (keep the fixed --draws) to 1000000000";
    let t = s.trim();
    if t.starts_with('-') {
        return Err(format!("negative; give {WHAT}"));
    }
    match t.parse::<u64>() {
        Ok(v) if v <= 1_000_000_000 => Ok(v),
        Ok(_) => Err(format!("too large; give {WHAT}")),
        Err(_) => Err(format!("not a whole number; give {WHAT}")),
    }
}

/// A budget of model runs: a whole number, 1 or more.
pub fn max_evaluations(s: &str) -> Result<u64, String> {
    const WHAT: &str =
        "a whole number of model runs, 1 or more (leave the option out for no limit)";
    let t = s.trim();
    if t.starts_with('-') {
        return Err(format!("negative; give {WHAT}"));
    }
    match t.parse::<u64>() {
        Ok(v) if v >= 1 => Ok(v),
        Ok(_) => Err(format!("zero; give {WHAT}")),
        Err(_) => Err(format!("not a whole number; give {WHAT}")),
    }
}

/// A wall-clock limit in seconds: above 0 and at most 1e9.
pub fn time_limit(s: &str) -> Result<f64, String> {
    const WHAT: &str = "seconds above 0 and at most 1e9 (leave the option out for no limit)";
    let v = finite(s, WHAT)?;
    if v > 0.0 && v <= MAX_SECONDS {
        Ok(v)
    } else {
        Err(format!("out of range; give {WHAT}"))
    }
}

/// The HMC integration time: positive and at most 1e6 (the sampler's own limit).
pub fn integration_time(s: &str) -> Result<f64, String> {
    const WHAT: &str =
        "a number above 0 and at most 1e6 (whitened units; π/2 ≈ 1.57 is the default)";
    let v = finite(s, WHAT)?;
    if v > 0.0 && v <= 1e6 {
        Ok(v)
    } else {
        Err(format!("out of range; give {WHAT}"))
    }
}

/// A time limit in seconds, 0 meaning none: checked before it becomes a [`Duration`].
pub fn seconds_or_none(s: &str) -> Result<Duration, String> {
    const WHAT: &str = "seconds between 0 (no limit) and 1e9";
    let v = finite(s, WHAT)?;
    to_duration(v, WHAT)
}

/// A time limit in seconds, above 0.
pub fn seconds(s: &str) -> Result<Duration, String> {
    const WHAT: &str = "seconds above 0 and at most 1e9";
    let v = finite(s, WHAT)?;
    if v <= 0.0 {
        return Err(format!("out of range; give {WHAT}"));
    }
    to_duration(v, WHAT)
}

fn to_duration(v: f64, what: &str) -> Result<Duration, String> {
    if !(0.0..=MAX_SECONDS).contains(&v) {
        return Err(format!("out of range; give {what}"));
    }
    // Finite and within [0, 1e9]: exactly what `Duration::try_from_secs_f64` accepts without loss.
    Duration::try_from_secs_f64(v).map_err(|e| format!("{v}: {e}; give {what}"))
}

/// The encoding asked of an adapter after the handshake.
pub fn encoding(s: &str) -> Result<EncodingChoice, String> {
    EncodingChoice::from_str(s, true)
        .map_err(|_| format!("--encoding {s}: use auto, text or binary"))
}

/// The Hessian method: `auto` or one of [`LaplaceMethod`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MethodChoice(pub Option<LaplaceMethod>);

/// Parses `--method`.
pub fn method(s: &str) -> Result<MethodChoice, String> {
    if s == "auto" {
        return Ok(MethodChoice(None));
    }
    LaplaceMethod::from_str(s, false)
        .map(|m| MethodChoice(Some(m)))
        .map_err(|_| format!("--method {s}: choose auto, dense, low-rank, lbfgs or diagonal"))
}

#[cfg(test)]
mod tests {
    use super::*;

    const BAD_EVERYWHERE: [&str; 4] = ["nan", "inf", "-inf", "x"];

    #[test]
    fn no_parser_accepts_nan_infinity_or_text() {
        for s in BAD_EVERYWHERE {
            assert!(open_unit(s).is_err(), "{s}");
            assert!(non_negative(s).is_err(), "{s}");
            assert!(positive(s).is_err(), "{s}");
            assert!(integration_time(s).is_err(), "{s}");
            assert!(seconds_or_none(s).is_err(), "{s}");
            assert!(seconds(s).is_err(), "{s}");
        }
    }

    #[test]
    fn ranges_are_enforced_and_named() {
        assert_eq!(open_unit("0.5"), Ok(0.5));
        for s in ["0", "1", "-1", "1e19", "1e30"] {
            assert!(
                open_unit(s)
                    .unwrap_err()
                    .contains("strictly between 0 and 1"),
                "{s}"
            );
        }
        assert_eq!(non_negative("0"), Ok(0.0));
        assert_eq!(non_negative("1e30"), Ok(1e30));
        assert!(non_negative("-1").unwrap_err().contains("negative"));
        assert!(positive("0").is_err() && positive("-1").is_err());
        assert_eq!(positive("1e19"), Ok(1e19));
        assert_eq!(integration_time("1e6"), Ok(1e6));
        assert!(integration_time("1e19")
            .unwrap_err()
            .contains("at most 1e6"));
    }

    #[test]
    fn durations_must_fit() {
        assert_eq!(seconds_or_none("0"), Ok(Duration::ZERO));
        assert_eq!(seconds_or_none("1.5"), Ok(Duration::from_millis(1500)));
        assert_eq!(seconds("1e9"), Ok(Duration::from_secs(1_000_000_000)));
        for s in ["1e19", "1e30", "1.0000001e9", "-1"] {
            assert!(seconds_or_none(s).unwrap_err().contains("1e9"), "{s}");
            assert!(seconds(s).unwrap_err().contains("1e9"), "{s}");
        }
        assert!(seconds("0").unwrap_err().contains("above 0"));
    }

    #[test]
    fn names_are_parsed_with_a_message_naming_the_option() {
        assert_eq!(encoding("binary"), Ok(EncodingChoice::Binary));
        assert!(encoding("morse").unwrap_err().contains("--encoding morse"));
        assert_eq!(method("auto"), Ok(MethodChoice(None)));
        assert_eq!(
            method("low-rank"),
            Ok(MethodChoice(Some(LaplaceMethod::LowRank)))
        );
        assert!(method("cholesky")
            .unwrap_err()
            .contains("choose auto, dense, low-rank"));
    }
}
