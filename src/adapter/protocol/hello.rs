//! The handshake lines, always text: the adapter's hello and varpost's start line.

use serde::{Deserialize, Serialize};

use super::json::json_line;
use super::{
    malformed, trim_line, Capabilities, Encoding, Hello, ProtocolError, HELLO_MARK,
    PROTOCOL_VERSION,
};

#[derive(Serialize, Deserialize)]
struct HelloJson {
    hello: String,
    protocol: u64,
    /// Read by [`hello_dim`] (a whole number, possibly written as `1e6`); replaced by 1 before the rest of
    /// the hello is read.
    dim: usize,
    #[serde(default)]
    encodings: Option<Vec<String>>,
    #[serde(default)]
    offers: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    names: Option<Vec<String>>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    label: Option<String>,
}

/// Writes a hello line (what an adapter sends; used by tests and Rust-side adapters).
pub fn encode_hello(h: &Hello) -> Vec<u8> {
    let j = HelloJson {
        hello: HELLO_MARK.into(),
        protocol: h.protocol as u64,
        dim: h.dim,
        encodings: Some(h.encodings.iter().map(|e| e.name().to_string()).collect()),
        offers: Some(h.offers.names().into_iter().map(String::from).collect()),
        names: h.names.clone(),
        label: h.label.clone(),
    };
    let mut out = Vec::new();
    json_line(&j, &mut out);
    out
}

/// Reads the adapter's hello line. A line that is not a hello, a version other than ours, an unknown
/// encoding or capability, or names of the wrong length are errors that quote the line.
pub fn decode_hello(line: &[u8]) -> Result<Hello, ProtocolError> {
    let line = trim_line(line);
    let mut value = hello_value(line)?;
    let dim = hello_dim(&value, line)?;
    value["dim"] = serde_json::Value::from(1u64);
    let j: HelloJson =
        serde_json::from_value(value).map_err(|e| malformed(format!("bad hello ({e})"), line))?;
    let encodings = hello_encodings(j.encodings.as_deref(), line)?;
    let offers = hello_offers(j.offers.as_deref(), line)?;
    if let Some(names) = &j.names {
        if names.len() != dim {
            return Err(ProtocolError::Length {
                what: "component names in the hello",
                expected: dim,
                got: names.len(),
            });
        }
    }
    Ok(Hello {
        protocol: PROTOCOL_VERSION,
        dim,
        encodings,
        offers,
        names: j.names,
        label: j.label,
    })
}

/// The hello as a JSON value, once it is known to be a hello of our protocol version.
fn hello_value(line: &[u8]) -> Result<serde_json::Value, ProtocolError> {
    let hint = "the adapter's first line on stdout must be its hello, e.g. \
                {\"hello\":\"varpost-adapter\",\"protocol\":1,\"dim\":40} (anything else belongs on stderr)";
    let value: serde_json::Value =
        serde_json::from_slice(line).map_err(|_| malformed(hint, line))?;
    if value.get("hello").and_then(|v| v.as_str()) != Some(HELLO_MARK) {
        return Err(malformed(hint, line));
    }
    match value.get("protocol").and_then(|v| v.as_u64()) {
        Some(v) if v == PROTOCOL_VERSION as u64 => Ok(value),
        Some(v) => Err(ProtocolError::Version(v)),
        None => Err(malformed(
            "the hello has no integer \"protocol\" field",
            line,
        )),
    }
}

/// The hello's `dim`: a whole number ≥ 1, written as an integer or as a number with an exponent
/// (`1e6`, as some writers print whole numbers). Only its value is read here; whether the machine can
/// hold a state that large is checked before anything of that size is allocated.
fn hello_dim(value: &serde_json::Value, line: &[u8]) -> Result<usize, ProtocolError> {
    let Some(dim) = value.get("dim") else {
        return Err(malformed("the hello has no \"dim\" field", line));
    };
    if let Some(n) = dim.as_u64() {
        return match usize::try_from(n) {
            Ok(0) => Err(malformed("the hello declares dimension 0", line)),
            Ok(n) => Ok(n),
            Err(_) => Err(too_large(n as f64, line)),
        };
    }
    match dim.as_f64() {
        Some(v) if v >= 1.0 && v.fract() == 0.0 && v < usize::MAX as f64 => Ok(v as usize),
        Some(v) if v >= 1.0 && v.fract() == 0.0 => Err(too_large(v, line)),
        _ => Err(malformed(
            "the hello's \"dim\" must be a whole number of at least 1 (the length of the control vector)",
            line,
        )),
    }
}

/// A dimension beyond any address space.
fn too_large(dim: f64, line: &[u8]) -> ProtocolError {
    malformed(
        format!(
            "the hello declares dimension {dim:e}: one state vector of that length would need {} of \
             memory, more than any machine has; check the \"dim\" the adapter prints",
            crate::resources::format_bytes(crate::resources::f64_bytes(dim as u128))
        ),
        line,
    )
}

fn hello_encodings(list: Option<&[String]>, line: &[u8]) -> Result<Vec<Encoding>, ProtocolError> {
    let Some(list) = list else {
        return Ok(vec![Encoding::Text]);
    };
    let mut v = Vec::new();
    for name in list {
        match Encoding::from_name(name) {
            Some(e) => v.push(e),
            None => {
                return Err(malformed(
                    format!("unknown encoding \"{name}\" in the hello (known: text, binary)"),
                    line,
                ))
            }
        }
    }
    if v.is_empty() {
        return Err(malformed("the hello lists no encodings", line));
    }
    Ok(v)
}

fn hello_offers(list: Option<&[String]>, line: &[u8]) -> Result<Capabilities, ProtocolError> {
    let mut offers = Capabilities::default();
    for name in list.into_iter().flatten() {
        if !offers.set(name) {
            return Err(malformed(
                format!(
                    "unknown capability \"{name}\" in the hello (known: {})",
                    Capabilities::NAMES.join(", ")
                ),
                line,
            ));
        }
    }
    if offers.prior_solve && !offers.prior {
        return Err(malformed(
            "the hello offers \"prior_solve\" without \"prior\"",
            line,
        ));
    }
    Ok(offers)
}

#[derive(Serialize, Deserialize)]
struct StartJson {
    op: String,
    encoding: String,
}

/// The start line varpost sends after the hello: from the next message on, `encoding` is used.
pub fn encode_start(encoding: Encoding) -> Vec<u8> {
    let mut out = Vec::new();
    json_line(
        &StartJson {
            op: "start".into(),
            encoding: encoding.name().into(),
        },
        &mut out,
    );
    out
}

/// Reads a start line (the adapter's side of the handshake).
pub fn decode_start(line: &[u8]) -> Result<Encoding, ProtocolError> {
    let line = trim_line(line);
    let j: StartJson = serde_json::from_slice(line).map_err(|_| {
        malformed(
            "expected the start line {\"op\":\"start\",\"encoding\":...}",
            line,
        )
    })?;
    if j.op != "start" {
        return Err(malformed(
            "expected the start line {\"op\":\"start\",...}",
            line,
        ));
    }
    Encoding::from_name(&j.encoding)
        .ok_or_else(|| malformed("unknown encoding in the start line", line))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn with_dim(dim: &str) -> Result<Hello, ProtocolError> {
        decode_hello(
            format!(r#"{{"hello":"varpost-adapter","protocol":1,"dim":{dim}}}"#).as_bytes(),
        )
    }

    #[test]
    fn huge_dimensions_are_read_without_allocating_and_impossible_ones_refused() {
        assert_eq!(with_dim("4611686018427387904").unwrap().dim, 1 << 62);
        assert_eq!(with_dim("1e12").unwrap().dim, 1_000_000_000_000);
        assert_eq!(with_dim("40.0").unwrap().dim, 40);
        let e = with_dim("1e30").unwrap_err().to_string();
        assert!(
            e.contains("1e30") && e.contains("more than any machine has"),
            "{e}"
        );
        let e = with_dim("18446744073709551616").unwrap_err().to_string();
        assert!(e.contains("more than any machine has"), "{e}");
        for bad in ["0", "-3", "2.5", "\"40\"", "null", "[4]"] {
            let e = with_dim(bad).unwrap_err().to_string();
            assert!(e.contains("dim") || e.contains("dimension 0"), "{bad}: {e}");
        }
        let e = decode_hello(br#"{"hello":"varpost-adapter","protocol":1}"#)
            .unwrap_err()
            .to_string();
        assert!(e.contains("no \"dim\" field"), "{e}");
    }
}
