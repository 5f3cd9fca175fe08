//! The fit driver: statistics pass, objective, optimizer loop with stop rules, and the
//! finished [`Model`].
//!
//! The driver calls back with [`FitEvent`]s (warnings, one record per iteration) so the
//! binary can print progress and the run directory can log it; it never prints.

use std::time::Instant;

use serde::{Deserialize, Serialize};

use crate::features::{self, Design, FeatureRequest, Summary};
use crate::model::{FitRecord, Model, Penalty};
use crate::objective::{GlmObjective, Layout, Loss};
use crate::optim::{Optimizer, Settings, StepOutcome, Stop};
use crate::pass::PassPlan;
use crate::source::{Source, DEFAULT_BLOCK_ROWS};
use crate::{Error, Result};

/// Everything that defines a fit besides the data paths.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FitSettings {
    /// Columns and their treatment.
    pub request: FeatureRequest,
    /// Ridge strength (`ridge / 2 · ‖β‖²`).
    pub ridge: f64,
    /// Lasso strength (`lasso · ‖β‖₁`).
    pub lasso: f64,
    /// Gradient tolerance (DESIGN §4).
    pub tol: f64,
    /// Most full data passes, the statistics pass included.
    pub max_passes: Option<u64>,
    /// Wall-clock budget in seconds.
    pub max_seconds: Option<f64>,
    /// L-BFGS history pairs.
    pub history: usize,
    /// Threads for the passes.
    pub threads: usize,
    /// Shards the data are cut into (default: the thread count).
    pub shards: Option<usize>,
    /// Rows per block.
    pub block_rows: usize,
}

impl FitSettings {
    /// Defaults of DESIGN §5 for a target and loss.
    pub fn new(request: FeatureRequest) -> FitSettings {
        FitSettings {
            request,
            ridge: 0.0,
            lasso: 0.0,
            tol: 1e-6,
            max_passes: None,
            max_seconds: None,
            history: 10,
            threads: default_threads(),
            shards: None,
            block_rows: DEFAULT_BLOCK_ROWS,
        }
    }

    /// Checks the numbers a user gave.
    pub fn validate(&self) -> Result<()> {
        let finite_non_negative = |v: f64, flag: &str| {
            if v.is_finite() && v >= 0.0 {
                Ok(())
            } else {
                Err(Error::usage(format!(
                    "{flag} must be a finite number of zero or more, not {v}"
                )))
            }
        };
        finite_non_negative(self.ridge, "--ridge")?;
        finite_non_negative(self.lasso, "--lasso")?;
        if !(self.tol.is_finite() && self.tol > 0.0) {
            return Err(Error::usage(format!(
                "--tol must be a positive number, not {}",
                self.tol
            )));
        }
        if self.history == 0 {
            return Err(Error::usage("--history must be at least 1"));
        }
        if self.threads == 0 {
            return Err(Error::usage("--threads must be at least 1"));
        }
        if self.shards == Some(0) {
            return Err(Error::usage("--shards must be at least 1"));
        }
        if self.max_passes.is_some_and(|p| p < 2) {
            return Err(Error::usage(
                "--max-passes must be at least 2 (the statistics pass and one evaluation)",
            ));
        }
        if let Some(s) = self.max_seconds {
            if !(s.is_finite() && s > 0.0) {
                return Err(Error::usage(format!(
                    "--max-seconds must be a positive number, not {s}"
                )));
            }
        }
        Ok(())
    }

    /// The shard count in force.
    pub fn shard_count(&self) -> usize {
        self.shards.unwrap_or(self.threads).max(1)
    }
}

/// All cores of the machine.
pub fn default_threads() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// Why a fit stopped: an optimizer stop, or separable data.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FitStop {
    /// A stop of the optimizer.
    Optimizer(Stop),
    /// Unpenalized logistic or softmax on data a hyperplane separates: the coefficients
    /// grow without bound.
    Separable,
}

impl FitStop {
    /// The stop reason as written in the model file.
    pub fn as_str(self) -> &'static str {
        match self {
            FitStop::Optimizer(s) => s.as_str(),
            FitStop::Separable => "separable",
        }
    }

    /// True only when the gradient test was met.
    pub fn is_converged(self) -> bool {
        self == FitStop::Optimizer(Stop::Converged)
    }
}

/// One line of the fit log.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct IterationRecord {
    /// Iterations done.
    pub iteration: u64,
    /// Full data passes so far, the statistics pass included.
    pub passes: u64,
    /// Objective (mean form, with penalties).
    pub objective: f64,
    /// `‖g‖∞`.
    pub gradient_max: f64,
    /// Accepted step length.
    pub step: f64,
    /// Seconds since the fit started.
    pub seconds: f64,
    /// History pairs skipped so far.
    pub pairs_skipped: u64,
}

/// What the driver reports while it works.
#[derive(Debug, Clone)]
pub enum FitEvent<'a> {
    /// The statistics pass is done.
    Statistics {
        /// What it saw.
        summary: &'a Summary,
        /// Features used.
        features: usize,
        /// Seconds it took.
        seconds: f64,
    },
    /// Something the user should know; the fit goes on.
    Warning(&'a str),
    /// An iteration was accepted.
    Iteration(&'a IterationRecord),
}

/// The result of a fit.
#[derive(Debug, Clone)]
pub struct FitOutcome {
    /// The model (written by the caller).
    pub model: Model,
    /// Why the fit stopped.
    pub stop: FitStop,
    /// The log, one record per iteration.
    pub log: Vec<IterationRecord>,
}

/// Fits a model on the Parquet files named by `data`.
pub fn fit(
    data: &[String],
    settings: &FitSettings,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<FitOutcome> {
    settings.validate()?;
    let started = Instant::now();
    let source = Source::open_with_block_rows(data, settings.block_rows)?;
    let request = &settings.request;
    let candidates = features::resolve_columns(&source, request)?;
    let plan = PassPlan::new(&source, settings.shard_count(), settings.threads);
    let summary = features::collect_stats(&source, &plan, request, &candidates)?;
    let (design, mut warnings) = Design::new(request, &summary)?;
    events(FitEvent::Statistics {
        summary: &summary,
        features: design.width(),
        seconds: started.elapsed().as_secs_f64(),
    });
    for w in &warnings {
        events(FitEvent::Warning(w));
    }
    if design.width() == 0 {
        return Err(Error::data(
            "no usable feature is left (every candidate is constant or empty); name other columns with --features",
        ));
    }
    let penalized = settings.ridge > 0.0 || settings.lasso > 0.0;
    let layout = Layout::new(
        request.loss,
        design.width(),
        design.classes.len(),
        penalized,
    );
    let x0 = starting_point(&design, &summary, layout)?;
    let mut l1 = Vec::new();
    if settings.lasso > 0.0 {
        l1 = (0..layout.dim())
            .map(|i| {
                if layout.is_intercept(i) {
                    0.0
                } else {
                    settings.lasso
                }
            })
            .collect();
    }
    let optim_settings = Settings {
        history: settings.history,
        tol: settings.tol,
        max_evals: settings.max_passes.map(|p| p.saturating_sub(1)),
        max_seconds: settings
            .max_seconds
            .map(|s| (s - started.elapsed().as_secs_f64()).max(0.0)),
        l1,
        ..Settings::default()
    };
    let mut objective = GlmObjective::new(
        &source,
        &plan,
        &design,
        layout,
        settings.ridge,
        summary.weight_sum,
    );
    let mut optimizer = Optimizer::new(&mut objective, &x0, optim_settings)?;
    if let Some(place) = objective.last_extras().and_then(|e| e.overflow.clone()) {
        return Err(poisson_overflow(&place));
    }
    let separable_watch = !penalized && matches!(request.loss, Loss::Logistic | Loss::Softmax);
    let mut separated_iterations = 0;
    let mut log = Vec::new();
    let mut message = None;
    let stop = loop {
        let outcome = optimizer.step(&mut objective)?;
        let (last, stopped) = match outcome {
            StepOutcome::Continue(it) => (Some(it), None),
            StepOutcome::Stopped {
                stop,
                last,
                message: m,
            } => {
                message = m;
                (last, Some(stop))
            }
        };
        if let Some(it) = last {
            let record = IterationRecord {
                iteration: it.iteration,
                passes: 1 + objective.passes(),
                objective: it.f,
                gradient_max: it.gradient_max,
                step: it.step,
                seconds: started.elapsed().as_secs_f64(),
                pairs_skipped: it.pairs_skipped,
            };
            events(FitEvent::Iteration(&record));
            log.push(record);
        }
        if let Some(stop) = stopped {
            if stop == Stop::LineSearchFailed {
                if let Some(place) = objective.last_extras().and_then(|e| e.overflow.clone()) {
                    return Err(poisson_overflow(&place));
                }
            }
            break FitStop::Optimizer(stop);
        }
        if separable_watch {
            let extras = objective.last_extras();
            let separated = extras.is_some_and(|e| {
                e.x.as_slice() == optimizer.x() && e.wrong_share == 0.0 && e.mean_loss < 1e-2
            });
            separated_iterations = if separated {
                separated_iterations + 1
            } else {
                0
            };
            if separated_iterations >= 3 {
                message = Some(
                    "the classes look perfectly separable: every training row is classified \
                     correctly and the coefficients grow without bound, so there is no finite \
                     optimum; add a penalty such as --ridge 1e-4"
                        .to_string(),
                );
                break FitStop::Separable;
            }
        }
    };
    if let FitStop::Optimizer(Stop::Converged) = stop {
        if separable_watch {
            large_coefficient_warning(&design, optimizer.x(), layout, &mut warnings, events);
        }
    }
    let fit = FitRecord {
        stop: stop.as_str().to_string(),
        message,
        objective: optimizer.f(),
        gradient_max: optimizer.gradient_max(),
        tol: settings.tol,
        iterations: optimizer.state().iterations,
        passes: 1 + objective.passes(),
        seconds: started.elapsed().as_secs_f64(),
        rows: summary.rows,
        weight_sum: summary.weight_sum,
        rows_skipped: summary.skipped_target,
        data_fingerprint: source.fingerprint(),
        shards: settings.shard_count(),
        history: settings.history,
        warnings,
    };
    let model = Model {
        loss: request.loss,
        target: request.target.clone(),
        weight: request.weight.clone(),
        classes: design.classes.clone(),
        features: design.features.clone(),
        missing: design.missing,
        standardize: design.standardize,
        layout,
        internal: optimizer.x().to_vec(),
        penalty: Penalty {
            ridge: settings.ridge,
            lasso: settings.lasso,
        },
        fit,
    };
    Ok(FitOutcome { model, stop, log })
}

fn poisson_overflow(place: &str) -> Error {
    Error::data(format!(
        "the Poisson margin overflows (e^z is too large for a float) at {place}; \
         standardize the features (drop --no-standardize) or add a --ridge penalty"
    ))
}

/// Standardized coefficients beyond this size mean odds ratios beyond e^20 per standard
/// deviation: in practice a sign of (quasi-)separation.
const LARGE_STANDARDIZED_COEFFICIENT: f64 = 20.0;

fn large_coefficient_warning(
    design: &Design,
    x: &[f64],
    layout: Layout,
    warnings: &mut Vec<String>,
    events: &mut dyn FnMut(FitEvent<'_>),
) {
    for g in 0..layout.groups {
        for (j, f) in design.features.iter().enumerate() {
            let v = x[layout.intercept(g) + 1 + j] * if design.standardize { 1.0 } else { f.std };
            if v.abs() > LARGE_STANDARDIZED_COEFFICIENT {
                let w = format!(
                    "the coefficient of '{}' is very large ({v:.1} per standard deviation); \
                     the data may be quasi-separable, consider --ridge",
                    f.name
                );
                events(FitEvent::Warning(&w));
                warnings.push(w);
                return;
            }
        }
    }
}

/// The null model: intercepts at their optimum for zero coefficients (exact when the
/// features are centred), everything else 0.
fn starting_point(design: &Design, summary: &Summary, layout: Layout) -> Result<Vec<f64>> {
    let mut x = vec![0.0; layout.dim()];
    let w = summary.weight_sum;
    match design.loss {
        Loss::Logistic => {
            let p = summary.class_weights[0] / w;
            x[0] = (p / (1.0 - p)).ln();
        }
        Loss::Squared => x[0] = summary.target.mean,
        Loss::Poisson => {
            let mean = summary.target.mean;
            if !(mean > 0.0) {
                return Err(Error::data(format!(
                    "every count of the target '{}' is 0; a Poisson model needs some positive counts",
                    design.target
                )));
            }
            x[0] = mean.ln();
        }
        Loss::Softmax => {
            let share = |c: usize| (summary.class_weights[c] / w).max(1e-12);
            for g in 0..layout.groups {
                let c = layout.class_of_group(g);
                x[layout.intercept(g)] = if layout.reference {
                    (share(c) / share(0)).ln()
                } else {
                    share(c).ln()
                };
            }
            if !layout.reference {
                let mean = (0..layout.groups)
                    .map(|g| x[layout.intercept(g)])
                    .sum::<f64>()
                    / layout.groups as f64;
                for g in 0..layout.groups {
                    x[layout.intercept(g)] -= mean;
                }
            }
        }
    }
    Ok(x)
}
