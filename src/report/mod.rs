//! The HTML report of a run directory: one self-contained file (inline SVG charts, one
//! inline style sheet, no scripts, no network), readable on screen and in print.
//!
//! What it reads: a fit's run directory (`settings.json`, `log.jsonl`, and the model
//! file the settings name) or a path's directory (`path.json`, `chosen.json`, and the
//! chosen strength's run under `runs/`). What it computes: one streaming pass over the
//! model's data scores the held-out rows (every row when the fit had no holdout, which
//! the charts then say) for the ROC curve, the calibration table, binned predictions or
//! the confusion matrix. It does not change the run directory.

pub mod svg;

use std::fmt::Write;
use std::path::{Path, PathBuf};

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use serde_json::Value;

use crate::features::Block;
use crate::fit::IterationRecord;
use crate::holdout::RowSplit;
use crate::metrics::{BinaryMetrics, BinaryReport, CalibrationRow, ScoreRanking, SoftmaxMetrics};
use crate::model::Model;
use crate::objective::glm::margins;
use crate::objective::Loss;
use crate::run_dir::{RunDir, LOG_FILE};
use crate::source::Source;
use crate::{atomic, Error, Result};

use svg::{esc, Bars, Callout, Chart, Mark, Scale, Series};

/// Memory for the exact ROC curve and AUC of the report's scoring pass (16 bytes a
/// row); past it they come from the score histogram.
pub const REPORT_AUC_MEMORY: u64 = 256 * 1024 * 1024;

/// Most points of a drawn ROC curve (more are thinned evenly, ends kept).
pub const ROC_POINTS: usize = 400;

/// Rows kept for the binned predicted-vs-actual chart; past it a seeded uniform sample
/// of this size is used (said on the chart).
pub const SAMPLE_ROWS: usize = 1 << 21;

/// What writing a report has to say besides the file.
#[derive(Debug, Clone, Default)]
pub struct Written {
    /// Notes for the user (which rows were scored, data changes).
    pub notes: Vec<String>,
}

/// The penalty path of a path directory, as read from `path.json`.
#[derive(Debug, Clone)]
pub struct PathTable {
    /// Penalty kind.
    pub penalty: String,
    /// Choice rule.
    pub rule: String,
    /// Measure name.
    pub measure: String,
    /// `(strength, holdout loss, standard error, nonzero)` per strength.
    pub steps: Vec<(f64, Option<f64>, Option<f64>, u64)>,
    /// Best index.
    pub best: usize,
    /// Chosen index.
    pub chosen: usize,
    /// All passes of the path.
    pub passes: u64,
}

/// Everything the report shows, gathered.
#[derive(Debug, Clone)]
pub struct Inputs {
    /// The directory reported on.
    pub dir: PathBuf,
    /// The model reported on (a path: the chosen one).
    pub model: Model,
    /// Its file.
    pub model_path: PathBuf,
    /// Its data.
    pub data: Vec<String>,
    /// Its iteration log.
    pub log: Vec<IterationRecord>,
    /// The path, for a path directory.
    pub path: Option<PathTable>,
}

/// Reads a run or path directory.
pub fn read_inputs(dir: &Path) -> Result<Inputs> {
    let table = dir.join("path.json");
    if table.is_file() {
        let text = std::fs::read(&table).map_err(|e| Error::io(&table, e))?;
        let v: Value = serde_json::from_slice(&text)
            .map_err(|e| Error::format(format!("{} is damaged: {e}", table.display())))?;
        if v["format"] != "outcore-path/1" {
            return Err(Error::format(format!(
                "{} is not a path table of this build (format outcore-path/1)",
                table.display()
            )));
        }
        let bad = |what: &str| {
            Error::format(format!(
                "{} lacks {what}; write it again with outcore path",
                table.display()
            ))
        };
        let steps_v = v["steps"].as_array().ok_or_else(|| bad("its steps"))?;
        let steps: Vec<(f64, Option<f64>, Option<f64>, u64)> = steps_v
            .iter()
            .map(|s| {
                (
                    s["strength"].as_f64().unwrap_or(f64::NAN),
                    s["holdout_loss"].as_f64(),
                    s["holdout_se"].as_f64(),
                    s["nonzero"].as_u64().unwrap_or(0),
                )
            })
            .collect();
        let chosen = v["chosen"]
            .as_u64()
            .ok_or_else(|| bad("the chosen strength"))? as usize;
        let best = v["best"].as_u64().ok_or_else(|| bad("the best strength"))? as usize;
        if chosen >= steps.len() || best >= steps.len() {
            return Err(bad("a valid chosen strength"));
        }
        let run = steps_v[chosen]["run"]
            .as_str()
            .ok_or_else(|| bad("the chosen strength's run"))?;
        let model_path = dir.join("chosen.json");
        let model = Model::load(&model_path)?;
        let data = v["data"]
            .as_array()
            .ok_or_else(|| bad("its data"))?
            .iter()
            .filter_map(|d| d.as_str().map(str::to_string))
            .collect();
        let log = read_log(&dir.join(run))?;
        return Ok(Inputs {
            dir: dir.to_path_buf(),
            model,
            model_path,
            data,
            log,
            path: Some(PathTable {
                penalty: v["penalty"].as_str().unwrap_or("").to_string(),
                rule: v["rule"].as_str().unwrap_or("").to_string(),
                measure: v["measure"].as_str().unwrap_or("holdout loss").to_string(),
                steps,
                best,
                chosen,
                passes: v["passes"].as_u64().unwrap_or(0),
            }),
        });
    }
    let (data, model_path, _settings) = RunDir::read_settings(dir)?;
    if !model_path.is_file() {
        return Err(Error::usage(format!(
            "the model file {} of the run in {} does not exist (the fit has not finished); finish it with outcore resume {} first",
            model_path.display(),
            dir.display(),
            dir.display()
        )));
    }
    let model = Model::load(&model_path)?;
    let log = read_log(dir)?;
    Ok(Inputs {
        dir: dir.to_path_buf(),
        model,
        model_path,
        data,
        log,
        path: None,
    })
}

/// The iteration log of a run directory.
pub fn read_log(dir: &Path) -> Result<Vec<IterationRecord>> {
    let file = dir.join(LOG_FILE);
    let text = std::fs::read_to_string(&file).map_err(|e| Error::io(&file, e))?;
    text.lines()
        .filter(|l| !l.trim().is_empty())
        .enumerate()
        .map(|(i, l)| {
            serde_json::from_str(l).map_err(|e| {
                Error::format(format!(
                    "line {} of {} is not an iteration record ({e})",
                    i + 1,
                    file.display()
                ))
            })
        })
        .collect()
}

/// Which rows the model's charts were computed on.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScoredRows {
    /// The fit's held-out rows.
    HeldOut,
    /// Every row of the training data (the fit had no holdout).
    Training,
}

impl ScoredRows {
    /// Words for captions.
    pub fn describe(self) -> &'static str {
        match self {
            ScoredRows::HeldOut => "held-out rows",
            ScoredRows::Training => {
                "training rows (the fit had no holdout, so these are not out-of-sample)"
            }
        }
    }
}

/// The measures of the scoring pass.
#[derive(Debug, Clone)]
pub enum Scored {
    /// Logistic.
    Binary {
        /// Log-loss, accuracy, Brier.
        report: BinaryReport,
        /// AUC.
        auc: Option<f64>,
        /// ROC points (full).
        roc: Vec<(f64, f64)>,
        /// Calibration deciles.
        calibration: Vec<CalibrationRow>,
    },
    /// Squared or Poisson: `(mean predicted, mean actual, weight)` per decile of the
    /// prediction.
    Regression {
        /// Deciles.
        bins: Vec<(f64, f64, f64)>,
        /// True when the bins come from a sample of the rows.
        sampled: bool,
    },
    /// Softmax.
    Softmax {
        /// Confusion matrix, rows actual, columns predicted (weights).
        confusion: Vec<Vec<f64>>,
        /// Accuracy.
        accuracy: f64,
        /// Log-loss.
        log_loss: f64,
    },
}

/// The result of the scoring pass.
#[derive(Debug, Clone)]
pub struct Scoring {
    /// Which rows.
    pub rows_kind: ScoredRows,
    /// How many.
    pub rows: u64,
    /// The measures.
    pub scored: Scored,
}

/// Scores the model's held-out rows (or every row without a holdout) in one pass.
pub fn score(model: &Model, source: &Source) -> Result<Scoring> {
    crate::evaluate::check_columns(model, source)?;
    let mut design = model.design();
    design.skip_missing_target = model.fit.rows_skipped > 0;
    let (design, rows_kind) = match &model.fit.holdout {
        Some(h) => (
            design.with_holdout(Some(RowSplit::new(h.fraction, h.key.clone())?)),
            ScoredRows::HeldOut,
        ),
        None => (design, ScoredRows::Training),
    };
    let columns: Vec<String> = design
        .training_columns()
        .into_iter()
        .map(str::to_string)
        .collect();
    let columns: Vec<&str> = columns.iter().map(String::as_str).collect();
    let layout = model.layout;
    let k = model.classes.len();
    let mut binary = (
        BinaryMetrics::default(),
        ScoreRanking::new(REPORT_AUC_MEMORY),
    );
    let mut softmax = SoftmaxMetrics::new(k.max(2));
    let mut sample: Vec<(f64, f64, f64)> = Vec::new();
    let mut seen = 0u64;
    let mut rng = StdRng::seed_from_u64(0x6f7574636f7265);
    let mut block = Block::default();
    let mut z = Vec::new();
    let mut row_margins = vec![0.0; k];
    let mut rows = 0u64;
    source.read_all(&columns, |at| {
        design.build_block(source, &at, true, &mut block)?;
        margins(&block, &model.internal, layout, &mut z);
        let n = block.rows;
        for i in 0..n {
            if rows_kind == ScoredRows::HeldOut && !block.is_held_out(i) {
                continue;
            }
            let (w, y) = (block.weight(i), block.y[i]);
            if w <= 0.0 {
                continue;
            }
            rows += 1;
            match model.loss {
                Loss::Logistic => {
                    binary.0.push(z[i], y == 1.0, w);
                    binary.1.push(z[i], y == 1.0, w);
                }
                Loss::Softmax => {
                    layout.class_margins(&z, n, i, &mut row_margins);
                    softmax.push(&row_margins, y as usize, w);
                }
                Loss::Squared | Loss::Poisson => {
                    let pred = if model.loss == Loss::Poisson {
                        crate::objective::elementary::exp(z[i])
                    } else {
                        z[i]
                    };
                    seen += 1;
                    if sample.len() < SAMPLE_ROWS {
                        sample.push((pred, y, w));
                    } else {
                        // Reservoir sampling: every row kept with the same chance.
                        let j = rng.random_range(0..seen);
                        if (j as usize) < SAMPLE_ROWS {
                            sample[j as usize] = (pred, y, w);
                        }
                    }
                }
            }
        }
        Ok(())
    })?;
    let none = || {
        Error::data(format!(
            "the data of the model hold no {} to score",
            rows_kind.describe()
        ))
    };
    let scored = match model.loss {
        Loss::Logistic => {
            let report = binary.0.finish().ok_or_else(none)?;
            let roc = binary.1.roc();
            let (auc, calibration) = binary.1.finish();
            Scored::Binary {
                report,
                auc: auc.value,
                roc,
                calibration,
            }
        }
        Loss::Softmax => {
            let r = softmax.finish().ok_or_else(none)?;
            Scored::Softmax {
                confusion: r.confusion,
                accuracy: r.accuracy,
                log_loss: r.log_loss,
            }
        }
        Loss::Squared | Loss::Poisson => {
            if sample.is_empty() {
                return Err(none());
            }
            Scored::Regression {
                bins: decile_means(sample.clone()),
                sampled: seen as usize > sample.len(),
            }
        }
    };
    Ok(Scoring {
        rows_kind,
        rows,
        scored,
    })
}

/// `(mean predicted, mean actual, weight)` in ten groups of equal weight by prediction.
fn decile_means(mut rows: Vec<(f64, f64, f64)>) -> Vec<(f64, f64, f64)> {
    rows.sort_by(|a, b| a.0.total_cmp(&b.0));
    let total: f64 = rows.iter().map(|r| r.2).sum();
    let mut acc = vec![(0.0, 0.0, 0.0); 10];
    let mut before = 0.0;
    for (p, y, w) in rows {
        let d = (((before + 0.5 * w) / total * 10.0) as usize).min(9);
        acc[d].0 += w * p;
        acc[d].1 += w * y;
        acc[d].2 += w;
        before += w;
    }
    acc.into_iter()
        .filter(|a| a.2 > 0.0)
        .map(|(p, y, w)| (p / w, y / w, w))
        .collect()
}

/// At most `max` points of `points`, evenly spaced by index, first and last kept.
pub fn thin(points: &[(f64, f64)], max: usize) -> Vec<(f64, f64)> {
    if points.len() <= max || max < 2 {
        return points.to_vec();
    }
    (0..max)
        .map(|i| points[i * (points.len() - 1) / (max - 1)])
        .collect()
}

/// The coefficients of the bar chart: `(name, value per standard deviation)`, largest
/// magnitude first, at most `top`.
pub fn top_coefficients(model: &Model, top: usize) -> Vec<(String, f64)> {
    let rows = model.internal_rows();
    let mut all = Vec::new();
    for (o, weights) in rows.weights.iter().enumerate() {
        for (f, v) in model.features.iter().zip(weights) {
            // Per standard deviation of the feature, so that features compare.
            let v = if model.standardize { *v } else { v * f.std };
            let name = if model.loss == Loss::Softmax {
                let class = model.classes.get(o + usize::from(model.layout.reference));
                format!("{}: {}", class.map_or("?", String::as_str), f.name)
            } else {
                f.name.clone()
            };
            if v != 0.0 {
                all.push((name, v));
            }
        }
    }
    all.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()).then(a.0.cmp(&b.0)));
    all.truncate(top);
    all
}

/// Writes the report of `dir` to `out` atomically.
pub fn write_report(dir: &Path, out: &Path, top: usize) -> Result<Written> {
    atomic::check_output(out, "report")?;
    let inputs = read_inputs(dir)?;
    let source = Source::open(&inputs.data)?;
    let mut written = Written::default();
    if source.fingerprint() != inputs.model.fit.data_fingerprint {
        written.notes.push(
            "the data of the run have changed since the fit (their fingerprint differs); the charts of predictions use the data as they are now"
                .to_string(),
        );
    }
    let scoring = score(&inputs.model, &source)?;
    written.notes.push(format!(
        "scored {} {}",
        scoring.rows,
        scoring.rows_kind.describe()
    ));
    let html = render(&inputs, &scoring, top, &written.notes);
    atomic::write(out, html.as_bytes())?;
    Ok(written)
}

/// A number for tables: about six significant digits.
fn n(v: f64) -> String {
    if v == 0.0 || !v.is_finite() {
        return format!("{v}");
    }
    let a = v.abs();
    if (1e-4..1e6).contains(&a) {
        let mag = a.log10().floor() as i32;
        let dec = (5 - mag).max(0) as usize;
        format!("{v:.dec$}")
    } else {
        format!("{v:.4e}")
    }
}

fn opt(v: Option<f64>) -> String {
    v.map_or("—".into(), n)
}

const STYLE: &str = r#"
body { font-family: "DejaVu Sans", "Liberation Sans", Arial, sans-serif; color: #1d1d1d; background: #ffffff; margin: 0 auto; max-width: 780px; padding: 24px 28px 48px; line-height: 1.45; }
h1 { font-size: 24px; margin: 0 0 4px; }
h2 { font-size: 18px; margin: 32px 0 6px; border-bottom: 2px solid #1b5e8c; padding-bottom: 3px; }
p.lead { color: #444; margin: 0 0 16px; }
table { border-collapse: collapse; margin: 8px 0 12px; font-size: 14px; }
th, td { border: 1px solid #c9c9c9; padding: 3px 9px; text-align: left; }
th { background: #eef3f7; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 8px 0 18px; page-break-inside: avoid; break-inside: avoid; }
figcaption { font-size: 13px; color: #333; margin-top: 4px; }
svg.chart { width: 100%; height: auto; display: block; }
.note { font-size: 13px; color: #5a3d00; background: #fff6e0; border-left: 4px solid #d89b00; padding: 4px 10px; }
@media print {
  body { max-width: none; padding: 0; font-size: 11pt; }
  h2 { page-break-after: avoid; break-after: avoid; }
  th { background: #eeeeee; }
  .note { background: none; }
}
"#;

/// The HTML page.
pub fn render(inputs: &Inputs, scoring: &Scoring, top: usize, notes: &[String]) -> String {
    let m = &inputs.model;
    let f = &m.fit;
    let mut h = String::new();
    let title = format!(
        "outcore report: {} model of '{}'",
        m.loss.as_str(),
        m.target
    );
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\"><meta name=\"viewport\" content=\"width=device-width, initial-scale=1\"><title>{}</title><style>{STYLE}</style></head><body>",
        esc(&title)
    );
    let _ = write!(
        h,
        "<h1>{}</h1><p class=\"lead\">Run directory <code>{}</code>{}. Model file <code>{}</code>.</p>",
        esc(&title),
        esc(&inputs.dir.display().to_string()),
        if inputs.path.is_some() {
            " (a penalty path; the charts of the fit show the chosen strength)"
        } else {
            ""
        },
        esc(&inputs.model_path.display().to_string())
    );
    for note in notes {
        let _ = write!(h, "<p class=\"note\">{}</p>", esc(note));
    }
    // Summary table.
    h.push_str("<h2>Summary</h2><table>");
    let mut row = |k: &str, v: String| {
        let _ = write!(h, "<tr><th>{}</th><td>{}</td></tr>", esc(k), esc(&v));
    };
    row("loss", m.loss.as_str().to_string());
    row("target", m.target.clone());
    if let Some(w) = &m.weight {
        row("weight column", w.clone());
    }
    row("features", m.features.len().to_string());
    row(
        "rows read",
        format!("{} (training weight {})", f.rows, n(f.weight_sum)),
    );
    row(
        "penalty",
        format!("ridge {}, lasso {}", n(m.penalty.ridge), n(m.penalty.lasso)),
    );
    row("stop", f.stop.clone());
    row("iterations", f.iterations.to_string());
    row("data passes", f.passes.to_string());
    row("seconds", format!("{:.2}", f.seconds));
    row("objective", n(f.objective));
    row("max |gradient|", format!("{:.3e}", f.gradient_max));
    if let Some(ho) = &f.holdout {
        row(
            "holdout",
            format!(
                "{} rows ({}% of the data{})",
                ho.rows,
                (100.0 * ho.fraction * 1e6).round() / 1e6,
                ho.key
                    .as_ref()
                    .map(|k| format!(", by key '{k}'"))
                    .unwrap_or_default()
            ),
        );
        row("holdout loss", opt(ho.loss));
    }
    match &scoring.scored {
        Scored::Binary { report, auc, .. } => {
            let on = match scoring.rows_kind {
                ScoredRows::HeldOut => "held-out",
                ScoredRows::Training => "training",
            };
            row(&format!("AUC ({on})"), opt(*auc));
            row(&format!("log-loss ({on})"), n(report.log_loss));
            row(&format!("accuracy at 0.5 ({on})"), n(report.accuracy));
            row(&format!("Brier score ({on})"), n(report.brier));
        }
        Scored::Softmax {
            accuracy, log_loss, ..
        } => {
            row("accuracy", n(*accuracy));
            row("log-loss", n(*log_loss));
        }
        Scored::Regression { .. } => {}
    }
    if let Some(p) = &inputs.path {
        row(
            "path",
            format!(
                "{} strengths of {}, chosen by {} ({} passes in all)",
                p.steps.len(),
                p.penalty,
                p.rule,
                p.passes
            ),
        );
    }
    h.push_str("</table>");
    // Convergence.
    h.push_str("<h2>Convergence</h2>");
    h.push_str(&convergence(&inputs.log));
    // Holdout per iteration.
    if inputs.log.iter().any(|r| r.holdout_loss.is_some()) {
        h.push_str("<h2>Holdout loss per iteration</h2>");
        h.push_str(&holdout_chart(&inputs.log));
    }
    if let Some(p) = &inputs.path {
        h.push_str("<h2>Choosing the penalty</h2>");
        h.push_str(&path_chart(p));
    }
    match &scoring.scored {
        Scored::Binary {
            roc,
            calibration,
            auc,
            ..
        } => {
            h.push_str("<h2>ROC curve</h2>");
            h.push_str(&roc_chart(roc, *auc, scoring));
            h.push_str("<h2>Calibration</h2>");
            h.push_str(&calibration_chart(calibration, scoring));
        }
        Scored::Regression { bins, sampled } => {
            h.push_str("<h2>Predicted against actual</h2>");
            h.push_str(&regression_chart(m, bins, *sampled, scoring));
        }
        Scored::Softmax { confusion, .. } => {
            h.push_str("<h2>Confusion matrix</h2>");
            h.push_str(&confusion_table(m, confusion, scoring));
        }
    }
    h.push_str("<h2>Largest coefficients</h2>");
    h.push_str(&coefficient_chart(m, top));
    let _ = writeln!(
        h,
        "<p class=\"lead\" style=\"margin-top:28px\">Written by outcore {}.</p></body></html>",
        env!("CARGO_PKG_VERSION")
    );
    h
}

fn figure(svg: String, caption: &str) -> String {
    format!(
        "<figure>{svg}<figcaption>{}</figcaption></figure>",
        esc(caption)
    )
}

fn convergence(log: &[IterationRecord]) -> String {
    if log.is_empty() {
        return "<p class=\"note\">The log holds no iteration.</p>".into();
    }
    let best = log
        .iter()
        .map(|r| r.objective)
        .fold(f64::INFINITY, f64::min);
    let gap: Vec<(f64, f64)> = log
        .iter()
        .map(|r| (r.passes as f64, r.objective - best))
        .collect();
    let grad: Vec<(f64, f64)> = log
        .iter()
        .map(|r| (r.passes as f64, r.gradient_max))
        .collect();
    let chart = Chart {
        id: "chart-convergence".into(),
        title: "Convergence: objective above its best, and largest gradient, per data pass".into(),
        x_label: "data passes (statistics pass included)".into(),
        y_label: "value (log scale)".into(),
        x: Scale::linear_for(gap.iter().map(|p| p.0)),
        y: Scale::log_for(gap.iter().chain(&grad).map(|p| p.1)),
        series: vec![
            Series {
                label: "objective − best".into(),
                points: gap,
                mark: Mark::LinePoints,
                colour: 0,
                errors: None,
            },
            Series {
                label: "max |gradient|".into(),
                points: grad,
                mark: Mark::Line,
                colour: 1,
                errors: None,
            },
        ],
        callouts: Vec::new(),
        diagonal: false,
    };
    figure(
        chart.render(),
        &format!(
            "Each point is an accepted iteration. The objective (mean loss plus penalty) is shown as its distance above the lowest value reached, {}; the last iterate is that lowest value, a distance of zero, which a log axis cannot draw. The largest absolute gradient component on the standardized scale is the convergence test (tolerance times max(1, |objective|)).",
            n(best)
        ),
    )
}

fn holdout_chart(log: &[IterationRecord]) -> String {
    let pts: Vec<(f64, f64)> = log
        .iter()
        .filter_map(|r| r.holdout_loss.map(|h| (r.iteration as f64, h)))
        .collect();
    let (bi, bl) = pts
        .iter()
        .copied()
        .fold((0.0, f64::INFINITY), |a, p| if p.1 < a.1 { p } else { a });
    let chart = Chart {
        id: "chart-holdout".into(),
        title: "Holdout loss per iteration".into(),
        x_label: "iteration".into(),
        y_label: "mean loss of the held-out rows".into(),
        x: Scale::linear_for(pts.iter().map(|p| p.0).chain([0.0])),
        y: Scale::linear_for(pts.iter().map(|p| p.1)),
        series: vec![Series {
            label: "holdout loss".into(),
            points: pts.clone(),
            mark: Mark::LinePoints,
            colour: 2,
            errors: None,
        }],
        callouts: vec![Callout {
            at: (bi, bl),
            text: format!("lowest {} at iteration {bi}", n(bl)),
        }],
        diagonal: false,
    };
    figure(
        chart.render(),
        "The mean loss of the held-out rows at each accepted iterate, scored in the same passes as the training rows (no extra pass). A curve that turns up again means the later iterations fit the training rows at the expense of new ones.",
    )
}

fn path_chart(p: &PathTable) -> String {
    let pts: Vec<(f64, f64)> = p
        .steps
        .iter()
        .filter_map(|s| s.1.map(|l| (s.0, l)))
        .collect();
    let errors: Vec<f64> = p
        .steps
        .iter()
        .filter(|s| s.1.is_some())
        .map(|s| s.2.unwrap_or(0.0))
        .collect();
    let chosen = p.steps[p.chosen];
    let best = p.steps[p.best];
    let mut callouts = vec![];
    if let Some(l) = chosen.1 {
        callouts.push(Callout {
            at: (chosen.0, l),
            text: format!("chosen: {} (loss {})", n(chosen.0), n(l)),
        });
    }
    if p.best != p.chosen {
        if let Some(l) = best.1 {
            callouts.push(Callout {
                at: (best.0, l),
                text: format!("lowest: {}", n(best.0)),
            });
        }
    }
    let chart = Chart {
        id: "chart-path".into(),
        title: "Holdout loss against penalty strength".into(),
        x_label: format!("{} strength λ (log scale)", p.penalty),
        y_label: p.measure.clone(),
        x: Scale::log_for(pts.iter().map(|q| q.0)),
        y: Scale::linear_for(
            pts.iter()
                .zip(&errors)
                .flat_map(|(q, e)| [q.1 - e, q.1 + e]),
        ),
        series: vec![Series {
            label: "holdout loss ± 1 standard error".into(),
            points: pts,
            mark: Mark::LinePoints,
            colour: 0,
            errors: Some(errors),
        }],
        callouts,
        diagonal: false,
    };
    let mut table = String::from(
        "<table><tr><th>#</th><th>strength</th><th>holdout loss</th><th>std error</th><th>nonzero</th></tr>",
    );
    for (i, s) in p.steps.iter().enumerate() {
        let mark = if i == p.chosen {
            " (chosen)"
        } else if i == p.best {
            " (lowest)"
        } else {
            ""
        };
        let _ = write!(
            table,
            "<tr><td class=\"num\">{}{mark}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
            i + 1,
            n(s.0),
            opt(s.1),
            opt(s.2),
            s.3
        );
    }
    table.push_str("</table>");
    figure(
        chart.render(),
        &format!(
            "One fit per strength, strongest on the right, each started from the solution of the stronger one before it. Bars: ± one standard error of the mean holdout loss (the spread of the per-row losses of the held-out rows over the square root of their weight). The choice rule is {}.",
            p.rule
        ),
    ) + &table
}

fn roc_chart(roc: &[(f64, f64)], auc: Option<f64>, scoring: &Scoring) -> String {
    if roc.is_empty() {
        return "<p class=\"note\">The scored rows hold one class only, so there is no ROC curve.</p>".into();
    }
    let chart = roc_figure(roc);
    figure(
        chart.render(),
        &format!(
            "Computed on the {} ({} rows). Each point is a threshold on the predicted probability: the share of positives caught against the share of negatives wrongly flagged. The dashed diagonal is a model that guesses. Area under the curve: {}.",
            scoring.rows_kind.describe(),
            scoring.rows,
            opt(auc)
        ),
    )
}

/// The ROC chart of `roc` (thinned to [`ROC_POINTS`]).
pub fn roc_figure(roc: &[(f64, f64)]) -> Chart {
    Chart {
        id: "chart-roc".into(),
        title: "ROC curve".into(),
        x_label: "false-positive rate (share of negatives flagged)".into(),
        y_label: "true-positive rate (share of positives caught)".into(),
        x: Scale::Linear { lo: 0.0, hi: 1.0 },
        y: Scale::Linear { lo: 0.0, hi: 1.0 },
        series: vec![Series {
            label: "ROC".into(),
            points: thin(roc, ROC_POINTS),
            mark: Mark::Line,
            colour: 0,
            errors: None,
        }],
        callouts: Vec::new(),
        diagonal: true,
    }
}

fn calibration_chart(rows: &[CalibrationRow], scoring: &Scoring) -> String {
    let pts: Vec<(f64, f64)> = rows
        .iter()
        .map(|r| (r.mean_predicted, r.observed_rate))
        .collect();
    let chart = Chart {
        id: "chart-calibration".into(),
        title: "Calibration by deciles of predicted probability".into(),
        x_label: "mean predicted probability in the decile".into(),
        y_label: "observed share of positives".into(),
        x: Scale::Linear { lo: 0.0, hi: 1.0 },
        y: Scale::Linear { lo: 0.0, hi: 1.0 },
        series: vec![Series {
            label: "deciles".into(),
            points: pts,
            mark: Mark::LinePoints,
            colour: 1,
            errors: None,
        }],
        callouts: Vec::new(),
        diagonal: true,
    };
    let mut table = String::from(
        "<table><tr><th>decile</th><th>rows</th><th>mean predicted</th><th>observed</th></tr>",
    );
    for r in rows {
        let _ = write!(
            table,
            "<tr><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
            r.decile,
            r.rows,
            n(r.mean_predicted),
            n(r.observed_rate)
        );
    }
    table.push_str("</table>");
    figure(
        chart.render(),
        &format!(
            "Computed on the {}. The rows are ordered by predicted probability and cut into ten groups of equal weight; a well-calibrated model puts each group's point on the dashed diagonal.",
            scoring.rows_kind.describe()
        ),
    ) + &table
}

fn regression_chart(
    m: &Model,
    bins: &[(f64, f64, f64)],
    sampled: bool,
    scoring: &Scoring,
) -> String {
    let pts: Vec<(f64, f64)> = bins.iter().map(|b| (b.0, b.1)).collect();
    let scale = Scale::linear_for(pts.iter().flat_map(|p| [p.0, p.1]));
    let what = if m.loss == Loss::Poisson {
        "count"
    } else {
        "value"
    };
    let chart = Chart {
        id: "chart-predicted".into(),
        title: "Predicted against actual, by deciles of the prediction".into(),
        x_label: format!("mean predicted {what} of '{}' in the decile", m.target),
        y_label: format!("mean actual {what}"),
        x: scale,
        y: scale,
        series: vec![Series {
            label: "deciles".into(),
            points: pts,
            mark: Mark::LinePoints,
            colour: 0,
            errors: None,
        }],
        callouts: Vec::new(),
        diagonal: false,
    };
    figure(
        chart.render(),
        &format!(
            "Computed on the {}{}. Rows ordered by prediction, cut into ten groups of equal weight; points on the line y = x mean the predictions are right on average in every range.",
            scoring.rows_kind.describe(),
            if sampled {
                format!(" (a seeded uniform sample of {SAMPLE_ROWS} of them)")
            } else {
                String::new()
            }
        ),
    )
    .replace(
        "</svg>",
        &diagonal_line(&chart),
    )
}

/// A y = x line over a chart whose axes share one scale (for regression charts).
fn diagonal_line(chart: &Chart) -> String {
    let (lo, hi) = match chart.x {
        Scale::Linear { lo, hi } | Scale::Log { lo, hi } => (lo, hi),
    };
    let a = chart.to_px((lo, lo));
    let b = chart.to_px((hi, hi));
    format!(
        "<line class=\"diagonal\" x1=\"{:.1}\" y1=\"{:.1}\" x2=\"{:.1}\" y2=\"{:.1}\" stroke=\"#9a9a9a\" stroke-dasharray=\"4 4\"/></svg>",
        a.0, a.1, b.0, b.1
    )
}

fn confusion_table(m: &Model, confusion: &[Vec<f64>], scoring: &Scoring) -> String {
    let mut t = String::from("<table><tr><th>actual \\ predicted</th>");
    for c in &m.classes {
        let _ = write!(t, "<th>{}</th>", esc(c));
    }
    t.push_str("</tr>");
    for (i, row) in confusion.iter().enumerate() {
        let _ = write!(
            t,
            "<tr><th>{}</th>",
            esc(m.classes.get(i).map_or("?", String::as_str))
        );
        for v in row {
            let _ = write!(t, "<td class=\"num\">{}</td>", n(*v));
        }
        t.push_str("</tr>");
    }
    t.push_str("</table>");
    format!(
        "{t}<p>Weights of the {} by actual class (rows) and the class of highest predicted probability (columns).</p>",
        esc(scoring.rows_kind.describe())
    )
}

fn coefficient_chart(m: &Model, top: usize) -> String {
    let bars = top_coefficients(m, top);
    if bars.is_empty() {
        return "<p class=\"note\">Every coefficient is zero.</p>".into();
    }
    let total: usize = m.internal_rows().weights.iter().map(Vec::len).sum();
    let chart = Bars {
        id: "chart-coefficients".into(),
        title: "Largest coefficients".into(),
        x_label: "change of the margin per standard deviation of the feature".into(),
        bars,
    };
    figure(
        chart.render(),
        &format!(
            "The {} largest of {total} coefficients by magnitude, on the standardized scale (effect on the {} of one standard deviation of the feature), so that features of different units compare; blue raises, orange lowers.",
            chart.bars.len(),
            match m.loss {
                Loss::Logistic => "log-odds",
                Loss::Poisson => "log of the expected count",
                Loss::Softmax => "class's log-odds against the others",
                Loss::Squared => "prediction",
            }
        ),
    )
}
