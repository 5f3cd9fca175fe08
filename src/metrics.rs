//! Measures of how good a model's scores are, computed while the rows stream past.
//!
//! Every accumulator here takes one row at a time (score, label, weight) and keeps
//! memory bounded, except the exact-AUC buffer, which holds 16 bytes per row up to a
//! budget the caller chooses ([`ScoreRanking::new`]). Weights are frequency weights: a
//! row of weight 3 counts as three rows in every measure.
//!
//! - Binary (logistic): [`BinaryMetrics`] for log-loss, accuracy at probability 0.5 and
//!   the Brier score; [`ScoreRanking`] for the area under the ROC curve and the
//!   calibration table by deciles of predicted probability.
//! - Multinomial (softmax): [`SoftmaxMetrics`] for log-loss, accuracy and the confusion
//!   matrix.
//! - Regression (squared): [`RegressionMetrics`] for RMSE, MAE and R².
//! - Counts (poisson): [`PoissonMetrics`] for the mean Poisson deviance.
//!
//! # AUC, exact or from a histogram
//!
//! The AUC is the probability that a random positive scores above a random negative,
//! ties counting one half (the trapezoid rule under the ROC curve), each pair weighted by
//! the product of the two rows' weights. While the scores fit in the memory budget they
//! are kept and sorted at the end: the AUC is then exact. Past the budget the kept scores
//! are moved into a histogram of [`HISTOGRAM_BINS`] equal bins over the scores' range
//! (the range grows by doubling when a score falls outside it, so the bins stay at most
//! twice as wide as the data need), and the buffer is freed.
//!
//! From the histogram, a pair in different bins is ordered exactly; a pair in the same
//! bin may be ordered either way, so it is counted one half. The within-bin pairs of bin
//! `b` hold `pos_b · neg_b` of the `P · N` pair weight; their true contribution lies
//! anywhere in `[0, pos_b · neg_b]`, so the reported AUC is off by at most
//! `Σ_b pos_b · neg_b / (2 · P · N)` — half the width of the interval the histogram
//! leaves open. Bins whose scores are all equal (each bin keeps its smallest and largest
//! score) hold exact ties, whose half credit is certain; they are left out of the sum. That half-width is reported as the error bound, with the interval
//! itself ([`Auc::low`], [`Auc::high`]).
//!
//! # Calibration by deciles
//!
//! Rows are ordered by score and cut into ten groups of (as nearly as ties allow) equal
//! weight: a group of tied scores (exact mode) or a histogram bin (histogram mode) goes
//! whole to the decile that holds the middle of its weight. For each decile the table
//! gives rows, weight, the weighted mean predicted probability, the weighted observed
//! rate of positives, and the smallest and largest predicted probability in it.

use crate::objective::loss::{log_sum_exp, sigmoid, softplus};

/// Default memory budget of the exact AUC: 512 MiB.
pub const DEFAULT_AUC_MEMORY: u64 = 512 * 1024 * 1024;

/// Bytes the exact AUC keeps per row (score and signed weight, both `f64`).
pub const AUC_BYTES_PER_ROW: u64 = 16;

/// Bins of the score histogram used past the memory budget.
pub const HISTOGRAM_BINS: usize = 1 << 16;

/// Deciles of the calibration table.
const DECILES: usize = 10;

/// Largest magnitude of a score put into the histogram; larger (or infinite) scores are
/// clamped to it, which keeps their order against every ordinary score.
const SCORE_LIMIT: f64 = 1e300;

/// A compensated (Neumaier) sum: long streams of terms keep their digits.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Sum {
    sum: f64,
    compensation: f64,
}

impl Sum {
    /// Adds `x`.
    #[inline]
    pub fn add(&mut self, x: f64) {
        let t = self.sum + x;
        if self.sum.abs() >= x.abs() {
            self.compensation += (self.sum - t) + x;
        } else {
            self.compensation += (x - t) + self.sum;
        }
        self.sum = t;
    }

    /// The sum so far.
    #[inline]
    pub fn value(&self) -> f64 {
        self.sum + self.compensation
    }
}

/// Weighted mean and sum of squared deviations of a stream (Welford's update with
/// weights), for the total sum of squares of R².
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct Spread {
    weight: f64,
    mean: f64,
    m2: f64,
}

impl Spread {
    #[inline]
    fn push(&mut self, x: f64, w: f64) {
        if w <= 0.0 {
            return;
        }
        self.weight += w;
        let delta = x - self.mean;
        self.mean += delta * (w / self.weight);
        self.m2 += w * delta * (x - self.mean);
    }
}

// ---------------------------------------------------------------------------------------
// Binary
// ---------------------------------------------------------------------------------------

/// Log-loss, accuracy and Brier score of a binary model, from margins (log-odds).
#[derive(Debug, Clone, Default)]
pub struct BinaryMetrics {
    rows: u64,
    weight: Sum,
    positives: Sum,
    log_loss: Sum,
    brier: Sum,
    correct: Sum,
    predicted: Sum,
}

/// Finished binary measures (weighted means over the rows).
#[derive(Debug, Clone, PartialEq)]
pub struct BinaryReport {
    /// Rows seen.
    pub rows: u64,
    /// Sum of the weights.
    pub weight: f64,
    /// Mean of `log(1 + e^z) − y·z`, the negative log-likelihood per row.
    pub log_loss: f64,
    /// Share of rows whose predicted class (1 when the probability is at least 0.5)
    /// equals the label.
    pub accuracy: f64,
    /// Mean of `(p − y)²`.
    pub brier: f64,
    /// Observed share of positives.
    pub positive_rate: f64,
    /// Mean predicted probability.
    pub mean_predicted: f64,
}

impl BinaryMetrics {
    /// Adds a row of margin `z`, label `y` and weight `w ≥ 0`.
    #[inline]
    pub fn push(&mut self, z: f64, y: bool, w: f64) {
        self.rows += 1;
        let yf = if y { 1.0 } else { 0.0 };
        let p = sigmoid(z);
        self.weight.add(w);
        self.positives.add(w * yf);
        self.log_loss.add(w * (softplus(z) - yf * z));
        self.brier.add(w * (p - yf) * (p - yf));
        if (p >= 0.5) == y {
            self.correct.add(w);
        }
        self.predicted.add(w * p);
    }

    /// The measures; `None` when no row had positive weight.
    pub fn finish(&self) -> Option<BinaryReport> {
        let w = self.weight.value();
        if w <= 0.0 {
            return None;
        }
        Some(BinaryReport {
            rows: self.rows,
            weight: w,
            log_loss: self.log_loss.value() / w,
            accuracy: self.correct.value() / w,
            brier: self.brier.value() / w,
            positive_rate: self.positives.value() / w,
            mean_predicted: self.predicted.value() / w,
        })
    }
}

/// How an AUC was computed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AucMethod {
    /// From every score, sorted.
    Exact,
    /// From a histogram of the scores with this many bins.
    Histogram {
        /// Bins of the histogram.
        bins: usize,
    },
}

impl AucMethod {
    /// `exact` or `histogram`.
    pub fn as_str(self) -> &'static str {
        match self {
            AucMethod::Exact => "exact",
            AucMethod::Histogram { .. } => "histogram",
        }
    }
}

/// The area under the ROC curve, with how it was found.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Auc {
    /// The AUC; `None` when the rows hold only one class (it is then undefined).
    pub value: Option<f64>,
    /// Exact or from a histogram.
    pub method: AucMethod,
    /// Largest possible difference between `value` and the exact AUC (0 when exact).
    pub error_bound: f64,
    /// Smallest AUC the histogram allows (equal to `value` when exact).
    pub low: Option<f64>,
    /// Largest AUC the histogram allows (equal to `value` when exact).
    pub high: Option<f64>,
}

/// One decile of the calibration table.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibrationRow {
    /// 1 (lowest predicted probabilities) to 10.
    pub decile: usize,
    /// Rows (of positive weight) in the decile.
    pub rows: u64,
    /// Sum of their weights.
    pub weight: f64,
    /// Weighted mean predicted probability.
    pub mean_predicted: f64,
    /// Weighted share of positives.
    pub observed_rate: f64,
    /// Smallest predicted probability in the decile.
    pub min_predicted: f64,
    /// Largest predicted probability in the decile.
    pub max_predicted: f64,
}

/// Collects scores for the AUC and the calibration table: exactly up to a memory
/// budget, then in a histogram (see the module documentation).
#[derive(Debug, Clone)]
pub struct ScoreRanking {
    budget_rows: u64,
    /// (score, weight signed by the label: `+w` positive, `−w` negative).
    exact: Vec<(f64, f64)>,
    histogram: Option<Histogram>,
}

impl ScoreRanking {
    /// A collector that keeps scores exactly while they take at most `memory_bytes`
    /// ([`AUC_BYTES_PER_ROW`] per row); 0 uses the histogram from the first row.
    pub fn new(memory_bytes: u64) -> ScoreRanking {
        ScoreRanking {
            budget_rows: memory_bytes / AUC_BYTES_PER_ROW,
            exact: Vec::new(),
            histogram: None,
        }
    }

    /// Adds a row of score `z` (a margin; any increasing function of the probability
    /// does), label `y` and weight `w`. Rows of weight 0 (or a NaN score) change nothing.
    pub fn push(&mut self, z: f64, y: bool, w: f64) {
        if w <= 0.0 || z.is_nan() {
            return;
        }
        if let Some(h) = &mut self.histogram {
            h.push(z, y, w);
            return;
        }
        if (self.exact.len() as u64) < self.budget_rows {
            self.exact.push((z, if y { w } else { -w }));
            return;
        }
        // Over the budget: move the kept scores into a histogram and free them.
        let kept = std::mem::take(&mut self.exact);
        let (lo, hi) = kept
            .iter()
            .fold((z, z), |(lo, hi), (s, _)| (lo.min(*s), hi.max(*s)));
        let mut h = Histogram::new(lo, hi);
        for (s, sw) in kept {
            h.push(s, sw > 0.0, sw.abs());
        }
        h.push(z, y, w);
        self.histogram = Some(h);
    }

    /// True once the scores have moved into the histogram.
    pub fn is_histogram(&self) -> bool {
        self.histogram.is_some()
    }

    /// The ROC curve: `(false-positive rate, true-positive rate)` at every threshold,
    /// from `(0, 0)` (nothing called positive) to `(1, 1)`, weighted. In exact mode one
    /// point per distinct score (tied scores move together, as in scikit-learn's
    /// `roc_curve(drop_intermediate=False)`); in histogram mode one point per non-empty
    /// bin. Empty when either class is missing.
    pub fn roc(&self) -> Vec<(f64, f64)> {
        // (positive weight, negative weight) per threshold group, highest score first.
        let groups: Vec<(f64, f64)> = match &self.histogram {
            Some(h) => h
                .pos
                .iter()
                .zip(&h.neg)
                .rev()
                .filter(|(p, n)| **p > 0.0 || **n > 0.0)
                .map(|(p, n)| (*p, *n))
                .collect(),
            None => {
                let mut rows = self.exact.clone();
                rows.sort_unstable_by(|a, b| b.0.total_cmp(&a.0));
                let mut out = Vec::new();
                let mut i = 0;
                while i < rows.len() {
                    let (mut p, mut n) = (Sum::default(), Sum::default());
                    let mut j = i;
                    while j < rows.len() && rows[j].0 == rows[i].0 {
                        if rows[j].1 > 0.0 {
                            p.add(rows[j].1);
                        } else {
                            n.add(-rows[j].1);
                        }
                        j += 1;
                    }
                    out.push((p.value(), n.value()));
                    i = j;
                }
                out
            }
        };
        let (mut pos_total, mut neg_total) = (Sum::default(), Sum::default());
        for (p, n) in &groups {
            pos_total.add(*p);
            neg_total.add(*n);
        }
        let (pt, nt) = (pos_total.value(), neg_total.value());
        if pt <= 0.0 || nt <= 0.0 {
            return Vec::new();
        }
        let mut points = Vec::with_capacity(groups.len() + 1);
        points.push((0.0, 0.0));
        let (mut tp, mut fp) = (Sum::default(), Sum::default());
        for (p, n) in groups {
            tp.add(p);
            fp.add(n);
            points.push((fp.value() / nt, tp.value() / pt));
        }
        points
    }

    /// The AUC and the calibration table.
    pub fn finish(self) -> (Auc, Vec<CalibrationRow>) {
        match self.histogram {
            Some(h) => h.finish(),
            None => finish_exact(self.exact),
        }
    }
}

/// Accumulates one calibration decile.
#[derive(Debug, Clone)]
struct DecileAcc {
    rows: u64,
    weight: Sum,
    predicted: Sum,
    positives: Sum,
    min: f64,
    max: f64,
}

impl Default for DecileAcc {
    fn default() -> Self {
        DecileAcc {
            rows: 0,
            weight: Sum::default(),
            predicted: Sum::default(),
            positives: Sum::default(),
            min: f64::INFINITY,
            max: f64::NEG_INFINITY,
        }
    }
}

/// The decile that holds the middle of a group whose weight starts at `before`.
fn decile_of(before: f64, group: f64, total: f64) -> usize {
    let mid = (before + 0.5 * group) / total;
    ((mid * DECILES as f64) as usize).min(DECILES - 1)
}

fn calibration_rows(acc: Vec<DecileAcc>) -> Vec<CalibrationRow> {
    acc.into_iter()
        .enumerate()
        .filter(|(_, d)| d.rows > 0 && d.weight.value() > 0.0)
        .map(|(i, d)| {
            let w = d.weight.value();
            CalibrationRow {
                decile: i + 1,
                rows: d.rows,
                weight: w,
                mean_predicted: d.predicted.value() / w,
                observed_rate: d.positives.value() / w,
                min_predicted: d.min,
                max_predicted: d.max,
            }
        })
        .collect()
}

fn auc_from(numerator: f64, ties: f64, pos: f64, neg: f64, method: AucMethod) -> Auc {
    if pos <= 0.0 || neg <= 0.0 {
        return Auc {
            value: None,
            method,
            error_bound: 0.0,
            low: None,
            high: None,
        };
    }
    let pairs = pos * neg;
    let value = numerator / pairs;
    let half = 0.5 * ties / pairs;
    Auc {
        value: Some(value),
        method,
        error_bound: half,
        low: Some((value - half).max(0.0)),
        high: Some((value + half).min(1.0)),
    }
}

/// Exact AUC (tied scores count one half) and calibration table from every score.
fn finish_exact(mut rows: Vec<(f64, f64)>) -> (Auc, Vec<CalibrationRow>) {
    rows.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
    let mut total = Sum::default();
    let mut pos_total = Sum::default();
    for (_, sw) in &rows {
        total.add(sw.abs());
        if *sw > 0.0 {
            pos_total.add(*sw);
        }
    }
    let total = total.value();
    let mut numerator = Sum::default();
    let mut neg_below = Sum::default();
    let mut before = Sum::default();
    let mut deciles = vec![DecileAcc::default(); DECILES];
    let mut i = 0;
    while i < rows.len() {
        let s = rows[i].0;
        let mut j = i;
        let mut pos = Sum::default();
        let mut neg = Sum::default();
        while j < rows.len() && rows[j].0 == s {
            let sw = rows[j].1;
            if sw > 0.0 {
                pos.add(sw);
            } else {
                neg.add(-sw);
            }
            j += 1;
        }
        let (pos, neg) = (pos.value(), neg.value());
        numerator.add(pos * neg_below.value());
        numerator.add(0.5 * pos * neg);
        neg_below.add(neg);
        let group = pos + neg;
        let d = &mut deciles[decile_of(before.value(), group, total)];
        let p = sigmoid(s);
        d.rows += (j - i) as u64;
        d.weight.add(group);
        d.predicted.add(group * p);
        d.positives.add(pos);
        d.min = d.min.min(p);
        d.max = d.max.max(p);
        before.add(group);
        i = j;
    }
    let neg_total = neg_below.value();
    let auc = auc_from(
        numerator.value(),
        0.0,
        pos_total.value(),
        neg_total,
        AucMethod::Exact,
    );
    (auc, calibration_rows(deciles))
}

/// A histogram of scores over `[m·width, (m + BINS)·width)` with `width` a power of two,
/// so that bin edges are exact and doubling the width merges whole bins.
#[derive(Debug, Clone)]
struct Histogram {
    /// Origin in units of `width`.
    m: i64,
    width: f64,
    pos: Vec<f64>,
    neg: Vec<f64>,
    /// Weighted sum of predicted probabilities.
    predicted: Vec<f64>,
    rows: Vec<u64>,
    /// Smallest and largest score in each bin: a bin of one distinct score holds exact
    /// ties, whose half credit is certain.
    min: Vec<f64>,
    max: Vec<f64>,
}

impl Histogram {
    /// A histogram whose range covers `[lo, hi]` (it grows as needed later).
    fn new(lo: f64, hi: f64) -> Histogram {
        let lo = lo.clamp(-SCORE_LIMIT, SCORE_LIMIT);
        let hi = hi.clamp(-SCORE_LIMIT, SCORE_LIMIT);
        // Keep the origin within 2^52 widths of zero so that every edge is exact.
        let magnitude = lo.abs().max(hi.abs());
        let span = (hi - lo)
            .max(magnitude * 2f64.powi(-36))
            .max(2f64.powi(-1000));
        let mut width = 2f64.powi((span / HISTOGRAM_BINS as f64).log2().ceil() as i32);
        while width * (HISTOGRAM_BINS as f64) < span {
            width *= 2.0;
        }
        let m = (lo / width).floor() as i64;
        let b = HISTOGRAM_BINS;
        Histogram {
            m,
            width,
            pos: vec![0.0; b],
            neg: vec![0.0; b],
            predicted: vec![0.0; b],
            rows: vec![0; b],
            min: vec![f64::INFINITY; b],
            max: vec![f64::NEG_INFINITY; b],
        }
    }

    fn lower(&self) -> f64 {
        self.m as f64 * self.width
    }

    fn upper(&self) -> f64 {
        (self.m + HISTOGRAM_BINS as i64) as f64 * self.width
    }

    /// Doubles the width, keeping the origin aligned to it; `left` extends the range
    /// below, otherwise above. Whole old bins fall into new ones.
    fn grow(&mut self, left: bool) {
        let b = HISTOGRAM_BINS as i64;
        let new_m = if left {
            self.m.div_euclid(2) + self.m.rem_euclid(2) - b / 2
        } else {
            self.m.div_euclid(2)
        };
        let mut pos = vec![0.0; HISTOGRAM_BINS];
        let mut neg = vec![0.0; HISTOGRAM_BINS];
        let mut predicted = vec![0.0; HISTOGRAM_BINS];
        let mut rows = vec![0u64; HISTOGRAM_BINS];
        let mut min = vec![f64::INFINITY; HISTOGRAM_BINS];
        let mut max = vec![f64::NEG_INFINITY; HISTOGRAM_BINS];
        for j in 0..HISTOGRAM_BINS {
            if self.rows[j] == 0 {
                continue;
            }
            let k = ((self.m + j as i64).div_euclid(2) - new_m) as usize;
            pos[k] += self.pos[j];
            neg[k] += self.neg[j];
            predicted[k] += self.predicted[j];
            rows[k] += self.rows[j];
            min[k] = min[k].min(self.min[j]);
            max[k] = max[k].max(self.max[j]);
        }
        self.m = new_m;
        self.width *= 2.0;
        self.pos = pos;
        self.neg = neg;
        self.predicted = predicted;
        self.rows = rows;
        self.min = min;
        self.max = max;
    }

    fn push(&mut self, z: f64, y: bool, w: f64) {
        let s = z.clamp(-SCORE_LIMIT, SCORE_LIMIT);
        while s < self.lower() {
            self.grow(true);
        }
        while s >= self.upper() {
            self.grow(false);
        }
        // Division by a power of two is exact, so the floor is the true bin.
        let k = (((s / self.width).floor() as i64) - self.m).clamp(0, HISTOGRAM_BINS as i64 - 1)
            as usize;
        if y {
            self.pos[k] += w;
        } else {
            self.neg[k] += w;
        }
        let p = sigmoid(z);
        self.predicted[k] += w * p;
        self.rows[k] += 1;
        self.min[k] = self.min[k].min(z);
        self.max[k] = self.max[k].max(z);
    }

    fn finish(self) -> (Auc, Vec<CalibrationRow>) {
        let mut pos_total = Sum::default();
        let mut total = Sum::default();
        for k in 0..HISTOGRAM_BINS {
            pos_total.add(self.pos[k]);
            total.add(self.pos[k] + self.neg[k]);
        }
        let total = total.value();
        let mut numerator = Sum::default();
        let mut ties = Sum::default();
        let mut neg_below = Sum::default();
        let mut before = Sum::default();
        let mut deciles = vec![DecileAcc::default(); DECILES];
        for k in 0..HISTOGRAM_BINS {
            if self.rows[k] == 0 {
                continue;
            }
            let (pos, neg) = (self.pos[k], self.neg[k]);
            numerator.add(pos * neg_below.value());
            numerator.add(0.5 * pos * neg);
            if self.min[k] < self.max[k] {
                ties.add(pos * neg);
            }
            neg_below.add(neg);
            let group = pos + neg;
            let d = &mut deciles[decile_of(before.value(), group, total)];
            d.rows += self.rows[k];
            d.weight.add(group);
            d.predicted.add(self.predicted[k]);
            d.positives.add(pos);
            d.min = d.min.min(sigmoid(self.min[k]));
            d.max = d.max.max(sigmoid(self.max[k]));
            before.add(group);
        }
        let auc = auc_from(
            numerator.value(),
            ties.value(),
            pos_total.value(),
            neg_below.value(),
            AucMethod::Histogram {
                bins: HISTOGRAM_BINS,
            },
        );
        (auc, calibration_rows(deciles))
    }
}

// ---------------------------------------------------------------------------------------
// Softmax
// ---------------------------------------------------------------------------------------

/// Log-loss, accuracy and confusion matrix of a multinomial model.
#[derive(Debug, Clone)]
pub struct SoftmaxMetrics {
    classes: usize,
    rows: u64,
    weight: Sum,
    log_loss: Sum,
    correct: Sum,
    /// `confusion[true * K + predicted]`, weighted.
    confusion: Vec<f64>,
    probabilities: Vec<f64>,
}

/// Finished multinomial measures.
#[derive(Debug, Clone, PartialEq)]
pub struct SoftmaxReport {
    /// Rows seen.
    pub rows: u64,
    /// Sum of the weights.
    pub weight: f64,
    /// Mean of `−log p_y`.
    pub log_loss: f64,
    /// Share of rows whose most probable class is the true one.
    pub accuracy: f64,
    /// Weight of rows by true class (rows) and predicted class (columns).
    pub confusion: Vec<Vec<f64>>,
}

impl SoftmaxMetrics {
    /// Measures for `classes` classes.
    pub fn new(classes: usize) -> SoftmaxMetrics {
        SoftmaxMetrics {
            classes,
            rows: 0,
            weight: Sum::default(),
            log_loss: Sum::default(),
            correct: Sum::default(),
            confusion: vec![0.0; classes * classes],
            probabilities: vec![0.0; classes],
        }
    }

    /// Adds a row with the margins of every class (`margins.len()` = classes), true
    /// class `y` and weight `w`. The predicted class is the first most probable one.
    pub fn push(&mut self, margins: &[f64], y: usize, w: f64) {
        let k = self.classes;
        debug_assert!(margins.len() == k && y < k);
        self.rows += 1;
        let lse = log_sum_exp(margins);
        let mut best = 0;
        for (c, m) in margins.iter().enumerate() {
            self.probabilities[c] = (m - lse).exp();
            if self.probabilities[c] > self.probabilities[best] {
                best = c;
            }
        }
        self.weight.add(w);
        self.log_loss.add(w * (lse - margins[y]));
        if best == y {
            self.correct.add(w);
        }
        self.confusion[y * k + best] += w;
    }

    /// The measures; `None` when no row had positive weight.
    pub fn finish(&self) -> Option<SoftmaxReport> {
        let w = self.weight.value();
        if w <= 0.0 {
            return None;
        }
        let k = self.classes;
        Some(SoftmaxReport {
            rows: self.rows,
            weight: w,
            log_loss: self.log_loss.value() / w,
            accuracy: self.correct.value() / w,
            confusion: (0..k)
                .map(|t| self.confusion[t * k..(t + 1) * k].to_vec())
                .collect(),
        })
    }
}

// ---------------------------------------------------------------------------------------
// Regression and counts
// ---------------------------------------------------------------------------------------

/// RMSE, MAE and R² of a regression.
#[derive(Debug, Clone, Default)]
pub struct RegressionMetrics {
    rows: u64,
    weight: Sum,
    squared: Sum,
    absolute: Sum,
    predicted: Sum,
    target: Spread,
}

/// Finished regression measures.
#[derive(Debug, Clone, PartialEq)]
pub struct RegressionReport {
    /// Rows seen.
    pub rows: u64,
    /// Sum of the weights.
    pub weight: f64,
    /// Mean squared error.
    pub mse: f64,
    /// Root of the mean squared error.
    pub rmse: f64,
    /// Mean absolute error.
    pub mae: f64,
    /// `1 − Σw(y − ŷ)² / Σw(y − ȳ)²`; `None` when the target is constant.
    pub r2: Option<f64>,
    /// Weighted mean of the target.
    pub mean_target: f64,
    /// Weighted mean of the prediction.
    pub mean_predicted: f64,
}

impl RegressionMetrics {
    /// Adds a row of prediction `pred`, target `y` and weight `w`.
    #[inline]
    pub fn push(&mut self, pred: f64, y: f64, w: f64) {
        self.rows += 1;
        let r = y - pred;
        self.weight.add(w);
        self.squared.add(w * r * r);
        self.absolute.add(w * r.abs());
        self.predicted.add(w * pred);
        self.target.push(y, w);
    }

    /// The measures; `None` when no row had positive weight.
    pub fn finish(&self) -> Option<RegressionReport> {
        let w = self.weight.value();
        if w <= 0.0 {
            return None;
        }
        let sse = self.squared.value();
        let mse = sse / w;
        Some(RegressionReport {
            rows: self.rows,
            weight: w,
            mse,
            rmse: mse.sqrt(),
            mae: self.absolute.value() / w,
            r2: (self.target.m2 > 0.0).then(|| 1.0 - sse / self.target.m2),
            mean_target: self.target.mean,
            mean_predicted: self.predicted.value() / w,
        })
    }
}

/// Mean Poisson deviance of a count model, from margins (log of the expected count).
#[derive(Debug, Clone, Default)]
pub struct PoissonMetrics {
    rows: u64,
    weight: Sum,
    deviance: Sum,
    target: Sum,
    predicted: Sum,
}

/// Finished count measures.
#[derive(Debug, Clone, PartialEq)]
pub struct PoissonReport {
    /// Rows seen.
    pub rows: u64,
    /// Sum of the weights.
    pub weight: f64,
    /// Mean of `2 · (y · log(y / μ) − (y − μ))`, with `y log y = 0` at `y = 0`.
    pub mean_deviance: f64,
    /// Weighted mean count.
    pub mean_target: f64,
    /// Weighted mean expected count `μ`.
    pub mean_predicted: f64,
}

impl PoissonMetrics {
    /// Adds a row of margin `z` (so `μ = e^z`), count `y ≥ 0` and weight `w`.
    #[inline]
    pub fn push(&mut self, z: f64, y: f64, w: f64) {
        self.rows += 1;
        let mu = crate::objective::elementary::exp(z);
        let ylog = if y > 0.0 { y * (y.ln() - z) } else { 0.0 };
        self.weight.add(w);
        self.deviance.add(w * 2.0 * (ylog - (y - mu)));
        self.target.add(w * y);
        self.predicted.add(w * mu);
    }

    /// The measures; `None` when no row had positive weight.
    pub fn finish(&self) -> Option<PoissonReport> {
        let w = self.weight.value();
        if w <= 0.0 {
            return None;
        }
        Some(PoissonReport {
            rows: self.rows,
            weight: w,
            mean_deviance: self.deviance.value() / w,
            mean_target: self.target.value() / w,
            mean_predicted: self.predicted.value() / w,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// AUC by comparing every pair (ties one half), weighted.
    fn brute_auc(rows: &[(f64, bool, f64)]) -> f64 {
        let mut num = 0.0;
        let mut pairs = 0.0;
        for (sp, yp, wp) in rows {
            if !yp {
                continue;
            }
            for (sn, yn, wn) in rows {
                if *yn {
                    continue;
                }
                let w = wp * wn;
                pairs += w;
                if sp > sn {
                    num += w;
                } else if sp == sn {
                    num += 0.5 * w;
                }
            }
        }
        num / pairs
    }

    /// A small deterministic stream of rows with ties and weights.
    fn rows(n: usize, distinct: bool) -> Vec<(f64, bool, f64)> {
        let mut state = 12345u64;
        let mut next = || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        (0..n)
            .map(|_| {
                let u = next();
                let score = if distinct {
                    4.0 * u - 2.0
                } else {
                    (u * 7.0).floor() - 3.0
                };
                let y = next() < 0.3 + 0.1 * score.clamp(-2.0, 2.0);
                let w = (next() * 3.0).floor();
                (score, y, w)
            })
            .collect()
    }

    fn ranking(rows: &[(f64, bool, f64)], memory: u64) -> (Auc, Vec<CalibrationRow>) {
        let mut r = ScoreRanking::new(memory);
        for (s, y, w) in rows {
            r.push(*s, *y, *w);
        }
        r.finish()
    }

    #[test]
    fn exact_auc_matches_all_pairs_with_ties_and_weights() {
        for distinct in [true, false] {
            let data = rows(400, distinct);
            let (auc, _) = ranking(&data, DEFAULT_AUC_MEMORY);
            assert_eq!(auc.method, AucMethod::Exact);
            assert_eq!(auc.error_bound, 0.0);
            let want = brute_auc(&data);
            let got = auc.value.unwrap();
            assert!((got - want).abs() <= 1e-14, "{got} vs {want}");
        }
    }

    #[test]
    fn histogram_auc_lies_within_its_bound() {
        for distinct in [true, false] {
            let data = rows(3000, distinct);
            let (exact, exact_cal) = ranking(&data, DEFAULT_AUC_MEMORY);
            // All in the histogram from the start, and moved there half way.
            for memory in [0, 1500 * AUC_BYTES_PER_ROW] {
                let (h, cal) = ranking(&data, memory);
                assert_eq!(h.method.as_str(), "histogram");
                let (e, v) = (exact.value.unwrap(), h.value.unwrap());
                assert!(
                    (e - v).abs() <= h.error_bound + 1e-15,
                    "{e} {v} {}",
                    h.error_bound
                );
                assert!(h.low.unwrap() <= e && e <= h.high.unwrap());
                if distinct {
                    assert!(h.error_bound < 1e-3, "bound {}", h.error_bound);
                } else {
                    // Every tie group sits in one bin: half credit is then exact.
                    assert!((e - v).abs() <= 1e-14);
                    assert_eq!(cal.len(), exact_cal.len());
                    for (a, b) in cal.iter().zip(&exact_cal) {
                        assert_eq!((a.decile, a.rows, a.weight), (b.decile, b.rows, b.weight));
                        assert!((a.mean_predicted - b.mean_predicted).abs() < 1e-14);
                        assert_eq!(a.observed_rate, b.observed_rate);
                    }
                }
            }
        }
    }

    #[test]
    fn histogram_grows_in_both_directions_and_keeps_order() {
        let mut r = ScoreRanking::new(0);
        let data = [
            (0.0, false, 1.0),
            (0.001, true, 1.0),
            (-50.0, false, 2.0),
            (1e6, true, 1.0),
            (-1e9, false, 1.0),
            (f64::INFINITY, true, 1.0),
        ];
        for (s, y, w) in data {
            r.push(s, y, w);
        }
        assert!(r.is_histogram());
        let (auc, _) = r.finish();
        // Every positive is above every negative except the pair (0.001, 0) that may
        // share a bin at the final width.
        let v = auc.value.unwrap();
        assert!((v - 1.0).abs() <= auc.error_bound + 1e-15, "{v} {auc:?}");
    }

    #[test]
    fn one_class_leaves_the_auc_undefined() {
        let (auc, cal) = ranking(&[(0.1, true, 1.0), (0.2, true, 2.0)], 1024);
        assert_eq!(auc.value, None);
        assert_eq!(cal.iter().map(|c| c.rows).sum::<u64>(), 2);
    }

    #[test]
    fn calibration_deciles_split_the_weight() {
        let data: Vec<(f64, bool, f64)> = (0..1000)
            .map(|i| (i as f64 / 100.0 - 5.0, i % 3 == 0, 1.0))
            .collect();
        let (_, cal) = ranking(&data, DEFAULT_AUC_MEMORY);
        assert_eq!(cal.len(), 10);
        for (i, c) in cal.iter().enumerate() {
            assert_eq!(c.decile, i + 1);
            assert_eq!(c.rows, 100);
            assert!(c.min_predicted <= c.mean_predicted && c.mean_predicted <= c.max_predicted);
        }
        assert!(cal
            .windows(2)
            .all(|w| w[0].max_predicted <= w[1].min_predicted));
    }

    #[test]
    fn binary_weighted_equals_duplicated() {
        let mut a = BinaryMetrics::default();
        let mut b = BinaryMetrics::default();
        for (z, y, w) in [(0.3, true, 2.0), (-1.0, false, 1.0), (2.0, false, 3.0)] {
            a.push(z, y, w);
            for _ in 0..(w as usize) {
                b.push(z, y, 1.0);
            }
        }
        let (a, b) = (a.finish().unwrap(), b.finish().unwrap());
        assert!((a.log_loss - b.log_loss).abs() < 1e-15);
        assert!((a.brier - b.brier).abs() < 1e-15);
        assert_eq!(a.accuracy, 3.0 / 6.0);
    }

    #[test]
    fn regression_poisson_and_softmax_by_hand() {
        let mut r = RegressionMetrics::default();
        for (p, y) in [(1.0, 2.0), (2.0, 2.0), (4.0, 5.0)] {
            r.push(p, y, 1.0);
        }
        let r = r.finish().unwrap();
        assert!((r.mse - 2.0 / 3.0).abs() < 1e-15);
        assert!((r.mae - 2.0 / 3.0).abs() < 1e-15);
        // ȳ = 3, Σ(y − ȳ)² = 6.
        assert!((r.r2.unwrap() - (1.0 - 2.0 / 6.0)).abs() < 1e-15);

        let mut p = PoissonMetrics::default();
        p.push(0.0, 0.0, 1.0); // 2·(0 − (0 − 1)) = 2
        p.push(2f64.ln(), 2.0, 1.0); // 2·(2·log 1 − 0) = 0
        let p = p.finish().unwrap();
        assert!((p.mean_deviance - 1.0).abs() < 1e-15);

        let mut s = SoftmaxMetrics::new(3);
        s.push(&[0.0, 1.0, 0.0], 1, 1.0);
        s.push(&[2.0, 0.0, 0.0], 2, 2.0);
        let s = s.finish().unwrap();
        assert_eq!(
            s.confusion,
            vec![vec![0.0; 3], vec![0.0, 1.0, 0.0], vec![2.0, 0.0, 0.0]]
        );
        assert!((s.accuracy - 1.0 / 3.0).abs() < 1e-15);
    }

    #[test]
    fn compensated_sum_keeps_small_terms() {
        let mut s = Sum::default();
        s.add(1e16);
        for _ in 0..1000 {
            s.add(1.0);
        }
        s.add(-1e16);
        assert_eq!(s.value(), 1000.0);
    }
}
