//! The fitted model: its file (DESIGN §6), reading it back, and scoring rows.
//!
//! The file is a versioned record of its own (`outcore-model/1`), written and read
//! through [`ModelFile`]; internals are never serialized directly.

use std::collections::HashMap;
use std::path::Path;

use serde::{Deserialize, Serialize};
use serde_json::{Map, Value};

use crate::features::hashing::SparseRequest;
use crate::features::{Design, Feature, FeatureRequest, MissingPolicy};
use crate::inference::InferenceTable;
use crate::objective::{Layout, Loss};
use crate::{atomic, Error, Result};

/// The model-file format this build writes and reads.
pub const MODEL_FORMAT: &str = "outcore-model/1";

/// How the fit ended, as recorded in the model file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitRecord {
    /// Stop reason: converged, flat, pass-budget, time-budget, interrupted,
    /// line-search-failed, separable.
    pub stop: String,
    /// What the stop means for the user, when it is not a plain convergence.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub message: Option<String>,
    /// The objective of DESIGN §4 (mean form, with penalties) at the coefficients.
    pub objective: f64,
    /// `‖g‖∞` of the objective on the internal scale (pseudo-gradient with L1).
    pub gradient_max: f64,
    /// Tolerance of the gradient test.
    pub tol: f64,
    /// Optimizer iterations.
    pub iterations: u64,
    /// Full data passes, the statistics pass included.
    pub passes: u64,
    /// Wall-clock seconds of the fit.
    pub seconds: f64,
    /// Rows read.
    pub rows: u64,
    /// Sum of the row weights used.
    pub weight_sum: f64,
    /// Rows skipped for a missing target.
    #[serde(default)]
    pub rows_skipped: u64,
    /// Fingerprint of the training data.
    pub data_fingerprint: String,
    /// Shards the passes were cut into.
    pub shards: usize,
    /// L-BFGS history pairs.
    pub history: usize,
    /// Warnings raised during the fit.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub warnings: Vec<String>,
    /// The held-out rows and their loss, when the fit held rows out (`--holdout`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub holdout: Option<HoldoutRecord>,
}

/// The holdout of a fit as recorded in the model file (`fit.holdout`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HoldoutRecord {
    /// Share of the rows (or keys) held out.
    pub fraction: f64,
    /// The split key column, when the split was by key rather than by row position.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub key: Option<String>,
    /// Early stop after this many iterations without improvement, if asked for.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub patience: Option<u64>,
    /// Held-out rows (with a target).
    pub rows: u64,
    /// Their weight.
    pub weight: f64,
    /// Mean weighted loss of the held-out rows at the model's coefficients.
    pub loss: Option<f64>,
    /// The lowest holdout loss of any accepted iterate.
    pub best_loss: Option<f64>,
    /// The iteration of the lowest holdout loss (0: the starting point).
    pub best_iteration: u64,
}

/// The penalty strengths, as in DESIGN §4.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Penalty {
    /// `ridge / 2 · ‖β‖²`.
    pub ridge: f64,
    /// `lasso · ‖β‖₁`.
    pub lasso: f64,
}

/// A fitted model, typed.
#[derive(Debug, Clone, PartialEq)]
pub struct Model {
    /// Loss family.
    pub loss: Loss,
    /// Target column.
    pub target: String,
    /// Weight column used in training.
    pub weight: Option<String>,
    /// Softmax classes, in order.
    pub classes: Vec<String>,
    /// Features with their statistics and transformation.
    pub features: Vec<Feature>,
    /// Missing-value policy of the training run.
    pub missing: MissingPolicy,
    /// Whether features were standardized in the fit.
    pub standardize: bool,
    /// Coefficient layout of the internal vector.
    pub layout: Layout,
    /// The internal (standardized-scale) coefficient vector, as the optimizer left it.
    pub internal: Vec<f64>,
    /// Penalties.
    pub penalty: Penalty,
    /// How the fit ended.
    pub fit: FitRecord,
    /// Standard errors and intervals, when the fit was asked for them (`--inference`).
    pub inference: Option<InferenceTable>,
    /// Hashed and sparse vector features (their weights follow the dense ones in
    /// `internal`), with the most frequent values seen per hashed feature.
    pub sparse: Option<SparseModel>,
}

/// The sparse part of a model.
#[derive(Debug, Clone, PartialEq)]
pub struct SparseModel {
    /// The hashing settings and sparse vector columns of the fit.
    pub request: SparseRequest,
    /// Most frequent values of each hashed feature in the training rows.
    pub frequent: Vec<crate::weights_file::Frequent>,
}

/// Intercepts and coefficients on the original scale: one row per output
/// (one for binary and single-output losses, one per class for softmax).
#[derive(Debug, Clone, PartialEq)]
pub struct Coefficients {
    /// Intercept per output.
    pub intercepts: Vec<f64>,
    /// Coefficients per output, in feature order.
    pub weights: Vec<Vec<f64>>,
}

impl Model {
    /// Coefficients of the internal vector, on the scale of the standardized features
    /// (equal to the original scale when standardization is off); one row per output.
    pub fn internal_rows(&self) -> Coefficients {
        let l = self.layout;
        let outputs = if self.loss == Loss::Softmax {
            l.classes
        } else {
            1
        };
        let mut intercepts = vec![0.0; outputs];
        let mut weights = vec![vec![0.0; l.width]; outputs];
        for g in 0..l.groups {
            let c = if self.loss == Loss::Softmax {
                l.class_of_group(g)
            } else {
                0
            };
            let base = l.intercept(g);
            intercepts[c] = self.internal[base];
            weights[c].copy_from_slice(&self.internal[base + 1..base + 1 + l.width]);
        }
        Coefficients {
            intercepts,
            weights,
        }
    }

    /// Intercepts and coefficients on the original scale of the columns. For a
    /// penalized softmax the intercepts are centred to sum to zero.
    pub fn coefficients(&self) -> Coefficients {
        let mut c = self.internal_rows();
        for (b, w) in c.intercepts.iter_mut().zip(c.weights.iter_mut()) {
            for (wj, f) in w.iter_mut().zip(&self.features) {
                *wj /= f.scale;
                *b -= *wj * f.center;
            }
        }
        if self.loss == Loss::Softmax && !self.layout.reference {
            let mean = c.intercepts.iter().sum::<f64>() / c.intercepts.len() as f64;
            for b in &mut c.intercepts {
                *b -= mean;
            }
        }
        c
    }

    /// A design that reads data for scoring this model (no target needed).
    pub fn design(&self) -> Design {
        self.design_skipping(false)
    }

    /// The design of the training run, reading the training data as the fit did (rows
    /// with a null target skipped when the fit skipped them, held-out rows left out).
    pub fn design_for_training(&self) -> Design {
        let design = self.design_skipping(self.fit.rows_skipped > 0);
        match &self.fit.holdout {
            Some(h) => match crate::holdout::RowSplit::new(h.fraction, h.key.clone()) {
                Ok(split) => design.with_holdout(Some(split)).training_only(),
                Err(_) => design,
            },
            None => design,
        }
    }

    fn design_skipping(&self, skip_missing_target: bool) -> Design {
        let request = FeatureRequest {
            target: self.target.clone(),
            weight: self.weight.clone(),
            features: None,
            loss: self.loss,
            missing: self.missing,
            skip_missing_target,
            standardize: self.standardize,
            sparse: self.sparse.as_ref().map(|s| s.request.clone()),
        };
        let class_index: HashMap<String, usize> = self
            .classes
            .iter()
            .enumerate()
            .map(|(i, c)| (c.clone(), i))
            .collect();
        Design::from_parts(
            &request,
            self.classes.clone(),
            self.features.clone(),
            class_index,
        )
    }

    /// The file record.
    pub fn to_file(&self) -> ModelFile {
        let c = self.coefficients();
        let names: Vec<&str> = self.features.iter().map(|f| f.name.as_str()).collect();
        let named = |w: &[f64]| -> Value {
            let mut m = Map::new();
            for (n, v) in names.iter().zip(w) {
                m.insert(n.to_string(), num(*v));
            }
            Value::Object(m)
        };
        let (intercept, coefficients) = if self.loss == Loss::Softmax {
            let mut bi = Map::new();
            let mut co = Map::new();
            for (k, class) in self.classes.iter().enumerate() {
                bi.insert(class.clone(), num(c.intercepts[k]));
                co.insert(class.clone(), named(&c.weights[k]));
            }
            (Value::Object(bi), Value::Object(co))
        } else {
            (num(c.intercepts[0]), named(&c.weights[0]))
        };
        let mut standardization = Map::new();
        if self.standardize {
            for f in &self.features {
                let mut m = Map::new();
                m.insert("mean".into(), num(f.center));
                m.insert("std".into(), num(f.scale));
                standardization.insert(f.name.clone(), Value::Object(m));
            }
        }
        ModelFile {
            format: MODEL_FORMAT.to_string(),
            loss: self.loss.as_str().to_string(),
            target: self.target.clone(),
            weight: self.weight.clone(),
            classes: (self.loss == Loss::Softmax).then(|| self.classes.clone()),
            intercept,
            coefficients,
            standardization: Value::Object(standardization),
            penalty: self.penalty,
            fit: self.fit.clone(),
            features: self
                .features
                .iter()
                .map(|f| FeatureRecord {
                    name: f.name.clone(),
                    column: f.column.clone(),
                    missing_indicator: f.indicator,
                    mean: f.mean,
                    std: f.std,
                    impute: f.impute,
                })
                .collect(),
            missing: self.missing,
            internal: InternalRecord {
                standardized: self.standardize,
                reference_class: self.layout.reference,
                coefficients: self.internal[..self.layout.dense_dim()].to_vec(),
            },
            inference: self.inference.as_ref().map(InferenceTable::to_value),
            hashed: self
                .sparse
                .as_ref()
                .map(|s| crate::weights_file::record(s, self.sparse_weights())),
        }
    }

    /// The sparse weights (every group's, in order): the tail of `internal`.
    pub fn sparse_weights(&self) -> &[f64] {
        &self.internal[self.layout.dense_dim()..]
    }

    /// Writes the model file atomically.
    pub fn save(&self, path: &Path) -> Result<()> {
        let mut file = self.to_file();
        if let Some(h) = file.hashed.as_mut() {
            // Large weight vectors go to a binary file beside the model, written first.
            crate::weights_file::write_beside(path, h, self.sparse_weights())?;
        }
        let mut text = serde_json::to_string_pretty(&file)
            .map_err(|e| Error::internal(format!("cannot encode the model: {e}")))?;
        text.push('\n');
        atomic::write(path, text.as_bytes())
    }

    /// Reads a model file.
    pub fn load(path: &Path) -> Result<Model> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        Model::from_json_slice(&bytes, path)
    }

    /// Reads a model from the bytes of a model file; `path` only names the file in
    /// messages. Any bytes give a model or an [`Error`] of kind
    /// [`Format`](crate::ErrorKind::Format), never a panic (the fuzz target `model`
    /// calls this).
    pub fn from_json_slice(bytes: &[u8], path: &Path) -> Result<Model> {
        let value: Value = serde_json::from_slice(bytes).map_err(|e| {
            Error::format(format!(
                "{} is not a model file of outcore (not valid JSON: {e}); give the file that `outcore fit` wrote, or fit again",
                path.display()
            ))
        })?;
        match value.get("format").and_then(Value::as_str) {
            Some(MODEL_FORMAT) => {}
            Some(other) => {
                return Err(Error::format(format!(
                    "{} is a model of format '{other}'; this build reads '{MODEL_FORMAT}': use the build that wrote it, or fit again",
                    path.display()
                )))
            }
            None => {
                return Err(Error::format(format!(
                    "{} is not a model file of outcore (no \"format\" key); give the file that `outcore fit` wrote",
                    path.display()
                )))
            }
        }
        let file: ModelFile = serde_json::from_value(value).map_err(|e| {
            Error::format(format!(
                "the model file {} is damaged: {e}; fit the model again",
                path.display()
            ))
        })?;
        let sparse_weights = match &file.hashed {
            Some(h) => Some(crate::weights_file::read_beside(path, h)?),
            None => None,
        };
        Model::from_file(file, sparse_weights).map_err(|e| {
            Error::format(format!(
                "the model file {} is damaged: {}; fit the model again",
                path.display(),
                e.message()
            ))
        })
    }

    fn from_file(file: ModelFile, sparse_weights: Option<Vec<f64>>) -> Result<Model> {
        let loss = Loss::parse(&file.loss)?;
        let classes = file.classes.unwrap_or_default();
        if loss == Loss::Softmax && classes.len() < 2 {
            return Err(Error::format("a softmax model needs at least two classes"));
        }
        let standardize = file.internal.standardized;
        let features: Vec<Feature> = file
            .features
            .iter()
            .map(|f| {
                let (center, scale) = if standardize {
                    (f.mean, f.std)
                } else {
                    (0.0, 1.0)
                };
                Feature {
                    name: f.name.clone(),
                    column: f.column.clone(),
                    indicator: f.missing_indicator,
                    mean: f.mean,
                    std: f.std,
                    impute: f.impute,
                    center,
                    scale,
                }
            })
            .collect();
        if features
            .iter()
            .any(|f| f.scale.is_nan() || f.scale <= 0.0 || !f.center.is_finite())
        {
            return Err(Error::format("a feature has an invalid scale"));
        }
        let sparse = file
            .hashed
            .as_ref()
            .map(crate::weights_file::sparse_model)
            .transpose()?;
        let sparse_dim = match &sparse {
            Some(s) => {
                crate::features::hashing::SparseDesign::new(&s.request)
                    .map_err(|e| Error::format(e.message().to_string()))?
                    .dim
            }
            None => 0,
        };
        let layout = Layout::new(
            loss,
            features.len(),
            classes.len(),
            !file.internal.reference_class,
        )
        .with_sparse(sparse_dim);
        if file.internal.coefficients.len() != layout.dense_dim() {
            return Err(Error::format(format!(
                "it holds {} internal coefficients where {} features need {}",
                file.internal.coefficients.len(),
                features.len(),
                layout.dense_dim()
            )));
        }
        let mut internal = file.internal.coefficients;
        let tail = sparse_weights.unwrap_or_default();
        if tail.len() != layout.groups * layout.sparse {
            return Err(Error::format(format!(
                "it holds {} hashed weights where its hashing settings need {}",
                tail.len(),
                layout.groups * layout.sparse
            )));
        }
        internal.extend_from_slice(&tail);
        if internal.iter().any(|v| !v.is_finite()) {
            return Err(Error::format("a coefficient is not a finite number"));
        }
        if let Some(h) = &file.fit.holdout {
            crate::holdout::RowSplit::new(h.fraction, h.key.clone())
                .map_err(|_| Error::format("its holdout fraction is not between 0 and 1"))?;
        }
        let inference = file
            .inference
            .as_ref()
            .map(|v| InferenceTable::from_value(v, loss == Loss::Softmax))
            .transpose()?;
        Ok(Model {
            loss,
            target: file.target,
            weight: file.weight,
            classes,
            features,
            missing: file.missing,
            standardize,
            layout,
            internal,
            penalty: file.penalty,
            fit: file.fit,
            inference,
            sparse,
        })
    }
}

fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map_or(Value::Null, Value::Number)
}

/// One feature as stored in the model file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureRecord {
    /// Name of the coefficient.
    pub name: String,
    /// Source column.
    pub column: String,
    /// True for a missing-value indicator of `column`.
    #[serde(default)]
    pub missing_indicator: bool,
    /// Weighted training mean.
    pub mean: f64,
    /// Weighted training population standard deviation.
    pub std: f64,
    /// Value used in place of a null.
    pub impute: f64,
}

/// The internal coefficient vector, kept so a model can seed a new fit exactly.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InternalRecord {
    /// Whether the internal scale is standardized.
    pub standardized: bool,
    /// Softmax without penalty: the first class is the reference.
    #[serde(default)]
    pub reference_class: bool,
    /// The vector, groups of intercept then coefficients.
    pub coefficients: Vec<f64>,
}

/// The model file as written (DESIGN §6 keys, plus what scoring needs).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelFile {
    /// `outcore-model/1`.
    pub format: String,
    /// Loss name.
    pub loss: String,
    /// Target column.
    pub target: String,
    /// Weight column, if the fit had one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub weight: Option<String>,
    /// Softmax classes in order.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub classes: Option<Vec<String>>,
    /// Intercept (softmax: by class), original scale.
    pub intercept: Value,
    /// Coefficients by feature (softmax: by class, then feature), original scale.
    pub coefficients: Value,
    /// Mean and standard deviation used to standardize each feature.
    pub standardization: Value,
    /// Penalty strengths.
    pub penalty: Penalty,
    /// How the fit ended.
    pub fit: FitRecord,
    /// Features with their statistics, in coefficient order.
    pub features: Vec<FeatureRecord>,
    /// Missing-value policy.
    pub missing: MissingPolicy,
    /// The internal vector.
    pub internal: InternalRecord,
    /// Standard errors, statistics, p-values and intervals (only with `--inference`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub inference: Option<Value>,
    /// Hashing settings and where the hashed weights are (DESIGN §6 `hashed`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub hashed: Option<crate::weights_file::HashedRecord>,
}
