//! The protocol's vocabulary: operations, capabilities, the hello, requests and replies, independent of
//! how they are encoded.

use std::borrow::Cow;

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
    /// The names of the capabilities in the hello, in this order.
    pub(crate) const NAMES: [&'static str; 4] = ["hess_vec", "split", "prior", "prior_solve"];

    /// The names of the capabilities that are on.
    pub(crate) fn names(&self) -> Vec<&'static str> {
        let on = [self.hess_vec, self.split, self.prior, self.prior_solve];
        Self::NAMES
            .iter()
            .zip(on)
            .filter(|(_, o)| *o)
            .map(|(n, _)| *n)
            .collect()
    }

    /// Turns on the capability called `name`; `false` for an unknown name.
    pub(crate) fn set(&mut self, name: &str) -> bool {
        match name {
            "hess_vec" => self.hess_vec = true,
            "split" => self.split = true,
            "prior" => self.prior = true,
            "prior_solve" => self.prior_solve = true,
            _ => return false,
        }
        true
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

    pub(crate) fn from_name(s: &str) -> Option<Op> {
        Op::ALL.into_iter().find(|o| o.name() == s)
    }

    pub(crate) fn from_tag(t: u8) -> Option<Op> {
        Op::ALL.into_iter().find(|o| o.tag() == t)
    }

    /// Whether the request carries x, v (each of length dim).
    pub(crate) fn carries(self) -> (bool, bool) {
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

impl Reply {
    /// The operation this reply answers, where its kind says so (not for `Vector` and `Error`).
    pub(crate) fn op(&self) -> Option<Op> {
        match self {
            Reply::CostGrad { .. } => Some(Op::CostGrad),
            Reply::Cost { .. } => Some(Op::Cost),
            Reply::HessVec { .. } => Some(Op::HessVec),
            Reply::Split { .. } => Some(Op::Split),
            Reply::Background { .. } => Some(Op::Background),
            Reply::Vector { .. } | Reply::Error { .. } => None,
        }
    }
}
