//! The crate's error types.
//!
//! Two levels: [`EvalError`] is what one evaluation of a problem can return (and says whether the caller
//! may carry on, e.g. a sampler rejecting a proposal), [`Error`] is what a whole run can fail with. Both
//! print a message that names what went wrong and, where we can tell, how to fix it.

use std::fmt;
use std::path::PathBuf;

/// The outcome of one failed evaluation of a cost, gradient or Hessian-vector product.
#[derive(Debug, Clone, PartialEq)]
pub enum EvalError {
    /// The cost or a gradient component came back NaN or infinite. Recoverable: a sampler rejects the
    /// proposal, a line search backs off.
    NonFinite {
        /// What was non-finite ("cost", "gradient component 3", ...).
        what: String,
    },
    /// A vector of the wrong length was passed or returned.
    Dimension {
        /// What had the wrong length.
        what: String,
        expected: usize,
        got: usize,
    },
    /// The problem does not offer this capability (e.g. no second-order adjoint).
    Unsupported {
        /// The capability that was asked for.
        capability: &'static str,
    },
    /// The user's code reported a failure. `recoverable` says whether a later evaluation at another point
    /// may succeed (a model blow-up: yes; a dead adapter process: no).
    Failed { message: String, recoverable: bool },
}

impl EvalError {
    /// Whether a sampler may reject the point and carry on.
    pub fn is_recoverable(&self) -> bool {
        match self {
            EvalError::NonFinite { .. } => true,
            EvalError::Failed { recoverable, .. } => *recoverable,
            EvalError::Dimension { .. } | EvalError::Unsupported { .. } => false,
        }
    }
}

impl fmt::Display for EvalError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            EvalError::NonFinite { what } => {
                write!(f, "the {what} is not finite (NaN or infinite)")
            }
            EvalError::Dimension {
                what,
                expected,
                got,
            } => {
                write!(f, "{what} has length {got}, expected {expected}")
            }
            EvalError::Unsupported { capability } => {
                write!(f, "the problem does not offer a {capability}")
            }
            EvalError::Failed { message, .. } => write!(f, "evaluation failed: {message}"),
        }
    }
}

impl std::error::Error for EvalError {}

/// Everything a varpost run can fail with.
#[derive(Debug)]
pub enum Error {
    /// An evaluation failed where the run could not carry on; `context` says what was being done and
    /// the evaluation error is the cause ([`std::error::Error::source`]).
    Eval { context: String, source: EvalError },
    /// A bad option, setting or combination of them; the message says how to fix it.
    Config(String),
    /// A file could not be read or written; the I/O error is the cause.
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    /// A file was read but its contents are wrong (corrupt, wrong format, wrong problem).
    Format { path: PathBuf, message: String },
    /// A numerical failure (e.g. a matrix that should be positive definite is not).
    Numerical(String),
    /// Too little data for a computation (e.g. diagnostics of chains holding fewer than 4 draws).
    Data(String),
    /// The operating system refused something the run needs (threads, signal handlers, a lock).
    System(String),
    /// The subprocess adapter failed in a way the run cannot survive.
    Adapter(String),
    /// The gradient test found the gradient wrong.
    GradientCheck(String),
    /// The run was interrupted (SIGINT/SIGTERM) after saving its state.
    Interrupted(String),
    /// A defect of varpost itself (a panic caught at the top); the message says where.
    Internal(String),
}

/// The process exit codes, decided here and nowhere else (README, "Exit codes").
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ExitCode {
    /// Done.
    Success,
    /// A failure; the message names what and how to fix it.
    Failure,
    /// A bad option, setting or file.
    BadInput,
    /// The gradient test failed.
    GradientWrong,
    /// The minimisation did not converge.
    AnalysisNotConverged,
    /// The ensemble is not to be used as it is: the chains have not converged, too many transitions
    /// diverged, or the run is partial (the verdict names every reason).
    EnsembleNotUsable,
    /// The chains converged and the ensemble can be used, but the verdict names something that needs
    /// attention: a skipped gradient test, a Laplace approximation that is not adequate or could not
    /// be judged.
    ConvergedWithWarnings,
    /// Interrupted by SIGINT/SIGTERM after saving the state.
    Interrupted,
}

impl ExitCode {
    /// The number the process exits with.
    pub fn code(self) -> i32 {
        match self {
            ExitCode::Success => 0,
            ExitCode::Failure => 1,
            ExitCode::BadInput => 2,
            ExitCode::GradientWrong => 3,
            ExitCode::AnalysisNotConverged => 4,
            ExitCode::EnsembleNotUsable => 5,
            ExitCode::ConvergedWithWarnings => 6,
            ExitCode::Interrupted => 130,
        }
    }
}

impl Error {
    /// Wraps an evaluation error with what was being done when it happened.
    pub fn eval(context: impl Into<String>, source: EvalError) -> Self {
        Error::Eval {
            context: context.into(),
            source,
        }
    }
    /// An I/O error on a path.
    pub fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        Error::Io {
            path: path.into(),
            source,
        }
    }
    /// A content error in a file.
    pub fn format(path: impl Into<PathBuf>, message: impl Into<String>) -> Self {
        Error::Format {
            path: path.into(),
            message: message.into(),
        }
    }
    /// The exit code this error ends the process with.
    pub fn exit_code(&self) -> ExitCode {
        match self {
            Error::Config(_) | Error::Format { .. } => ExitCode::BadInput,
            Error::GradientCheck(_) => ExitCode::GradientWrong,
            Error::Interrupted(_) => ExitCode::Interrupted,
            _ => ExitCode::Failure,
        }
    }
    /// The message with every cause, joined by ": " (for logs and one-line reports).
    pub fn full_message(&self) -> String {
        let mut m = self.to_string();
        let mut source = std::error::Error::source(self);
        while let Some(s) = source {
            m.push_str(": ");
            m.push_str(&s.to_string());
            source = s.source();
        }
        m
    }
}

impl fmt::Display for Error {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Error::Eval { context, .. } => write!(f, "{context}"),
            Error::Config(m) => write!(f, "{m}"),
            Error::Io { path, .. } => write!(f, "{}", path.display()),
            Error::Format { path, message } => write!(f, "{}: {message}", path.display()),
            Error::Numerical(m) => write!(f, "numerical failure: {m}"),
            Error::Data(m) => write!(f, "{m}"),
            Error::System(m) => write!(f, "{m}"),
            Error::Adapter(m) => write!(f, "adapter: {m}"),
            Error::GradientCheck(m) => write!(f, "gradient test failed: {m}"),
            Error::Interrupted(m) => write!(f, "interrupted: {m}"),
            Error::Internal(m) => write!(
                f,
                "internal error (a defect of varpost; please report it with this message): {m}"
            ),
        }
    }
}

impl std::error::Error for Error {
    fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
        match self {
            Error::Eval { source, .. } => Some(source),
            Error::Io { source, .. } => Some(source),
            _ => None,
        }
    }
}

/// The crate's result type.
pub type Result<T> = std::result::Result<T, Error>;
