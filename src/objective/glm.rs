//! The GLM objective over streamed data: one pass per evaluation.

use std::time::Duration;

use crate::checkpoint::{PartialPass, ShardProgress};
use crate::features::{Block, Design};
use crate::objective::loss::{self, Loss, MAX_EXP_MARGIN};
use crate::objective::sparse_kernel;
use crate::optim::Objective;
use crate::pass::{self, PassPlan, ShardStart, Snapshots};
use crate::source::Source;
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

/// Per-shard sums of one evaluation pass.
#[derive(Debug)]
struct PassSums {
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
    block: Block,
    z: Vec<f64>,
}

/// A copy of the sums only: the scratch buffers are not part of a shard's state.
impl Clone for PassSums {
    fn clone(&self) -> Self {
        PassSums {
            loss: self.loss,
            grad: self.grad.clone(),
            wrong: self.wrong,
            overflow: self.overflow.clone(),
            holdout_loss: self.holdout_loss,
            holdout_weight: self.holdout_weight,
            block: Block::default(),
            z: Vec::new(),
        }
    }
}

impl PassSums {
    fn empty(dim: usize) -> PassSums {
        PassSums {
            loss: 0.0,
            grad: vec![0.0; dim],
            wrong: 0.0,
            overflow: None,
            holdout_loss: 0.0,
            holdout_weight: 0.0,
            block: Block::default(),
            z: Vec::new(),
        }
    }

    /// The sums as saved in a checkpoint: `[loss, wrong, overflowed, gradient…]`, then
    /// `[holdout loss, holdout weight]` unless both are +0 (no held-out row read yet).
    fn to_vec(&self) -> Vec<f64> {
        let mut v = Vec::with_capacity(5 + self.grad.len());
        v.push(self.loss);
        v.push(self.wrong);
        v.push(if self.overflow.is_some() { 1.0 } else { 0.0 });
        v.extend_from_slice(&self.grad);
        if self.holdout_loss.to_bits() != 0 || self.holdout_weight.to_bits() != 0 {
            v.push(self.holdout_loss);
            v.push(self.holdout_weight);
        }
        v
    }

    fn from_vec(v: &[f64], dim: usize) -> Option<PassSums> {
        if v.len() != 3 + dim && v.len() != 5 + dim {
            return None;
        }
        let mut sums = PassSums::empty(dim);
        sums.loss = v[0];
        sums.wrong = v[1];
        if v[2] != 0.0 {
            sums.overflow = Some("a row read before the fit was resumed".to_string());
        }
        sums.grad.copy_from_slice(&v[3..3 + dim]);
        if v.len() == 5 + dim {
            sums.holdout_loss = v[3 + dim];
            sums.holdout_weight = v[4 + dim];
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
        }
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

impl Objective for GlmObjective<'_> {
    fn dim(&self) -> usize {
        self.layout.dim()
    }

    fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> Result<f64> {
        let layout = self.layout;
        let design = self.design;
        let source = self.source;
        let columns = design.training_columns();
        let starts = self.starts_for(x);
        let save_partial = |states: Vec<ShardStart<PassSums>>| -> Result<()> {
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
        };
        let snapshots = self.mid_pass.as_ref().map(|mid| Snapshots {
            every: mid.every,
            save: &save_partial,
        });
        let shards = pass::run_resumable(
            source,
            self.plan,
            &columns,
            || PassSums::empty(layout.dim()),
            |acc, at| {
                let mut block = std::mem::take(&mut acc.block);
                design.build_block(source, &at, true, &mut block)?;
                accumulate(acc, &block, x, layout, design.loss, source);
                acc.block = block;
                Ok(())
            },
            starts,
            snapshots,
        )?;
        self.passes += 1;
        let mut loss_sum = 0.0;
        let mut wrong = 0.0;
        let mut overflow = None;
        let mut holdout_sum = 0.0;
        let mut holdout_weight = 0.0;
        grad.fill(0.0);
        for shard in &shards {
            loss_sum += shard.loss;
            wrong += shard.wrong;
            holdout_sum += shard.holdout_loss;
            holdout_weight += shard.holdout_weight;
            for (g, s) in grad.iter_mut().zip(&shard.grad) {
                *g += s;
            }
            if overflow.is_none() {
                overflow = shard.overflow.clone();
            }
        }
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
        self.last = Some(EvalExtras {
            x: x.to_vec(),
            mean_loss,
            wrong_share: wrong * inv_w,
            overflow,
            holdout_loss,
            holdout_weight,
        });
        Ok(f)
    }
}

/// Adds one block's loss and gradient to the shard sums.
fn accumulate(
    acc: &mut PassSums,
    block: &Block,
    x: &[f64],
    layout: Layout,
    loss: Loss,
    source: &Source,
) {
    let n = block.rows;
    if n == 0 {
        return;
    }
    let groups = layout.groups;
    margins(block, x, layout, &mut acc.z);
    // Loss, and the residuals dℓ/dz (times the weight) in place of the margins.
    match loss {
        Loss::Softmax => softmax_rows(acc, block, layout),
        _ => {
            let z = &mut acc.z[..n];
            let mut sum = 0.0;
            let mut wrong = 0.0;
            let mut held_sum = 0.0;
            let mut held_weight = 0.0;
            for i in 0..n {
                let zi = z[i];
                let y = block.y[i];
                let w = block.weight(i);
                let held = block.is_held_out(i);
                let (l, d) = match loss {
                    Loss::Logistic => {
                        if !held && (zi > 0.0) != (y > 0.5) {
                            wrong += w;
                        }
                        loss::logistic(zi, y)
                    }
                    Loss::Squared => loss::squared(zi, y),
                    _ => {
                        if !held && zi > MAX_EXP_MARGIN && acc.overflow.is_none() {
                            acc.overflow = Some(format!(
                                "row {} of {}",
                                block.first_row + i as u64 + 1,
                                source.files()[block.file].path.display()
                            ));
                        }
                        loss::poisson(zi, y)
                    }
                };
                if held {
                    // Scored, not trained on: no residual, so no gradient.
                    held_sum += w * l;
                    held_weight += w;
                    z[i] = 0.0;
                } else {
                    sum += w * l;
                    z[i] = w * d;
                }
            }
            acc.loss += sum;
            acc.wrong += wrong;
            acc.holdout_loss += held_sum;
            acc.holdout_weight += held_weight;
        }
    }
    let p = layout.width;
    // Gradient: intercept sums the residuals, coefficient j is their dot with feature j.
    for g in 0..groups {
        let base = layout.intercept(g);
        let r = &acc.z[g * n..(g + 1) * n];
        acc.grad[base] += r.iter().sum::<f64>();
        for j in 0..p {
            let dot: f64 = r.iter().zip(block.column(j)).map(|(a, b)| a * b).sum();
            acc.grad[base + 1 + j] += dot;
        }
    }
    // Sparse part: scatter the residuals into the hashed coordinates.
    if !block.sparse.is_empty() {
        sparse_kernel::add_gradient(&block.sparse, &acc.z, layout, &mut acc.grad);
    }
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
        sparse_kernel::add_margins(&block.sparse, x, layout, z);
    }
}

/// Softmax loss per row; replaces the margins with weighted residuals `w (p_k − [y = k])`.
fn softmax_rows(acc: &mut PassSums, block: &Block, layout: Layout) {
    let n = block.rows;
    let k = layout.classes;
    let mut margins = vec![0.0; k];
    let mut sum = 0.0;
    let mut wrong = 0.0;
    let mut held_sum = 0.0;
    let mut held_weight = 0.0;
    for i in 0..n {
        for (c, m) in margins.iter_mut().enumerate() {
            *m = if layout.reference {
                if c == 0 {
                    0.0
                } else {
                    acc.z[(c - 1) * n + i]
                }
            } else {
                acc.z[c * n + i]
            };
        }
        let y = block.y[i] as usize;
        let w = block.weight(i);
        let lse = loss::log_sum_exp(&margins);
        if block.is_held_out(i) {
            // Scored, not trained on: no residuals, so no gradient.
            held_sum += w * (lse - margins[y]);
            held_weight += w;
            for g in 0..layout.groups {
                acc.z[g * n + i] = 0.0;
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
            acc.z[g * n + i] = w * (p - if c == y { 1.0 } else { 0.0 });
        }
    }
    acc.loss += sum;
    acc.wrong += wrong;
    acc.holdout_loss += held_sum;
    acc.holdout_weight += held_weight;
}
