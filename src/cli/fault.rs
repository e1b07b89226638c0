//! Faults forced on purpose, for the tests of what a defect does to a run: the environment variable
//! `VARPOST_FAULT` names one, read by the command line before the pipeline starts.
//!
//! - `panic-in-sampling`: the progress callback of the chains panics at the first iteration, inside
//!   the sampler's worker threads, so that the test sees a panic unwind through the pipeline.
//!
//! Unset or empty: no fault. Any other value is refused, so that a misspelt fault never passes for a
//! run that survived it.

use crate::error::{Error, Result};

/// The environment variable naming a fault to force.
pub const FAULT_VAR: &str = "VARPOST_FAULT";

/// A fault to force.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Fault {
    /// Panic in the chains' progress callback.
    PanicInSampling,
}

impl Fault {
    /// The fault `VARPOST_FAULT` asks for, if any.
    pub fn from_env() -> Result<Option<Fault>> {
        match std::env::var(FAULT_VAR) {
            Err(_) => Ok(None),
            Ok(v) => Fault::parse(&v),
        }
    }

    fn parse(v: &str) -> Result<Option<Fault>> {
        match v.trim() {
            "" => Ok(None),
            "panic-in-sampling" => Ok(Some(Fault::PanicInSampling)),
            other => Err(Error::Config(format!(
                "{FAULT_VAR}={other}: unknown fault (known: panic-in-sampling); unset {FAULT_VAR} \
                 for a normal run"
            ))),
        }
    }

    /// Panics if this fault is the one forced in the chains' progress callback.
    pub fn in_sampling(fault: Option<Fault>) {
        if fault == Some(Fault::PanicInSampling) {
            panic!("forced by {FAULT_VAR}=panic-in-sampling");
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn faults_are_named_exactly() {
        assert_eq!(Fault::parse("").unwrap(), None);
        assert_eq!(
            Fault::parse("panic-in-sampling").unwrap(),
            Some(Fault::PanicInSampling)
        );
        let e = Fault::parse("panic-in-sampler").unwrap_err();
        assert!(e.to_string().contains("unknown fault"), "{e}");
    }
}
