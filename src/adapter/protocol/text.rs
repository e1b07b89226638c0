//! The text encoding of requests and replies: one JSON object per line.

use serde::{Deserialize, Serialize};

use super::json::{json_line, parse_json, DeNum, DeNumVec, Num, NumSlice};
use super::{check_len, finish_request, malformed, Op, ProtocolError, Reply, Request};

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

/// Appends one request line.
pub(super) fn encode_request(id: u64, req: &Request<'_>, out: &mut Vec<u8>) {
    let (has_x, has_v) = req.op.carries();
    let r = RequestOut {
        id,
        op: req.op.name(),
        x: has_x.then_some(NumSlice(&req.x)),
        v: has_v.then_some(NumSlice(&req.v)),
    };
    json_line(&r, out);
}

/// Reads one request line (without its newline).
pub(super) fn decode_request(
    line: &[u8],
    dim: usize,
) -> Result<(u64, Request<'static>), ProtocolError> {
    let mut owned = None;
    let r: RequestIn = parse_json(line, &mut owned)
        .map_err(|e| malformed(format!("not a request ({e})"), line))?;
    let op =
        Op::from_name(&r.op).ok_or_else(|| malformed(format!("unknown op \"{}\"", r.op), line))?;
    finish_request(r.id, op, r.x.map(|v| v.0), r.v.map(|v| v.0), dim)
}

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

/// Appends one reply line.
pub(super) fn encode_reply(id: u64, reply: &Reply, out: &mut Vec<u8>) {
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

/// Takes the fields a reply must have, with errors that name the missing field and quote the line.
struct Fields<'a> {
    line: &'a [u8],
    op: Op,
    dim: usize,
}

impl Fields<'_> {
    fn missing(&self, field: &str) -> ProtocolError {
        malformed(
            format!(
                "the reply to a {} request has no \"{field}\" field",
                self.op.name()
            ),
            self.line,
        )
    }

    fn num(&self, v: Option<DeNum>, field: &str) -> Result<f64, ProtocolError> {
        v.map(|n| n.0).ok_or_else(|| self.missing(field))
    }

    fn vec(
        &self,
        v: Option<DeNumVec>,
        field: &str,
        what: &'static str,
    ) -> Result<Vec<f64>, ProtocolError> {
        let v = v.map(|n| n.0).ok_or_else(|| self.missing(field))?;
        check_len(what, &v, self.dim)?;
        Ok(v)
    }
}

/// Reads the reply line (without its newline) to a request of kind `op`.
pub(super) fn decode_reply(line: &[u8], op: Op, dim: usize) -> Result<(u64, Reply), ProtocolError> {
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
        let recoverable = r.recoverable.unwrap_or(false);
        return Ok((
            id,
            Reply::Error {
                message,
                recoverable,
            },
        ));
    }
    let f = Fields { line, op, dim };
    let reply = match op {
        Op::CostGrad => Reply::CostGrad {
            cost: f.num(r.cost, "cost")?,
            grad: f.vec(r.grad, "grad", "gradient")?,
        },
        Op::Cost => Reply::Cost {
            cost: f.num(r.cost, "cost")?,
        },
        Op::HessVec => Reply::HessVec {
            hv: f.vec(r.hv, "hv", "Hessian-vector product")?,
        },
        Op::Split => Reply::Split {
            jb: f.num(r.jb, "jb")?,
            jo: f.num(r.jo, "jo")?,
        },
        Op::Background => Reply::Background {
            xb: f.vec(r.xb, "xb", "background xb")?,
            var: f.vec(r.var, "var", "background variances")?,
            log_det: f.num(r.log_det, "log_det")?,
        },
        Op::BHalf | Op::BHalfT | Op::BHalfSolve | Op::BHalfTSolve => Reply::Vector {
            out: f.vec(r.out, "out", "prior product")?,
        },
        Op::Quit => return Err(malformed("a quit request has no reply", line)),
    };
    Ok((id, reply))
}
