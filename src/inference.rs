//! Standard errors, z or t statistics, two-sided p-values and 95% intervals for dense
//! models, from one extra pass over the data at the optimum.
//!
//! The pass sums the information matrix `Σ w_i h_i x̃_i x̃_iᵀ` of the internal
//! (standardized) coefficients, intercept included, where `h_i` is the second derivative
//! of the loss at the fitted margin ([`loss::curvature`]; for softmax the per-row block
//! `w_i (diag(p) − p pᵀ)`). Every shard sums its blocks in data order and the shard sums
//! are added in shard order, so the table depends on data, settings and shard count
//! only. Weights are frequency weights: a row of weight 3 counts as three rows.
//!
//! With a ridge penalty the penalty's Hessian (`W · ridge` on the penalized coordinates,
//! the objective being the mean form times `W = Σ w_i`) is added and the numbers are
//! labelled *conditional on the penalty; approximate*. With a lasso penalty the table
//! covers the nonzero coefficients only, as if the zero ones were fixed at zero. For
//! squared loss the covariance is scaled by the residual variance
//! `σ² = Σ w r² / (W − q)` (`q` coefficients in the table, the intercept included) and
//! the statistic is Student's t with `W − q` degrees of freedom; the other losses use z.
//!
//! The matrix is equilibrated to unit diagonal and factored by Cholesky ([`nalgebra`]).
//! When a pivot `1 − R²` (of a column regressed on the columns before it, in the metric
//! of the information matrix) falls below [`COLLINEARITY_LIMIT`], the matrix is singular
//! or nearly so, and the error names that column and the earlier ones it is (almost) a
//! combination of. The covariance on the internal scale is mapped to the original scale
//! of the columns by the linear map of [`crate::model::Model::coefficients`]:
//! `β_j = β̃_j / s_j`, `b = b̃ − Σ β̃_j m_j / s_j`, as `A Σ Aᵀ`.

use nalgebra::DMatrix;
use serde_json::{Map, Value};
use statrs::distribution::{ContinuousCDF, Normal, StudentsT};

use crate::features::{Block, Design};
use crate::fit::FitStop;
use crate::model::Model;
use crate::objective::glm::margins;
use crate::objective::loss::{self, log_sum_exp, Loss};
use crate::objective::Layout;
use crate::pass::{self, PassPlan};
use crate::source::Source;
use crate::{Error, ErrorKind, Result};

/// Most dense features a table is computed for unless the user raises the limit.
pub const DEFAULT_MAX_FEATURES: usize = 2000;

/// Coverage of the intervals.
pub const LEVEL: f64 = 0.95;

/// A pivot `1 − R²` of the equilibrated information matrix below this marks it singular
/// or nearly so: the standard errors would carry fewer than about five correct digits.
pub const COLLINEARITY_LIMIT: f64 = 1e-10;

/// The note of a table computed with a penalty.
pub const PENALIZED_NOTE: &str = "conditional on the penalty; approximate";

/// Rows of a block multiplied at once (bounds the scratch memory per thread).
const CHUNK_ROWS: usize = 256;

/// Which reference distribution the statistics follow.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Statistic {
    /// Standard normal (logistic, Poisson, softmax).
    Z,
    /// Student's t with the residual degrees of freedom (squared loss).
    T,
}

impl Statistic {
    /// `"z"` or `"t"`, as in the model file.
    pub fn as_str(self) -> &'static str {
        match self {
            Statistic::Z => "z",
            Statistic::T => "t",
        }
    }
}

/// One row of the table: a coefficient or intercept on the original scale.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Entry {
    /// The estimate (as in the model file's coefficients).
    pub estimate: f64,
    /// Standard error.
    pub se: f64,
    /// `estimate / se` (z or t).
    pub stat: f64,
    /// Two-sided p-value.
    pub p: f64,
    /// Lower end of the 95% interval.
    pub low: f64,
    /// Upper end of the 95% interval.
    pub high: f64,
}

/// The table of one output (the only one, or one softmax class).
#[derive(Debug, Clone, PartialEq)]
pub struct OutputTable {
    /// Softmax class (none for single-output losses).
    pub class: Option<String>,
    /// The intercept.
    pub intercept: Entry,
    /// Coefficients by feature name, in feature order (with lasso: the nonzero ones).
    pub coefficients: Vec<(String, Entry)>,
}

/// The coefficient table of a model, stored under the model file's `inference` key.
#[derive(Debug, Clone, PartialEq)]
pub struct InferenceTable {
    /// z or t.
    pub statistic: Statistic,
    /// Degrees of freedom of t (squared loss).
    pub df: Option<f64>,
    /// Coverage of the intervals (0.95).
    pub level: f64,
    /// Caveats: penalty, lasso restriction, an unconverged fit.
    pub note: Option<String>,
    /// Softmax: the reference class whose coefficients are fixed at zero.
    pub reference_class: Option<String>,
    /// One table per output (softmax: per class but the reference).
    pub outputs: Vec<OutputTable>,
}

/// What the computation needs from a finished fit.
pub struct Request<'a> {
    /// The training data.
    pub source: &'a Source,
    /// Shards and threads of the fit.
    pub plan: &'a PassPlan,
    /// The fixed feature design of the fit.
    pub design: &'a Design,
    /// Coefficient layout.
    pub layout: Layout,
    /// The internal coefficient vector at the optimum.
    pub x: &'a [f64],
    /// Ridge strength (mean form).
    pub ridge: f64,
    /// Lasso strength (mean form).
    pub lasso: f64,
    /// `W = Σ w_i`.
    pub weight_sum: f64,
    /// Most features allowed (`--inference-max-features`).
    pub max_features: usize,
    /// How the fit stopped.
    pub stop: FitStop,
}

/// The result of [`after_fit`]: a table or the reason there is none.
#[derive(Debug, Clone, Default)]
pub struct AfterFit {
    /// The table, when it could be computed.
    pub table: Option<InferenceTable>,
    /// Full data passes made (0 or 1).
    pub passes: u64,
    /// Why there is no table (a warning for the user), or a caveat.
    pub warning: Option<String>,
}

/// Computes the table for a finished fit. A fit whose table cannot be computed
/// (singular information, too many features, separable data, …) still stands: the
/// reason comes back as a warning and the model is written without a table. Only an
/// interruption is an error.
pub fn after_fit(req: &Request<'_>) -> Result<AfterFit> {
    if req.stop == FitStop::Separable {
        return Ok(AfterFit {
            table: None,
            passes: 0,
            warning: Some(
                "no standard errors: the classes are separable, so the maximum-likelihood \
                 coefficients and their standard errors are infinite"
                    .to_string(),
            ),
        });
    }
    if let Err(e) = check(req) {
        return Ok(AfterFit {
            table: None,
            passes: 0,
            warning: Some(format!("no standard errors: {}", e.message())),
        });
    }
    match compute(req) {
        Ok(table) => Ok(AfterFit {
            table: Some(table),
            passes: 1,
            warning: None,
        }),
        Err(e) if e.kind() == ErrorKind::Interrupted => Err(e),
        Err(e) => Ok(AfterFit {
            table: None,
            passes: 1,
            warning: Some(format!("no standard errors: {}", e.message())),
        }),
    }
}

/// Refuses requests the table cannot serve, before any pass.
fn check(req: &Request<'_>) -> Result<()> {
    let width = req.layout.width;
    if width > req.max_features {
        return Err(Error::usage(format!(
            "the model has {width} features and standard errors are computed for at most {} \
             (the information matrix takes (features + 1)² numbers per shard); raise the limit \
             with --inference-max-features {width} or fit fewer features",
            req.max_features
        )));
    }
    if req.design.loss == Loss::Softmax && !req.layout.reference {
        return Err(Error::usage(
            "standard errors of a penalized softmax model are not available (its class \
             intercepts are only defined up to a common shift); fit it without a penalty, \
             which makes the first class the reference",
        ));
    }
    if req.x.len() != req.layout.dim() {
        return Err(Error::internal(format!(
            "the coefficient vector has {} values where the layout needs {}",
            req.x.len(),
            req.layout.dim()
        )));
    }
    if !(req.weight_sum.is_finite() && req.weight_sum > 0.0) {
        return Err(Error::data(
            "the sum of the weights is not a positive number",
        ));
    }
    Ok(())
}

/// Per-shard sums of the information pass.
#[derive(Clone)]
struct Sums {
    /// Information matrix over the whole internal vector (summed form).
    h: DMatrix<f64>,
    /// Squared loss: `Σ w r²`.
    rss: f64,
    /// First row with a non-finite curvature, as a message.
    bad: Option<String>,
    block: Block,
    z: Vec<f64>,
}

/// The information matrix over the whole internal vector (summed form, the ridge
/// Hessian added) and the weighted residual sum of squares, from one pass.
fn information(req: &Request<'_>) -> Result<(DMatrix<f64>, f64)> {
    let layout = req.layout;
    let design = req.design;
    let source = req.source;
    let dim = layout.dim();
    let x = req.x;
    let columns = design.training_columns();
    let shards = pass::run(
        source,
        req.plan,
        &columns,
        || Sums {
            h: DMatrix::zeros(dim, dim),
            rss: 0.0,
            bad: None,
            block: Block::default(),
            z: Vec::new(),
        },
        |acc, at| {
            let mut block = std::mem::take(&mut acc.block);
            design.build_block(source, &at, true, &mut block)?;
            accumulate(acc, &block, x, layout, design.loss, source);
            acc.block = block;
            Ok(())
        },
    )?;
    let mut h = DMatrix::<f64>::zeros(dim, dim);
    let mut rss = 0.0;
    for shard in &shards {
        if let Some(place) = &shard.bad {
            return Err(Error::data(format!(
                "the curvature of the loss is not a finite number at {place} (the fitted \
                 margin is too large); standard errors cannot be computed"
            )));
        }
        h += &shard.h;
        rss += shard.rss;
    }
    drop(shards);
    let w = req.weight_sum;
    if req.ridge > 0.0 {
        for i in 0..dim {
            if !layout.is_intercept(i) {
                h[(i, i)] += w * req.ridge;
            }
        }
    }
    Ok((h, rss))
}

/// Computes the table with one pass over the data. Errors (usage or data) say why no
/// table can be made; see [`after_fit`] for the fit's use.
pub fn compute(req: &Request<'_>) -> Result<InferenceTable> {
    check(req)?;
    let layout = req.layout;
    let design = req.design;
    let dim = layout.dim();
    let x = req.x;
    let w = req.weight_sum;
    let (h, rss) = information(req)?;
    // The coordinates in the table: intercepts, and every coefficient (with lasso: the
    // nonzero ones).
    let active: Vec<usize> = (0..dim)
        .filter(|&i| layout.is_intercept(i) || req.lasso == 0.0 || x[i] != 0.0)
        .collect();
    let q = active.len();
    let m = DMatrix::from_fn(q, q, |a, b| h[(active[a], active[b])]);
    drop(h);
    let names: Vec<String> = active.iter().map(|&i| coordinate_name(req, i)).collect();
    let cov_active = invert_information(m, &names)?;
    // Squared loss: residual variance and t.
    let (statistic, df, sigma2) = if design.loss == Loss::Squared {
        let df = w - q as f64;
        if df.is_nan() || df <= 0.0 {
            return Err(Error::data(format!(
                "the t statistics need more rows (weight sum {w}) than coefficients ({q}); \
                 there are no residual degrees of freedom"
            )));
        }
        (Statistic::T, Some(df), rss / df)
    } else {
        (Statistic::Z, None, 1.0)
    };
    // Position of each internal coordinate in the active set.
    let mut position = vec![usize::MAX; dim];
    for (a, &i) in active.iter().enumerate() {
        position[i] = a;
    }
    let cov = |i: usize, j: usize| sigma2 * cov_active[(position[i], position[j])];
    let critical = Critical::new(statistic, df)?;
    let features = &design.features;
    let mut outputs = Vec::with_capacity(layout.groups);
    for g in 0..layout.groups {
        let base = layout.intercept(g);
        // The intercept on the original scale: a · θ with a = e_b − Σ (m_j / s_j) e_j.
        let mut terms: Vec<(usize, f64)> = vec![(base, 1.0)];
        let mut intercept = x[base];
        let mut coefficients = Vec::new();
        for (j, f) in features.iter().enumerate() {
            let i = base + 1 + j;
            if position[i] == usize::MAX {
                continue;
            }
            let estimate = x[i] / f.scale;
            intercept -= estimate * f.center;
            terms.push((i, -f.center / f.scale));
            let se = (cov(i, i)).sqrt() / f.scale;
            coefficients.push((f.name.clone(), critical.entry(estimate, se)));
        }
        let mut var = 0.0;
        for &(i, ai) in &terms {
            for &(j, aj) in &terms {
                var += ai * aj * cov(i, j);
            }
        }
        let class = (design.loss == Loss::Softmax)
            .then(|| design.classes[layout.class_of_group(g)].clone());
        outputs.push(OutputTable {
            class,
            intercept: critical.entry(intercept, var.max(0.0).sqrt()),
            coefficients,
        });
    }
    let mut notes = Vec::new();
    if req.ridge > 0.0 || req.lasso > 0.0 {
        notes.push(PENALIZED_NOTE.to_string());
    }
    if req.lasso > 0.0 {
        let zero = layout.groups * layout.width + layout.groups - q;
        notes.push(format!(
            "lasso: only the {} nonzero coefficients are in the table, computed as if the {zero} \
             zero ones were fixed at zero",
            q - layout.groups
        ));
    }
    let reference_class = (design.loss == Loss::Softmax).then(|| design.classes[0].clone());
    if let Some(r) = &reference_class {
        notes.push(format!(
            "softmax: coefficients of each class relative to the reference class '{r}'"
        ));
    }
    if !req.stop.is_converged() {
        notes.push(format!(
            "the fit stopped before converging ({}); the numbers are at its last iterate",
            req.stop.as_str()
        ));
    }
    Ok(InferenceTable {
        statistic,
        df,
        level: LEVEL,
        note: (!notes.is_empty()).then(|| notes.join("; ")),
        reference_class,
        outputs,
    })
}

/// The name of an internal coordinate for messages.
fn coordinate_name(req: &Request<'_>, i: usize) -> String {
    let layout = req.layout;
    let g = i / (1 + layout.width);
    let j = i % (1 + layout.width);
    let name = if j == 0 {
        "(intercept)".to_string()
    } else {
        format!("'{}'", req.design.features[j - 1].name)
    };
    if req.design.loss == Loss::Softmax {
        format!(
            "{name} of class '{}'",
            req.design.classes[layout.class_of_group(g)]
        )
    } else {
        name
    }
}

/// Inverts the information matrix `m` (on the active coordinates named by `names`):
/// equilibrated to unit diagonal, Cholesky, singularity check, inverse.
fn invert_information(m: DMatrix<f64>, names: &[String]) -> Result<DMatrix<f64>> {
    let q = m.nrows();
    let mut inv_sqrt = vec![0.0; q];
    for a in 0..q {
        let d = m[(a, a)];
        if !(d.is_finite() && d > 0.0) {
            return Err(Error::data(format!(
                "the information matrix is singular: {} carries no information (its \
                 curvature-weighted sum of squares is {d}); drop that column",
                names[a]
            )));
        }
        inv_sqrt[a] = 1.0 / d.sqrt();
    }
    let e = DMatrix::from_fn(q, q, |a, b| m[(a, b)] * inv_sqrt[a] * inv_sqrt[b]);
    if e.iter().any(|v| !v.is_finite()) {
        return Err(Error::data(
            "the information matrix holds a value that is not a finite number",
        ));
    }
    let chol = nalgebra::Cholesky::new_with_substitute(e.clone(), f64::MIN_POSITIVE)
        .ok_or_else(|| Error::internal("the Cholesky factorization of the information failed"))?;
    let l = chol.l();
    for k in 0..q {
        let pivot = l[(k, k)] * l[(k, k)];
        if pivot < COLLINEARITY_LIMIT {
            return Err(collinearity(&l, &e, k, pivot, names));
        }
    }
    let e_inv = chol.inverse();
    Ok(DMatrix::from_fn(q, q, |a, b| {
        e_inv[(a, b)] * inv_sqrt[a] * inv_sqrt[b]
    }))
}

/// The error for a (nearly) singular information matrix whose pivot `k` is tiny.
fn collinearity(
    l: &DMatrix<f64>,
    e: &DMatrix<f64>,
    k: usize,
    pivot: f64,
    names: &[String],
) -> Error {
    let (what, residual) = describe_collinearity(l, e, k, pivot, names);
    Error::data(format!(
        "the information matrix is singular or nearly so ({residual} for {}): {what}; \
         standard errors are not defined. Drop one of these columns, or add a penalty such as \
         --ridge 1e-4 (the numbers are then conditional on it)",
        names[k]
    ))
}

/// What a tiny pivot `k` means: column `k` is (almost) a combination of the columns
/// before it, found from the leading factor (well conditioned, as its pivots passed);
/// returns that sentence and the `1 − R²` text.
fn describe_collinearity(
    l: &DMatrix<f64>,
    e: &DMatrix<f64>,
    k: usize,
    pivot: f64,
    names: &[String],
) -> (String, String) {
    let mut involved: Vec<(usize, f64)> = Vec::new();
    if k > 0 {
        let l11 = l.view((0, 0), (k, k)).clone_owned();
        let rhs = e.view((0, k), (k, 1)).clone_owned();
        let c = l11
            .solve_lower_triangular(&rhs)
            .and_then(|y| l11.tr_solve_lower_triangular(&y));
        if let Some(c) = c {
            let largest = c.iter().fold(0.0f64, |a, v| a.max(v.abs()));
            involved = c
                .iter()
                .enumerate()
                .filter(|(_, v)| v.abs() >= 0.1 * largest && v.abs() > 0.0)
                .map(|(j, v)| (j, v.abs()))
                .collect();
            involved.sort_by(|a, b| b.1.total_cmp(&a.1));
            involved.truncate(6);
        }
    }
    let others: Vec<&str> = involved.iter().map(|(j, _)| names[*j].as_str()).collect();
    let what = if others.is_empty() {
        format!(
            "{} is (almost) constant in the information metric",
            names[k]
        )
    } else {
        format!(
            "{} is (almost) a linear combination of {}",
            names[k],
            others.join(", ")
        )
    };
    let residual = if pivot < 1e-30 {
        "1 − R² ≈ 0".to_string()
    } else {
        format!("1 − R² = {pivot:.1e}")
    };
    (what, residual)
}

/// Most features the identifiability check of an unpenalized fit runs for: its pass
/// costs about `(features + 1)²` multiply-adds per row (a few ordinary passes at this
/// width); wider fits skip it.
pub const IDENTIFIABILITY_MAX_FEATURES: usize = 64;

/// The identifiability check of an unpenalized fit: one pass for the information
/// matrix at the optimum, equilibrated to unit diagonal and factored by Cholesky, as for
/// the standard errors. A pivot `1 − R²` below [`COLLINEARITY_LIMIT`] means a direction
/// of the coefficients that the data do not identify (collinear or duplicated columns):
/// the warning names the columns involved. `Ok(None)`: every direction is identified.
/// Only an interruption or a failed read is an error.
pub fn identifiability(req: &Request<'_>) -> Result<Option<String>> {
    if check(req).is_err() {
        return Ok(None);
    }
    let layout = req.layout;
    let dim = layout.dim();
    let (h, _) = match information(req) {
        Ok(v) => v,
        // Non-finite curvature: the separation and overflow checks speak for that.
        Err(e) if e.kind() == ErrorKind::Data => return Ok(None),
        Err(e) => return Err(e),
    };
    let names: Vec<String> = (0..dim).map(|i| coordinate_name(req, i)).collect();
    let mut inv_sqrt = vec![0.0; dim];
    for a in 0..dim {
        let d = h[(a, a)];
        if !(d.is_finite() && d > 0.0) {
            return Ok(Some(format!(
                "the coefficient of {} is not identified: that column carries no \
                 information in the rows used; drop it, or add --ridge",
                names[a]
            )));
        }
        inv_sqrt[a] = 1.0 / d.sqrt();
    }
    let full = DMatrix::from_fn(dim, dim, |a, b| h[(a, b)] * inv_sqrt[a] * inv_sqrt[b]);
    if full.iter().any(|v| !v.is_finite()) {
        return Ok(None);
    }
    // Each dependent column found is set aside and the rest factored again, so that
    // every dependence is named (at most a few).
    let mut active: Vec<usize> = (0..dim).collect();
    let mut found: Vec<(String, String, String)> = Vec::new();
    while found.len() < 4 {
        let q = active.len();
        let e = DMatrix::from_fn(q, q, |a, b| full[(active[a], active[b])]);
        let names_active: Vec<String> = active.iter().map(|&i| names[i].clone()).collect();
        let Some(chol) = nalgebra::Cholesky::new_with_substitute(e.clone(), f64::MIN_POSITIVE)
        else {
            break;
        };
        let l = chol.l();
        let Some(k) = (0..q).find(|&k| l[(k, k)] * l[(k, k)] < COLLINEARITY_LIMIT) else {
            break;
        };
        let pivot = l[(k, k)] * l[(k, k)];
        let (what, residual) = describe_collinearity(&l, &e, k, pivot, &names_active);
        found.push((names_active[k].clone(), what, residual));
        active.remove(k);
    }
    if found.is_empty() {
        return Ok(None);
    }
    let columns: Vec<&str> = found.iter().map(|(c, _, _)| c.as_str()).collect();
    let details: Vec<String> = found
        .iter()
        .map(|(c, what, residual)| format!("{what} ({residual} for {c})"))
        .collect();
    Ok(Some(format!(
        "the coefficients of {} are not identified by the data: {}; the split of the \
         effect between these columns is arbitrary, so drop the dependent ones, or add a \
         penalty such as --ridge 1e-4",
        columns.join(", "),
        details.join("; ")
    )))
}

/// Adds one block's information (and residual sum of squares) to the shard sums.
fn accumulate(
    acc: &mut Sums,
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
    let width = layout.width;
    let groups = layout.groups;
    let stride = 1 + width;
    margins(block, x, layout, &mut acc.z);
    // Row scales c[(g, h)][i] of the information blocks, group pair major.
    let pairs = groups * groups;
    let mut c = vec![0.0; pairs * n];
    match loss {
        Loss::Softmax => {
            let k = layout.classes;
            let mut m = vec![0.0; k];
            for i in 0..n {
                layout.class_margins(&acc.z, n, i, &mut m);
                let lse = log_sum_exp(&m);
                let w = block.weight(i);
                for g in 0..groups {
                    let pg = (m[layout.class_of_group(g)] - lse).exp();
                    for h in 0..groups {
                        let ph = (m[layout.class_of_group(h)] - lse).exp();
                        let delta = if g == h { pg } else { 0.0 };
                        c[(g * groups + h) * n + i] = w * (delta - pg * ph);
                    }
                }
            }
        }
        _ => {
            for i in 0..n {
                let zi = acc.z[i];
                let w = block.weight(i);
                let hi = loss::curvature(loss, zi);
                if !hi.is_finite() && acc.bad.is_none() {
                    acc.bad = Some(format!(
                        "row {} of {}",
                        block.first_row + i as u64 + 1,
                        source.files()[block.file].path.display()
                    ));
                }
                if loss == Loss::Squared {
                    let r = zi - block.y[i];
                    acc.rss += w * r * r;
                }
                c[i] = w * hi;
            }
        }
    }
    let mut start = 0;
    while start < n {
        let rows = CHUNK_ROWS.min(n - start);
        // Design rows of the chunk: [1, x̃_i].
        let zc = DMatrix::from_fn(rows, stride, |r, col| {
            if col == 0 {
                1.0
            } else {
                block.column(col - 1)[start + r]
            }
        });
        for g in 0..groups {
            for h in 0..groups {
                let scale = &c[(g * groups + h) * n + start..(g * groups + h) * n + start + rows];
                if scale.iter().all(|v| *v == 0.0) {
                    continue;
                }
                // (diag(c) Z)ᵀ, then H_gh += (diag(c) Z)ᵀ Z.
                let at = DMatrix::from_fn(stride, rows, |col, r| scale[r] * zc[(r, col)]);
                acc.h
                    .view_mut((g * stride, h * stride), (stride, stride))
                    .gemm(1.0, &at, &zc, 1.0);
            }
        }
        start += rows;
    }
}

/// Quantile and tail probabilities of the reference distribution.
struct Critical {
    statistic: Statistic,
    normal: Normal,
    t: Option<StudentsT>,
    quantile: f64,
}

impl Critical {
    fn new(statistic: Statistic, df: Option<f64>) -> Result<Critical> {
        let normal = Normal::new(0.0, 1.0)
            .map_err(|e| Error::internal(format!("the normal distribution: {e}")))?;
        let t = match (statistic, df) {
            (Statistic::T, Some(df)) => Some(StudentsT::new(0.0, 1.0, df).map_err(|e| {
                Error::data(format!(
                    "no t distribution with {df} degrees of freedom ({e})"
                ))
            })?),
            _ => None,
        };
        let upper = 0.5 + LEVEL / 2.0;
        let quantile = match &t {
            Some(t) => t.inverse_cdf(upper),
            None => normal.inverse_cdf(upper),
        };
        Ok(Critical {
            statistic,
            normal,
            t,
            quantile,
        })
    }

    fn entry(&self, estimate: f64, se: f64) -> Entry {
        let stat = estimate / se;
        let tail = match (&self.t, self.statistic) {
            (Some(t), Statistic::T) => t.sf(stat.abs()),
            _ => self.normal.sf(stat.abs()),
        };
        Entry {
            estimate,
            se,
            stat,
            p: (2.0 * tail).min(1.0),
            low: estimate - self.quantile * se,
            high: estimate + self.quantile * se,
        }
    }
}

fn num(v: f64) -> Value {
    serde_json::Number::from_f64(v).map_or(Value::Null, Value::Number)
}

impl Entry {
    fn to_value(self) -> Value {
        let mut m = Map::new();
        m.insert("estimate".into(), num(self.estimate));
        m.insert("se".into(), num(self.se));
        m.insert("stat".into(), num(self.stat));
        m.insert("p".into(), num(self.p));
        m.insert("low".into(), num(self.low));
        m.insert("high".into(), num(self.high));
        Value::Object(m)
    }

    fn from_value(v: &Value) -> Result<Entry> {
        let get = |key: &str| -> Result<f64> {
            match v.get(key) {
                Some(Value::Null) => Ok(f64::NAN),
                Some(x) => x.as_f64().ok_or_else(|| {
                    Error::format(format!("the inference entry '{key}' is not a number"))
                }),
                None => Err(Error::format(format!("an inference entry has no '{key}'"))),
            }
        };
        Ok(Entry {
            estimate: get("estimate").unwrap_or(f64::NAN),
            se: get("se")?,
            stat: get("stat")?,
            p: get("p")?,
            low: get("low")?,
            high: get("high")?,
        })
    }
}

fn coefficients_value(out: &OutputTable) -> Value {
    let mut m = Map::new();
    for (name, e) in &out.coefficients {
        m.insert(name.clone(), e.to_value());
    }
    Value::Object(m)
}

fn coefficients_from(v: &Value) -> Result<Vec<(String, Entry)>> {
    let obj = v
        .as_object()
        .ok_or_else(|| Error::format("inference.coefficients is not an object"))?;
    obj.iter()
        .map(|(k, e)| Ok((k.clone(), Entry::from_value(e)?)))
        .collect()
}

impl InferenceTable {
    /// The `inference` value of the model file (DESIGN §6): `intercept` and
    /// `coefficients` (softmax: by class) of `{estimate, se, stat, p, low, high}`, with
    /// `statistic`, `df`, `level`, `note` and `reference_class`.
    pub fn to_value(&self) -> Value {
        let mut m = Map::new();
        m.insert("statistic".into(), Value::from(self.statistic.as_str()));
        if let Some(df) = self.df {
            m.insert("df".into(), num(df));
        }
        m.insert("level".into(), num(self.level));
        if let Some(note) = &self.note {
            m.insert("note".into(), Value::from(note.as_str()));
        }
        if let Some(r) = &self.reference_class {
            m.insert("reference_class".into(), Value::from(r.as_str()));
        }
        if self.reference_class.is_some() {
            let mut bi = Map::new();
            let mut co = Map::new();
            for out in &self.outputs {
                let class = out.class.clone().unwrap_or_default();
                bi.insert(class.clone(), out.intercept.to_value());
                co.insert(class, coefficients_value(out));
            }
            m.insert("intercept".into(), Value::Object(bi));
            m.insert("coefficients".into(), Value::Object(co));
        } else if let Some(out) = self.outputs.first() {
            m.insert("intercept".into(), out.intercept.to_value());
            m.insert("coefficients".into(), coefficients_value(out));
        }
        Value::Object(m)
    }

    /// Reads the `inference` value of a model file; `softmax` says whether it is by class.
    pub fn from_value(v: &Value, softmax: bool) -> Result<InferenceTable> {
        let statistic = match v.get("statistic").and_then(Value::as_str) {
            Some("z") => Statistic::Z,
            Some("t") => Statistic::T,
            _ => {
                return Err(Error::format(
                    "inference.statistic is neither \"z\" nor \"t\"",
                ))
            }
        };
        let df = v.get("df").and_then(Value::as_f64);
        if statistic == Statistic::T && df.is_none() {
            return Err(Error::format("inference.statistic is t but there is no df"));
        }
        let level = v.get("level").and_then(Value::as_f64).unwrap_or(LEVEL);
        let note = v.get("note").and_then(Value::as_str).map(str::to_string);
        let reference_class = v
            .get("reference_class")
            .and_then(Value::as_str)
            .map(str::to_string);
        let intercept = v
            .get("intercept")
            .ok_or_else(|| Error::format("inference has no intercept"))?;
        let coefficients = v
            .get("coefficients")
            .ok_or_else(|| Error::format("inference has no coefficients"))?;
        let outputs = if softmax {
            let by_class = intercept
                .as_object()
                .ok_or_else(|| Error::format("inference.intercept is not by class"))?;
            by_class
                .iter()
                .map(|(class, b)| {
                    Ok(OutputTable {
                        class: Some(class.clone()),
                        intercept: Entry::from_value(b)?,
                        coefficients: coefficients_from(
                            coefficients.get(class).unwrap_or(&Value::Null),
                        )?,
                    })
                })
                .collect::<Result<Vec<_>>>()?
        } else {
            vec![OutputTable {
                class: None,
                intercept: Entry::from_value(intercept)?,
                coefficients: coefficients_from(coefficients)?,
            }]
        };
        Ok(InferenceTable {
            statistic,
            df,
            level,
            note,
            reference_class,
            outputs,
        })
    }

    /// The table as text lines (for `inspect`).
    pub fn table_lines(&self) -> Vec<String> {
        let mut lines = Vec::new();
        let stat = self.statistic.as_str();
        let mut head = format!(
            "coefficient table ({stat} statistics{}, {:.0}% intervals, original scale)",
            self.df.map_or(String::new(), |df| format!(" with {df} df")),
            self.level * 100.0
        );
        if let Some(note) = &self.note {
            head.push_str(&format!("\nnote: {note}"));
        }
        lines.extend(head.lines().map(str::to_string));
        for out in &self.outputs {
            let width = out
                .coefficients
                .iter()
                .map(|(n, _)| n.len())
                .max()
                .unwrap_or(0)
                .max(11);
            if let Some(class) = &out.class {
                lines.push(format!("class '{class}'"));
            }
            lines.push(format!(
                "{:<width$}  {:>13}  {:>11}  {:>9}  {:>9}  {:>13}  {:>13}",
                "term", "estimate", "std. error", stat, "p", "95% low", "95% high"
            ));
            let row = |name: &str, e: &Entry| {
                format!(
                    "{:<width$}  {:>13.6e}  {:>11.4e}  {:>9.3}  {:>9.3e}  {:>13.6e}  {:>13.6e}",
                    name, e.estimate, e.se, e.stat, e.p, e.low, e.high
                )
            };
            lines.push(row("(intercept)", &out.intercept));
            for (name, e) in &out.coefficients {
                lines.push(row(name, e));
            }
        }
        lines
    }
}

/// Computes the table for an existing model on its training data (one pass), for a
/// model fitted without `--inference`. The data must be the data the model was fitted
/// on: the fingerprint is compared with the model's.
pub fn for_model(
    model: &Model,
    source: &Source,
    threads: usize,
    max_features: usize,
) -> Result<AfterFit> {
    if source.fingerprint() != model.fit.data_fingerprint {
        return Err(Error::mismatch(
            "these data are not the data the model was fitted on (their fingerprint differs); \
             standard errors need the training data exactly as they were: the same files, unchanged",
        ));
    }
    let design = model.design_for_training();
    let plan = PassPlan::new(source, model.fit.shards, threads);
    let stop = if model.fit.stop == FitStop::Separable.as_str() {
        FitStop::Separable
    } else if model.fit.stop == "converged" {
        FitStop::Optimizer(crate::optim::Stop::Converged)
    } else {
        FitStop::Optimizer(crate::optim::Stop::PassBudget)
    };
    after_fit(&Request {
        source,
        plan: &plan,
        design: &design,
        layout: model.layout,
        x: &model.internal,
        ridge: model.penalty.ridge,
        lasso: model.penalty.lasso,
        weight_sum: model.fit.weight_sum,
        max_features,
        stop,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn table_round_trips_through_json() {
        let e = Entry {
            estimate: 1.5,
            se: 0.5,
            stat: 3.0,
            p: 0.0027,
            low: 0.52,
            high: 2.48,
        };
        let table = InferenceTable {
            statistic: Statistic::T,
            df: Some(9.0),
            level: LEVEL,
            note: Some(PENALIZED_NOTE.into()),
            reference_class: None,
            outputs: vec![OutputTable {
                class: None,
                intercept: e,
                coefficients: vec![("x".into(), e)],
            }],
        };
        let back = InferenceTable::from_value(&table.to_value(), false).unwrap();
        assert_eq!(back, table);
    }

    #[test]
    fn normal_entry_matches_known_quantiles() {
        let c = Critical::new(Statistic::Z, None).unwrap();
        let e = c.entry(1.959963984540054, 1.0);
        assert!((e.p - 0.05).abs() < 1e-9, "{}", e.p);
        assert!((e.low - 0.0).abs() < 1e-9);
    }

    #[test]
    fn duplicated_direction_is_named() {
        // Columns: intercept, a, b = a.
        let m = DMatrix::from_row_slice(3, 3, &[4.0, 1.0, 1.0, 1.0, 2.0, 2.0, 1.0, 2.0, 2.0]);
        let names = vec!["(intercept)".into(), "'a'".into(), "'b'".into()];
        let err = invert_information(m, &names).unwrap_err();
        assert!(
            err.message()
                .contains("'b' is (almost) a linear combination of 'a'"),
            "{}",
            err.message()
        );
    }
}
