//! Judging a model on data with known targets: one streaming pass that scores every row
//! the way [`crate::predict`] does and feeds the scores into the accumulators of
//! [`crate::metrics`].
//!
//! The data must hold the model's feature columns and its target. Rows are read with the
//! model's own design: the same standardization, missing-value policy and classes; a
//! null target is an error unless [`EvaluateOptions::skip_missing_target`] is set. When
//! the model was fit with a weight column and the data have it, every measure is
//! weighted by it (frequency weights); when the data lack it, the rows count once each
//! and a warning says so.
//!
//! Memory stays bounded by one block plus, for logistic models, the exact-AUC buffer of
//! at most [`EvaluateOptions::auc_memory`] bytes (past it the AUC comes from a histogram
//! with a stated error bound, see [`crate::metrics`]).

use serde_json::{json, Map, Value};

use crate::features::Block;
use crate::metrics::{
    Auc, AucMethod, BinaryMetrics, BinaryReport, CalibrationRow, PoissonMetrics, PoissonReport,
    RegressionMetrics, RegressionReport, ScoreRanking, SoftmaxMetrics, SoftmaxReport,
    DEFAULT_AUC_MEMORY,
};
use crate::model::Model;
use crate::objective::glm::margins;
use crate::objective::Loss;
use crate::source::Source;
use crate::{predict, Error, Result};

/// How an evaluation runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct EvaluateOptions {
    /// Bytes the exact AUC may keep (16 per row); past them the AUC comes from a
    /// histogram. 0 uses the histogram from the first row.
    pub auc_memory: u64,
    /// Skip (and count) rows whose target is null instead of refusing them.
    pub skip_missing_target: bool,
}

impl Default for EvaluateOptions {
    fn default() -> Self {
        EvaluateOptions {
            auc_memory: DEFAULT_AUC_MEMORY,
            skip_missing_target: false,
        }
    }
}

/// The measures of one evaluation, by loss family.
#[derive(Debug, Clone, PartialEq)]
pub enum Scores {
    /// Logistic models.
    Binary {
        /// Log-loss, accuracy, Brier score.
        report: BinaryReport,
        /// Area under the ROC curve.
        auc: Auc,
        /// Calibration by deciles of predicted probability.
        calibration: Vec<CalibrationRow>,
    },
    /// Softmax models.
    Softmax {
        /// Log-loss, accuracy, confusion matrix.
        report: SoftmaxReport,
        /// Class names, in the order of the confusion matrix.
        classes: Vec<String>,
    },
    /// Squared-loss models.
    Squared(RegressionReport),
    /// Poisson models.
    Poisson(PoissonReport),
}

/// What an evaluation found.
#[derive(Debug, Clone, PartialEq)]
pub struct Evaluation {
    /// Loss family of the model.
    pub loss: Loss,
    /// Target column.
    pub target: String,
    /// Rows evaluated.
    pub rows: u64,
    /// Rows skipped for a null target.
    pub rows_skipped: u64,
    /// The weight column used, when the measures are weighted.
    pub weight_column: Option<String>,
    /// Sum of the weights (the row count when unweighted).
    pub weight_sum: f64,
    /// Files read.
    pub files: usize,
    /// The measures.
    pub scores: Scores,
    /// Things the user should know (an unused weight column, an undefined AUC or R²).
    pub warnings: Vec<String>,
}

/// Checks that every file holds the model's features and target, and decides whether
/// the model's weight column is used: `Ok(true)` when every file has it, `Ok(false)`
/// when none has it (or the model has none). Errors name the file and column.
pub fn check_columns(model: &Model, source: &Source) -> Result<bool> {
    predict::check_columns(model, source, &[])?;
    for file in source.files() {
        if file.schema().field_with_name(&model.target).is_err() {
            return Err(Error::data(format!(
                "{} has no column '{}', the model's target; evaluate needs the true values beside the features",
                file.path.display(),
                model.target
            )));
        }
    }
    let weighted = match &model.weight {
        None => false,
        Some(w) => {
            let has = |f: &&crate::source::SourceFile| f.schema().field_with_name(w).is_ok();
            let with: Vec<_> = source.files().iter().filter(has).collect();
            if with.is_empty() {
                false
            } else if let Some(without) = source.files().iter().find(|f| !has(f)) {
                return Err(Error::data(format!(
                    "{} has no column '{w}', the model's weight column, which {} has; give every file the weights or none",
                    without.path.display(),
                    with[0].path.display()
                )));
            } else {
                true
            }
        }
    };
    let mut columns: Vec<&str> = vec![model.target.as_str()];
    if weighted {
        if let Some(w) = &model.weight {
            columns.push(w);
        }
    }
    source.require_columns(&columns)?;
    Ok(weighted)
}

/// Per-family accumulators.
enum Acc {
    Binary(BinaryMetrics, ScoreRanking),
    Softmax(SoftmaxMetrics),
    Squared(RegressionMetrics),
    Poisson(PoissonMetrics),
}

/// Evaluates `model` on `source` in one streaming pass.
pub fn evaluate(model: &Model, source: &Source, options: &EvaluateOptions) -> Result<Evaluation> {
    let weighted = check_columns(model, source)?;
    let mut warnings = Vec::new();
    if let (Some(w), false) = (&model.weight, weighted) {
        warnings.push(format!(
            "the model was fit with the weight column '{w}', which the data lack; every row counts once"
        ));
    }
    let mut design = model.design();
    design.skip_missing_target = options.skip_missing_target;
    if !weighted {
        design.weight = None;
    }
    let columns: Vec<String> = design
        .training_columns()
        .into_iter()
        .map(str::to_string)
        .collect();
    let columns: Vec<&str> = columns.iter().map(String::as_str).collect();
    let k = model.classes.len();
    let mut acc = match model.loss {
        Loss::Logistic => Acc::Binary(
            BinaryMetrics::default(),
            ScoreRanking::new(options.auc_memory),
        ),
        Loss::Softmax => Acc::Softmax(SoftmaxMetrics::new(k)),
        Loss::Squared => Acc::Squared(RegressionMetrics::default()),
        Loss::Poisson => Acc::Poisson(PoissonMetrics::default()),
    };
    let layout = model.layout;
    let mut block = Block::default();
    let mut z = Vec::new();
    let mut row_margins = vec![0.0; k];
    let mut rows = 0u64;
    let mut skipped = 0u64;
    source.read_all(&columns, |at| {
        let read = at.batch.num_rows();
        design.build_block(source, &at, true, &mut block)?;
        skipped += (read - block.rows) as u64;
        margins(&block, &model.internal, layout, &mut z);
        let n = block.rows;
        if let Some(i) = z.iter().position(|v| v.is_nan()) {
            return Err(Error::data(format!(
                "the model's score is not a number for a row of {} (block from row {}, offset {}); a feature value is too large for the model",
                source.files()[at.file].path.display(),
                at.first_row,
                i % n.max(1)
            )));
        }
        for i in 0..n {
            let w = block.weight(i);
            let y = block.y[i];
            match &mut acc {
                Acc::Binary(m, r) => {
                    m.push(z[i], y == 1.0, w);
                    r.push(z[i], y == 1.0, w);
                }
                Acc::Softmax(m) => {
                    layout.class_margins(&z, n, i, &mut row_margins);
                    m.push(&row_margins, y as usize, w);
                }
                Acc::Squared(m) => m.push(z[i], y, w),
                Acc::Poisson(m) => m.push(z[i], y, w),
            }
        }
        rows += n as u64;
        Ok(())
    })?;
    let empty = || {
        let first = source.files()[0].path.display();
        let more = if source.files().len() > 1 {
            format!(" and {} more files", source.files().len() - 1)
        } else {
            String::new()
        };
        Error::data(format!(
            "{first}{more} hold no rows of positive weight to evaluate ({rows} rows read, {skipped} skipped for a null target)"
        ))
    };
    let (scores, weight_sum) = match acc {
        Acc::Binary(m, r) => {
            let report = m.finish().ok_or_else(empty)?;
            let (auc, calibration) = r.finish();
            if auc.value.is_none() {
                warnings.push(format!(
                    "the target '{}' holds only one class in these data, so the AUC is undefined",
                    model.target
                ));
            }
            let w = report.weight;
            (
                Scores::Binary {
                    report,
                    auc,
                    calibration,
                },
                w,
            )
        }
        Acc::Softmax(m) => {
            let report = m.finish().ok_or_else(empty)?;
            let w = report.weight;
            (
                Scores::Softmax {
                    report,
                    classes: model.classes.clone(),
                },
                w,
            )
        }
        Acc::Squared(m) => {
            let report = m.finish().ok_or_else(empty)?;
            if report.r2.is_none() {
                warnings.push(format!(
                    "the target '{}' is constant in these data, so R² is undefined",
                    model.target
                ));
            }
            let w = report.weight;
            (Scores::Squared(report), w)
        }
        Acc::Poisson(m) => {
            let report = m.finish().ok_or_else(empty)?;
            let w = report.weight;
            (Scores::Poisson(report), w)
        }
    };
    Ok(Evaluation {
        loss: model.loss,
        target: model.target.clone(),
        rows,
        rows_skipped: skipped,
        weight_column: if weighted { model.weight.clone() } else { None },
        weight_sum,
        files: source.files().len(),
        scores,
        warnings,
    })
}

/// A JSON number, or `null` for NaN and infinities.
fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map_or(Value::Null, Value::Number)
}

fn opt(v: Option<f64>) -> Value {
    v.map_or(Value::Null, num)
}

impl Evaluation {
    /// The JSON object `outcore evaluate --json` prints (DESIGN §5 keys and more).
    pub fn to_json(&self) -> Value {
        let mut m = Map::new();
        m.insert("loss".into(), json!(self.loss.as_str()));
        m.insert("target".into(), json!(self.target));
        m.insert("rows".into(), json!(self.rows));
        m.insert("rows_skipped".into(), json!(self.rows_skipped));
        m.insert("weight_column".into(), json!(self.weight_column));
        m.insert("weight_sum".into(), num(self.weight_sum));
        m.insert("files".into(), json!(self.files));
        match &self.scores {
            Scores::Binary {
                report,
                auc,
                calibration,
            } => {
                m.insert("log_loss".into(), num(report.log_loss));
                m.insert("auc".into(), opt(auc.value));
                m.insert("auc_method".into(), json!(auc.method.as_str()));
                if let AucMethod::Histogram { bins } = auc.method {
                    m.insert("auc_bins".into(), json!(bins));
                }
                m.insert("auc_error_bound".into(), num(auc.error_bound));
                m.insert("auc_low".into(), opt(auc.low));
                m.insert("auc_high".into(), opt(auc.high));
                m.insert("accuracy".into(), num(report.accuracy));
                m.insert("brier".into(), num(report.brier));
                m.insert("positive_rate".into(), num(report.positive_rate));
                m.insert("mean_predicted".into(), num(report.mean_predicted));
                let table: Vec<Value> = calibration
                    .iter()
                    .map(|c| {
                        json!({
                            "decile": c.decile,
                            "rows": c.rows,
                            "weight": num(c.weight),
                            "mean_predicted": num(c.mean_predicted),
                            "observed_rate": num(c.observed_rate),
                            "min_predicted": num(c.min_predicted),
                            "max_predicted": num(c.max_predicted),
                        })
                    })
                    .collect();
                m.insert("calibration".into(), Value::Array(table));
            }
            Scores::Softmax { report, classes } => {
                m.insert("log_loss".into(), num(report.log_loss));
                m.insert("accuracy".into(), num(report.accuracy));
                m.insert("classes".into(), json!(classes));
                let rows: Vec<Value> = report
                    .confusion
                    .iter()
                    .map(|r| Value::Array(r.iter().map(|v| num(*v)).collect()))
                    .collect();
                m.insert("confusion_matrix".into(), Value::Array(rows));
            }
            Scores::Squared(r) => {
                m.insert("rmse".into(), num(r.rmse));
                m.insert("mae".into(), num(r.mae));
                m.insert("r2".into(), opt(r.r2));
                m.insert("mse".into(), num(r.mse));
                m.insert("mean_target".into(), num(r.mean_target));
                m.insert("mean_predicted".into(), num(r.mean_predicted));
            }
            Scores::Poisson(r) => {
                m.insert("mean_deviance".into(), num(r.mean_deviance));
                m.insert("mean_target".into(), num(r.mean_target));
                m.insert("mean_predicted".into(), num(r.mean_predicted));
            }
        }
        m.insert("warnings".into(), json!(self.warnings));
        Value::Object(m)
    }
}
