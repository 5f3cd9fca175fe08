//! The GLM objective over streamed data: one pass per evaluation.

use std::sync::Mutex;
use std::time::Duration;

use super::start::PassTotals;
use crate::cache::{encode_block, BlockCache, BlockView, CacheSlot, CacheState, CacheWriter, Kind};
use crate::checkpoint::{PartialPass, ShardProgress};
use crate::features::sparse::SparseRows;
use crate::features::{Block, Design};
use crate::objective::loss::{self, Loss, MAX_EXP_MARGIN};
use crate::objective::sparse_kernel;
use crate::optim::Objective;
use crate::pass::{self, PassPlan, ShardStart, Snapshots};
use crate::source::{BatchAt, Source};
use crate::Result;

/// How the coefficient vector is laid out: `groups` runs of `1 + width` values, each an
/// intercept followed by the coefficients of the `width` features.
///
/// Binary and single-output losses have one group. Softmax has one group per class when
/// penalized (symmetric form), or one per class but the first when unpenalized (the
/// first class is the reference with zero coefficients).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Layout {
    /// Features per group.
    pub width: usize,
    /// Groups (outputs with their own coefficients).
    pub groups: usize,
    /// Softmax classes (0 for other losses).
    pub classes: usize,
    /// Softmax: the first class is the reference (margin fixed at 0).
    pub reference: bool,
    /// Sparse coordinates per group (hash buckets, sparse vectors); their coefficients
    /// follow all dense groups: group `g`'s at `dense_dim() + g * sparse ..`.
    pub sparse: usize,
}

impl Layout {
    /// The layout for a loss, feature count, class count and penalty.
    pub fn new(loss: Loss, width: usize, classes: usize, penalized: bool) -> Layout {
        match loss {
            Loss::Softmax => Layout {
                width,
                groups: if penalized { classes } else { classes - 1 },
                classes,
                reference: !penalized,
                sparse: 0,
            },
            _ => Layout {
                width,
                groups: 1,
                classes: 0,
                reference: false,
                sparse: 0,
            },
        }
    }

    /// The layout with `sparse` sparse coordinates per group.
    pub fn with_sparse(mut self, sparse: usize) -> Layout {
        self.sparse = sparse;
        self
    }

    /// Length of the coefficient vector.
    pub fn dim(&self) -> usize {
        self.dense_dim() + self.groups * self.sparse
    }

    /// Length of the dense part (intercepts and dense coefficients of every group).
    pub fn dense_dim(&self) -> usize {
        self.groups * (1 + self.width)
    }

    /// The margins of the `classes` outputs of row `i` (softmax) into `out`, from the
    /// group-major margins `z` of `n` rows (`z[g * n + i]`); the reference class, when
    /// the layout has one, gets 0.
    #[inline]
    pub fn class_margins(&self, z: &[f64], n: usize, i: usize, out: &mut [f64]) {
        for (c, m) in out.iter_mut().enumerate() {
            *m = if self.reference {
                if c == 0 {
                    0.0
                } else {
                    z[(c - 1) * n + i]
                }
            } else {
                z[c * n + i]
            };
        }
    }

    /// Index of the first sparse coefficient of group `g`.
    pub fn sparse_start(&self, g: usize) -> usize {
        self.dense_dim() + g * self.sparse
    }

    /// Index of the intercept of group `g`.
    pub fn intercept(&self, g: usize) -> usize {
        g * (1 + self.width)
    }

    /// True for coordinates that are intercepts (never penalized).
    pub fn is_intercept(&self, i: usize) -> bool {
        i < self.dense_dim() && i.is_multiple_of(1 + self.width)
    }

    /// Softmax class of group `g`.
    pub fn class_of_group(&self, g: usize) -> usize {
        if self.reference {
            g + 1
        } else {
            g
        }
    }
}

/// Per-shard sums of one evaluation pass, with the shard's scratch buffers.
#[derive(Debug)]
struct PassSums {
    t: Totals,
    scratch: Scratch,
}

/// The sums themselves.
#[derive(Debug, Clone)]
struct Totals {
    loss: f64,
    grad: Vec<f64>,
    /// Weight of rows the current coefficients classify wrongly (logistic, softmax).
    wrong: f64,
    /// First row whose Poisson margin overflows, as a message.
    overflow: Option<String>,
    /// Weighted loss of the held-out rows (scored, not trained on).
    holdout_loss: f64,
    /// Weight of the held-out rows.
    holdout_weight: f64,
}

/// A shard's reusable buffers: allocated on its first block, then only reused, so the
/// hot path allocates nothing per block or row (their size is `O(block + tile × width)`).
#[derive(Debug, Default)]
struct Scratch {
    /// The block built from Parquet.
    block: Block,
    /// Raw values of the block (cache build pass).
    raw: Vec<f64>,
    /// The encoded block (cache build pass).
    encoded: Vec<u8>,
    /// Margins, then residuals, of a tile: `groups × tile` values.
    z: Vec<f64>,
    /// Softmax margins of one row.
    row: Vec<f64>,
    /// Features of a tile decoded from the cache, column-major with stride `tile`.
    tile: Vec<f64>,
    /// Labels, weights and holdout flags of a cached block.
    y: Vec<f64>,
    w: Vec<f64>,
    held: Vec<bool>,
}

/// A copy of the sums only: the scratch buffers are not part of a shard's state.
impl Clone for PassSums {
    fn clone(&self) -> Self {
        PassSums {
            t: self.t.clone(),
            scratch: Scratch::default(),
        }
    }
}

impl PassSums {
    /// Zero sums, keeping the buffers.
    fn reset(&mut self) {
        let t = &mut self.t;
        t.loss = 0.0;
        t.grad.fill(0.0);
        t.wrong = 0.0;
        t.overflow = None;
        t.holdout_loss = 0.0;
        t.holdout_weight = 0.0;
    }

    fn empty(dim: usize) -> PassSums {
        PassSums {
            t: Totals {
                loss: 0.0,
                grad: vec![0.0; dim],
                wrong: 0.0,
                overflow: None,
                holdout_loss: 0.0,
                holdout_weight: 0.0,
            },
            scratch: Scratch::default(),
        }
    }

    /// The sums as saved in a checkpoint: `[loss, wrong, overflowed, gradient…]`, then
    /// `[holdout loss, holdout weight]` unless both are +0 (no held-out row read yet).
    fn to_vec(&self) -> Vec<f64> {
        let t = &self.t;
        let mut v = Vec::with_capacity(5 + self.t.grad.len());
        v.push(t.loss);
        v.push(t.wrong);
        v.push(if t.overflow.is_some() { 1.0 } else { 0.0 });
        v.extend_from_slice(&t.grad);
        if t.holdout_loss.to_bits() != 0 || t.holdout_weight.to_bits() != 0 {
            v.push(t.holdout_loss);
            v.push(t.holdout_weight);
        }
        v
    }

    fn from_vec(v: &[f64], dim: usize) -> Option<PassSums> {
        if v.len() != 3 + dim && v.len() != 5 + dim {
            return None;
        }
        let mut sums = PassSums::empty(dim);
        let t = &mut sums.t;
        t.loss = v[0];
        t.wrong = v[1];
        if v[2] != 0.0 {
            t.overflow = Some("a row read before the fit was resumed".to_string());
        }
        t.grad.copy_from_slice(&v[3..3 + dim]);
        if v.len() == 5 + dim {
            t.holdout_loss = v[3 + dim];
            t.holdout_weight = v[4 + dim];
        }
        Some(sums)
    }
}

/// Checkpoints taken inside long passes: every `every`, the partial sums of the pass go
/// to `save`.
pub struct MidPassCheckpoints<'a> {
    /// Time between checkpoints inside a pass.
    pub every: Duration,
    /// Saves a partial pass (with the last accepted optimizer state).
    pub save: &'a (dyn Fn(PartialPass) -> Result<()> + Sync),
}

/// What the last evaluation saw besides the value and gradient.
#[derive(Debug, Clone, PartialEq)]
pub struct EvalExtras {
    /// Point evaluated.
    pub x: Vec<f64>,
    /// Mean weighted loss (without the penalty).
    pub mean_loss: f64,
    /// Weight share of rows classified wrongly (logistic, softmax).
    pub wrong_share: f64,
    /// Poisson: where the margin overflowed, if it did.
    pub overflow: Option<String>,
    /// Mean weighted loss of the held-out rows, scored in the same pass (none without a
    /// holdout, or when no held-out row has weight).
    pub holdout_loss: Option<f64>,
    /// Weight of the held-out rows.
    pub holdout_weight: f64,
}

/// Holdout losses of recent evaluations kept for lookup by point.
const HOLDOUT_MEMO: usize = 64;

/// A 64-bit fingerprint of a point (its exact bits).
fn point_key(x: &[f64]) -> u64 {
    use std::hash::Hasher;
    // Streamed in chunks: no copy of a long (hashed) vector.
    let mut h = twox_hash::XxHash3_64::default();
    let mut buf = [0u8; 8 * 512];
    for chunk in x.chunks(512) {
        for (out, v) in buf.chunks_exact_mut(8).zip(chunk) {
            out.copy_from_slice(&v.to_bits().to_le_bytes());
        }
        h.write(&buf[..8 * chunk.len()]);
    }
    h.finish()
}

/// The objective of DESIGN §4 on streamed data, with ridge; L1 is left to the optimizer.
pub struct GlmObjective<'a> {
    source: &'a Source,
    plan: &'a PassPlan,
    design: &'a Design,
    layout: Layout,
    ridge: f64,
    weight_sum: f64,
    passes: u64,
    last: Option<EvalExtras>,
    /// The first place any evaluation so far saw a Poisson margin overflow.
    first_overflow: Option<String>,
    mid_pass: Option<MidPassCheckpoints<'a>>,
    resume_from: Option<PartialPass>,
    /// `(point fingerprint, holdout loss)` of the last evaluations, newest last.
    holdout_memo: Vec<(u64, f64)>,
    /// The block cache of the fit (none: every pass reads Parquet).
    cache: Option<&'a CacheSlot>,
    /// The sums at the starting point, known without a pass (see [`super::start`]).
    start: Option<(Vec<f64>, PassTotals)>,
    /// Shard sums (and their scratch buffers) of the last pass, reused by the next one:
    /// with millions of hashed coordinates a fresh gradient buffer per shard and pass
    /// costs page faults and unmapping far above the zeroing of a reused one.
    pool: Mutex<Vec<PassSums>>,
    /// The pass's summed gradient, reused likewise.
    sum_buffer: Vec<f64>,
}

impl<'a> GlmObjective<'a> {
    /// The objective over `source` as cut by `plan`, with features from `design`.
    pub fn new(
        source: &'a Source,
        plan: &'a PassPlan,
        design: &'a Design,
        layout: Layout,
        ridge: f64,
        weight_sum: f64,
    ) -> Self {
        GlmObjective {
            source,
            plan,
            design,
            layout,
            ridge,
            weight_sum,
            passes: 0,
            last: None,
            first_overflow: None,
            mid_pass: None,
            resume_from: None,
            holdout_memo: Vec::new(),
            cache: None,
            start: None,
            pool: Mutex::new(Vec::new()),
            sum_buffer: Vec::new(),
        }
    }

    /// Empty shard sums: a reused set from the pool, zeroed, or a new one.
    fn shard_sums(&self) -> PassSums {
        let dim = self.layout.dim();
        let reused = self.pool.lock().ok().and_then(|mut p| p.pop());
        match reused {
            Some(mut sums) if sums.t.grad.len() == dim => {
                sums.reset();
                sums
            }
            _ => PassSums::empty(dim),
        }
    }

    /// The sums of the evaluation at `x`, known without a pass (from the statistics
    /// pass): an evaluation at exactly `x` uses them instead of reading the data.
    pub fn with_start_totals(mut self, x: &[f64], totals: PassTotals) -> Self {
        self.start = (totals.grad.len() == self.layout.dim()).then(|| (x.to_vec(), totals));
        self
    }

    /// Reads blocks through the fit's block cache (building it in the first full pass).
    pub fn with_cache(mut self, cache: &'a CacheSlot) -> Self {
        self.cache = Some(cache);
        self
    }

    /// The holdout loss of the most recent evaluation at exactly `x`, if one of the last
    /// few evaluations was there (the accepted point of an iteration always is).
    pub fn holdout_loss_at(&self, x: &[f64]) -> Option<f64> {
        if self.holdout_memo.is_empty() {
            return None;
        }
        let key = point_key(x);
        self.holdout_memo
            .iter()
            .rev()
            .find(|(k, _)| *k == key)
            .map(|(_, l)| *l)
    }

    /// Takes checkpoints inside long passes.
    pub fn with_mid_pass_checkpoints(mut self, mid_pass: MidPassCheckpoints<'a>) -> Self {
        self.mid_pass = Some(mid_pass);
        self
    }

    /// Continues the saved partial pass when its point is evaluated again.
    pub fn resume_pass(&mut self, partial: PartialPass) {
        self.resume_from = Some(partial);
    }

    /// Shard states to start the pass at `x` from: those of the saved partial pass when
    /// it evaluated exactly `x`, else every shard fresh.
    fn starts_for(&mut self, x: &[f64]) -> Vec<ShardStart<PassSums>> {
        let dim = self.layout.dim();
        let matches = self.resume_from.as_ref().is_some_and(|p| {
            p.point.len() == x.len()
                && p.point
                    .iter()
                    .zip(x)
                    .all(|(a, b)| a.to_bits() == b.to_bits())
        });
        if !matches {
            return Vec::new();
        }
        let Some(partial) = self.resume_from.take() else {
            return Vec::new();
        };
        let mut starts = Vec::with_capacity(partial.shards.len());
        for shard in &partial.shards {
            let start = match shard {
                ShardProgress::NotStarted => Some(ShardStart::Fresh),
                ShardProgress::Partial { blocks, sums } => {
                    PassSums::from_vec(sums, dim).map(|acc| ShardStart::Partial {
                        blocks: *blocks,
                        acc,
                    })
                }
                ShardProgress::Done { sums } => PassSums::from_vec(sums, dim).map(ShardStart::Done),
            };
            match start {
                Some(s) => starts.push(s),
                None => return Vec::new(),
            }
        }
        if starts.len() != self.plan.shards.len() {
            return Vec::new();
        }
        starts
    }

    /// Evaluation passes made so far.
    pub fn passes(&self) -> u64 {
        self.passes
    }

    /// What the last evaluation saw.
    pub fn last_extras(&self) -> Option<&EvalExtras> {
        self.last.as_ref()
    }

    /// Where the first evaluation that overflowed (Poisson margin beyond e^z's range)
    /// met the overflow, if any evaluation did; a line search may have stepped back
    /// from such a trial point, so the last evaluation alone does not tell.
    pub fn first_overflow(&self) -> Option<&str> {
        self.first_overflow.as_deref()
    }

    /// The coefficient layout.
    pub fn layout(&self) -> Layout {
        self.layout
    }
}

impl GlmObjective<'_> {
    /// One pass in the cache's current state; returns the sums and the next state.
    fn pass_with_cache(
        &self,
        slot: &CacheSlot,
        state: CacheState,
        x: &[f64],
        starts: Vec<ShardStart<PassSums>>,
    ) -> (Result<Vec<PassSums>>, CacheState) {
        match state {
            CacheState::Off => (self.parquet_pass(x, starts, None), CacheState::Off),
            CacheState::Ready(cache) => {
                let retry = starts.clone();
                let outcome = self.cached_pass(&cache, x, starts);
                match (&outcome, cache.corruption()) {
                    (Err(_), Some(why)) => {
                        let path = cache.path().to_path_buf();
                        slot.note(
                            true,
                            format!(
                                "the block cache {} {why}; it is rebuilt from Parquet in this pass",
                                path.display()
                            ),
                        );
                        drop(cache);
                        crate::cache::remove(&path);
                        let dir = path.parent().map(|p| p.to_path_buf()).unwrap_or_default();
                        self.pass_with_cache(slot, CacheState::Build(dir), x, retry)
                    }
                    _ => (outcome, CacheState::Ready(cache)),
                }
            }
            CacheState::Build(dir) => {
                let writer = match CacheWriter::create(&dir, slot.key()) {
                    Ok(w) => w,
                    Err(e) => {
                        slot.note(
                            true,
                            format!(
                                "{e}; the block cache is not written, every pass reads Parquet"
                            ),
                        );
                        return (self.parquet_pass(x, starts, None), CacheState::Off);
                    }
                };
                let started = std::time::Instant::now();
                let outcome = self.parquet_pass(x, starts, Some(&writer));
                if outcome.is_err() {
                    writer.abandon();
                    return (outcome, CacheState::Build(dir));
                }
                let path = writer.path().to_path_buf();
                match writer.finish() {
                    Ok(bytes) => match BlockCache::open(&dir, slot.key()) {
                        crate::cache::Opened::Ready(cache) => {
                            slot.note(
                                false,
                                format!(
                                    "wrote the block cache {} ({}) in {:.2}s; later passes read it",
                                    path.display(),
                                    crate::cache::megabytes(bytes),
                                    started.elapsed().as_secs_f64()
                                ),
                            );
                            (outcome, CacheState::Ready(cache))
                        }
                        _ => {
                            slot.note(
                                true,
                                format!(
                                    "the block cache {} just written cannot be read back; every pass reads Parquet",
                                    path.display()
                                ),
                            );
                            (outcome, CacheState::Off)
                        }
                    },
                    // A pass continued from a checkpoint did not see every block: the
                    // next full pass builds the cache.
                    Err(e) if e.kind() == crate::ErrorKind::Internal => {
                        (outcome, CacheState::Build(dir))
                    }
                    Err(e) => {
                        slot.note(
                            true,
                            format!(
                                "{e}; the block cache is not written, every pass reads Parquet"
                            ),
                        );
                        (outcome, CacheState::Off)
                    }
                }
            }
        }
    }

    /// Mid-pass snapshot saving for a pass at `x`.
    fn save_partial(&self, x: &[f64], states: Vec<ShardStart<PassSums>>) -> Result<()> {
        let Some(mid) = &self.mid_pass else {
            return Ok(());
        };
        let shards = states
            .iter()
            .map(|s| match s {
                ShardStart::Fresh => ShardProgress::NotStarted,
                ShardStart::Partial { blocks, acc } => ShardProgress::Partial {
                    blocks: *blocks,
                    sums: acc.to_vec(),
                },
                ShardStart::Done(acc) => ShardProgress::Done { sums: acc.to_vec() },
            })
            .collect();
        (mid.save)(PartialPass {
            point: x.to_vec(),
            shards,
        })
    }

    /// A pass that decodes Parquet, writing every block into `writer` when given.
    fn parquet_pass(
        &self,
        x: &[f64],
        starts: Vec<ShardStart<PassSums>>,
        writer: Option<&CacheWriter>,
    ) -> Result<Vec<PassSums>> {
        let (layout, design, source, plan) = (self.layout, self.design, self.source, self.plan);
        let columns = design.training_columns();
        let ncols = design.dense_columns();
        let save = |states: Vec<ShardStart<PassSums>>| self.save_partial(x, states);
        let snapshots = self.mid_pass.as_ref().map(|mid| Snapshots {
            every: mid.every,
            save: &save,
        });
        let read =
            |shard: usize, skip: u64, each: &mut dyn FnMut(u64, (usize, BatchAt)) -> Result<()>| {
                pass::read_parquet_shard(source, plan, &columns, shard, skip, &mut |i, at| {
                    each(at.batch.num_rows() as u64, (i, at))
                })
            };
        pass::run_units(
            source,
            plan,
            || self.shard_sums(),
            |acc: &mut PassSums, (index, at): (usize, BatchAt)| {
                let s = &mut acc.scratch;
                let mut block = std::mem::take(&mut s.block);
                match writer {
                    Some(w) => {
                        design.build_block_raw(source, &at, true, &mut block, Some(&mut s.raw))?;
                        encode_block(&block, &s.raw, ncols, &mut s.encoded);
                        w.put(index, &block, &s.encoded);
                    }
                    None => design.build_block(source, &at, true, &mut block)?,
                }
                accumulate(acc, &block, x, layout, design.loss, source);
                acc.scratch.block = block;
                Ok(())
            },
            read,
            starts,
            snapshots,
        )
    }

    /// A pass over the mapped block cache.
    fn cached_pass<'c>(
        &self,
        cache: &'c BlockCache,
        x: &[f64],
        starts: Vec<ShardStart<PassSums>>,
    ) -> Result<Vec<PassSums>> {
        let (layout, design, source, plan) = (self.layout, self.design, self.source, self.plan);
        let decoders = decoders(design);
        let ranges = pass::shard_block_ranges(plan, source.block_rows() as u64);
        let save = |states: Vec<ShardStart<PassSums>>| self.save_partial(x, states);
        let snapshots = self.mid_pass.as_ref().map(|mid| Snapshots {
            every: mid.every,
            save: &save,
        });
        let read =
            |shard: usize, skip: u64, each: &mut dyn FnMut(u64, BlockView<'c>) -> Result<()>| {
                let range = &ranges[shard];
                for i in range.start + skip as usize..range.end {
                    let view = cache.block(i)?;
                    each(view.rows as u64, view)?;
                }
                Ok(())
            };
        pass::run_units(
            source,
            plan,
            || self.shard_sums(),
            |acc: &mut PassSums, view: BlockView<'c>| {
                accumulate_cached(acc, cache, &view, &decoders, x, layout, design.loss, source)
            },
            read,
            starts,
            snapshots,
        )
    }
}

impl Objective for GlmObjective<'_> {
    fn dim(&self) -> usize {
        self.layout.dim()
    }

    fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        let layout = self.layout;
        let design = self.design;
        let known = match &self.start {
            Some((at, totals)) if self.resume_from.is_none() && at.as_slice() == x => {
                Some(totals.clone())
            }
            _ => None,
        };
        let mut overflow = None;
        let totals = match known {
            Some(totals) => totals,
            None => {
                let starts = self.starts_for(x);
                let shards = match self.cache {
                    None => self.parquet_pass(x, starts, None)?,
                    Some(slot) => {
                        let state = slot.take();
                        let (outcome, state) = self.pass_with_cache(slot, state, x, starts);
                        slot.put(state);
                        outcome?
                    }
                };
                crate::memory::sample();
                self.passes += 1;
                let mut sum = std::mem::take(&mut self.sum_buffer);
                sum.clear();
                sum.resize(layout.dim(), 0.0);
                let mut totals = PassTotals {
                    loss: 0.0,
                    grad: sum,
                    wrong: 0.0,
                    holdout_loss: 0.0,
                    holdout_weight: 0.0,
                };
                for shard in shards.iter().map(|s| &s.t) {
                    totals.loss += shard.loss;
                    totals.wrong += shard.wrong;
                    totals.holdout_loss += shard.holdout_loss;
                    totals.holdout_weight += shard.holdout_weight;
                    for (g, s) in totals.grad.iter_mut().zip(&shard.grad) {
                        *g += s;
                    }
                    if overflow.is_none() {
                        overflow = shard.overflow.clone();
                    }
                }
                if let Ok(mut pool) = self.pool.lock() {
                    pool.clear();
                    pool.extend(shards);
                }
                totals
            }
        };
        let PassTotals {
            loss: loss_sum,
            grad: sums,
            wrong,
            holdout_loss: holdout_sum,
            holdout_weight,
        } = totals;
        grad.copy_from_slice(&sums);
        self.sum_buffer = sums;
        let inv_w = 1.0 / self.weight_sum;
        let mean_loss = loss_sum * inv_w;
        let mut f = mean_loss;
        let mut penalty = 0.0;
        for (i, (g, xi)) in grad.iter_mut().zip(x).enumerate() {
            *g *= inv_w;
            if !layout.is_intercept(i) && self.ridge > 0.0 {
                penalty += xi * xi;
                *g += self.ridge * xi;
            }
        }
        f += 0.5 * self.ridge * penalty;
        if overflow.is_some() {
            f = f64::INFINITY;
            if self.first_overflow.is_none() {
                self.first_overflow = overflow.clone();
            }
        }
        let holdout_loss = (design.holdout().is_some() && holdout_weight > 0.0)
            .then(|| holdout_sum / holdout_weight);
        if let Some(h) = holdout_loss {
            if self.holdout_memo.len() == HOLDOUT_MEMO {
                self.holdout_memo.remove(0);
            }
            self.holdout_memo.push((point_key(x), h));
        }
        // The point's copy reuses the last one's buffer (a long vector with hashing).
        let mut at = self.last.take().map(|e| e.x).unwrap_or_default();
        at.clear();
        at.extend_from_slice(x);
        self.last = Some(EvalExtras {
            x: at,
            mean_loss,
            wrong_share: wrong * inv_w,
            overflow,
            holdout_loss,
            holdout_weight,
        });
        Ok(f)
    }
}

/// Most rows of a tile, the unit of the fused kernel.
pub const MAX_TILE_ROWS: usize = 512;
/// Feature values of one tile: 4 Ki `f64` = 32 KiB, so that the tile's columns, read a
/// second time for the gradient, are still in L1 (32–48 KiB on current cores); measured
/// against 8 Ki and 16 Ki with `cargo bench --bench throughput` (32 features: 15.3 ms
/// CPU per 400 000-row cached pass at 4 Ki against 17.7 ms at 16 Ki).
const TILE_VALUES: usize = 4 * 1024;

/// Rows of a tile for `width` features: as many as keep the tile's features within
/// [`TILE_VALUES`], a multiple of 8 between 16 and [`MAX_TILE_ROWS`]. It depends on the
/// width only, so both ways of reading a block (Parquet or cache) cut the same tiles
/// and give bitwise the same sums.
pub fn tile_rows(width: usize) -> usize {
    (TILE_VALUES / width.max(1)).clamp(16, MAX_TILE_ROWS) / 8 * 8
}

/// Rows of a block as the kernel sees them.
struct Tile<'a> {
    rows: usize,
    /// Feature `j` at `cols[j * stride .. j * stride + rows]`, standardized.
    cols: &'a [f64],
    stride: usize,
    y: &'a [f64],
    /// Empty: every weight is 1.
    w: &'a [f64],
    /// Empty: every row trains.
    held: &'a [bool],
    file: usize,
    first_row: u64,
    /// The block's CSR part (none when it has none) and the block row of the tile's
    /// first row in it.
    sparse: Option<&'a SparseRows>,
    sparse_first: usize,
}

impl Tile<'_> {
    #[inline]
    fn col(&self, j: usize) -> &[f64] {
        &self.cols[j * self.stride..j * self.stride + self.rows]
    }

    #[inline]
    fn weight(&self, i: usize) -> f64 {
        if self.w.is_empty() {
            1.0
        } else {
            self.w[i]
        }
    }

    #[inline]
    fn is_held_out(&self, i: usize) -> bool {
        !self.held.is_empty() && self.held[i]
    }
}

/// `Σ a_i b_i` with eight independent partial sums combined in a fixed order: the
/// compiler turns the lanes into SIMD registers (no reassociation is needed, so the
/// result is the same on every machine and run).
#[inline(always)]
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    let (a, b) = (&a[..n], &b[..n]);
    let mut lanes = [0.0f64; 8];
    let ca = a.chunks_exact(8);
    let cb = b.chunks_exact(8);
    let tail: f64 = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .map(|(x, y)| x * y)
        .sum();
    for (x, y) in ca.zip(cb) {
        for k in 0..8 {
            lanes[k] += x[k] * y[k];
        }
    }
    ((lanes[0] + lanes[1]) + (lanes[2] + lanes[3]))
        + ((lanes[4] + lanes[5]) + (lanes[6] + lanes[7]))
        + tail
}

/// [`dot`] of `r` with four columns at once, bitwise the four separate dots (each lane
/// of each column adds the same products in the same order); `r` is loaded once for all
/// four.
#[inline(always)]
fn dot4(r: &[f64], c: [&[f64]; 4]) -> [f64; 4] {
    let n = r.len();
    let full = n / 8 * 8;
    let c = c.map(|c| &c[..n]);
    let mut lanes = [[0.0f64; 8]; 4];
    for s in (0..full).step_by(8) {
        let rr = &r[s..s + 8];
        for q in 0..4 {
            let cc = &c[q][s..s + 8];
            for k in 0..8 {
                lanes[q][k] += rr[k] * cc[k];
            }
        }
    }
    let mut out = [0.0; 4];
    for q in 0..4 {
        let l = &lanes[q];
        let tail: f64 = r[full..]
            .iter()
            .zip(&c[q][full..])
            .map(|(x, y)| x * y)
            .sum();
        out[q] = ((l[0] + l[1]) + (l[2] + l[3])) + ((l[4] + l[5]) + (l[6] + l[7])) + tail;
    }
    out
}

/// `z_i += β_j x_ij` over the tile's columns `j` with a nonzero coefficient, in column
/// order, four columns per sweep over `z` (bitwise the column-at-a-time loop: every
/// `z_i` receives the same products in the same order, with one load and store of it
/// per four columns instead of one per column).
#[inline(always)]
fn add_columns(z: &mut [f64], tile: &Tile<'_>, beta: &[f64]) {
    let n = z.len();
    let mut j = 0;
    loop {
        // The next (up to) four columns with a nonzero coefficient.
        let mut cols = [0usize; 4];
        let mut k = 0;
        while j < beta.len() && k < 4 {
            if beta[j] != 0.0 {
                cols[k] = j;
                k += 1;
            }
            j += 1;
        }
        if k == 4 {
            let b = cols.map(|c| beta[c]);
            let c = cols.map(|c| &tile.col(c)[..n]);
            for i in 0..n {
                let mut v = z[i];
                v += b[0] * c[0][i];
                v += b[1] * c[1][i];
                v += b[2] * c[2][i];
                v += b[3] * c[3][i];
                z[i] = v;
            }
        } else {
            for &c in &cols[..k] {
                let b = beta[c];
                for (zi, xi) in z.iter_mut().zip(tile.col(c)) {
                    *zi += b * xi;
                }
            }
        }
        if j >= beta.len() {
            break;
        }
    }
}

/// `Σ a_i` in the lanes of [`dot`].
#[inline(always)]
fn lane_sum(a: &[f64]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let c = a.chunks_exact(8);
    let tail: f64 = c.remainder().iter().sum();
    for x in c {
        for k in 0..8 {
            lanes[k] += x[k];
        }
    }
    ((lanes[0] + lanes[1]) + (lanes[2] + lanes[3]))
        + ((lanes[4] + lanes[5]) + (lanes[6] + lanes[7]))
        + tail
}

/// The fused kernel: margins, loss and residuals, and the gradient of one tile, in one
/// sweep over its features (the second read, for the gradient, hits the cache).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn fold_tile(
    t: &mut Totals,
    z: &mut Vec<f64>,
    row: &mut Vec<f64>,
    tile: &Tile<'_>,
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) {
    let n = tile.rows;
    if n == 0 {
        return;
    }
    let groups = layout.groups;
    z.clear();
    z.resize(groups * n, 0.0);
    for g in 0..groups {
        let base = layout.intercept(g);
        let zg = &mut z[g * n..(g + 1) * n];
        zg.fill(x[base]);
        add_columns(zg, tile, &x[base + 1..base + 1 + layout.width]);
    }
    // Sparse part: add the hashed coefficients of every row's nonzeros.
    if let Some(sparse) = tile.sparse {
        sparse_kernel::add_margins(sparse, tile.sparse_first, n, x, layout, z);
    }
    // Loss, and the residuals dℓ/dz (times the weight) in place of the margins.
    match loss {
        Loss::Softmax => softmax_rows(t, z, row, tile, layout),
        _ => {
            let z = &mut z[..n];
            // Loss and derivative of every row first, in a loop of straight-line
            // arithmetic the compiler vectorizes; then the weighted sums in row order.
            row.clear();
            row.resize(2 * n, 0.0);
            let (ls, ds) = row.split_at_mut(n);
            let y = &tile.y[..n];
            match loss {
                Loss::Logistic => {
                    for i in 0..n {
                        (ls[i], ds[i]) = loss::logistic(z[i], y[i]);
                    }
                }
                Loss::Squared => {
                    for i in 0..n {
                        (ls[i], ds[i]) = loss::squared(z[i], y[i]);
                    }
                }
                _ => {
                    for i in 0..n {
                        (ls[i], ds[i]) = loss::poisson(z[i], y[i]);
                    }
                }
            }
            let mut sum = 0.0;
            let mut wrong = 0.0;
            let mut held_sum = 0.0;
            let mut held_weight = 0.0;
            for i in 0..n {
                let zi = z[i];
                let w = tile.weight(i);
                let held = tile.is_held_out(i);
                let l = ls[i];
                match loss {
                    Loss::Logistic if !held && (zi > 0.0) != (y[i] > 0.5) => wrong += w,
                    Loss::Poisson if !held && zi > MAX_EXP_MARGIN && t.overflow.is_none() => {
                        t.overflow = Some(format!(
                            "row {} of {}",
                            tile.first_row + i as u64 + 1,
                            source.files()[tile.file].path.display()
                        ));
                    }
                    _ => {}
                }
                if held {
                    // Scored, not trained on: no residual, so no gradient.
                    held_sum += w * l;
                    held_weight += w;
                    z[i] = 0.0;
                } else {
                    sum += w * l;
                    z[i] = w * ds[i];
                }
            }
            t.loss += sum;
            t.wrong += wrong;
            t.holdout_loss += held_sum;
            t.holdout_weight += held_weight;
        }
    }
    // Gradient: intercept sums the residuals, coefficient j is their dot with feature j.
    for g in 0..groups {
        let base = layout.intercept(g);
        let r = &z[g * n..(g + 1) * n];
        t.grad[base] += lane_sum(r);
        let grad = &mut t.grad[base + 1..base + 1 + layout.width];
        let mut j = 0;
        while j + 4 <= layout.width {
            let d = dot4(
                r,
                [
                    tile.col(j),
                    tile.col(j + 1),
                    tile.col(j + 2),
                    tile.col(j + 3),
                ],
            );
            for q in 0..4 {
                grad[j + q] += d[q];
            }
            j += 4;
        }
        for (j, gj) in grad.iter_mut().enumerate().skip(j) {
            *gj += dot(r, tile.col(j));
        }
    }
    // Sparse part: scatter the residuals into the hashed coordinates.
    if let Some(sparse) = tile.sparse {
        sparse_kernel::add_gradient(sparse, tile.sparse_first, n, z, layout, &mut t.grad);
    }
}

/// Adds one block built from Parquet to the shard sums, tile by tile (with the AVX2
/// instructions where the processor has them; see [`crate::simd`]).
fn accumulate(
    acc: &mut PassSums,
    block: &Block,
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) {
    #[cfg(target_arch = "x86_64")]
    if crate::simd::has_avx2() {
        // SAFETY: the processor has AVX2 (checked just above).
        return unsafe { accumulate_avx2(acc, block, x, layout, loss, source) };
    }
    accumulate_body(acc, block, x, layout, loss, source)
}

/// [`accumulate`] compiled for AVX2 (without FMA, so its sums are bitwise the baseline's).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn accumulate_avx2(
    acc: &mut PassSums,
    block: &Block,
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) {
    accumulate_body(acc, block, x, layout, loss, source)
}

#[inline(always)]
fn accumulate_body(
    acc: &mut PassSums,
    block: &Block,
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) {
    let n = block.rows;
    let step = tile_rows(layout.width);
    let Scratch { z, row, .. } = &mut acc.scratch;
    let mut r0 = 0;
    while r0 < n {
        let rows = step.min(n - r0);
        let held: &[bool] = if block.holdout.is_empty() {
            &[]
        } else {
            &block.holdout[r0..r0 + rows]
        };
        let tile = Tile {
            rows,
            // No dense features: `x` is empty (width 0, no column is read).
            cols: block.x.get(r0..).unwrap_or(&[]),
            stride: n,
            y: &block.y[r0..r0 + rows],
            w: if block.w.is_empty() {
                &[]
            } else {
                &block.w[r0..r0 + rows]
            },
            held,
            file: block.file,
            first_row: block.first_row + r0 as u64,
            sparse: (!block.sparse.is_empty()).then_some(&block.sparse),
            sparse_first: r0,
        };
        fold_tile(&mut acc.t, z, row, &tile, x, layout, loss, source);
        r0 += rows;
    }
}

/// How a feature is decoded from the cache's raw column into the standardized value
/// that [`Design::build_block`] would have built.
#[derive(Debug, Clone, Copy)]
struct Decoder {
    column: u32,
    center: f64,
    inv: f64,
    impute: f64,
    indicator: bool,
}

fn decoders(design: &Design) -> Vec<Decoder> {
    let columns = design.feature_columns();
    design
        .features
        .iter()
        .map(|f| Decoder {
            column: columns.iter().position(|c| c == &f.column).unwrap_or(0) as u32,
            center: f.center,
            inv: 1.0 / f.scale,
            impute: f.impute,
            indicator: f.indicator,
        })
        .collect()
}

/// Adds one cached block to the shard sums: every tile's features are decoded and
/// standardized into the shard's tile buffer, then folded by the same kernel as a block
/// built from Parquet.
#[allow(clippy::too_many_arguments)]
fn accumulate_cached(
    acc: &mut PassSums,
    cache: &BlockCache,
    view: &BlockView<'_>,
    decoders: &[Decoder],
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) -> Result<()> {
    #[cfg(target_arch = "x86_64")]
    if crate::simd::has_avx2() {
        // SAFETY: the processor has AVX2 (checked just above).
        return unsafe {
            accumulate_cached_avx2(acc, cache, view, decoders, x, layout, loss, source)
        };
    }
    accumulate_cached_body(acc, cache, view, decoders, x, layout, loss, source)
}

/// [`accumulate_cached`] compiled for AVX2 (without FMA: bitwise the baseline's sums).
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
#[allow(clippy::too_many_arguments)]
unsafe fn accumulate_cached_avx2(
    acc: &mut PassSums,
    cache: &BlockCache,
    view: &BlockView<'_>,
    decoders: &[Decoder],
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) -> Result<()> {
    accumulate_cached_body(acc, cache, view, decoders, x, layout, loss, source)
}

#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn accumulate_cached_body(
    acc: &mut PassSums,
    cache: &BlockCache,
    view: &BlockView<'_>,
    decoders: &[Decoder],
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) -> Result<()> {
    let n = view.rows;
    let PassSums { t, scratch: s } = acc;
    let missing = |what: &str| cache.damaged(format!("lacks its {what} section"));
    let labels = view
        .section(Kind::Label, 0)
        .ok_or_else(|| missing("label"))?;
    s.y.resize(n, 0.0);
    labels.decode_into(0, &mut s.y, |v| v);
    match view.section(Kind::Weight, 0) {
        Some(w) => {
            s.w.resize(n, 0.0);
            w.decode_into(0, &mut s.w, |v| v);
        }
        None => s.w.clear(),
    }
    match view.section(Kind::Holdout, 0) {
        Some(h) => {
            s.held.clear();
            s.held.extend((0..n).map(|i| h.get(i) != 0.0));
        }
        None => s.held.clear(),
    }
    let sparse = cached_sparse(cache, view, layout, &mut s.block.sparse)?;
    let step = tile_rows(layout.width);
    s.tile.resize(step * decoders.len().max(1), 0.0);
    let mut r0 = 0;
    while r0 < n {
        let rows = step.min(n - r0);
        for (j, d) in decoders.iter().enumerate() {
            let values = view
                .section(Kind::Dense, d.column)
                .ok_or_else(|| missing("column"))?;
            let out = &mut s.tile[j * step..j * step + rows];
            let (c, inv, impute) = (d.center, d.inv, d.impute);
            if d.indicator {
                values.decode_ahead(r0, out, step, |v| {
                    (if v.is_nan() { 1.0 } else { 0.0 } - c) * inv
                });
            } else {
                values.decode_ahead(r0, out, step, |v| {
                    (if v.is_nan() { impute } else { v } - c) * inv
                });
            }
        }
        let tile = Tile {
            rows,
            cols: &s.tile,
            stride: step,
            y: &s.y[r0..r0 + rows],
            w: if s.w.is_empty() {
                &[]
            } else {
                &s.w[r0..r0 + rows]
            },
            held: if s.held.is_empty() {
                &[]
            } else {
                &s.held[r0..r0 + rows]
            },
            file: view.file,
            first_row: view.first_row + r0 as u64,
            sparse: sparse.then_some(&s.block.sparse),
            sparse_first: r0,
        };
        fold_tile(t, &mut s.z, &mut s.row, &tile, x, layout, loss, source);
        r0 += rows;
    }
    Ok(())
}

/// Decodes the CSR part of a cached block into `rows` (the shard's scratch, reused:
/// in a cached pass the scratch block built from Parquet is idle, so its CSR vectors
/// hold the decoded part and nothing is allocated per block once warm). Returns whether
/// the block has one; a block of a sparse design without one, or with a damaged one,
/// marks the cache damaged.
fn cached_sparse(
    cache: &BlockCache,
    view: &BlockView<'_>,
    layout: Layout,
    rows: &mut SparseRows,
) -> Result<bool> {
    let has = crate::cache::decode_sparse(view, layout.sparse, rows)
        .map_err(|why| cache.damaged(format!("block of {} rows {why}", view.rows)))?;
    if layout.sparse > 0 && view.rows > 0 && !has {
        return Err(cache.damaged("lacks its sparse sections".to_string()));
    }
    if has && rows.rows() != view.rows {
        return Err(cache.damaged(format!(
            "has sparse sections of {} rows in a block of {}",
            rows.rows(),
            view.rows
        )));
    }
    Ok(has)
}

/// Margins of every group for every row of `block`, group-major: `z[g * rows + i]`.
pub fn margins(block: &Block, x: &[f64], layout: Layout, z: &mut Vec<f64>) {
    let n = block.rows;
    z.clear();
    z.resize(layout.groups * n, 0.0);
    for g in 0..layout.groups {
        let base = layout.intercept(g);
        let zg = &mut z[g * n..(g + 1) * n];
        zg.fill(x[base]);
        for j in 0..layout.width {
            let beta = x[base + 1 + j];
            if beta != 0.0 {
                for (zi, xi) in zg.iter_mut().zip(block.column(j)) {
                    *zi += beta * xi;
                }
            }
        }
    }
    // Sparse part: add the hashed coefficients of every row's nonzeros.
    if !block.sparse.is_empty() {
        sparse_kernel::add_margins(&block.sparse, 0, n, x, layout, z);
    }
}

/// Softmax loss per row of a tile; replaces the margins `z` with weighted residuals
/// `w (p_k − [y = k])`.
fn softmax_rows(
    t: &mut Totals,
    z: &mut [f64],
    margins: &mut Vec<f64>,
    tile: &Tile<'_>,
    layout: Layout,
) {
    let n = tile.rows;
    let k = layout.classes;
    margins.clear();
    margins.resize(k, 0.0);
    let mut sum = 0.0;
    let mut wrong = 0.0;
    let mut held_sum = 0.0;
    let mut held_weight = 0.0;
    for i in 0..n {
        layout.class_margins(z, n, i, margins);
        let y = tile.y[i] as usize;
        let w = tile.weight(i);
        let lse = loss::log_sum_exp(margins);
        if tile.is_held_out(i) {
            // Scored, not trained on: no residuals, so no gradient.
            held_sum += w * (lse - margins[y]);
            held_weight += w;
            for g in 0..layout.groups {
                z[g * n + i] = 0.0;
            }
            continue;
        }
        sum += w * (lse - margins[y]);
        let mut best = 0;
        for c in 1..k {
            if margins[c] > margins[best] {
                best = c;
            }
        }
        if best != y {
            wrong += w;
        }
        for g in 0..layout.groups {
            let c = layout.class_of_group(g);
            let p = (margins[c] - lse).exp();
            z[g * n + i] = w * (p - if c == y { 1.0 } else { 0.0 });
        }
    }
    t.loss += sum;
    t.wrong += wrong;
    t.holdout_loss += held_sum;
    t.holdout_weight += held_weight;
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A block of `rows` rows and `width` features from a fixed pseudo-random sequence,
    /// with weights, held-out rows, a few extreme margins and, when `classes > 0`, class
    /// labels.
    fn block(rows: usize, width: usize, classes: usize, loss: Loss) -> Block {
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let x: Vec<f64> = (0..rows * width).map(|_| 4.0 * next() - 2.0).collect();
        let y = (0..rows)
            .map(|_| match loss {
                Loss::Logistic => (next() < 0.4) as u8 as f64,
                Loss::Squared => 10.0 * next() - 3.0,
                Loss::Poisson => (5.0 * next()).floor(),
                Loss::Softmax => (next() * classes as f64).floor(),
            })
            .collect();
        Block {
            rows,
            x,
            y,
            w: (0..rows).map(|_| 0.5 + next()).collect(),
            holdout: (0..rows).map(|_| next() < 0.2).collect(),
            ..Block::default()
        }
    }

    fn fixture_source() -> Source {
        let path = concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/tests/data/sparse/hashed.parquet"
        );
        Source::open(&[path.to_string()]).expect("the fixture opens")
    }

    /// The AVX2 copy of the kernel gives bitwise the sums of the baseline copy, for every
    /// loss, odd widths (lane tails), zero coefficients (skipped columns) and rows of huge
    /// margins; and both sums are a plain row-by-row computation's to rounding.
    #[test]
    fn avx2_kernel_is_bitwise_the_baseline_kernel() {
        let source = fixture_source();
        for (loss, classes) in [
            (Loss::Logistic, 0),
            (Loss::Squared, 0),
            (Loss::Poisson, 0),
            (Loss::Softmax, 3),
        ] {
            for width in [1usize, 5, 13, 32, 47] {
                let rows = 3 * tile_rows(width) + 11;
                let b = block(rows, width, classes, loss);
                let layout = Layout::new(loss, width, classes, true);
                let scale = if loss == Loss::Poisson { 0.05 } else { 0.7 };
                let x: Vec<f64> = (0..layout.dim())
                    .map(|i| {
                        if i % 5 == 3 {
                            0.0
                        } else {
                            scale * ((i % 7) as f64 - 3.0)
                        }
                    })
                    .collect();
                let mut base = PassSums::empty(layout.dim());
                accumulate_body(&mut base, &b, &x, layout, loss, &source);
                // A plain computation, row by row, with the system library's functions.
                let (mut loss_sum, mut held_sum) = (0.0, 0.0);
                let mut z = vec![0.0; layout.groups];
                let mut m = vec![0.0; layout.classes.max(1)];
                for i in 0..rows {
                    for (g, zg) in z.iter_mut().enumerate() {
                        let at = layout.intercept(g);
                        *zg = x[at]
                            + (0..width)
                                .map(|j| x[at + 1 + j] * b.column(j)[i])
                                .sum::<f64>();
                    }
                    let y = b.y[i];
                    let l = match loss {
                        Loss::Logistic => (1.0 + z[0].exp()).ln() - y * z[0],
                        Loss::Squared => 0.5 * (z[0] - y) * (z[0] - y),
                        Loss::Poisson => z[0].exp() - y * z[0],
                        Loss::Softmax => {
                            layout.class_margins(&z, 1, 0, &mut m);
                            let top = m.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
                            let lse = top + m.iter().map(|v| (v - top).exp()).sum::<f64>().ln();
                            lse - m[y as usize]
                        }
                    };
                    if b.holdout[i] {
                        held_sum += b.w[i] * l;
                    } else {
                        loss_sum += b.w[i] * l;
                    }
                }
                let close = |a: f64, e: f64| (a - e).abs() <= 1e-12 * e.abs().max(1.0);
                assert!(
                    close(base.t.loss, loss_sum),
                    "{loss:?} width {width}: {} vs {loss_sum}",
                    base.t.loss
                );
                assert!(
                    close(base.t.holdout_loss, held_sum),
                    "{loss:?} width {width}"
                );
                #[cfg(target_arch = "x86_64")]
                if crate::simd::has_avx2() {
                    let mut wide = PassSums::empty(layout.dim());
                    // SAFETY: the processor has AVX2 (checked just above).
                    unsafe { accumulate_avx2(&mut wide, &b, &x, layout, loss, &source) };
                    assert_eq!(wide.to_vec().len(), base.to_vec().len());
                    for (a, e) in wide.to_vec().iter().zip(base.to_vec()) {
                        assert_eq!(a.to_bits(), e.to_bits(), "{loss:?} width {width}");
                    }
                }
            }
        }
    }
}
