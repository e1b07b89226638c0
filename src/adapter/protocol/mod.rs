//! The adapter protocol, version 1: its messages and their two encodings. No I/O happens here.
//!
//! The full specification, written for someone implementing an adapter, is `adapters/PROTOCOL.md`.
//! In short:
//!
//! 1. The adapter prints one *hello* line (always text): protocol version, dimension, encodings it
//!    speaks, capabilities it offers, optional component names.
//! 2. varpost answers with one *start* line (always text) naming the encoding both sides use from then on.
//! 3. varpost sends requests, each with an id; the adapter answers each with a reply carrying the same
//!    id, or with an error reply. A `quit` request has no reply: the adapter exits.
//!
//! Text encoding: one JSON object per line. Numbers are JSON numbers written with enough digits to
//! round-trip (shortest round-trip form on our side), non-finite values are the strings `"nan"`, `"inf"`,
//! `"-inf"`. The bare tokens `NaN`, `Infinity`, `-Infinity` that some JSON writers emit are accepted too.
//!
//! Binary encoding: frames of a 16-byte header and a payload, all little-endian:
//! `u32 body length (bytes after this field) | u8 tag | u8 flags | u16 zero | u64 id | payload`.
//! Vector payloads are packed f64; an error payload is UTF-8 text.
//!
//! Files: [`messages`] (the vocabulary), `hello` (the handshake lines), `json` (numbers in JSON),
//! `text` and `binary` (the two encodings of requests and replies). This file holds what they share
//! and the entry points that pick an encoding.

mod binary;
mod hello;
mod json;
pub mod messages;
mod text;

#[cfg(test)]
mod fuzz;

use std::fmt;

pub use hello::{decode_hello, decode_start, encode_hello, encode_start};
pub use messages::{Capabilities, Encoding, Hello, Op, Reply, Request};

/// The protocol version this varpost speaks.
pub const PROTOCOL_VERSION: u32 = 1;
/// The value of the `hello` field that marks an adapter's first line.
pub const HELLO_MARK: &str = "varpost-adapter";
/// Size of a binary frame header including the length field.
pub const FRAME_HEADER: usize = 16;
/// Longest error message an adapter may send, in bytes.
pub const MAX_MESSAGE: usize = 64 * 1024;
/// Tag of a binary error reply.
pub const TAG_ERROR: u8 = 0xFF;
/// Bit set on a reply's tag: the reply to the request whose tag is in the low bits.
pub const TAG_REPLY: u8 = 0x80;

/// What is wrong with a message.
#[derive(Debug, Clone, PartialEq)]
pub enum ProtocolError {
    /// The bytes do not form the expected message; the text quotes what arrived.
    Malformed(String),
    /// A vector of the wrong length.
    Length {
        what: &'static str,
        expected: usize,
        got: usize,
    },
    /// The adapter speaks another protocol version.
    Version(u64),
}

impl fmt::Display for ProtocolError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ProtocolError::Malformed(m) => write!(f, "{m}"),
            ProtocolError::Length { what, expected, got } => {
                write!(f, "{what} has length {got}, expected {expected}")
            }
            ProtocolError::Version(v) => write!(
                f,
                "the adapter speaks protocol version {v}, this varpost speaks version {PROTOCOL_VERSION} \
                 only: update the adapter (or its helper module) or varpost"
            ),
        }
    }
}

impl std::error::Error for ProtocolError {}

/// A malformed-message error quoting (the start of) what arrived.
pub(crate) fn malformed(what: impl fmt::Display, bytes: &[u8]) -> ProtocolError {
    ProtocolError::Malformed(format!("{what}; received {}", quote(bytes, 240)))
}

/// Shows bytes for an error message: printable ASCII as is, the rest escaped, cut after `max` bytes.
pub fn quote(bytes: &[u8], max: usize) -> String {
    let mut s = String::from("\"");
    for &b in bytes.iter().take(max) {
        match b {
            b'"' => s.push_str("\\\""),
            b'\\' => s.push_str("\\\\"),
            b'\n' => s.push_str("\\n"),
            b'\r' => s.push_str("\\r"),
            b'\t' => s.push_str("\\t"),
            0x20..=0x7e => s.push(b as char),
            _ => s.push_str(&format!("\\x{b:02x}")),
        }
    }
    s.push('"');
    if bytes.len() > max {
        s.push_str(&format!(" ... ({} more bytes)", bytes.len() - max));
    }
    s
}

/// A line without its trailing `\n` / `\r\n`.
pub(crate) fn trim_line(line: &[u8]) -> &[u8] {
    let mut end = line.len();
    while end > 0 && matches!(line[end - 1], b'\n' | b'\r') {
        end -= 1;
    }
    &line[..end]
}

/// Checks that a vector has the adapter's dimension.
pub(crate) fn check_len(what: &'static str, v: &[f64], dim: usize) -> Result<(), ProtocolError> {
    if v.len() != dim {
        return Err(ProtocolError::Length {
            what,
            expected: dim,
            got: v.len(),
        });
    }
    Ok(())
}

/// Builds a decoded request, checking that it carries the vectors its operation needs, of length `dim`.
pub(crate) fn finish_request(
    id: u64,
    op: Op,
    x: Option<Vec<f64>>,
    v: Option<Vec<f64>>,
    dim: usize,
) -> Result<(u64, Request<'static>), ProtocolError> {
    let (has_x, has_v) = op.carries();
    let take = |want: bool, got: Option<Vec<f64>>, what: &'static str| match (want, got) {
        (false, _) => Ok(Vec::new()),
        (true, None) => Err(ProtocolError::Malformed(format!(
            "{} request without \"{what}\"",
            op.name()
        ))),
        (true, Some(v)) => check_len(what, &v, dim).map(|_| v),
    };
    let x = take(has_x, x, "x")?;
    let v = take(has_v, v, "v")?;
    Ok((
        id,
        Request {
            op,
            x: std::borrow::Cow::Owned(x),
            v: std::borrow::Cow::Owned(v),
        },
    ))
}

/// The body length announced by a binary frame's first four bytes.
pub fn frame_body_len(prefix: [u8; 4]) -> usize {
    u32::from_le_bytes(prefix) as usize
}

/// The longest frame body a well-behaved adapter of dimension `dim` sends (a background reply, or an
/// error message); anything longer is refused before it is read.
pub fn max_frame_body(dim: usize) -> usize {
    dim.saturating_mul(2)
        .saturating_add(1)
        .saturating_mul(8)
        .saturating_add(FRAME_HEADER - 4 + MAX_MESSAGE)
}

/// The longest text line a well-behaved adapter of dimension `dim` sends.
pub fn max_text_line(dim: usize) -> usize {
    // A JSON number needs at most 24 characters; allow generous room for field names and spacing.
    dim.saturating_mul(2)
        .saturating_add(1)
        .saturating_mul(64)
        .saturating_add(MAX_MESSAGE)
}

/// Appends one request with id `id` to `out`.
pub fn encode_request(enc: Encoding, id: u64, req: &Request<'_>, out: &mut Vec<u8>) {
    match enc {
        Encoding::Text => text::encode_request(id, req, out),
        Encoding::Binary => binary::encode_request(id, req, out),
    }
}

/// Reads one request (the adapter's side); `dim` is the adapter's dimension.
pub fn decode_request(
    enc: Encoding,
    bytes: &[u8],
    dim: usize,
) -> Result<(u64, Request<'static>), ProtocolError> {
    match enc {
        Encoding::Text => text::decode_request(trim_line(bytes), dim),
        Encoding::Binary => binary::decode_request(bytes, dim),
    }
}

/// Appends one reply (what an adapter sends). `op` is the request answered (it fixes the binary tag of a
/// `Vector` reply).
pub fn encode_reply(enc: Encoding, id: u64, op: Op, reply: &Reply, out: &mut Vec<u8>) {
    match enc {
        Encoding::Text => text::encode_reply(id, reply, out),
        Encoding::Binary => binary::encode_reply(id, op, reply, out),
    }
}

/// Reads the reply to a request of kind `op` from an adapter of dimension `dim`: its id and content.
/// Vectors of the wrong length, missing fields and replies of the wrong kind are errors.
pub fn decode_reply(
    enc: Encoding,
    bytes: &[u8],
    op: Op,
    dim: usize,
) -> Result<(u64, Reply), ProtocolError> {
    match enc {
        Encoding::Text => text::decode_reply(trim_line(bytes), op, dim),
        Encoding::Binary => binary::decode_reply(bytes, op, dim),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quote_escapes_and_truncates() {
        assert_eq!(quote(b"a\"b\n\x01", 10), "\"a\\\"b\\n\\x01\"");
        assert_eq!(quote(b"abcdef", 3), "\"abc\" ... (3 more bytes)");
    }

    #[test]
    fn size_limits_saturate_instead_of_overflowing() {
        assert_eq!(max_text_line(usize::MAX / 2), usize::MAX);
        assert_eq!(max_frame_body(1 << 62), usize::MAX);
        assert_eq!(max_frame_body(2), 12 + 8 * 5 + MAX_MESSAGE);
    }
}
