//! Small helpers shared across the crate, one home each: durable atomic file writes ([`atomic`]),
//! vector arithmetic ([`vector`]) and the running-moments update ([`moments`]); for the tests, the
//! in-process fuzzing of the decoders (`fuzz`).

pub(crate) mod atomic;
#[cfg(test)]
pub(crate) mod fuzz;
pub(crate) mod moments;
pub(crate) mod vector;
