//! `outcore inspect`: a model file as a readable summary.

use outcore::model::Model;
use outcore::objective::Loss;
use outcore::Result;

use super::args::InspectArgs;
use super::output;
use super::EXIT_OK;

/// `outcore inspect`.
pub fn run(args: InspectArgs) -> Result<i32> {
    let model = Model::load(&args.model)?;
    let f = &model.fit;
    let mut lines = vec![
        format!("model       {}", args.model.display()),
        format!(
            "loss        {} (target '{}')",
            model.loss.as_str(),
            model.target
        ),
        format!(
            "rows        {} (weight sum {}{})",
            f.rows,
            f.weight_sum,
            if f.rows_skipped > 0 {
                format!(", {} skipped", f.rows_skipped)
            } else {
                String::new()
            }
        ),
        format!(
            "fit         {} after {} iterations, {} passes, {:.2}s",
            f.stop, f.iterations, f.passes, f.seconds
        ),
        format!(
            "objective   {} (max|g| {}, tol {})",
            output::sig(f.objective, 12),
            output::sci(f.gradient_max, 3),
            output::compact(f.tol)
        ),
        format!(
            "penalty     ridge {}, lasso {}",
            output::compact(model.penalty.ridge),
            output::compact(model.penalty.lasso)
        ),
    ];
    if let Some(m) = &f.message {
        lines.push(format!("note        {m}"));
    }
    for w in &f.warnings {
        lines.push(format!("warning     {w}"));
    }
    let original = model.coefficients();
    let internal = model.internal_rows();
    let outputs: Vec<String> = if model.loss == Loss::Softmax {
        model.classes.clone()
    } else {
        vec![String::new()]
    };
    for (k, name) in outputs.iter().enumerate() {
        lines.push(String::new());
        if model.loss == Loss::Softmax {
            lines.push(format!("class '{name}'"));
        }
        lines.push(format!(
            "intercept   {}",
            output::sig(original.intercepts[k], 7)
        ));
        let mut order: Vec<usize> = (0..model.features.len()).collect();
        // Rank by the coefficient on the standardized scale: the effect of one standard
        // deviation, comparable across features.
        let standardized = |j: usize| -> f64 {
            let scale = if model.standardize {
                1.0
            } else {
                model.features[j].std
            };
            internal.weights[k][j] * scale
        };
        order.sort_by(|a, b| standardized(*b).abs().total_cmp(&standardized(*a).abs()));
        let nonzero = order
            .iter()
            .filter(|j| original.weights[k][**j] != 0.0)
            .count();
        let width = model
            .features
            .iter()
            .map(|f| f.name.len())
            .max()
            .unwrap_or(7)
            .max(7);
        lines.push(format!(
            "{:<width$}  {:>14}  {:>14}",
            "feature", "coefficient", "per std. dev."
        ));
        for &j in order.iter().take(args.top) {
            lines.push(format!(
                "{:<width$}  {:>14}  {:>14}",
                model.features[j].name,
                output::sig(original.weights[k][j], 7),
                output::sig(standardized(j), 7)
            ));
        }
        if order.len() > args.top {
            lines.push(format!("... {} more (use --top)", order.len() - args.top));
        }
        lines.push(format!(
            "{nonzero} of {} coefficients are nonzero",
            order.len()
        ));
    }
    if let Some(table) = &model.inference {
        lines.push(String::new());
        lines.extend(table.table_lines());
    }
    for l in lines {
        output::line(&l);
    }
    Ok(EXIT_OK)
}
