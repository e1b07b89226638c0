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

use std::borrow::Cow;
use std::fmt;

use serde::de::{self, Deserializer, SeqAccess, Visitor};
use serde::ser::{SerializeSeq, Serializer};
use serde::{Deserialize, Serialize};

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

/// How messages after the handshake are written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Encoding {
    /// One JSON object per line.
    Text,
    /// Length-prefixed frames of little-endian f64.
    Binary,
}

impl Encoding {
    /// The name used in the handshake.
    pub fn name(self) -> &'static str {
        match self {
            Encoding::Text => "text",
            Encoding::Binary => "binary",
        }
    }
    /// Parses a handshake name.
    pub fn from_name(s: &str) -> Option<Self> {
        match s {
            "text" => Some(Encoding::Text),
            "binary" => Some(Encoding::Binary),
            _ => None,
        }
    }
}

/// Optional capabilities an adapter declares in its hello.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Capabilities {
    /// Answers `hess_vec` (a second-order adjoint, or exact for a linear problem).
    pub hess_vec: bool,
    /// Answers `split` with Jb and Jo.
    pub split: bool,
    /// Answers `background`, `b_half`, `b_half_t`: the prior N(xb, B) with B = S Sᵀ.
    pub prior: bool,
    /// Also answers `b_half_solve`, `b_half_t_solve` (S⁻¹ and S⁻ᵀ). Needs `prior`.
    pub prior_solve: bool,
}

impl Capabilities {
    const NAMES: [&'static str; 4] = ["hess_vec", "split", "prior", "prior_solve"];

    fn names(&self) -> Vec<&'static str> {
        let on = [self.hess_vec, self.split, self.prior, self.prior_solve];
        Self::NAMES
            .iter()
            .zip(on)
            .filter(|(_, o)| *o)
            .map(|(n, _)| *n)
            .collect()
    }

    /// Whether a request with this operation may be sent.
    pub fn allows(&self, op: Op) -> bool {
        match op {
            Op::CostGrad | Op::Cost | Op::Quit => true,
            Op::HessVec => self.hess_vec,
            Op::Split => self.split,
            Op::Background | Op::BHalf | Op::BHalfT => self.prior,
            Op::BHalfSolve | Op::BHalfTSolve => self.prior && self.prior_solve,
        }
    }
}

/// The adapter's first line.
#[derive(Debug, Clone, PartialEq)]
pub struct Hello {
    /// Protocol version the adapter speaks.
    pub protocol: u32,
    /// Length of the control vector.
    pub dim: usize,
    /// Encodings the adapter can switch to after the handshake, in its order of preference.
    pub encodings: Vec<Encoding>,
    /// Optional capabilities.
    pub offers: Capabilities,
    /// Names of the control-vector components, if given (length `dim`).
    pub names: Option<Vec<String>>,
    /// A free-form description of the adapter, shown in logs and errors.
    pub label: Option<String>,
}

/// What a request asks for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Op {
    /// Cost and gradient at x.
    CostGrad,
    /// Cost alone at x.
    Cost,
    /// Hessian-vector product ∇²J(x) v.
    HessVec,
    /// Cost split into Jb and Jo at x.
    Split,
    /// The prior's background xb, diag(B) and log det B.
    Background,
    /// S v with B = S Sᵀ.
    BHalf,
    /// Sᵀ v.
    BHalfT,
    /// S⁻¹ v.
    BHalfSolve,
    /// S⁻ᵀ v.
    BHalfTSolve,
    /// Stop: the adapter exits without replying.
    Quit,
}

impl Op {
    /// Every operation, for tests and tables.
    pub const ALL: [Op; 10] = [
        Op::CostGrad,
        Op::Cost,
        Op::HessVec,
        Op::Split,
        Op::Background,
        Op::BHalf,
        Op::BHalfT,
        Op::BHalfSolve,
        Op::BHalfTSolve,
        Op::Quit,
    ];

    /// The `op` field of a text request.
    pub fn name(self) -> &'static str {
        match self {
            Op::CostGrad => "cost_grad",
            Op::Cost => "cost",
            Op::HessVec => "hess_vec",
            Op::Split => "split",
            Op::Background => "background",
            Op::BHalf => "b_half",
            Op::BHalfT => "b_half_t",
            Op::BHalfSolve => "b_half_solve",
            Op::BHalfTSolve => "b_half_t_solve",
            Op::Quit => "quit",
        }
    }

    /// The tag of a binary request.
    pub fn tag(self) -> u8 {
        match self {
            Op::CostGrad => 1,
            Op::Cost => 2,
            Op::HessVec => 3,
            Op::Split => 4,
            Op::Background => 5,
            Op::BHalf => 6,
            Op::BHalfT => 7,
            Op::BHalfSolve => 8,
            Op::BHalfTSolve => 9,
            Op::Quit => 15,
        }
    }

    fn from_name(s: &str) -> Option<Op> {
        Op::ALL.into_iter().find(|o| o.name() == s)
    }

    fn from_tag(t: u8) -> Option<Op> {
        Op::ALL.into_iter().find(|o| o.tag() == t)
    }

    /// Whether the request carries x, v (each of length dim).
    fn carries(self) -> (bool, bool) {
        match self {
            Op::CostGrad | Op::Cost | Op::Split => (true, false),
            Op::HessVec => (true, true),
            Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve => (false, true),
            Op::Background | Op::Quit => (false, false),
        }
    }
}

/// A request from varpost. `x` and `v` are empty where the operation does not use them.
#[derive(Debug, Clone, PartialEq)]
pub struct Request<'a> {
    pub op: Op,
    pub x: Cow<'a, [f64]>,
    pub v: Cow<'a, [f64]>,
}

impl<'a> Request<'a> {
    /// A request borrowing its vectors.
    pub fn new(op: Op, x: &'a [f64], v: &'a [f64]) -> Self {
        Request {
            op,
            x: Cow::Borrowed(x),
            v: Cow::Borrowed(v),
        }
    }
}

/// An adapter's answer to one request.
#[derive(Debug, Clone, PartialEq)]
pub enum Reply {
    CostGrad {
        cost: f64,
        grad: Vec<f64>,
    },
    Cost {
        cost: f64,
    },
    HessVec {
        hv: Vec<f64>,
    },
    Split {
        jb: f64,
        jo: f64,
    },
    Background {
        xb: Vec<f64>,
        var: Vec<f64>,
        log_det: f64,
    },
    /// The answer to `b_half`, `b_half_t`, `b_half_solve`, `b_half_t_solve`.
    Vector {
        out: Vec<f64>,
    },
    /// The adapter could not evaluate. `recoverable`: another point may succeed.
    Error {
        message: String,
        recoverable: bool,
    },
}

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

fn malformed(what: impl fmt::Display, bytes: &[u8]) -> ProtocolError {
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

// ---------------------------------------------------------------------------------------------------
// Numbers in JSON: finite values as numbers, non-finite ones as strings.

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

struct Num(f64);

impl Serialize for Num {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        if self.0.is_finite() {
            s.serialize_f64(self.0)
        } else {
            s.serialize_str(nonfinite_name(self.0))
        }
    }
}

struct NumSlice<'a>(&'a [f64]);

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

struct DeNum(f64);

impl<'de> Deserialize<'de> for DeNum {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(NumVisitor).map(DeNum)
    }
}

struct DeNumVec(Vec<f64>);

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

/// Rewrites the bare tokens `NaN`, `Infinity`, `-Infinity` outside strings into our string form.
/// Returns `None` when there are none (then the line was malformed for another reason).
fn quote_bare_nonfinite(line: &[u8]) -> Option<Vec<u8>> {
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
        let rest = &line[i..];
        let token: Option<(&[u8], &[u8])> = if rest.starts_with(b"-Infinity") {
            Some((b"-Infinity", b"\"-inf\""))
        } else if rest.starts_with(b"Infinity") {
            Some((b"Infinity", b"\"inf\""))
        } else if rest.starts_with(b"NaN") {
            Some((b"NaN", b"\"nan\""))
        } else {
            None
        };
        if let Some((tok, rep)) = token {
            out.extend_from_slice(rep);
            i += tok.len();
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

fn parse_json<'a, T: Deserialize<'a>>(
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

fn trim_line(line: &[u8]) -> &[u8] {
    let mut end = line.len();
    while end > 0 && matches!(line[end - 1], b'\n' | b'\r') {
        end -= 1;
    }
    &line[..end]
}

fn check_len(what: &'static str, v: &[f64], dim: usize) -> Result<(), ProtocolError> {
    if v.len() != dim {
        return Err(ProtocolError::Length {
            what,
            expected: dim,
            got: v.len(),
        });
    }
    Ok(())
}

fn json_line<T: Serialize>(value: &T, out: &mut Vec<u8>) {
    // Writing JSON into a Vec cannot fail: every value here serialises (non-finite numbers as strings).
    if serde_json::to_writer(&mut *out, value).is_err() {
        out.extend_from_slice(b"{}");
    }
    out.push(b'\n');
}

// ---------------------------------------------------------------------------------------------------
// Handshake.

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
    let hint = "the adapter's first line on stdout must be its hello, e.g. \
                {\"hello\":\"varpost-adapter\",\"protocol\":1,\"dim\":40} (anything else belongs on stderr)";
    let value: serde_json::Value =
        serde_json::from_slice(line).map_err(|_| malformed(hint, line))?;
    if value.get("hello").and_then(|v| v.as_str()) != Some(HELLO_MARK) {
        return Err(malformed(hint, line));
    }
    match value.get("protocol").and_then(|v| v.as_u64()) {
        Some(v) if v == PROTOCOL_VERSION as u64 => {}
        Some(v) => return Err(ProtocolError::Version(v)),
        None => {
            return Err(malformed(
                "the hello has no integer \"protocol\" field",
                line,
            ))
        }
    }
    let j: HelloJson =
        serde_json::from_value(value).map_err(|e| malformed(format!("bad hello ({e})"), line))?;
    let encodings = match &j.encodings {
        None => vec![Encoding::Text],
        Some(list) => {
            let mut v = Vec::new();
            for name in list {
                match Encoding::from_name(name) {
                    Some(e) => v.push(e),
                    None => {
                        return Err(malformed(
                            format!(
                                "unknown encoding \"{name}\" in the hello (known: text, binary)"
                            ),
                            line,
                        ))
                    }
                }
            }
            if v.is_empty() {
                return Err(malformed("the hello lists no encodings", line));
            }
            v
        }
    };
    let mut offers = Capabilities::default();
    for name in j.offers.iter().flatten() {
        match name.as_str() {
            "hess_vec" => offers.hess_vec = true,
            "split" => offers.split = true,
            "prior" => offers.prior = true,
            "prior_solve" => offers.prior_solve = true,
            _ => {
                return Err(malformed(
                    format!(
                        "unknown capability \"{name}\" in the hello (known: {})",
                        Capabilities::NAMES.join(", ")
                    ),
                    line,
                ))
            }
        }
    }
    if offers.prior_solve && !offers.prior {
        return Err(malformed(
            "the hello offers \"prior_solve\" without \"prior\"",
            line,
        ));
    }
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

// ---------------------------------------------------------------------------------------------------
// Requests.

#[derive(Serialize)]
struct RequestOut<'a> {
    id: u64,
    op: &'static str,
    #[serde(skip_serializing_if = "Option::is_none")]
    x: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    v: Option<NumSlice<'a>>,
}

#[derive(Deserialize)]
struct RequestIn {
    id: u64,
    op: String,
    #[serde(default)]
    x: Option<DeNumVec>,
    #[serde(default)]
    v: Option<DeNumVec>,
}

fn frame_header(out: &mut Vec<u8>, tag: u8, flags: u8, id: u64, payload_len: usize) {
    let body = (FRAME_HEADER - 4 + payload_len) as u32;
    out.reserve(FRAME_HEADER + payload_len);
    out.extend_from_slice(&body.to_le_bytes());
    out.push(tag);
    out.push(flags);
    out.extend_from_slice(&[0, 0]);
    out.extend_from_slice(&id.to_le_bytes());
}

fn put_f64s(out: &mut Vec<u8>, v: &[f64]) {
    let start = out.len();
    out.resize(start + 8 * v.len(), 0);
    for (chunk, x) in out[start..].chunks_exact_mut(8).zip(v) {
        chunk.copy_from_slice(&x.to_le_bytes());
    }
}

fn get_f64s(bytes: &[u8]) -> Vec<f64> {
    bytes
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes([c[0], c[1], c[2], c[3], c[4], c[5], c[6], c[7]]))
        .collect()
}

/// Appends one request with id `id` to `out`.
pub fn encode_request(enc: Encoding, id: u64, req: &Request<'_>, out: &mut Vec<u8>) {
    let (has_x, has_v) = req.op.carries();
    match enc {
        Encoding::Text => {
            let r = RequestOut {
                id,
                op: req.op.name(),
                x: has_x.then_some(NumSlice(&req.x)),
                v: has_v.then_some(NumSlice(&req.v)),
            };
            json_line(&r, out);
        }
        Encoding::Binary => {
            let n = if has_x { req.x.len() } else { 0 } + if has_v { req.v.len() } else { 0 };
            frame_header(out, req.op.tag(), 0, id, 8 * n);
            if has_x {
                put_f64s(out, &req.x);
            }
            if has_v {
                put_f64s(out, &req.v);
            }
        }
    }
}

/// Splits a binary frame into (tag, flags, id, payload), checking its length field.
fn split_frame(frame: &[u8]) -> Result<(u8, u8, u64, &[u8]), ProtocolError> {
    if frame.len() < FRAME_HEADER {
        return Err(malformed(
            format!("a binary frame needs at least {FRAME_HEADER} bytes"),
            frame,
        ));
    }
    let body = u32::from_le_bytes([frame[0], frame[1], frame[2], frame[3]]) as usize;
    if body + 4 != frame.len() {
        return Err(malformed(
            format!(
                "the frame's length field says {body} bytes follow but {} do",
                frame.len() - 4
            ),
            &frame[..frame.len().min(64)],
        ));
    }
    let mut id = [0u8; 8];
    id.copy_from_slice(&frame[8..16]);
    Ok((
        frame[4],
        frame[5],
        u64::from_le_bytes(id),
        &frame[FRAME_HEADER..],
    ))
}

/// The body length announced by a binary frame's first four bytes.
pub fn frame_body_len(prefix: [u8; 4]) -> usize {
    u32::from_le_bytes(prefix) as usize
}

/// The longest frame body a well-behaved adapter of dimension `dim` sends (a background reply, or an
/// error message); anything longer is refused before it is read.
pub fn max_frame_body(dim: usize) -> usize {
    FRAME_HEADER - 4 + 8 * (2 * dim + 1) + MAX_MESSAGE
}

/// The longest text line a well-behaved adapter of dimension `dim` sends.
pub fn max_text_line(dim: usize) -> usize {
    // A JSON number needs at most 24 characters; allow generous room for field names and spacing.
    64 * (2 * dim + 1) + MAX_MESSAGE
}

/// Reads one request (the adapter's side); `dim` is the adapter's dimension.
pub fn decode_request(
    enc: Encoding,
    bytes: &[u8],
    dim: usize,
) -> Result<(u64, Request<'static>), ProtocolError> {
    let (id, op, x, v) = match enc {
        Encoding::Text => {
            let line = trim_line(bytes);
            let mut owned = None;
            let r: RequestIn = parse_json(line, &mut owned)
                .map_err(|e| malformed(format!("not a request ({e})"), line))?;
            let op = Op::from_name(&r.op)
                .ok_or_else(|| malformed(format!("unknown op \"{}\"", r.op), line))?;
            (r.id, op, r.x.map(|v| v.0), r.v.map(|v| v.0))
        }
        Encoding::Binary => {
            let (tag, _, id, payload) = split_frame(bytes)?;
            let op = Op::from_tag(tag).ok_or_else(|| {
                malformed(
                    format!("unknown request tag {tag:#04x}"),
                    &bytes[..bytes.len().min(64)],
                )
            })?;
            let (has_x, has_v) = op.carries();
            let want = 8 * dim * (has_x as usize + has_v as usize);
            if payload.len() != want {
                return Err(ProtocolError::Length {
                    what: "request payload (bytes)",
                    expected: want,
                    got: payload.len(),
                });
            }
            let vals = get_f64s(payload);
            let (x, v) = match (has_x, has_v) {
                (true, true) => (Some(vals[..dim].to_vec()), Some(vals[dim..].to_vec())),
                (true, false) => (Some(vals), None),
                (false, true) => (None, Some(vals)),
                (false, false) => (None, None),
            };
            (id, op, x, v)
        }
    };
    let (has_x, has_v) = op.carries();
    let take = |want: bool,
                got: Option<Vec<f64>>,
                what: &'static str|
     -> Result<Vec<f64>, ProtocolError> {
        match (want, got) {
            (false, _) => Ok(Vec::new()),
            (true, None) => Err(ProtocolError::Malformed(format!(
                "{} request without \"{what}\"",
                op.name()
            ))),
            (true, Some(v)) => {
                check_len(what, &v, dim)?;
                Ok(v)
            }
        }
    };
    let x = take(has_x, x, "x")?;
    let v = take(has_v, v, "v")?;
    Ok((
        id,
        Request {
            op,
            x: Cow::Owned(x),
            v: Cow::Owned(v),
        },
    ))
}

// ---------------------------------------------------------------------------------------------------
// Replies.

#[derive(Serialize, Default)]
struct ReplyOut<'a> {
    id: u64,
    #[serde(skip_serializing_if = "Option::is_none")]
    cost: Option<Num>,
    #[serde(skip_serializing_if = "Option::is_none")]
    grad: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    hv: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    jb: Option<Num>,
    #[serde(skip_serializing_if = "Option::is_none")]
    jo: Option<Num>,
    #[serde(skip_serializing_if = "Option::is_none")]
    xb: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    var: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    log_det: Option<Num>,
    #[serde(skip_serializing_if = "Option::is_none")]
    out: Option<NumSlice<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    error: Option<&'a str>,
    #[serde(skip_serializing_if = "Option::is_none")]
    recoverable: Option<bool>,
}

#[derive(Deserialize)]
struct ReplyIn {
    id: Option<u64>,
    cost: Option<DeNum>,
    grad: Option<DeNumVec>,
    hv: Option<DeNumVec>,
    jb: Option<DeNum>,
    jo: Option<DeNum>,
    xb: Option<DeNumVec>,
    var: Option<DeNumVec>,
    log_det: Option<DeNum>,
    out: Option<DeNumVec>,
    error: Option<String>,
    recoverable: Option<bool>,
}

fn reply_op(r: &Reply) -> Option<Op> {
    match r {
        Reply::CostGrad { .. } => Some(Op::CostGrad),
        Reply::Cost { .. } => Some(Op::Cost),
        Reply::HessVec { .. } => Some(Op::HessVec),
        Reply::Split { .. } => Some(Op::Split),
        Reply::Background { .. } => Some(Op::Background),
        Reply::Vector { .. } | Reply::Error { .. } => None,
    }
}

/// Appends one reply (what an adapter sends). `op` is the request answered (it fixes the binary tag of a
/// `Vector` reply).
pub fn encode_reply(enc: Encoding, id: u64, op: Op, reply: &Reply, out: &mut Vec<u8>) {
    match enc {
        Encoding::Text => {
            let mut r = ReplyOut {
                id,
                ..Default::default()
            };
            match reply {
                Reply::CostGrad { cost, grad } => {
                    r.cost = Some(Num(*cost));
                    r.grad = Some(NumSlice(grad));
                }
                Reply::Cost { cost } => r.cost = Some(Num(*cost)),
                Reply::HessVec { hv } => r.hv = Some(NumSlice(hv)),
                Reply::Split { jb, jo } => {
                    r.jb = Some(Num(*jb));
                    r.jo = Some(Num(*jo));
                }
                Reply::Background { xb, var, log_det } => {
                    r.xb = Some(NumSlice(xb));
                    r.var = Some(NumSlice(var));
                    r.log_det = Some(Num(*log_det));
                }
                Reply::Vector { out } => r.out = Some(NumSlice(out)),
                Reply::Error {
                    message,
                    recoverable,
                } => {
                    r.error = Some(message);
                    r.recoverable = Some(*recoverable);
                }
            }
            json_line(&r, out);
        }
        Encoding::Binary => {
            let tag = TAG_REPLY | reply_op(reply).unwrap_or(op).tag();
            match reply {
                Reply::CostGrad { cost, grad } => {
                    frame_header(out, tag, 0, id, 8 * (1 + grad.len()));
                    put_f64s(out, &[*cost]);
                    put_f64s(out, grad);
                }
                Reply::Cost { cost } => {
                    frame_header(out, tag, 0, id, 8);
                    put_f64s(out, &[*cost]);
                }
                Reply::HessVec { hv: v } | Reply::Vector { out: v } => {
                    frame_header(out, tag, 0, id, 8 * v.len());
                    put_f64s(out, v);
                }
                Reply::Split { jb, jo } => {
                    frame_header(out, tag, 0, id, 16);
                    put_f64s(out, &[*jb, *jo]);
                }
                Reply::Background { xb, var, log_det } => {
                    frame_header(out, tag, 0, id, 8 * (xb.len() + var.len() + 1));
                    put_f64s(out, xb);
                    put_f64s(out, var);
                    put_f64s(out, &[*log_det]);
                }
                Reply::Error {
                    message,
                    recoverable,
                } => {
                    let m = &message.as_bytes()[..message.len().min(MAX_MESSAGE)];
                    frame_header(out, TAG_ERROR, *recoverable as u8, id, m.len());
                    out.extend_from_slice(m);
                }
            }
        }
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
        Encoding::Text => decode_text_reply(trim_line(bytes), op, dim),
        Encoding::Binary => decode_binary_reply(bytes, op, dim),
    }
}

fn decode_text_reply(line: &[u8], op: Op, dim: usize) -> Result<(u64, Reply), ProtocolError> {
    let mut owned = None;
    let r: ReplyIn = parse_json(line, &mut owned).map_err(|e| {
        malformed(
            format!(
                "the reply to a {} request is not a JSON object ({e})",
                op.name()
            ),
            line,
        )
    })?;
    let id =
        r.id.ok_or_else(|| malformed("the reply has no \"id\" field", line))?;
    if let Some(message) = r.error {
        return Ok((
            id,
            Reply::Error {
                message,
                recoverable: r.recoverable.unwrap_or(false),
            },
        ));
    }
    let need_num = |v: Option<DeNum>, field: &str| {
        v.map(|n| n.0).ok_or_else(|| {
            malformed(
                format!(
                    "the reply to a {} request has no \"{field}\" field",
                    op.name()
                ),
                line,
            )
        })
    };
    let need_vec = |v: Option<DeNumVec>, field: &'static str, what: &'static str| {
        let v = v.map(|n| n.0).ok_or_else(|| {
            malformed(
                format!(
                    "the reply to a {} request has no \"{field}\" field",
                    op.name()
                ),
                line,
            )
        })?;
        check_len(what, &v, dim)?;
        Ok::<_, ProtocolError>(v)
    };
    let reply = match op {
        Op::CostGrad => Reply::CostGrad {
            cost: need_num(r.cost, "cost")?,
            grad: need_vec(r.grad, "grad", "gradient")?,
        },
        Op::Cost => Reply::Cost {
            cost: need_num(r.cost, "cost")?,
        },
        Op::HessVec => Reply::HessVec {
            hv: need_vec(r.hv, "hv", "Hessian-vector product")?,
        },
        Op::Split => Reply::Split {
            jb: need_num(r.jb, "jb")?,
            jo: need_num(r.jo, "jo")?,
        },
        Op::Background => Reply::Background {
            xb: need_vec(r.xb, "xb", "background xb")?,
            var: need_vec(r.var, "var", "background variances")?,
            log_det: need_num(r.log_det, "log_det")?,
        },
        Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve => Reply::Vector {
            out: need_vec(r.out, "out", "prior product")?,
        },
        Op::Quit => return Err(malformed("a quit request has no reply", line)),
    };
    Ok((id, reply))
}

fn decode_binary_reply(frame: &[u8], op: Op, dim: usize) -> Result<(u64, Reply), ProtocolError> {
    let (tag, flags, id, payload) = split_frame(frame)?;
    let head = &frame[..frame.len().min(64)];
    if tag == TAG_ERROR {
        let message = String::from_utf8_lossy(payload).into_owned();
        return Ok((
            id,
            Reply::Error {
                message,
                recoverable: flags & 1 == 1,
            },
        ));
    }
    if op == Op::Quit {
        return Err(malformed("a quit request has no reply", head));
    }
    if tag != TAG_REPLY | op.tag() {
        return Err(malformed(
            format!(
                "reply tag {tag:#04x} does not answer a {} request (expected {:#04x})",
                op.name(),
                TAG_REPLY | op.tag()
            ),
            head,
        ));
    }
    if payload.len() % 8 != 0 {
        return Err(malformed(
            format!(
                "a payload of {} bytes is not a whole number of f64",
                payload.len()
            ),
            head,
        ));
    }
    // The gradient is decoded straight from the payload (no copy of a large vector).
    let vals = if op == Op::CostGrad {
        get_f64s(&payload[..payload.len().min(8)])
    } else {
        get_f64s(payload)
    };
    let m = vals.len();
    let fixed = |want: usize, what: &'static str| {
        if m != want {
            return Err(ProtocolError::Length {
                what,
                expected: want,
                got: m,
            });
        }
        Ok(())
    };
    let reply = match op {
        Op::CostGrad => {
            if m == 0 {
                return Err(malformed("an empty reply to a cost_grad request", head));
            }
            let grad = get_f64s(&payload[8..]);
            check_len("gradient", &grad, dim)?;
            Reply::CostGrad {
                cost: vals[0],
                grad,
            }
        }
        Op::Cost => {
            fixed(1, "cost reply (values)")?;
            Reply::Cost { cost: vals[0] }
        }
        Op::HessVec => {
            check_len("Hessian-vector product", &vals, dim)?;
            Reply::HessVec { hv: vals }
        }
        Op::Split => {
            fixed(2, "split reply (values)")?;
            Reply::Split {
                jb: vals[0],
                jo: vals[1],
            }
        }
        Op::Background => {
            fixed(2 * dim + 1, "background reply (values)")?;
            Reply::Background {
                xb: vals[..dim].to_vec(),
                var: vals[dim..2 * dim].to_vec(),
                log_det: vals[2 * dim],
            }
        }
        Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve => {
            check_len("prior product", &vals, dim)?;
            Reply::Vector { out: vals }
        }
        Op::Quit => return Err(malformed("a quit request has no reply", head)),
    };
    Ok((id, reply))
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

    #[test]
    fn quote_escapes_and_truncates() {
        assert_eq!(quote(b"a\"b\n\x01", 10), "\"a\\\"b\\n\\x01\"");
        assert_eq!(quote(b"abcdef", 3), "\"abc\" ... (3 more bytes)");
    }
}
