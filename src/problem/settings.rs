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
