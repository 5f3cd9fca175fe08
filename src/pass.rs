//! Running work over every block of the data on several threads with a result that does
//! not depend on the thread count.
//!
//! The data are cut into a fixed number of shards ([`Source::shards`]). Threads take
//! whole shards from a counter; each shard's blocks are folded in data order into that
//! shard's own accumulator, and the shard accumulators come back in shard order for the
//! caller to merge. The result therefore depends on data, settings and shard count only.
//!
//! **Invariant:** a pass's result does not depend on the thread count or on scheduling.

use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

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
    /// Live counters for a progress display (none: not counted).
    pub progress: Option<Arc<PassCounter>>,
}

/// Live counters of the pass in progress, for a progress display read by another thread
/// (a ticker): a pass adds one relaxed atomic increment per block, never a lock.
#[derive(Debug, Default)]
pub struct PassCounter {
    /// Passes started through this plan (every pass: statistics, evaluations, extra).
    pub passes: AtomicU64,
    /// Rows folded so far in the current pass.
    pub rows_done: AtomicU64,
    /// Rows of a whole pass.
    pub rows_total: AtomicU64,
    /// Bytes of the data files a whole pass reads (compressed, on disk).
    pub bytes_total: AtomicU64,
}

impl PassPlan {
    /// Cuts `source` into `shards` shards, to be run on `threads` threads.
    pub fn new(source: &Source, shards: usize, threads: usize) -> PassPlan {
        PassPlan {
            shards: source.shards(shards.max(1)),
            threads: threads.max(1),
            cancel: None,
            progress: None,
        }
    }
}

/// Where a shard starts in a pass, or where it stood when a snapshot was taken.
#[derive(Debug, Clone, PartialEq)]
pub enum ShardStart<A> {
    /// From its first block.
    Fresh,
    /// Its first `blocks` blocks are already summed into `acc`.
    Partial {
        /// Blocks already summed, in data order.
        blocks: u64,
        /// The shard's accumulator after them.
        acc: A,
    },
    /// The whole shard is summed into the accumulator.
    Done(A),
}

/// Periodic snapshots of a long pass, taken at block boundaries: every `every`, and once
/// more when the pass is cancelled, `save` receives the state of every shard.
pub struct Snapshots<'a, A> {
    /// Time between snapshots.
    pub every: Duration,
    /// Receives one entry per shard, in shard order.
    pub save: &'a (dyn Fn(Vec<ShardStart<A>>) -> Result<()> + Sync),
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
    A: Send + Clone,
    I: Fn() -> A + Sync,
    F: Fn(&mut A, BatchAt) -> Result<()> + Sync,
{
    run_resumable(source, plan, columns, init, fold, Vec::new(), None)
}

/// The segments of `segments` after their first `skip` blocks.
fn skip_blocks(segments: &[Segment], mut skip: u64, block_rows: u64) -> Vec<Segment> {
    let mut out = Vec::with_capacity(segments.len());
    for seg in segments {
        let blocks = seg.rows.div_ceil(block_rows);
        if skip >= blocks {
            skip -= blocks;
            continue;
        }
        let rows = skip * block_rows;
        out.push(Segment {
            first_row: seg.first_row + rows,
            rows: seg.rows - rows,
            ..*seg
        });
        skip = 0;
    }
    out
}

/// What a worker has published about a shard for snapshots.
enum Published<A> {
    /// Not taken by a worker yet.
    Waiting,
    /// Taken; the last state published (for generation `.0`).
    Running(u64, Option<(u64, A)>),
    /// Summed.
    Done(A),
}

/// As [`run`], starting each shard where `starts` says (empty: every shard fresh), and
/// taking [`Snapshots`] when asked. The result is bitwise the same as an uninterrupted
/// [`run`]: a shard continued from a snapshot folds the same blocks in the same order
/// into the same accumulator.
pub fn run_resumable<A, I, F>(
    source: &Source,
    plan: &PassPlan,
    columns: &[&str],
    init: I,
    fold: F,
    starts: Vec<ShardStart<A>>,
    snapshots: Option<Snapshots<'_, A>>,
) -> Result<Vec<A>>
where
    A: Send + Clone,
    I: Fn() -> A + Sync,
    F: Fn(&mut A, BatchAt) -> Result<()> + Sync,
{
    let read = |shard: usize, skip: u64, each: &mut dyn FnMut(u64, BatchAt) -> Result<()>| {
        read_parquet_shard(source, plan, columns, shard, skip, &mut |_, at| {
            each(at.batch.num_rows() as u64, at)
        })
    };
    run_units(source, plan, init, fold, read, starts, snapshots)
}

/// Reads the blocks of `shard` after its first `skip` from Parquet, decoding only
/// `columns`, and calls `each` with every block's index in the whole grid (data order)
/// and its batch.
pub fn read_parquet_shard(
    source: &Source,
    plan: &PassPlan,
    columns: &[&str],
    shard: usize,
    skip: u64,
    each: &mut dyn FnMut(usize, BatchAt) -> Result<()>,
) -> Result<()> {
    let block_rows = source.block_rows() as u64;
    let mut index = shard_block_ranges(plan, block_rows)[shard].start + skip as usize;
    for segment in &skip_blocks(&plan.shards[shard], skip, block_rows) {
        source.read_segment(segment, columns, |at| {
            let i = index;
            index += 1;
            each(i, at)
        })?;
    }
    Ok(())
}

/// The blocks of every shard as ranges of block indices of the whole grid (data order):
/// shard `s` holds blocks `ranges[s]`.
pub fn shard_block_ranges(plan: &PassPlan, block_rows: u64) -> Vec<std::ops::Range<usize>> {
    let mut start = 0usize;
    plan.shards
        .iter()
        .map(|segments| {
            let blocks: u64 = segments.iter().map(|s| s.rows.div_ceil(block_rows)).sum();
            let range = start..start + blocks as usize;
            start = range.end;
            range
        })
        .collect()
}

/// The pass engine behind [`run_resumable`], over any source of blocks: `read(shard,
/// skip, each)` must call `each(rows, unit)` for every block of `shard` after its first
/// `skip`, in data order, on the calling thread, and stop at the first error `each`
/// returns. Determinism, cancellation and snapshots are as for [`run_resumable`].
pub fn run_units<A, T, I, F, R>(
    source: &Source,
    plan: &PassPlan,
    init: I,
    fold: F,
    read: R,
    starts: Vec<ShardStart<A>>,
    snapshots: Option<Snapshots<'_, A>>,
) -> Result<Vec<A>>
where
    A: Send + Clone,
    I: Fn() -> A + Sync,
    F: Fn(&mut A, T) -> Result<()> + Sync,
    R: Fn(usize, u64, &mut dyn FnMut(u64, T) -> Result<()>) -> Result<()> + Sync,
{
    let n = plan.shards.len();
    if !starts.is_empty() && starts.len() != n {
        return Err(Error::internal(format!(
            "a pass was resumed with {} shard states for {n} shards",
            starts.len()
        )));
    }
    let starts: Vec<Mutex<Option<ShardStart<A>>>> = if starts.is_empty() {
        (0..n)
            .map(|_| Mutex::new(Some(ShardStart::Fresh)))
            .collect()
    } else {
        starts.into_iter().map(|s| Mutex::new(Some(s))).collect()
    };
    if let Some(p) = &plan.progress {
        let rows: u64 = plan.shards.iter().flatten().map(|s| s.rows).sum();
        p.rows_total.store(rows, Ordering::Relaxed);
        p.bytes_total.store(
            source.files().iter().map(|f| f.size).sum(),
            Ordering::Relaxed,
        );
        p.rows_done.store(0, Ordering::Relaxed);
        p.passes.fetch_add(1, Ordering::Relaxed);
    }
    let next = AtomicUsize::new(0);
    let failed = AtomicBool::new(false);
    let finished = AtomicUsize::new(0);
    let generation = AtomicU64::new(0);
    let want_snapshots = snapshots.is_some();
    let published: Vec<Mutex<Published<A>>> =
        (0..n).map(|_| Mutex::new(Published::Waiting)).collect();
    let slots: Vec<Mutex<Option<Result<A>>>> = (0..n).map(|_| Mutex::new(None)).collect();
    let cancelled = || {
        plan.cancel
            .as_ref()
            .is_some_and(|c| c.load(Ordering::Relaxed))
    };
    let publish = |shard: usize, value: Published<A>| {
        if let Ok(mut p) = published[shard].lock() {
            *p = value;
        }
    };
    let work = || loop {
        let shard = next.fetch_add(1, Ordering::Relaxed);
        if shard >= n || failed.load(Ordering::Relaxed) {
            break;
        }
        let start = starts[shard]
            .lock()
            .ok()
            .and_then(|mut s| s.take())
            .unwrap_or(ShardStart::Fresh);
        let (mut acc, skip) = match start {
            ShardStart::Fresh => (init(), 0),
            ShardStart::Partial { blocks, acc } => (acc, blocks),
            ShardStart::Done(acc) => {
                if want_snapshots {
                    publish(shard, Published::Done(acc.clone()));
                }
                if let Ok(mut slot) = slots[shard].lock() {
                    *slot = Some(Ok(acc));
                }
                finished.fetch_add(1, Ordering::Relaxed);
                continue;
            }
        };
        if want_snapshots {
            publish(shard, Published::Running(0, None));
        }
        let mut blocks_done = skip;
        let mut seen = 0u64;
        // Set when this shard stops because another one failed: not an error of its own.
        let mut stopped = false;
        let outcome = read(shard, skip, &mut |rows, unit| {
            if failed.load(Ordering::Relaxed) {
                stopped = true;
                return Err(Error::internal("stopped because another shard failed"));
            }
            if cancelled() {
                if want_snapshots {
                    publish(
                        shard,
                        Published::Running(u64::MAX, Some((blocks_done, acc.clone()))),
                    );
                }
                return Err(Error::interrupted());
            }
            fold(&mut acc, unit)?;
            blocks_done += 1;
            if let Some(p) = &plan.progress {
                p.rows_done.fetch_add(rows, Ordering::Relaxed);
            }
            if want_snapshots {
                let g = generation.load(Ordering::Acquire);
                if g > seen {
                    seen = g;
                    publish(
                        shard,
                        Published::Running(g, Some((blocks_done, acc.clone()))),
                    );
                }
            }
            Ok(())
        });
        if stopped {
            finished.fetch_add(1, Ordering::Relaxed);
            continue;
        }
        let result = match outcome {
            Ok(()) => {
                if want_snapshots {
                    publish(shard, Published::Done(acc.clone()));
                }
                Ok(acc)
            }
            Err(e) => {
                failed.store(true, Ordering::Relaxed);
                Err(e)
            }
        };
        if let Ok(mut slot) = slots[shard].lock() {
            *slot = Some(result);
        }
        finished.fetch_add(1, Ordering::Relaxed);
    };
    // The state of every shard as published; `None` while a running shard has not
    // answered generation `g` yet.
    let collect = |g: u64| -> Option<Vec<ShardStart<A>>> {
        let mut out = Vec::with_capacity(n);
        for p in &published {
            let p = p.lock().ok()?;
            out.push(match &*p {
                Published::Waiting => ShardStart::Fresh,
                Published::Done(acc) => ShardStart::Done(acc.clone()),
                Published::Running(pg, state) if *pg >= g => match state {
                    Some((blocks, acc)) => ShardStart::Partial {
                        blocks: *blocks,
                        acc: acc.clone(),
                    },
                    None => ShardStart::Fresh,
                },
                Published::Running(..) => return None,
            });
        }
        Some(out)
    };
    let mut snapshot_error = None;
    let threads = plan.threads.min(n).max(1);
    if threads == 1 && snapshots.is_none() {
        work();
    } else {
        crossbeam::thread::scope(|scope| {
            for _ in 0..threads {
                scope.spawn(|_| work());
            }
            if let Some(snap) = &snapshots {
                let mut last = Instant::now();
                let tick = snap
                    .every
                    .min(Duration::from_millis(20))
                    .max(Duration::from_millis(1));
                while finished.load(Ordering::Relaxed) < n && !failed.load(Ordering::Relaxed) {
                    std::thread::sleep(tick);
                    if last.elapsed() < snap.every {
                        continue;
                    }
                    let g = generation.fetch_add(1, Ordering::AcqRel) + 1;
                    let states = loop {
                        if let Some(states) = collect(g) {
                            break Some(states);
                        }
                        if finished.load(Ordering::Relaxed) >= n || failed.load(Ordering::Relaxed) {
                            break None;
                        }
                        std::thread::sleep(Duration::from_millis(1));
                    };
                    if let Some(states) = states {
                        if let Err(e) = (snap.save)(states) {
                            snapshot_error.get_or_insert(e);
                        }
                    }
                    last = Instant::now();
                }
            }
        })
        .map_err(|_| Error::internal("a worker thread of the pass panicked"))?;
    }
    if let Some(e) = snapshot_error {
        return Err(e);
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
        Some(e) => {
            // A cancelled pass leaves one last snapshot so that its work is kept.
            if e.kind() == crate::ErrorKind::Interrupted {
                if let (Some(snap), Some(states)) = (&snapshots, collect(0)) {
                    (snap.save)(states)?;
                }
            }
            Err(e)
        }
        None if out.len() == n => Ok(out),
        None => Err(Error::internal("a shard of the pass was not run")),
    }
}
