//! Scoring new data with a model: Parquet in, Parquet out, row order kept, streamed one
//! block at a time so inputs larger than memory cost no more memory than one block.
//!
//! Prediction columns (documented in the README):
//! - logistic: `margin` (log-odds) and `probability` (of class 1);
//! - squared: `prediction`;
//! - poisson: `margin` (log of the expected count) and `prediction` (expected count);
//! - softmax: `probability_<class>` for every class and `predicted_class`.

use std::fs::File;
use std::path::Path;
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array, RecordBatch, StringArray};
use arrow::datatypes::{DataType, Field, Schema};
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::properties::WriterProperties;

use crate::features::Block;
use crate::model::Model;
use crate::objective::glm::margins;
use crate::objective::loss::{log_sum_exp, sigmoid};
use crate::objective::Loss;
use crate::source::Source;
use crate::{atomic, Error, Result};

/// Names of the prediction columns a model writes.
pub fn prediction_columns(model: &Model) -> Vec<String> {
    match model.loss {
        Loss::Logistic => vec!["margin".into(), "probability".into()],
        Loss::Squared => vec!["prediction".into()],
        Loss::Poisson => vec!["margin".into(), "prediction".into()],
        Loss::Softmax => {
            let mut v: Vec<String> = model
                .classes
                .iter()
                .map(|c| format!("probability_{c}"))
                .collect();
            v.push("predicted_class".into());
            v
        }
    }
}

/// What a prediction run did.
#[derive(Debug, Clone, PartialEq)]
pub struct PredictSummary {
    /// Rows scored.
    pub rows: u64,
    /// Files read.
    pub files: usize,
}

/// Checks that every file of `source` has the model's feature columns and the `keep`
/// columns; the error names the first missing column.
pub fn check_columns(model: &Model, source: &Source, keep: &[String]) -> Result<()> {
    let design = model.design();
    let mut needed: Vec<&str> = design
        .feature_columns()
        .iter()
        .map(String::as_str)
        .collect();
    needed.extend(keep.iter().map(String::as_str));
    for file in source.files() {
        for column in &needed {
            if file.schema().field_with_name(column).is_err() {
                let what = if keep.iter().any(|k| k == column) {
                    "--keep column"
                } else {
                    "feature the model needs"
                };
                return Err(Error::data(format!(
                    "{} has no column '{column}' (a {what}); score data with the columns the model was fit on",
                    file.path.display()
                )));
            }
        }
    }
    let outputs = prediction_columns(model);
    for k in keep {
        if outputs.contains(k) {
            return Err(Error::usage(format!(
                "the --keep column '{k}' has the name of a prediction column; rename it first"
            )));
        }
    }
    Ok(())
}

/// Scores `source` with `model` into the Parquet file `out` (written atomically),
/// passing through the `keep` columns.
pub fn predict(
    model: &Model,
    source: &Source,
    keep: &[String],
    out: &Path,
) -> Result<PredictSummary> {
    check_columns(model, source, keep)?;
    let design = model.design();
    let mut columns: Vec<&str> = design
        .feature_columns()
        .iter()
        .map(String::as_str)
        .collect();
    for k in keep {
        if !columns.contains(&k.as_str()) {
            columns.push(k);
        }
    }
    let first = source.schema();
    let mut fields: Vec<Field> = Vec::new();
    for k in keep {
        let field = first
            .field_with_name(k)
            .map_err(|_| Error::data(format!("no column '{k}' to keep")))?;
        fields.push(field.clone().with_nullable(true));
    }
    let outputs = prediction_columns(model);
    for (i, name) in outputs.iter().enumerate() {
        let is_class = model.loss == Loss::Softmax && i == outputs.len() - 1;
        fields.push(Field::new(
            name,
            if is_class {
                DataType::Utf8
            } else {
                DataType::Float64
            },
            false,
        ));
    }
    let schema = Arc::new(Schema::new(fields));
    let tmp = atomic::temp_path(out);
    let file = File::create(&tmp).map_err(|e| Error::io(&tmp, e))?;
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .build();
    let result = (|| {
        let mut writer = ArrowWriter::try_new(file, schema.clone(), Some(props))
            .map_err(|e| Error::internal(format!("cannot start the Parquet writer: {e}")))?;
        let mut block = Block::default();
        let mut z = Vec::new();
        let mut rows = 0u64;
        source.read_all(&columns, |at| {
            design.build_block(source, &at, false, &mut block)?;
            margins(&block, &model.internal, model.layout, &mut z);
            let mut arrays: Vec<ArrayRef> = Vec::new();
            for k in keep {
                let col = at
                    .batch
                    .column_by_name(k)
                    .ok_or_else(|| Error::internal(format!("column '{k}' was not decoded")))?;
                let target_type = schema.field_with_name(k).map(|f| f.data_type().clone())
                    .map_err(|e| Error::internal(e.to_string()))?;
                let col = if col.data_type() == &target_type {
                    col.clone()
                } else {
                    arrow::compute::cast(col, &target_type).map_err(|e| {
                        Error::data(format!(
                            "the --keep column '{k}' of {} has another type than in the first file: {e}",
                            source.files()[at.file].path.display()
                        ))
                    })?
                };
                arrays.push(col);
            }
            arrays.extend(score_arrays(model, &block, &z));
            let batch = RecordBatch::try_new(schema.clone(), arrays)
                .map_err(|e| Error::internal(format!("cannot assemble the scores: {e}")))?;
            writer
                .write(&batch)
                .map_err(|e| Error::io(out, std::io::Error::other(e.to_string())))?;
            rows += block.rows as u64;
            Ok(())
        })?;
        let inner = writer
            .into_inner()
            .map_err(|e| Error::io(out, std::io::Error::other(e.to_string())))?;
        inner.sync_all().map_err(|e| Error::io(out, e))?;
        Ok(rows)
    })();
    match result {
        Ok(rows) => {
            atomic::finish(&tmp, out)?;
            Ok(PredictSummary {
                rows,
                files: source.files().len(),
            })
        }
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            Err(e)
        }
    }
}

/// The prediction arrays of one block, from its margins.
fn score_arrays(model: &Model, block: &Block, z: &[f64]) -> Vec<ArrayRef> {
    let n = block.rows;
    match model.loss {
        Loss::Logistic => {
            let margin = Float64Array::from(z[..n].to_vec());
            let p = Float64Array::from(z[..n].iter().map(|v| sigmoid(*v)).collect::<Vec<_>>());
            vec![Arc::new(margin), Arc::new(p)]
        }
        Loss::Squared => vec![Arc::new(Float64Array::from(z[..n].to_vec()))],
        Loss::Poisson => {
            let margin = Float64Array::from(z[..n].to_vec());
            let mu = Float64Array::from(
                z[..n]
                    .iter()
                    .map(|v| crate::objective::elementary::exp(*v))
                    .collect::<Vec<_>>(),
            );
            vec![Arc::new(margin), Arc::new(mu)]
        }
        Loss::Softmax => {
            let k = model.classes.len();
            let probs = softmax_probabilities(model, n, z);
            let mut out: Vec<ArrayRef> = Vec::with_capacity(k + 1);
            for c in 0..k {
                out.push(Arc::new(Float64Array::from(
                    (0..n).map(|i| probs[i * k + c]).collect::<Vec<_>>(),
                )));
            }
            let best: Vec<&str> = (0..n)
                .map(|i| {
                    let row = &probs[i * k..(i + 1) * k];
                    let mut b = 0;
                    for c in 1..k {
                        if row[c] > row[b] {
                            b = c;
                        }
                    }
                    model.classes[b].as_str()
                })
                .collect();
            out.push(Arc::new(StringArray::from(best)));
            out
        }
    }
}

/// Class probabilities of every row, row-major (`p[i * K + c]`), from group-major margins.
pub fn softmax_probabilities(model: &Model, n: usize, z: &[f64]) -> Vec<f64> {
    let k = model.classes.len();
    let l = model.layout;
    let mut out = vec![0.0; n * k];
    let mut m = vec![0.0; k];
    for i in 0..n {
        for (c, mc) in m.iter_mut().enumerate() {
            *mc = if l.reference {
                if c == 0 {
                    0.0
                } else {
                    z[(c - 1) * n + i]
                }
            } else {
                z[c * n + i]
            };
        }
        let lse = log_sum_exp(&m);
        for c in 0..k {
            out[i * k + c] = (m[c] - lse).exp();
        }
    }
    out
}
