//! `outcore inspect`: a model file as a readable summary.

use std::collections::HashMap;

use outcore::features::hashing::SparseDesign;
use outcore::model::Model;
use outcore::objective::Loss;
use outcore::weights_file::encode_parts;
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
    if model.sparse.is_some() {
        lines.push(String::new());
        lines.extend(hashed_lines(&model, args.top));
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

/// The strongest sparse weights of each output, named by the frequent values that fell
/// into their buckets, and the count of nonzero weights.
fn hashed_lines(model: &Model, top: usize) -> Vec<String> {
    let Some(sparse) = &model.sparse else {
        return Vec::new();
    };
    let Ok(design) = SparseDesign::new(&sparse.request) else {
        return Vec::new();
    };
    let bits = sparse.request.bits;
    // Bucket → labels of the frequent values hashed there, with their signs.
    let mut names: HashMap<u32, Vec<(String, f64)>> = HashMap::new();
    for freq in &sparse.frequent {
        let Some(f) = design.hashed.iter().find(|f| f.name == freq.feature) else {
            continue;
        };
        for v in &freq.values {
            let bytes = encode_parts(&v.value);
            let (bucket, sign) = f.locate(&bytes, bits);
            names
                .entry(bucket)
                .or_default()
                .push((f.label(&bytes), sign));
        }
    }
    let layout = model.layout;
    let weights = model.sparse_weights();
    let mut lines = vec![format!(
        "hashed      {} buckets (2^{bits}) for {}{}",
        design.buckets,
        design
            .hashed
            .iter()
            .map(|f| f.name.as_str())
            .collect::<Vec<_>>()
            .join(", "),
        if sparse.request.vectors.is_empty() {
            String::new()
        } else {
            format!(
                "; sparse vectors {}",
                sparse
                    .request
                    .vectors
                    .iter()
                    .map(|v| format!("{} ({})", v.column, v.dim))
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        }
    )];
    let outputs: Vec<String> = if model.loss == Loss::Softmax {
        model.classes.clone()
    } else {
        vec![String::new()]
    };
    for (k, class) in outputs.iter().enumerate() {
        // Softmax without a penalty has no weights for the reference class.
        let Some(g) = (0..layout.groups)
            .find(|g| model.loss != Loss::Softmax || layout.class_of_group(*g) == k)
        else {
            continue;
        };
        let w = &weights[g * layout.sparse..(g + 1) * layout.sparse];
        let nonzero = w.iter().filter(|v| **v != 0.0).count();
        if model.loss == Loss::Softmax {
            lines.push(format!("class '{class}'"));
        }
        let mut order: Vec<usize> = (0..w.len()).filter(|i| w[*i] != 0.0).collect();
        order.sort_by(|a, b| w[*b].abs().total_cmp(&w[*a].abs()).then(a.cmp(b)));
        lines.push(format!(
            "{:>14}  {:>14}  values in the bucket (sign)",
            "weight", "coordinate"
        ));
        for &i in order.iter().take(top) {
            let label = if i < design.buckets {
                match names.get(&(i as u32)) {
                    Some(list) => list
                        .iter()
                        .map(|(l, s)| format!("{l} ({})", if *s > 0.0 { '+' } else { '-' }))
                        .collect::<Vec<_>>()
                        .join(", "),
                    None => "(no frequent value)".to_string(),
                }
            } else {
                let (v, start) = sparse
                    .request
                    .vectors
                    .iter()
                    .zip(&design.vector_offsets)
                    .rev()
                    .find(|(_, s)| **s <= i)
                    .map(|(v, s)| (v.column.as_str(), *s))
                    .unwrap_or(("?", 0));
                format!("{v}[{}]", i - start)
            };
            let coordinate = if i < design.buckets {
                format!("bucket {i}")
            } else {
                format!("{i}")
            };
            lines.push(format!(
                "{:>14}  {:>14}  {label}",
                output::sig(w[i], 7),
                coordinate
            ));
        }
        lines.push(format!(
            "{nonzero} of {} hashed and sparse weights are nonzero",
            w.len()
        ));
    }
    lines
}
