//! Many independent cost evaluations at once ([`Problem::cost_batch`]): the points are spread over the
//! idle workers, each worker evaluating one point at a time, and the costs come back in the order of the
//! points. A failure is the failure of its point only; a non-recoverable one stops the batch cleanly (the
//! points in flight finish, the rest are not sent and say why).
//!
//! [`Problem::cost_batch`]: crate::problem::Problem::cost_batch

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, OnceLock};
use std::thread;

use super::problem::cost_of;
use super::slots::{fatal, Pool, SlotGuard};
use crate::adapter::protocol::{Op, Request};
use crate::error::EvalError;
use crate::problem::check_len;

type Cost = Result<f64, EvalError>;

/// What the workers of one batch share.
struct Batch<'a> {
    pool: &'a Pool,
    xs: &'a [&'a [f64]],
    results: Vec<Mutex<Option<Cost>>>,
    /// The next point no worker has taken yet.
    next: AtomicUsize,
    /// The first non-recoverable failure: no point is taken after it.
    stopped: OnceLock<EvalError>,
}

impl Batch<'_> {
    /// One worker's share: point `first`, then whatever point is next, one at a time.
    fn work(&self, mut guard: SlotGuard<'_>, first: usize) {
        let mut i = first;
        while i < self.xs.len() && self.stopped.get().is_none() {
            let r = self
                .pool
                .call_on(guard.slot(), &Request::new(Op::Cost, self.xs[i], &[]))
                .and_then(cost_of);
            if let Err(e) = &r {
                if !e.is_recoverable() {
                    let _ = self.stopped.set(e.clone());
                }
            }
            if let Ok(mut slot) = self.results[i].lock() {
                *slot = Some(r);
            }
            i = self.next.fetch_add(1, Ordering::Relaxed);
        }
    }

    /// The results in point order; points never sent say which failure stopped the batch.
    fn finish(self) -> Vec<Cost> {
        let stopped = self.stopped.into_inner();
        self.results
            .into_iter()
            .map(|m| match m.into_inner().ok().flatten() {
                Some(r) => r,
                None => Err(skipped(stopped.as_ref())),
            })
            .collect()
    }
}

fn skipped(cause: Option<&EvalError>) -> EvalError {
    fatal(match cause {
        Some(e) => format!("not evaluated: the batch stopped after another point failed ({e})"),
        None => "not evaluated: the batch stopped".into(),
    })
}

/// The costs at `xs`, spread over up to `workers` worker processes of `pool`.
pub(super) fn cost_batch(pool: &Pool, xs: &[&[f64]]) -> Vec<Cost> {
    let n = pool.hello.dim;
    if let Some(bad) = xs
        .iter()
        .find_map(|x| check_len("control vector", x, n).err())
    {
        return xs.iter().map(|_| Err(bad.clone())).collect();
    }
    if xs.is_empty() {
        return Vec::new();
    }
    let guards = match pool.take_slots(pool.workers.min(xs.len())) {
        Ok(g) => g,
        Err(e) => return xs.iter().map(|_| Err(e.clone())).collect(),
    };
    let batch = Batch {
        pool,
        xs,
        results: xs.iter().map(|_| Mutex::new(None)).collect(),
        next: AtomicUsize::new(guards.len()),
        stopped: OnceLock::new(),
    };
    thread::scope(|s| {
        for (first, guard) in guards.into_iter().enumerate() {
            let batch = &batch;
            s.spawn(move || batch.work(guard, first));
        }
    });
    batch.finish()
}
