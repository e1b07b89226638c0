//! The binary encoding of requests and replies: frames of a 16-byte little-endian header
//! (`u32 body length | u8 tag | u8 flags | u16 zero | u64 id`) and a payload of packed f64 (or UTF-8
//! text for an error).

use super::{
    check_len, finish_request, malformed, Op, ProtocolError, Reply, Request, FRAME_HEADER,
    MAX_MESSAGE, TAG_ERROR, TAG_REPLY,
};

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

/// The first bytes of a frame, quoted in error messages.
fn head(frame: &[u8]) -> &[u8] {
    &frame[..frame.len().min(64)]
}

/// Splits a binary frame into (tag, flags, id, payload), checking its length field.
pub(super) fn split_frame(frame: &[u8]) -> Result<(u8, u8, u64, &[u8]), ProtocolError> {
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
            head(frame),
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

/// Appends one request frame.
pub(super) fn encode_request(id: u64, req: &Request<'_>, out: &mut Vec<u8>) {
    let (has_x, has_v) = req.op.carries();
    let n = if has_x { req.x.len() } else { 0 } + if has_v { req.v.len() } else { 0 };
    frame_header(out, req.op.tag(), 0, id, 8 * n);
    if has_x {
        put_f64s(out, &req.x);
    }
    if has_v {
        put_f64s(out, &req.v);
    }
}

/// Reads one request frame.
pub(super) fn decode_request(
    bytes: &[u8],
    dim: usize,
) -> Result<(u64, Request<'static>), ProtocolError> {
    let (tag, _, id, payload) = split_frame(bytes)?;
    let op = Op::from_tag(tag)
        .ok_or_else(|| malformed(format!("unknown request tag {tag:#04x}"), head(bytes)))?;
    let (has_x, has_v) = op.carries();
    let want = 8usize
        .saturating_mul(dim)
        .saturating_mul(has_x as usize + has_v as usize);
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
    finish_request(id, op, x, v, dim)
}

/// Appends one reply frame; `op` is the request answered (it fixes the tag of a `Vector` reply).
pub(super) fn encode_reply(id: u64, op: Op, reply: &Reply, out: &mut Vec<u8>) {
    let tag = TAG_REPLY | reply.op().unwrap_or(op).tag();
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

/// Reads the reply frame to a request of kind `op`.
pub(super) fn decode_reply(
    frame: &[u8],
    op: Op,
    dim: usize,
) -> Result<(u64, Reply), ProtocolError> {
    let (tag, flags, id, payload) = split_frame(frame)?;
    if tag == TAG_ERROR {
        let message = String::from_utf8_lossy(payload).into_owned();
        let recoverable = flags & 1 == 1;
        return Ok((
            id,
            Reply::Error {
                message,
                recoverable,
            },
        ));
    }
    if op == Op::Quit {
        return Err(malformed("a quit request has no reply", head(frame)));
    }
    if tag != TAG_REPLY | op.tag() {
        return Err(malformed(
            format!(
                "reply tag {tag:#04x} does not answer a {} request (expected {:#04x})",
                op.name(),
                TAG_REPLY | op.tag()
            ),
            head(frame),
        ));
    }
    if payload.len() % 8 != 0 {
        return Err(malformed(
            format!(
                "a payload of {} bytes is not a whole number of f64",
                payload.len()
            ),
            head(frame),
        ));
    }
    Ok((id, reply_payload(frame, payload, op, dim)?))
}

/// The reply a payload of whole f64 carries for a request of kind `op` (not `Quit`).
fn reply_payload(frame: &[u8], payload: &[u8], op: Op, dim: usize) -> Result<Reply, ProtocolError> {
    if op == Op::CostGrad {
        // The gradient is decoded straight from the payload (no copy of a large vector).
        if payload.is_empty() {
            return Err(malformed(
                "an empty reply to a cost_grad request",
                head(frame),
            ));
        }
        let grad = get_f64s(&payload[8..]);
        check_len("gradient", &grad, dim)?;
        let cost = get_f64s(&payload[..8])[0];
        return Ok(Reply::CostGrad { cost, grad });
    }
    let vals = get_f64s(payload);
    let fixed = |want: usize, what: &'static str| {
        if vals.len() != want {
            return Err(ProtocolError::Length {
                what,
                expected: want,
                got: vals.len(),
            });
        }
        Ok(())
    };
    Ok(match op {
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
            fixed(
                dim.saturating_mul(2).saturating_add(1),
                "background reply (values)",
            )?;
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
        Op::CostGrad | Op::Quit => {
            return Err(malformed("a quit request has no reply", head(frame)))
        }
    })
}
