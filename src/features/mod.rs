//! The feature spec: which columns are features, target and weight; the statistics pass;
//! standardization; the missing-value policy; and turning record batches into
//! [`Block`]s that the kernels read.
//!
//! A [`Design`] is fixed once the statistics pass has run: it knows every feature's
//! centre and scale and the target's classes, and it turns any batch of the same data
//! into the same block, on every pass.

pub mod hashing;
pub mod heavy_hitters;
pub mod sparse;
pub mod stats;
pub mod values;

use std::collections::{BTreeSet, HashMap};

use arrow::array::{Array, Float64Array};
use serde::{Deserialize, Serialize};

use crate::holdout::RowSplit;
use crate::objective::Loss;
use crate::pass::{self, PassPlan};
use crate::source::{BatchAt, ColumnClass, Source};
use crate::{Error, Result};
use hashing::{SparseDesign, SparseRequest};
use heavy_hitters::Sketch;
use sparse::SparseRows;
use stats::{Comoments, Moments};
use values::Place;

/// What to do with a null feature value.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum MissingPolicy {
    /// Refuse the data, naming the column, the count and the first row.
    Error,
    /// Put the training mean in its place and add an indicator feature.
    Mean,
}

impl MissingPolicy {
    /// Parses `error` or `mean`.
    pub fn parse(name: &str) -> Result<MissingPolicy> {
        match name {
            "error" => Ok(MissingPolicy::Error),
            "mean" => Ok(MissingPolicy::Mean),
            other => Err(Error::usage(format!(
                "unknown missing-value policy '{other}'; choose error or mean"
            ))),
        }
    }
}

/// What the user asked for: columns and how to treat them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FeatureRequest {
    /// Target column.
    pub target: String,
    /// Weight column (frequency weights), if any.
    pub weight: Option<String>,
    /// Feature columns; `None` means every numeric or boolean column but target and weight.
    pub features: Option<Vec<String>>,
    /// Loss family (decides how the target is read).
    pub loss: Loss,
    /// Null feature values.
    pub missing: MissingPolicy,
    /// Skip rows whose target is null (counted) instead of refusing them.
    pub skip_missing_target: bool,
    /// Centre and scale numeric features by their weighted mean and standard deviation.
    pub standardize: bool,
    /// Hashed categoricals, crosses and sparse vector columns (none: dense only).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub sparse: Option<SparseRequest>,
}

/// Suffix of the name of a missing-value indicator feature.
pub const MISSING_SUFFIX: &str = ".missing";

/// One column of the design matrix.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Feature {
    /// Name in the model (the column name, or `column.missing` for an indicator).
    pub name: String,
    /// Source column.
    pub column: String,
    /// True for a missing-value indicator (1 where the column is null).
    pub indicator: bool,
    /// Weighted mean of the feature over the training rows.
    pub mean: f64,
    /// Weighted population standard deviation.
    pub std: f64,
    /// Value put in place of a null (the training mean of the non-null values).
    pub impute: f64,
    /// Subtracted before use (the mean when standardizing, else 0).
    pub center: f64,
    /// Divided by before use (the standard deviation when standardizing, else 1).
    pub scale: f64,
}

/// What the statistics pass saw.
#[derive(Debug, Clone, PartialEq)]
pub struct Summary {
    /// Rows read.
    pub rows: u64,
    /// Rows skipped because the target was null.
    pub skipped_target: u64,
    /// Rows used whose weight is positive.
    pub rows_weighted: u64,
    /// Sum of the weights of the rows used.
    pub weight_sum: f64,
    /// Moments of each candidate feature column, in the order of the request.
    pub columns: Vec<(String, Moments)>,
    /// Most frequent values of each hashed feature (training rows), in the order of
    /// [`SparseDesign::hashed`].
    pub frequent: Vec<Sketch>,
    /// Moments of the target (numeric targets).
    pub target: Moments,
    /// Distinct class labels (softmax), in order.
    pub classes: Vec<String>,
    /// Weighted count per class (softmax) or of positives (logistic, one entry).
    pub class_weights: Vec<f64>,
    /// Rows held out of the training (with a target; not in any statistic above but
    /// `rows`).
    pub held_out_rows: u64,
    /// Sum of the weights of the held-out rows.
    pub held_out_weight: f64,
    /// Sums of each candidate feature column against the target (numeric targets of the
    /// one-output losses; empty for softmax), in the order of `columns`: the gradient at
    /// the starting point comes from them (see [`crate::objective::start`]).
    pub target_columns: Vec<Comoments>,
    /// Moments of the target over the held-out rows (numeric targets).
    pub held_out_target: Moments,
}

/// The fixed transformation from record batches to blocks.
#[derive(Debug, Clone, PartialEq)]
pub struct Design {
    /// Target column.
    pub target: String,
    /// Weight column.
    pub weight: Option<String>,
    /// Loss family.
    pub loss: Loss,
    /// Class labels (softmax), in class-index order.
    pub classes: Vec<String>,
    /// The features, in coefficient order.
    pub features: Vec<Feature>,
    /// Null feature values.
    pub missing: MissingPolicy,
    /// Skip rows with a null target.
    pub skip_missing_target: bool,
    /// Whether features were standardized.
    pub standardize: bool,
    class_index: HashMap<String, usize>,
    /// Distinct source columns of the features, in order.
    feature_columns: Vec<String>,
    /// The holdout split, when rows are held out of the training.
    holdout: Option<RowSplit>,
    /// With a split: leave held-out rows out of blocks (true) instead of marking them.
    drop_held_out: bool,
    /// Hashed and sparse vector features (their coordinates follow the dense ones).
    pub sparse: Option<SparseDesign>,
    /// `--precision f32`: feature values are rounded to `f32` as they are read.
    round_f32: bool,
}

/// A block of rows ready for the kernels: features column by column, labels, weights.
#[derive(Debug, Clone, Default)]
pub struct Block {
    /// Rows in the block.
    pub rows: usize,
    /// Feature values, column-major: feature `j` at `x[j * rows .. (j + 1) * rows]`,
    /// already centred and scaled.
    pub x: Vec<f64>,
    /// Labels: 0/1, the value, the count, or the class index as `f64`.
    pub y: Vec<f64>,
    /// Weights (empty when there is no weight column: every weight is 1).
    pub w: Vec<f64>,
    /// File of the block.
    pub file: usize,
    /// Row number within the file of the block's first row.
    pub first_row: u64,
    /// Held-out rows (`true`), when the design has a holdout split and some rows of the
    /// block are held out; empty otherwise (every row is a training row).
    pub holdout: Vec<bool>,
    /// Sparse entries (hashed values, sparse vectors) of each row; empty without them.
    pub sparse: SparseRows,
}

impl Block {
    /// Feature `j` of every row.
    #[inline]
    pub fn column(&self, j: usize) -> &[f64] {
        &self.x[j * self.rows..(j + 1) * self.rows]
    }

    /// Weight of row `i`.
    #[inline]
    pub fn weight(&self, i: usize) -> f64 {
        if self.w.is_empty() {
            1.0
        } else {
            self.w[i]
        }
    }

    /// True when row `i` is held out of the training.
    #[inline]
    pub fn is_held_out(&self, i: usize) -> bool {
        !self.holdout.is_empty() && self.holdout[i]
    }
}

/// Chooses the feature columns and checks every column's presence and type in every
/// file. Returns the candidate feature column names.
pub fn resolve_columns(source: &Source, request: &FeatureRequest) -> Result<Vec<String>> {
    let mut needed: Vec<&str> = vec![request.target.as_str()];
    if let Some(w) = &request.weight {
        if w == &request.target {
            return Err(Error::usage(format!(
                "the weight column '{w}' is also the target; name another column with --weight"
            )));
        }
        needed.push(w);
    }
    let sparse = request.sparse.as_ref().map(SparseDesign::new).transpose()?;
    let sparse_columns = sparse
        .as_ref()
        .map(SparseDesign::columns)
        .unwrap_or_default();
    for c in &sparse_columns {
        if c == &request.target || Some(c) == request.weight.as_ref() {
            return Err(Error::usage(format!(
                "'{c}' is the target or the weight column and cannot also be a categorical feature"
            )));
        }
    }
    let features: Vec<String> = match &request.features {
        Some(list) => {
            let mut seen = BTreeSet::new();
            for name in list {
                if !seen.insert(name.as_str()) {
                    return Err(Error::usage(format!(
                        "the feature '{name}' is listed twice in --features (or features in the settings file); name it once"
                    )));
                }
                if name == &request.target || Some(name) == request.weight.as_ref() {
                    return Err(Error::usage(format!(
                        "'{name}' is the target or the weight column and cannot also be a feature; leave it out of --features"
                    )));
                }
            }
            list.clone()
        }
        None => source
            .schema()
            .fields()
            .iter()
            .filter(|f| {
                f.name() != &request.target
                    && Some(f.name()) != request.weight.as_ref()
                    && !sparse_columns.contains(f.name())
                    && matches!(
                        ColumnClass::of(f.data_type()),
                        ColumnClass::Numeric | ColumnClass::Bool
                    )
            })
            .map(|f| f.name().clone())
            .collect(),
    };
    if features.is_empty() && sparse.is_none() {
        return Err(Error::usage(format!(
            "{} has no numeric feature columns besides the target; name features with --features",
            source.files()[0].path.display()
        )));
    }
    needed.extend(features.iter().map(String::as_str));
    source.require_columns(&needed)?;
    if let Some(s) = &sparse {
        s.check_columns(source)?;
    }
    let first = &source.files()[0];
    for name in &features {
        let class = source
            .column_type(name)
            .map(ColumnClass::of)
            .unwrap_or(ColumnClass::Other);
        if !matches!(class, ColumnClass::Numeric | ColumnClass::Bool) {
            return Err(Error::usage(format!(
                "the feature '{name}' of {} is a {} column; features must be numeric or boolean",
                first.path.display(),
                class.describe()
            )));
        }
    }
    if let Some(w) = &request.weight {
        let class = source.column_type(w).map(ColumnClass::of);
        if class != Some(ColumnClass::Numeric) {
            return Err(Error::usage(format!(
                "the weight column '{w}' of {} is not numeric",
                first.path.display()
            )));
        }
    }
    let target_class = source
        .column_type(&request.target)
        .map(ColumnClass::of)
        .unwrap_or(ColumnClass::Other);
    let ok = match request.loss {
        Loss::Logistic => matches!(target_class, ColumnClass::Numeric | ColumnClass::Bool),
        Loss::Squared | Loss::Poisson => target_class == ColumnClass::Numeric,
        Loss::Softmax => matches!(target_class, ColumnClass::Numeric | ColumnClass::Text),
    };
    if !ok {
        return Err(Error::usage(format!(
            "the target '{}' of {} is a {} column, which the {} loss cannot use; {}",
            request.target,
            first.path.display(),
            target_class.describe(),
            request.loss.as_str(),
            if target_class == ColumnClass::Text {
                "for classes named by text use --loss softmax, or recode the column"
            } else {
                "choose another --loss or another --target"
            }
        )));
    }
    Ok(features)
}

/// The target of one block as read: values (or class labels) and nulls.
enum TargetValues {
    Numbers(Float64Array),
    Labels(Vec<Option<String>>),
}

fn read_target(
    request_loss: Loss,
    target: &str,
    at: &BatchAt,
    place: Place<'_>,
) -> Result<TargetValues> {
    let array = at
        .batch
        .column_by_name(target)
        .ok_or_else(|| Error::internal(format!("column '{target}' was not decoded")))?;
    let is_text = matches!(ColumnClass::of(array.data_type()), ColumnClass::Text);
    if request_loss == Loss::Softmax && is_text {
        return Ok(TargetValues::Labels(values::as_strings(
            array, target, place,
        )?));
    }
    let numbers = values::as_f64(array, target, place)?;
    values::check_finite(&numbers, target, place)?;
    for (i, v) in numbers.values().iter().enumerate() {
        if numbers.is_null(i) {
            continue;
        }
        let bad = match request_loss {
            Loss::Logistic => *v != 0.0 && *v != 1.0,
            Loss::Poisson => *v < 0.0,
            Loss::Softmax => v.fract() != 0.0,
            Loss::Squared => false,
        };
        if bad {
            let need = match request_loss {
                Loss::Logistic => "logistic targets must be 0 or 1 (or booleans)",
                Loss::Poisson => "poisson targets must be non-negative counts",
                _ => "softmax targets must be whole numbers or strings naming the classes",
            };
            return Err(Error::data(format!(
                "the target '{target}' is {v} at {}; {need}",
                place.row(i)
            )));
        }
    }
    Ok(TargetValues::Numbers(numbers))
}

fn read_weights(weight: &str, at: &BatchAt, place: Place<'_>) -> Result<Float64Array> {
    let array = at
        .batch
        .column_by_name(weight)
        .ok_or_else(|| Error::internal(format!("column '{weight}' was not decoded")))?;
    let w = values::as_f64(array, weight, place)?;
    values::check_finite(&w, weight, place)?;
    for (i, v) in w.values().iter().enumerate() {
        if w.is_null(i) {
            return Err(Error::data(format!(
                "the weight column '{weight}' is null at {}; every row needs a weight",
                place.row(i)
            )));
        }
        if *v < 0.0 {
            return Err(Error::data(format!(
                "the weight column '{weight}' is negative ({v}) at {}; weights must be zero or more",
                place.row(i)
            )));
        }
    }
    Ok(w)
}

/// Class label of a numeric softmax target value.
fn numeric_label(v: f64) -> String {
    format!("{}", v as i64)
}

/// Per-shard accumulator of the statistics pass.
#[derive(Clone)]
struct StatsAcc {
    rows: u64,
    skipped: u64,
    rows_weighted: u64,
    weight_sum: f64,
    columns: Vec<Moments>,
    target: Moments,
    labels: BTreeSet<String>,
    numeric_labels: BTreeSet<i64>,
    class_weights: HashMap<String, f64>,
    positives: f64,
    first_null: Vec<Option<String>>,
    held_out_rows: u64,
    held_out_weight: f64,
    /// Nulls of each feature in held-out rows (refused like training nulls under
    /// `--missing error`, since later passes read them).
    held_out_nulls: Vec<u64>,
    /// Softmax class labels seen in held-out rows.
    held_out_labels: BTreeSet<String>,
    /// Most frequent values of each hashed feature.
    sketches: Vec<Sketch>,
    /// Feature columns against the target (one-output losses).
    comoments: Vec<Comoments>,
    held_out_target: Moments,
}

/// The statistics pass: reads target, weight and every candidate feature once, checks
/// every value, and returns the moments of each column.
pub fn collect_stats(
    source: &Source,
    plan: &PassPlan,
    request: &FeatureRequest,
    features: &[String],
) -> Result<Summary> {
    collect_stats_split(source, plan, request, features, None)
}

/// As [`collect_stats`], with the rows that `split` holds out left out of every
/// statistic (they are counted in `held_out_rows` and `held_out_weight`; their values
/// are still checked).
pub fn collect_stats_split(
    source: &Source,
    plan: &PassPlan,
    request: &FeatureRequest,
    features: &[String],
    split: Option<&RowSplit>,
) -> Result<Summary> {
    let mut columns: Vec<&str> = vec![request.target.as_str()];
    if let Some(w) = &request.weight {
        columns.push(w);
    }
    columns.extend(features.iter().map(String::as_str));
    if let Some(key) = split.and_then(RowSplit::key) {
        if !columns.contains(&key) {
            columns.push(key);
        }
    }
    let sparse = request.sparse.as_ref().map(SparseDesign::new).transpose()?;
    let sparse_columns = sparse
        .as_ref()
        .map(SparseDesign::columns)
        .unwrap_or_default();
    for c in &sparse_columns {
        if !columns.contains(&c.as_str()) {
            columns.push(c);
        }
    }
    let hashed_count = sparse.as_ref().map_or(0, |s| s.hashed.len());
    let shards = pass::run(
        source,
        plan,
        &columns,
        || StatsAcc {
            rows: 0,
            skipped: 0,
            rows_weighted: 0,
            weight_sum: 0.0,
            columns: vec![Moments::default(); features.len()],
            target: Moments::default(),
            labels: BTreeSet::new(),
            numeric_labels: BTreeSet::new(),
            class_weights: HashMap::new(),
            positives: 0.0,
            first_null: vec![None; features.len()],
            held_out_rows: 0,
            held_out_weight: 0.0,
            held_out_nulls: vec![0; features.len()],
            held_out_labels: BTreeSet::new(),
            sketches: vec![Sketch::new(heavy_hitters::DEFAULT_COUNTERS); hashed_count],
            comoments: vec![Comoments::default(); features.len()],
            held_out_target: Moments::default(),
        },
        |acc, at| stats_block(acc, source, request, features, split, sparse.as_ref(), &at),
    )?;
    let mut total = Summary {
        rows: 0,
        skipped_target: 0,
        rows_weighted: 0,
        weight_sum: 0.0,
        columns: features
            .iter()
            .map(|f| (f.clone(), Moments::default()))
            .collect(),
        target: Moments::default(),
        classes: Vec::new(),
        class_weights: Vec::new(),
        held_out_rows: 0,
        held_out_weight: 0.0,
        frequent: vec![Sketch::new(heavy_hitters::DEFAULT_COUNTERS); hashed_count],
        target_columns: if request.loss == Loss::Softmax {
            Vec::new()
        } else {
            vec![Comoments::default(); features.len()]
        },
        held_out_target: Moments::default(),
    };
    let mut held_out_nulls = vec![0u64; features.len()];
    let mut held_out_labels = BTreeSet::new();
    let mut labels = BTreeSet::new();
    let mut numeric_labels = BTreeSet::new();
    let mut class_weights: HashMap<String, f64> = HashMap::new();
    let mut positives = 0.0;
    let mut first_null: Vec<Option<String>> = vec![None; features.len()];
    for shard in shards {
        total.rows += shard.rows;
        total.skipped_target += shard.skipped;
        total.rows_weighted += shard.rows_weighted;
        total.weight_sum += shard.weight_sum;
        for (j, m) in shard.columns.iter().enumerate() {
            total.columns[j].1.merge(m);
            if first_null[j].is_none() {
                first_null[j] = shard.first_null[j].clone();
            }
        }
        total.target.merge(&shard.target);
        total.held_out_target.merge(&shard.held_out_target);
        for (t, c) in total.target_columns.iter_mut().zip(&shard.comoments) {
            t.merge(c);
        }
        labels.extend(shard.labels);
        numeric_labels.extend(shard.numeric_labels);
        for (k, v) in shard.class_weights {
            *class_weights.entry(k).or_insert(0.0) += v;
        }
        positives += shard.positives;
        total.held_out_rows += shard.held_out_rows;
        total.held_out_weight += shard.held_out_weight;
        for (t, n) in held_out_nulls.iter_mut().zip(&shard.held_out_nulls) {
            *t += n;
        }
        held_out_labels.extend(shard.held_out_labels);
        for (t, s) in total.frequent.iter_mut().zip(&shard.sketches) {
            t.merge(s);
        }
    }
    if request.missing == MissingPolicy::Error {
        for (j, (name, m)) in total.columns.iter().enumerate() {
            if m.nulls + held_out_nulls[j] > 0 {
                return Err(Error::data(format!(
                    "the feature '{name}' has {} null value(s), the first at {}; \
                     fill them, drop the column, or use --missing mean",
                    m.nulls + held_out_nulls[j],
                    first_null[j].as_deref().unwrap_or("an unknown row")
                )));
            }
        }
    }
    if request.loss == Loss::Softmax {
        if !labels.is_empty() && !numeric_labels.is_empty() {
            return Err(Error::data(format!(
                "the target '{}' holds strings in some files and numbers in others",
                request.target
            )));
        }
        total.classes = if labels.is_empty() {
            numeric_labels.iter().map(|v| v.to_string()).collect()
        } else {
            labels.into_iter().collect()
        };
        total.class_weights = total
            .classes
            .iter()
            .map(|c| class_weights.get(c).copied().unwrap_or(0.0))
            .collect();
        if let Some(c) = held_out_labels.iter().find(|c| !total.classes.contains(c)) {
            return Err(Error::data(format!(
                "the class '{c}' of the target '{}' occurs only in held-out rows, so the model \
                 cannot learn it; hold out fewer rows with --holdout, or split by another --split-key",
                request.target
            )));
        }
    } else if request.loss == Loss::Logistic {
        total.class_weights = vec![positives];
    }
    Ok(total)
}

fn stats_block(
    acc: &mut StatsAcc,
    source: &Source,
    request: &FeatureRequest,
    features: &[String],
    split: Option<&RowSplit>,
    sparse: Option<&SparseDesign>,
    at: &BatchAt,
) -> Result<()> {
    let place = Place {
        file: &source.files()[at.file],
        first_row: at.first_row,
    };
    let n = at.batch.num_rows();
    let target = read_target(request.loss, &request.target, at, place)?;
    let weights = match &request.weight {
        Some(w) => Some(read_weights(w, at, place)?),
        None => None,
    };
    // Which rows are used: target present.
    let mut used = vec![true; n];
    for (i, keep) in used.iter_mut().enumerate() {
        let null = match &target {
            TargetValues::Numbers(v) => v.is_null(i),
            TargetValues::Labels(v) => v[i].is_none(),
        };
        if null {
            if !request.skip_missing_target {
                return Err(Error::data(format!(
                    "the target '{}' is null at {}; fill it, or pass --skip-missing-target to skip such rows",
                    request.target,
                    place.row(i)
                )));
            }
            *keep = false;
        }
    }
    let weight_of = |i: usize| weights.as_ref().map_or(1.0, |w| w.value(i));
    // Held-out rows with a target (rows without one are skipped either way).
    let mut held = match split {
        Some(s) => s.mask(source, at)?,
        None => Vec::new(),
    };
    for i in 0..n {
        acc.rows += 1;
        if !used[i] {
            acc.skipped += 1;
            if !held.is_empty() {
                held[i] = false;
            }
            continue;
        }
        if !held.is_empty() && held[i] {
            // Left out of every statistic; only counted (and its class noted).
            used[i] = false;
            acc.held_out_rows += 1;
            acc.held_out_weight += weight_of(i);
            if let TargetValues::Numbers(v) = &target {
                acc.held_out_target.push(v.value(i), weight_of(i));
            }
            if request.loss == Loss::Softmax {
                let label = match &target {
                    TargetValues::Numbers(v) => Some(numeric_label(v.value(i))),
                    TargetValues::Labels(v) => v[i].clone(),
                };
                if let Some(label) = label {
                    acc.held_out_labels.insert(label);
                }
            }
            continue;
        }
        let w = weight_of(i);
        if w > 0.0 {
            acc.rows_weighted += 1;
        }
        acc.weight_sum += w;
        match &target {
            TargetValues::Numbers(v) => {
                let y = v.value(i);
                acc.target.push(y, w);
                match request.loss {
                    Loss::Softmax => {
                        acc.numeric_labels.insert(y as i64);
                        *acc.class_weights.entry(numeric_label(y)).or_insert(0.0) += w;
                    }
                    Loss::Logistic => acc.positives += w * y,
                    _ => {}
                }
            }
            TargetValues::Labels(v) => {
                if let Some(label) = &v[i] {
                    if !acc.labels.contains(label) {
                        acc.labels.insert(label.clone());
                    }
                    *acc.class_weights.entry(label.clone()).or_insert(0.0) += w;
                }
            }
        }
    }
    for (j, name) in features.iter().enumerate() {
        let array = at
            .batch
            .column_by_name(name)
            .ok_or_else(|| Error::internal(format!("column '{name}' was not decoded")))?;
        let values = values::as_f64(array, name, place)?;
        values::check_finite(&values, name, place)?;
        let m = &mut acc.columns[j];
        // The target as a number, for the sums against the target (one-output losses).
        let numbers = match &target {
            TargetValues::Numbers(v) if request.loss != Loss::Softmax => Some(v),
            _ => None,
        };
        let c = &mut acc.comoments[j];
        for i in 0..n {
            if used[i] {
                if let Some(y) = numbers {
                    if values.is_null(i) {
                        c.push_null(y.value(i), weight_of(i));
                    } else {
                        c.push(values.value(i), y.value(i), weight_of(i));
                    }
                }
            }
            if !used[i] {
                if !held.is_empty() && held[i] && values.is_null(i) {
                    acc.held_out_nulls[j] += 1;
                    if acc.first_null[j].is_none() {
                        acc.first_null[j] = Some(place.row(i));
                    }
                }
                continue;
            }
            if values.is_null(i) {
                m.push_null(weight_of(i));
                if acc.first_null[j].is_none() {
                    acc.first_null[j] = Some(place.row(i));
                }
            } else {
                m.push(values.value(i), weight_of(i));
            }
        }
    }
    if let Some(sparse) = sparse {
        for (f, sketch) in sparse.hashed.iter().zip(acc.sketches.iter_mut()) {
            sparse.for_each_value(f, &at.batch, place, |i, bytes| {
                if used[i] {
                    sketch.offer(bytes);
                }
            })?;
        }
        if !sparse.request.vectors.is_empty() {
            // Checks every entry (indices inside the declared dimension) once, here.
            let mut rows = SparseRows::default();
            sparse.build(&at.batch, place, None, &mut rows)?;
        }
    }
    Ok(())
}

impl Design {
    /// Fixes the design from the statistics pass. Returns the design and warnings for
    /// the user (dropped columns).
    pub fn new(request: &FeatureRequest, summary: &Summary) -> Result<(Design, Vec<String>)> {
        let mut warnings = Vec::new();
        if summary.rows_weighted == 0 || summary.weight_sum <= 0.0 {
            return Err(Error::data(if summary.rows == 0 {
                "the data hold no rows; there is nothing to fit".to_string()
            } else {
                "every row has weight zero or a missing target; there is nothing to fit".to_string()
            }));
        }
        match request.loss {
            Loss::Logistic => {
                let pos = summary.class_weights.first().copied().unwrap_or(0.0);
                if pos <= 0.0 || pos >= summary.weight_sum {
                    return Err(Error::data(format!(
                        "every row of the target '{}' is {}; logistic regression needs both 0s and 1s",
                        request.target,
                        if pos <= 0.0 { 0 } else { 1 }
                    )));
                }
            }
            Loss::Softmax if summary.classes.len() < 2 => {
                return Err(Error::data(format!(
                    "the target '{}' has only one class ({}); softmax needs at least two",
                    request.target,
                    summary
                        .classes
                        .first()
                        .map(String::as_str)
                        .unwrap_or("none")
                )));
            }
            _ => {}
        }
        let mut features = Vec::new();
        for (name, m) in &summary.columns {
            let std = m.std();
            if m.weight <= 0.0 {
                warnings.push(format!(
                    "the feature '{name}' has no non-null values in the rows used; it is left out"
                ));
                continue;
            }
            if std.is_nan() || std <= 1e-12 * m.mean.abs() {
                warnings.push(format!(
                    "the feature '{name}' is constant ({}) in the rows used; it is left out",
                    m.mean
                ));
                continue;
            }
            let (center, scale) = if request.standardize {
                (m.mean, std)
            } else {
                (0.0, 1.0)
            };
            features.push(Feature {
                name: name.clone(),
                column: name.clone(),
                indicator: false,
                mean: m.mean,
                std,
                impute: m.mean,
                center,
                scale,
            });
            if request.missing == MissingPolicy::Mean && m.null_weight > 0.0 {
                let total = m.weight + m.null_weight;
                let p = m.null_weight / total;
                let std = (p * (1.0 - p)).sqrt();
                let (center, scale) = if request.standardize {
                    (p, std)
                } else {
                    (0.0, 1.0)
                };
                features.push(Feature {
                    name: format!("{name}{MISSING_SUFFIX}"),
                    column: name.clone(),
                    indicator: true,
                    mean: p,
                    std,
                    impute: 0.0,
                    center,
                    scale,
                });
            }
        }
        let class_index = summary
            .classes
            .iter()
            .enumerate()
            .map(|(i, c)| (c.clone(), i))
            .collect();
        if let Some(r) = &request.sparse {
            SparseDesign::new(r)?;
        }
        Ok((
            Design::from_parts(request, summary.classes.clone(), features, class_index),
            warnings,
        ))
    }

    /// A design from its parts (as stored in a model file).
    pub fn from_parts(
        request: &FeatureRequest,
        classes: Vec<String>,
        features: Vec<Feature>,
        class_index: HashMap<String, usize>,
    ) -> Design {
        let mut feature_columns: Vec<String> = Vec::new();
        for f in &features {
            if !feature_columns.contains(&f.column) {
                feature_columns.push(f.column.clone());
            }
        }
        // Checked by `Design::new` (fits) and by the model reader (models).
        let sparse = request
            .sparse
            .as_ref()
            .and_then(|r| SparseDesign::new(r).ok());
        for c in sparse.iter().flat_map(SparseDesign::columns) {
            if !feature_columns.contains(&c) {
                feature_columns.push(c);
            }
        }
        Design {
            target: request.target.clone(),
            weight: request.weight.clone(),
            loss: request.loss,
            classes,
            features,
            missing: request.missing,
            skip_missing_target: request.skip_missing_target,
            standardize: request.standardize,
            class_index,
            feature_columns,
            holdout: None,
            drop_held_out: false,
            sparse,
            round_f32: false,
        }
    }

    /// The design reading feature values rounded to `f32` (`--precision f32`: half the
    /// memory traffic of `float64` data, chosen knowingly; sums stay `f64`).
    pub fn with_f32_values(mut self, round: bool) -> Design {
        self.round_f32 = round;
        self
    }

    /// True when feature values are rounded to `f32` as they are read.
    pub fn rounds_to_f32(&self) -> bool {
        self.round_f32
    }

    /// The design with a holdout split: blocks built with the target mark the rows that
    /// `split` holds out ([`Block::holdout`]), and the objective scores them apart.
    pub fn with_holdout(mut self, split: Option<RowSplit>) -> Design {
        self.holdout = split;
        self.drop_held_out = false;
        self
    }

    /// The design reading the training rows only: held-out rows are left out of blocks
    /// built with the target (for passes that know nothing of the holdout, such as the
    /// information matrix of `--inference`).
    pub fn training_only(&self) -> Design {
        let mut d = self.clone();
        d.drop_held_out = true;
        d
    }

    /// The holdout split, if rows are held out.
    pub fn holdout(&self) -> Option<&RowSplit> {
        self.holdout.as_ref()
    }

    /// Number of features (columns of the design matrix, intercept not counted).
    pub fn width(&self) -> usize {
        self.features.len()
    }

    /// Sparse coordinates (hash buckets and sparse vector positions); 0 when dense only.
    pub fn sparse_dim(&self) -> usize {
        self.sparse.as_ref().map_or(0, |s| s.dim)
    }

    /// Source columns of the features (dense, then sparse).
    pub fn feature_columns(&self) -> &[String] {
        &self.feature_columns
    }

    /// Dense source columns: the first ones of [`Design::feature_columns`] (those that
    /// numeric features read; the block cache stores one section for each).
    pub fn dense_columns(&self) -> usize {
        self.feature_columns
            .iter()
            .take_while(|c| self.features.iter().any(|f| &f.column == *c))
            .count()
    }

    /// Columns a training pass decodes: target, weight, features.
    pub fn training_columns(&self) -> Vec<&str> {
        let mut out = vec![self.target.as_str()];
        if let Some(w) = &self.weight {
            out.push(w);
        }
        out.extend(self.feature_columns.iter().map(String::as_str));
        if let Some(key) = self.holdout.as_ref().and_then(RowSplit::key) {
            if !out.contains(&key) {
                out.push(key);
            }
        }
        out
    }

    /// Fills `block` with the features of `at` (centred and scaled), and with labels and
    /// weights when `with_target` is set. Rows with a null target are dropped when the
    /// design skips them.
    pub fn build_block(
        &self,
        source: &Source,
        at: &BatchAt,
        with_target: bool,
        block: &mut Block,
    ) -> Result<()> {
        self.build_block_raw(source, at, with_target, block, None)
    }

    /// As [`Design::build_block`], also filling `raw` (when given) with the values the
    /// block was built from: one run of `block.rows` values per source column of
    /// [`Design::feature_columns`], in that order, before imputation and scaling (after
    /// the `f32` rounding of `--precision f32`), NaN where the value is null. The block
    /// cache stores these, so that a block decoded from it is bitwise this block.
    pub fn build_block_raw(
        &self,
        source: &Source,
        at: &BatchAt,
        with_target: bool,
        block: &mut Block,
        mut raw: Option<&mut Vec<f64>>,
    ) -> Result<()> {
        let place = Place {
            file: &source.files()[at.file],
            first_row: at.first_row,
        };
        let n = at.batch.num_rows();
        block.file = at.file;
        block.first_row = at.first_row;
        block.y.clear();
        block.w.clear();
        block.holdout.clear();
        let mut keep: Option<Vec<bool>> = None;
        if with_target {
            let held = match &self.holdout {
                Some(split) => split.mask(source, at)?,
                None => Vec::new(),
            };
            let target = read_target(self.loss, &self.target, at, place)?;
            let mut labels = Vec::with_capacity(n);
            let mut kept = vec![true; n];
            for (i, k) in kept.iter_mut().enumerate() {
                if self.drop_held_out && !held.is_empty() && held[i] {
                    *k = false;
                    continue;
                }
                let label = match &target {
                    TargetValues::Numbers(v) if v.is_valid(i) => {
                        let y = v.value(i);
                        if self.loss == Loss::Softmax {
                            Some(self.class_of(&numeric_label(y), place, i)?)
                        } else {
                            Some(y)
                        }
                    }
                    TargetValues::Labels(v) => match &v[i] {
                        Some(label) => Some(self.class_of(label, place, i)?),
                        None => None,
                    },
                    TargetValues::Numbers(_) => None,
                };
                match label {
                    Some(y) => labels.push(y),
                    None if self.skip_missing_target => *k = false,
                    None => {
                        return Err(Error::data(format!(
                            "the target '{}' is null at {}; fill it, or pass --skip-missing-target",
                            self.target,
                            place.row(i)
                        )))
                    }
                }
            }
            block.y = labels;
            if let Some(w) = &self.weight {
                let weights = read_weights(w, at, place)?;
                block.w = weights
                    .values()
                    .iter()
                    .zip(&kept)
                    .filter(|(_, k)| **k)
                    .map(|(v, _)| *v)
                    .collect();
            }
            if !self.drop_held_out && held.iter().any(|h| *h) {
                block.holdout = held
                    .iter()
                    .zip(&kept)
                    .filter(|(_, k)| **k)
                    .map(|(h, _)| *h)
                    .collect();
            }
            if kept.iter().any(|k| !k) {
                keep = Some(kept);
            }
        }
        let rows = keep
            .as_ref()
            .map_or(n, |k| k.iter().filter(|v| **v).count());
        block.rows = rows;
        block.x.clear();
        block.x.reserve(rows * self.features.len());
        if let Some(r) = raw.as_deref_mut() {
            r.clear();
        }
        let mut cached: Option<(&str, Float64Array)> = None;
        for feature in &self.features {
            let values = match &cached {
                Some((name, v)) if *name == feature.column => v.clone(),
                _ => {
                    let array = at.batch.column_by_name(&feature.column).ok_or_else(|| {
                        Error::data(format!(
                            "{} has no column '{}', which the model needs",
                            place.file.path.display(),
                            feature.column
                        ))
                    })?;
                    let v = values::as_f64(array, &feature.column, place)?;
                    values::check_finite(&v, &feature.column, place)?;
                    cached = Some((feature.column.as_str(), v.clone()));
                    if let Some(r) = raw.as_deref_mut() {
                        for i in 0..n {
                            if keep.as_ref().is_some_and(|k| !k[i]) {
                                continue;
                            }
                            r.push(if v.is_null(i) {
                                f64::NAN
                            } else {
                                self.stored(v.value(i))
                            });
                        }
                    }
                    v
                }
            };
            let inv = 1.0 / feature.scale;
            for i in 0..n {
                if keep.as_ref().is_some_and(|k| !k[i]) {
                    continue;
                }
                let raw = if values.is_null(i) {
                    if self.missing == MissingPolicy::Error {
                        return Err(Error::data(format!(
                            "the feature '{}' is null at {}; fill it, or fit with --missing mean",
                            feature.column,
                            place.row(i)
                        )));
                    }
                    if feature.indicator {
                        1.0
                    } else {
                        feature.impute
                    }
                } else if feature.indicator {
                    0.0
                } else {
                    self.stored(values.value(i))
                };
                block.x.push((raw - feature.center) * inv);
            }
        }
        block.sparse.clear();
        if let Some(sparse) = &self.sparse {
            sparse.build(&at.batch, place, keep.as_deref(), &mut block.sparse)?;
        }
        Ok(())
    }

    /// A feature value as the design reads it: itself, or rounded to `f32`.
    #[inline]
    fn stored(&self, v: f64) -> f64 {
        if self.round_f32 {
            v as f32 as f64
        } else {
            v
        }
    }

    fn class_of(&self, label: &str, place: Place<'_>, i: usize) -> Result<f64> {
        self.class_index.get(label).map(|c| *c as f64).ok_or_else(|| {
            Error::data(format!(
                "the target '{}' has the class '{label}' at {}, which the model does not know (its classes: {}); leave such rows out, or fit a model on data with that class",
                self.target,
                place.row(i),
                self.classes.join(", ")
            ))
        })
    }
}
