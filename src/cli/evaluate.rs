//! `outcore evaluate`: measures of a model on data with known targets, as a table or as
//! one JSON object on stdout.

use outcore::evaluate::{self, EvaluateOptions, Evaluation, Scores};
use outcore::metrics::DEFAULT_AUC_MEMORY;
use outcore::model::Model;
use outcore::source::Source;
use outcore::{Error, Result};

use super::args::EvaluateArgs;
use super::{output, EXIT_OK};

/// Bytes in a megabyte of `--auc-memory`.
const MB: f64 = 1024.0 * 1024.0;

/// `outcore evaluate`.
pub fn run(args: EvaluateArgs) -> Result<i32> {
    let auc_memory = match args.auc_memory {
        None => DEFAULT_AUC_MEMORY,
        Some(mb) if mb.is_finite() && mb >= 0.0 && mb * MB < u64::MAX as f64 => (mb * MB) as u64,
        Some(mb) => {
            return Err(Error::usage(format!(
                "--auc-memory {mb} is not a size in MB; give a number of zero or more"
            )))
        }
    };
    let model = Model::load(&args.model)?;
    let source = Source::open(&args.data)?;
    let options = EvaluateOptions {
        auc_memory,
        skip_missing_target: args.skip_missing_target,
    };
    let result = evaluate::evaluate(&model, &source, &options)?;
    for w in &result.warnings {
        output::warning(w);
    }
    if args.json {
        output::line(&result.to_json().to_string());
    } else {
        for line in table(&result) {
            output::line(&line);
        }
    }
    Ok(EXIT_OK)
}

/// A number for the table: six significant digits, or `undefined`.
fn fmt(v: Option<f64>) -> String {
    match v {
        Some(v) if v.is_finite() => {
            if v != 0.0 && (v.abs() < 1e-3 || v.abs() >= 1e7) {
                format!("{v:.5e}")
            } else {
                format!("{v:.6}")
            }
        }
        Some(v) => format!("{v}"),
        None => "undefined".into(),
    }
}

/// The human-readable report.
fn table(e: &Evaluation) -> Vec<String> {
    let mut out = Vec::new();
    let weighting = match &e.weight_column {
        Some(w) => format!(
            ", weighted by '{w}' (weight sum {})",
            fmt_weight(e.weight_sum)
        ),
        None => String::new(),
    };
    let skipped = if e.rows_skipped > 0 {
        format!(", {} skipped for a null target", e.rows_skipped)
    } else {
        String::new()
    };
    out.push(format!(
        "{} model, target '{}': {} rows from {} file{}{weighting}{skipped}",
        e.loss.as_str(),
        e.target,
        e.rows,
        e.files,
        if e.files == 1 { "" } else { "s" }
    ));
    out.push(String::new());
    let row = |name: &str, value: String| format!("  {name:<16}{value}");
    match &e.scores {
        Scores::Binary {
            report,
            auc,
            calibration,
        } => {
            out.push(row("log-loss", fmt(Some(report.log_loss))));
            let how = match (auc.method.as_str(), auc.value) {
                ("exact", _) | (_, None) => format!("({})", auc.method.as_str()),
                _ if auc.error_bound == 0.0 => {
                    "(histogram; no bin mixes different scores, so exact)".to_string()
                }
                _ => format!("(histogram, within ±{:.2e})", auc.error_bound),
            };
            out.push(row("AUC", format!("{} {how}", fmt(auc.value))));
            out.push(row(
                "accuracy",
                format!("{} (at probability 0.5)", fmt(Some(report.accuracy))),
            ));
            out.push(row("Brier score", fmt(Some(report.brier))));
            out.push(row("positive rate", fmt(Some(report.positive_rate))));
            out.push(row("mean predicted", fmt(Some(report.mean_predicted))));
            out.push(String::new());
            out.push("calibration by deciles of predicted probability".into());
            out.push(format!(
                "  {:>6}  {:>10}  {:>12}  {:>14}  {:>13}  {:>19}",
                "decile", "rows", "weight", "mean predicted", "observed rate", "probability range"
            ));
            for c in calibration {
                out.push(format!(
                    "  {:>6}  {:>10}  {:>12}  {:>14.6}  {:>13.6}  {:>8.6} – {:>8.6}",
                    c.decile,
                    c.rows,
                    fmt_weight(c.weight),
                    c.mean_predicted,
                    c.observed_rate,
                    c.min_predicted,
                    c.max_predicted
                ));
            }
        }
        Scores::Softmax { report, classes } => {
            out.push(row("log-loss", fmt(Some(report.log_loss))));
            out.push(row("accuracy", fmt(Some(report.accuracy))));
            out.push(String::new());
            out.push("confusion matrix (rows: true class, columns: predicted class)".into());
            let width = classes
                .iter()
                .map(|c| c.chars().count())
                .chain(
                    report
                        .confusion
                        .iter()
                        .flatten()
                        .map(|v| fmt_weight(*v).len()),
                )
                .max()
                .unwrap_or(1)
                .max(4);
            let mut head = format!("  {:>width$}", "");
            for c in classes {
                head.push_str(&format!("  {c:>width$}"));
            }
            out.push(head);
            for (c, r) in classes.iter().zip(&report.confusion) {
                let mut line = format!("  {c:>width$}");
                for v in r {
                    line.push_str(&format!("  {:>width$}", fmt_weight(*v)));
                }
                out.push(line);
            }
        }
        Scores::Squared(r) => {
            out.push(row("RMSE", fmt(Some(r.rmse))));
            out.push(row("MAE", fmt(Some(r.mae))));
            out.push(row("R²", fmt(r.r2)));
            out.push(row("mean target", fmt(Some(r.mean_target))));
            out.push(row("mean predicted", fmt(Some(r.mean_predicted))));
        }
        Scores::Poisson(r) => {
            out.push(row("mean deviance", fmt(Some(r.mean_deviance))));
            out.push(row("mean count", fmt(Some(r.mean_target))));
            out.push(row("mean predicted", fmt(Some(r.mean_predicted))));
        }
    }
    out
}

/// A weight in the confusion matrix: whole numbers without decimals.
fn fmt_weight(v: f64) -> String {
    if v.fract() == 0.0 && v.abs() < 1e15 {
        format!("{v:.0}")
    } else {
        format!("{v:.3}")
    }
}
