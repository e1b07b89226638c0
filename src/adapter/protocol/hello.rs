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
    let value = hello_value(line)?;
    let j: HelloJson =
        serde_json::from_value(value).map_err(|e| malformed(format!("bad hello ({e})"), line))?;
    let encodings = hello_encodings(j.encodings.as_deref(), line)?;
    let offers = hello_offers(j.offers.as_deref(), line)?;
    if j.dim == 0 {
        return Err(malformed("the hello declares dimension 0", line));
    }
    if let Some(names) = &j.names {
        if names.len() != j.dim {
            return Err(ProtocolError::Length {
                what: "component names in the hello",
                expected: j.dim,
                got: names.len(),
            });
        }
    }
    Ok(Hello {
        protocol: PROTOCOL_VERSION,
        dim: j.dim,
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
