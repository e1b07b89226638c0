"""Serve a cost function and its gradient to varpost over the adapter protocol (version 1).

Standard library only. Write your cost and gradient as Python functions and call `serve`:

    import varpost_adapter as va

    def cost_grad(x):                # x: a list of floats
        g = [xi - 1.0 for xi in x]
        return 0.5 * sum(gi * gi for gi in g), g

    va.serve(dim=3, cost_grad=cost_grad)

Then `varpost check --adapter "python3 my_adapter.py"`. The protocol itself is described in PROTOCOL.md
next to this folder; this module speaks both its encodings (text and binary) and lets varpost choose.

While `serve` runs, `print()` goes to stderr (which varpost writes to the adapter's log file): stdout
carries the protocol only.

To report that an evaluation failed, raise an exception from your function. Raise `Recoverable` when
another point may well succeed (a model blow-up at an extreme state): varpost then rejects that point and
carries on. Any other exception stops the run with its message.
"""

import json
import math
import struct
import sys
import traceback
from array import array

PROTOCOL_VERSION = 1

_OPS = {
    "cost_grad": 1,
    "cost": 2,
    "hess_vec": 3,
    "split": 4,
    "background": 5,
    "b_half": 6,
    "b_half_t": 7,
    "b_half_solve": 8,
    "b_half_t_solve": 9,
    "quit": 15,
}
_OP_BY_TAG = {tag: name for name, tag in _OPS.items()}
_TAG_ERROR = 0xFF
_TAG_REPLY = 0x80
_HEADER = struct.Struct("<IBBHQ")  # body length, tag, flags, reserved, id
_SWAP = sys.byteorder != "little"


class Recoverable(Exception):
    """An evaluation failure after which other points may still be evaluated."""


class Prior:
    """The background N(xb, B) with B = S S^T, for adapters that offer the `prior` capability.

    `xb` and `var` (the diagonal of B) are lists of floats, `log_det` is log det B. `b_half(v)` returns
    S v and `b_half_t(v)` returns S^T v. `b_half_solve(v)` (S^-1 v) and `b_half_t_solve(v)` (S^-T v) are
    optional: give both to offer `prior_solve`.
    """

    def __init__(self, xb, var, log_det, b_half, b_half_t, b_half_solve=None, b_half_t_solve=None):
        self.xb = [float(v) for v in xb]
        self.var = [float(v) for v in var]
        self.log_det = float(log_det)
        self.b_half = b_half
        self.b_half_t = b_half_t
        self.b_half_solve = b_half_solve
        self.b_half_t_solve = b_half_t_solve


def _num(v):
    v = float(v)
    if math.isfinite(v):
        return v
    if math.isnan(v):
        return "nan"
    return "inf" if v > 0 else "-inf"


def _nums(vs):
    vs = [float(v) for v in vs]
    if all(map(math.isfinite, vs)):
        return vs
    return [_num(v) for v in vs]


def _floats(vs):
    # JSON numbers, or the strings "nan", "inf", "-inf" (float() reads both).
    return [float(v) for v in vs]


class _Text:
    def __init__(self, inp, out):
        self.inp, self.out = inp, out

    def read(self, dim):
        line = self.inp.readline()
        if not line:
            return None
        msg = json.loads(line)
        return msg["id"], msg["op"], _floats(msg.get("x", ())), _floats(msg.get("v", ()))

    def reply(self, rid, op, values):
        msg = {"id": rid}
        if op in ("cost_grad", "cost"):
            msg["cost"] = _num(values[0])
            if op == "cost_grad":
                msg["grad"] = _nums(values[1])
        elif op == "hess_vec":
            msg["hv"] = _nums(values)
        elif op == "split":
            msg["jb"], msg["jo"] = _num(values[0]), _num(values[1])
        elif op == "background":
            msg["xb"], msg["var"], msg["log_det"] = _nums(values[0]), _nums(values[1]), _num(values[2])
        else:
            msg["out"] = _nums(values)
        self._write(msg)

    def error(self, rid, message, recoverable):
        self._write({"id": rid, "error": message, "recoverable": bool(recoverable)})

    def _write(self, msg):
        self.out.write(json.dumps(msg, separators=(",", ":")).encode() + b"\n")
        self.out.flush()


def _read_exact(inp, k):
    data = inp.read(k)
    if data is None or len(data) < k:
        return None
    return data


def _pack(vs):
    a = array("d", (float(v) for v in vs))
    if _SWAP:
        a.byteswap()
    return a.tobytes()


class _Binary:
    def __init__(self, inp, out):
        self.inp, self.out = inp, out

    def read(self, dim):
        head = _read_exact(self.inp, _HEADER.size)
        if head is None:
            return None
        body, tag, _flags, _res, rid = _HEADER.unpack(head)
        payload = _read_exact(self.inp, body - (_HEADER.size - 4)) if body > _HEADER.size - 4 else b""
        if payload is None:
            return None
        vals = array("d")
        vals.frombytes(payload)
        if _SWAP:
            vals.byteswap()
        op = _OP_BY_TAG.get(tag, "unknown tag %d" % tag)
        vals = vals.tolist()
        if op == "hess_vec":
            return rid, op, vals[:dim], vals[dim:]
        if op.startswith("b_half"):
            return rid, op, [], vals
        return rid, op, vals, []

    def reply(self, rid, op, values):
        if op == "cost_grad":
            payload = _pack([values[0]]) + _pack(values[1])
        elif op == "cost":
            payload = _pack([values[0]])
        elif op == "split":
            payload = _pack(values)
        elif op == "background":
            payload = _pack(values[0]) + _pack(values[1]) + _pack([values[2]])
        else:
            payload = _pack(values)
        self._frame(_TAG_REPLY | _OPS[op], 0, rid, payload)

    def error(self, rid, message, recoverable):
        self._frame(_TAG_ERROR, 1 if recoverable else 0, rid, message.encode("utf-8", "replace")[:65536])

    def _frame(self, tag, flags, rid, payload):
        self.out.write(_HEADER.pack(_HEADER.size - 4 + len(payload), tag, flags, 0, rid) + payload)
        self.out.flush()


def serve(dim, cost_grad, cost=None, hess_vec=None, split=None, prior=None, names=None, label=None,
          encodings=("text", "binary")):
    """Answer varpost's requests until it sends `quit` or closes stdin.

    cost_grad(x) -> (J, gradient)   required
    cost(x) -> J                    optional (default: cost_grad without the gradient)
    hess_vec(x, v) -> H v           optional: offers the Hessian-vector product
    split(x) -> (Jb, Jo)            optional: offers the cost split
    prior: a `Prior`                optional: offers the background and B^{1/2} products
    names: list of dim strings      optional component names
    label: str                      optional description, shown in varpost's messages
    """
    inp = sys.stdin.buffer
    out = sys.stdout.buffer
    sys.stdout = sys.stderr  # stray prints must not corrupt the protocol stream
    offers = []
    if hess_vec is not None:
        offers.append("hess_vec")
    if split is not None:
        offers.append("split")
    if prior is not None:
        offers.append("prior")
        if prior.b_half_solve is not None and prior.b_half_t_solve is not None:
            offers.append("prior_solve")
    hello = {"hello": "varpost-adapter", "protocol": PROTOCOL_VERSION, "dim": int(dim),
             "encodings": list(encodings), "offers": offers}
    if names is not None:
        hello["names"] = [str(n) for n in names]
    if label is not None:
        hello["label"] = str(label)
    out.write(json.dumps(hello).encode() + b"\n")
    out.flush()

    start = inp.readline()
    if not start:
        return
    encoding = json.loads(start).get("encoding", "text")
    codec = _Binary(inp, out) if encoding == "binary" else _Text(inp, out)
    if cost is None:
        def cost(x):
            return cost_grad(x)[0]

    handlers = {
        "cost_grad": lambda x, v: cost_grad(x),
        "cost": lambda x, v: [cost(x)],
        "hess_vec": (lambda x, v: hess_vec(x, v)) if hess_vec else None,
        "split": (lambda x, v: split(x)) if split else None,
        "background": (lambda x, v: (prior.xb, prior.var, prior.log_det)) if prior else None,
        "b_half": (lambda x, v: prior.b_half(v)) if prior else None,
        "b_half_t": (lambda x, v: prior.b_half_t(v)) if prior else None,
        "b_half_solve": (lambda x, v: prior.b_half_solve(v)) if prior and prior.b_half_solve else None,
        "b_half_t_solve": (lambda x, v: prior.b_half_t_solve(v)) if prior and prior.b_half_t_solve else None,
    }
    while True:
        msg = codec.read(dim)
        if msg is None:
            return
        rid, op, x, v = msg
        if op == "quit":
            return
        handler = handlers.get(op)
        if handler is None:
            codec.error(rid, "this adapter does not answer %r requests" % op, False)
            continue
        try:
            values = handler(x, v)
        except Recoverable as e:
            codec.error(rid, str(e) or type(e).__name__, True)
            continue
        except Exception as e:  # reported to varpost, which stops the run with this message
            traceback.print_exc(file=sys.stderr)
            codec.error(rid, "%s: %s" % (type(e).__name__, e), False)
            continue
        codec.reply(rid, op, values)
