//! Numbers in the text encoding: finite values as JSON numbers, non-finite ones as the strings `"nan"`,
//! `"inf"`, `"-inf"`; the bare tokens `NaN`, `Infinity`, `-Infinity` of common JSON writers are read too.

use std::fmt;

use serde::de::{self, Deserializer, SeqAccess, Visitor};
use serde::ser::{SerializeSeq, Serializer};
use serde::{Deserialize, Serialize};

fn nonfinite_name(v: f64) -> &'static str {
    if v.is_nan() {
        "nan"
    } else if v > 0.0 {
        "inf"
    } else {
        "-inf"
    }
}

fn parse_nonfinite(s: &str) -> Option<f64> {
    match s.to_ascii_lowercase().as_str() {
        "nan" | "+nan" | "-nan" => Some(f64::NAN),
        "inf" | "+inf" | "infinity" | "+infinity" => Some(f64::INFINITY),
        "-inf" | "-infinity" => Some(f64::NEG_INFINITY),
        _ => None,
    }
}

/// One number to write.
pub(crate) struct Num(pub f64);

impl Serialize for Num {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        if self.0.is_finite() {
            s.serialize_f64(self.0)
        } else {
            s.serialize_str(nonfinite_name(self.0))
        }
    }
}

/// A vector of numbers to write.
pub(crate) struct NumSlice<'a>(pub &'a [f64]);

impl Serialize for NumSlice<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut seq = s.serialize_seq(Some(self.0.len()))?;
        for v in self.0 {
            seq.serialize_element(&Num(*v))?;
        }
        seq.end()
    }
}

struct NumVisitor;

impl<'de> Visitor<'de> for NumVisitor {
    type Value = f64;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a number or one of the strings \"nan\", \"inf\", \"-inf\"")
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<f64, E> {
        Ok(v)
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<f64, E> {
        Ok(v as f64)
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<f64, E> {
        parse_nonfinite(v).ok_or_else(|| E::invalid_value(de::Unexpected::Str(v), &self))
    }
}

/// One number read.
pub(crate) struct DeNum(pub f64);

impl<'de> Deserialize<'de> for DeNum {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(NumVisitor).map(DeNum)
    }
}

/// A vector of numbers read.
pub(crate) struct DeNumVec(pub Vec<f64>);

impl<'de> Deserialize<'de> for DeNumVec {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = Vec<f64>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an array of numbers")
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Vec<f64>, A::Error> {
                // The size hint comes from the input: cap it so garbage cannot ask for a huge allocation.
                let mut out = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(1 << 16));
                while let Some(DeNum(v)) = seq.next_element()? {
                    out.push(v);
                }
                Ok(out)
            }
        }
        d.deserialize_seq(V).map(DeNumVec)
    }
}

/// The bare token at the start of `rest` and its quoted replacement, if there is one.
fn bare_token(rest: &[u8]) -> Option<(usize, &'static [u8])> {
    if rest.starts_with(b"-Infinity") {
        Some((9, b"\"-inf\""))
    } else if rest.starts_with(b"Infinity") {
        Some((8, b"\"inf\""))
    } else if rest.starts_with(b"NaN") {
        Some((3, b"\"nan\""))
    } else {
        None
    }
}

/// Rewrites the bare tokens `NaN`, `Infinity`, `-Infinity` outside strings into our string form.
/// Returns `None` when there are none (then the line was malformed for another reason).
pub(crate) fn quote_bare_nonfinite(line: &[u8]) -> Option<Vec<u8>> {
    let mut out = Vec::with_capacity(line.len() + 16);
    let mut in_str = false;
    let mut escaped = false;
    let mut changed = false;
    let mut i = 0;
    while i < line.len() {
        let b = line[i];
        if in_str {
            out.push(b);
            if escaped {
                escaped = false;
            } else if b == b'\\' {
                escaped = true;
            } else if b == b'"' {
                in_str = false;
            }
            i += 1;
            continue;
        }
        if let Some((len, rep)) = bare_token(&line[i..]) {
            out.extend_from_slice(rep);
            i += len;
            changed = true;
            continue;
        }
        if b == b'"' {
            in_str = true;
        }
        out.push(b);
        i += 1;
    }
    changed.then_some(out)
}

/// Parses one JSON message, retrying with the bare non-finite tokens quoted (the fixed line is kept in
/// `owned`, which the result may borrow from).
pub(crate) fn parse_json<'a, T: Deserialize<'a>>(
    line: &'a [u8],
    owned: &'a mut Option<Vec<u8>>,
) -> Result<T, String> {
    match serde_json::from_slice::<T>(line) {
        Ok(v) => Ok(v),
        Err(e) => {
            *owned = quote_bare_nonfinite(line);
            match owned.as_deref() {
                Some(fixed) => serde_json::from_slice::<T>(fixed).map_err(|e| e.to_string()),
                None => Err(e.to_string()),
            }
        }
    }
}

/// Appends `value` as one JSON line.
pub(crate) fn json_line<T: Serialize>(value: &T, out: &mut Vec<u8>) {
    // Writing JSON into a Vec cannot fail: every value here serialises (non-finite numbers as strings).
    if serde_json::to_writer(&mut *out, value).is_err() {
        out.extend_from_slice(b"{}");
    }
    out.push(b'\n');
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bare_nonfinite_tokens_are_quoted_outside_strings_only() {
        let fixed =
            quote_bare_nonfinite(br#"{"error":"NaN here","cost":NaN,"grad":[-Infinity,Infinity]}"#);
        assert_eq!(
            fixed.as_deref(),
            Some(&br#"{"error":"NaN here","cost":"nan","grad":["-inf","inf"]}"#[..])
        );
        assert_eq!(quote_bare_nonfinite(br#"{"a":"NaN"}"#), None);
    }
}
