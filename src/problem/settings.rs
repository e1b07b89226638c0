//! Problem settings given on the command line as `--set key=value`, read with typed getters so that a
//! mistyped key or a bad value is reported with the list of known keys.

use std::collections::BTreeMap;
use std::str::FromStr;

use crate::error::{Error, Result};

/// Key-value settings for a built-in problem; every key must be read by the problem, or it is an error.
#[derive(Debug, Clone, Default)]
pub struct Settings {
    values: BTreeMap<String, String>,
    read: std::cell::RefCell<Vec<String>>,
}

impl Settings {
    /// Parses `key=value` items.
    pub fn parse(items: &[String]) -> Result<Self> {
        let mut values = BTreeMap::new();
        for item in items {
            let (k, v) = item.split_once('=').ok_or_else(|| {
                Error::Config(format!(
                    "setting '{item}' is not of the form key=value (e.g. --set window=12)"
                ))
            })?;
            let k = k.trim();
            if k.is_empty() {
                return Err(Error::Config(format!("setting '{item}' has an empty key")));
            }
            if values.insert(k.to_string(), v.trim().to_string()).is_some() {
                return Err(Error::Config(format!("setting '{k}' is given twice")));
            }
        }
        Ok(Settings {
            values,
            read: Default::default(),
        })
    }

    /// Settings from pairs (for library callers).
    pub fn from_pairs(pairs: &[(&str, &str)]) -> Self {
        let values = pairs
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect();
        Settings {
            values,
            read: Default::default(),
        }
    }

    /// Whether no settings were given.
    pub fn is_empty(&self) -> bool {
        self.values.is_empty()
    }

    /// Whether `key` was given.
    pub fn contains(&self, key: &str) -> bool {
        self.values.contains_key(key)
    }

    /// The value of `key` parsed as `T`, or `default` when absent.
    pub fn get<T: FromStr>(&self, key: &str, default: T) -> Result<T> {
        self.read.borrow_mut().push(key.to_string());
        match self.values.get(key) {
            None => Ok(default),
            Some(v) => v.parse::<T>().map_err(|_| {
                Error::Config(format!(
                    "setting {key}={v}: cannot read '{v}' as {}",
                    std::any::type_name::<T>()
                        .rsplit("::")
                        .next()
                        .unwrap_or("a value")
                ))
            }),
        }
    }

    /// The raw string value of `key`, if given.
    pub fn get_str(&self, key: &str) -> Option<String> {
        self.read.borrow_mut().push(key.to_string());
        self.values.get(key).cloned()
    }

    /// Fails when a key was given that the problem never read, listing the keys it knows.
    pub fn finish(&self, problem: &str) -> Result<()> {
        let read = self.read.borrow();
        let unknown: Vec<&String> = self.values.keys().filter(|k| !read.contains(k)).collect();
        if unknown.is_empty() {
            return Ok(());
        }
        let mut known: Vec<&String> = read.iter().collect();
        known.sort();
        known.dedup();
        Err(Error::Config(format!(
            "unknown setting{} {} for problem {problem}; known settings: {}",
            if unknown.len() > 1 { "s" } else { "" },
            unknown
                .iter()
                .map(|s| format!("'{s}'"))
                .collect::<Vec<_>>()
                .join(", "),
            known
                .iter()
                .map(|s| s.as_str())
                .collect::<Vec<_>>()
                .join(", ")
        )))
    }
}

/// Checks that a numeric setting is finite and positive.
pub fn positive(key: &str, v: f64) -> Result<f64> {
    if v.is_finite() && v > 0.0 {
        Ok(v)
    } else {
        Err(Error::Config(format!(
            "setting {key}={v}: it must be a positive finite number"
        )))
    }
}

/// Checks that a numeric setting is finite and within [lo, hi]; `why` says what the bounds protect.
pub fn in_range(key: &str, v: f64, lo: f64, hi: f64, why: &str) -> Result<f64> {
    if v.is_finite() && (lo..=hi).contains(&v) {
        Ok(v)
    } else {
        Err(Error::Config(format!(
            "setting {key}={v}: it must be a finite number between {} and {} ({why})",
            bound(lo),
            bound(hi)
        )))
    }
}

/// A bound for a message: plain for ordinary magnitudes, scientific for very large or small ones.
fn bound(v: f64) -> String {
    if v != 0.0 && !(1e-4..1e6).contains(&v.abs()) {
        format!("{v:e}")
    } else {
        format!("{v}")
    }
}

/// Checks a standard deviation or length scale: positive, and between 1e-150 and 1e150 so that its
/// square and inverse square (variances, precisions) are finite.
pub fn scale(key: &str, v: f64) -> Result<f64> {
    positive(key, v)?;
    in_range(
        key,
        v,
        1e-150,
        1e150,
        "its square and inverse square must be finite",
    )
}

/// Checks the observation schedule of a synthetic 4D-Var scenario: a window of at least one step,
/// observations every `obs_every` steps within it, and every `obs_stride`-th of `n` points.
pub fn observation_schedule(
    window: usize,
    obs_every: usize,
    obs_stride: usize,
    n: usize,
) -> Result<()> {
    if window == 0 {
        return Err(Error::Config(
            "setting window=0: the window must hold at least one step".into(),
        ));
    }
    if obs_every == 0 || obs_every > window {
        return Err(Error::Config(format!(
            "setting obs_every={obs_every}: it must be between 1 and the window length ({window})"
        )));
    }
    if obs_stride == 0 || obs_stride > n {
        return Err(Error::Config(format!(
            "setting obs_stride={obs_stride}: it must be between 1 and n ({n})"
        )));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn out_of_range_values_are_refused_with_their_name() {
        // Input validation, no outside source.
        for v in [f64::NAN, f64::INFINITY, -1.0, 0.0, 1e-200, 1e200] {
            let e = scale("sigma_o", v).unwrap_err().to_string();
            assert!(e.contains("setting sigma_o="), "{e}");
        }
        assert_eq!(scale("sigma_o", 0.5).unwrap(), 0.5);
        let e = in_range("b_cond", 1e20, 1.0, 1e12, "why")
            .unwrap_err()
            .to_string();
        assert!(
            e.contains("b_cond=100000000000000000000") && e.contains("1e12"),
            "{e}"
        );
    }
}
