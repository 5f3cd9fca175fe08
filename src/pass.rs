//! Running work over every block of the data on several threads with a result that does
//! not depend on the thread count.
//!
//! The data are cut into a fixed number of shards ([`Source::shards`]). Threads take
//! whole shards from a counter; each shard's blocks are folded in data order into that
//! shard's own accumulator, and the shard accumulators come back in shard order for the
//! caller to merge. The result therefore depends on data, settings and shard count only.
//!
//! **Invariant:** a pass's result does not depend on the thread count or on scheduling.

use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

use crate::source::{BatchAt, Segment, Source};
use crate::{Error, Result};

/// How a pass is cut and run.
#[derive(Debug, Clone)]
pub struct PassPlan {
    /// The shards: each a list of segments in data order.
    pub shards: Vec<Vec<Segment>>,
    /// Threads that run shards at once.
    pub threads: usize,
    /// When set (by a signal handler), passes stop at the next block boundary with an
    /// [`crate::ErrorKind::Interrupted`] error.
    pub cancel: Option<Arc<AtomicBool>>,
}

impl PassPlan {
    /// Cuts `source` into `shards` shards, to be run on `threads` threads.
    pub fn new(source: &Source, shards: usize, threads: usize) -> PassPlan {
        PassPlan {
            shards: source.shards(shards.max(1)),
            threads: threads.max(1),
            cancel: None,
        }
    }
}

/// Runs `fold` over every block of every shard and returns the shard accumulators in
/// shard order. `init` makes a fresh accumulator for a shard; `fold` adds one block
/// (decoded with only `columns`) to it. On error, the error of the lowest failing shard
/// is returned.
pub fn run<A, I, F>(
    source: &Source,
    plan: &PassPlan,
    columns: &[&str],
    init: I,
    fold: F,
) -> Result<Vec<A>>
where
    A: Send,
    I: Fn() -> A + Sync,
    F: Fn(&mut A, BatchAt) -> Result<()> + Sync,
{
    let n = plan.shards.len();
    let next = AtomicUsize::new(0);
    let failed = AtomicBool::new(false);
    let slots: Vec<Mutex<Option<Result<A>>>> = (0..n).map(|_| Mutex::new(None)).collect();
    let threads = plan.threads.min(n).max(1);
    let work = || loop {
        let shard = next.fetch_add(1, Ordering::Relaxed);
        if shard >= n || failed.load(Ordering::Relaxed) {
            break;
        }
        let mut acc = init();
        let mut outcome = Ok(());
        for segment in &plan.shards[shard] {
            outcome = source.read_segment(segment, columns, |batch| {
                if plan
                    .cancel
                    .as_ref()
                    .is_some_and(|c| c.load(Ordering::Relaxed))
                {
                    return Err(Error::interrupted());
                }
                fold(&mut acc, batch)
            });
            if outcome.is_err() || failed.load(Ordering::Relaxed) {
                break;
            }
        }
        let result = match outcome {
            Ok(()) => Ok(acc),
            Err(e) => {
                failed.store(true, Ordering::Relaxed);
                Err(e)
            }
        };
        if let Ok(mut slot) = slots[shard].lock() {
            *slot = Some(result);
        }
    };
    if threads == 1 {
        work();
    } else {
        crossbeam::thread::scope(|scope| {
            for _ in 0..threads {
                scope.spawn(|_| work());
            }
        })
        .map_err(|_| Error::internal("a worker thread of the pass panicked"))?;
    }
    let mut out = Vec::with_capacity(n);
    let mut first_error = None;
    for slot in slots {
        let value = slot
            .into_inner()
            .map_err(|_| Error::internal("a worker thread of the pass panicked"))?;
        match value {
            Some(Ok(acc)) => out.push(acc),
            Some(Err(e)) => {
                first_error.get_or_insert(e);
            }
            None => {
                // Not run because another shard failed first.
            }
        }
    }
    match first_error {
        Some(e) => Err(e),
        None if out.len() == n => Ok(out),
        None => Err(Error::internal("a shard of the pass was not run")),
    }
}
