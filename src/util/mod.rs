//! Small helpers shared across the crate, one home each: durable atomic file writes ([`atomic`]),
//! vector arithmetic ([`vector`]) and the running-moments update ([`moments`]).

pub(crate) mod atomic;
pub(crate) mod moments;
pub(crate) mod vector;
