//! The fit driver: statistics pass, objective, optimizer loop with stop rules, and the
//! finished [`Model`].
//!
//! The driver calls back with [`FitEvent`]s (warnings, one record per iteration) so the
//! binary can print progress and the run directory can log it; it never prints.

use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};

use crate::cache::{CacheKey, CacheSlot, CacheStatus};
use crate::checkpoint::{self, Checkpoint, PartialPass, Progress, RunIdentity};
use crate::features::{self, Design, Feature, FeatureRequest, Summary};
use crate::holdout::HoldoutSettings;
use crate::model::{FitRecord, HoldoutRecord, Model, Penalty};
use crate::objective::glm::MidPassCheckpoints;
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
    /// Compute standard errors, statistics, p-values and intervals after the fit.
    #[serde(default)]
    pub inference: bool,
    /// Most dense features the coefficient table is computed for.
    #[serde(default = "default_inference_max_features")]
    pub inference_max_features: usize,
    /// Rows held out of the training and scored in every pass (`--holdout`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub holdout: Option<HoldoutSettings>,
    /// Most memory in MB for the per-shard gradient buffers (`--gradient-memory`).
    #[serde(default = "default_gradient_memory_mb")]
    pub gradient_memory_mb: f64,
    /// Where passes read their blocks from (`--cache DIR`, `--no-cache`).
    #[serde(default, skip_serializing_if = "CacheSetting::is_default")]
    pub cache: CacheSetting,
    /// `--precision f32`: feature values rounded to `f32` as they are read (half the
    /// traffic of `float64` data; changes the objective, so it is compared on resume).
    #[serde(default, skip_serializing_if = "std::ops::Not::not")]
    pub f32_values: bool,
}

/// Default bound of the per-shard gradient buffers, in MB.
pub const DEFAULT_GRADIENT_MEMORY_MB: f64 = 2048.0;

fn default_gradient_memory_mb() -> f64 {
    DEFAULT_GRADIENT_MEMORY_MB
}

/// Where the passes of a fit read their blocks from.
#[derive(Debug, Clone, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum CacheSetting {
    /// A block cache in the run directory (the default).
    #[default]
    Run,
    /// A block cache in this directory (`--cache DIR`), shared by fits on the same data.
    Dir(PathBuf),
    /// Parquet on every pass (`--no-cache`).
    Off,
}

impl CacheSetting {
    fn is_default(&self) -> bool {
        *self == CacheSetting::Run
    }

    /// The cache directory of a fit whose run directory is `run`.
    pub fn dir(&self, run: Option<&Path>) -> Option<PathBuf> {
        match self {
            CacheSetting::Run => run.map(Path::to_path_buf),
            CacheSetting::Dir(d) => Some(d.clone()),
            CacheSetting::Off => None,
        }
    }
}

fn default_inference_max_features() -> usize {
    crate::inference::DEFAULT_MAX_FEATURES
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
            inference: false,
            inference_max_features: default_inference_max_features(),
            holdout: None,
            gradient_memory_mb: DEFAULT_GRADIENT_MEMORY_MB,
            cache: CacheSetting::Run,
            f32_values: false,
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
        if let Some(h) = &self.holdout {
            h.validate()?;
        }
        if !(self.gradient_memory_mb.is_finite() && self.gradient_memory_mb > 0.0) {
            return Err(Error::usage(format!(
                "--gradient-memory must be a positive number of MB, not {}",
                self.gradient_memory_mb
            )));
        }
        if let Some(sparse) = &self.request.sparse {
            let design = crate::features::hashing::SparseDesign::new(sparse)?;
            if self.inference {
                return Err(Error::usage(
                    "--inference computes standard errors for dense models only; a model with \
                     hashed or sparse features has too many weights for an information matrix; \
                     fit without --inference (or without --categorical/--cross/--sparse-vector)",
                ));
            }
            // At least one group of sparse coordinates per shard (softmax needs more,
            // checked again once the classes are known).
            self.check_gradient_memory(1 + design.dim)?;
        }
        Ok(())
    }

    /// Refuses a fit whose per-shard gradient buffers (`shards × dim × 8` bytes) would
    /// exceed `--gradient-memory`.
    pub fn check_gradient_memory(&self, dim: usize) -> Result<()> {
        let shards = self.shard_count();
        let bytes = shards as f64 * dim as f64 * 8.0;
        let limit = self.gradient_memory_mb * 1024.0 * 1024.0;
        if bytes > limit {
            let bits = self.request.sparse.as_ref().map_or(0, |s| s.bits);
            return Err(Error::usage(format!(
                "the per-shard gradient buffers would take {:.0} MB ({shards} shards × {dim} \
                 coefficients × 8 bytes), over the limit of {:.0} MB; use fewer --hash-bits \
                 (now {bits}), fewer --threads or --shards, or raise --gradient-memory",
                bytes / (1024.0 * 1024.0),
                self.gradient_memory_mb
            )));
        }
        Ok(())
    }

    /// True when a ridge or lasso penalty is set.
    pub fn penalized(&self) -> bool {
        self.ridge > 0.0 || self.lasso > 0.0
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
    /// The holdout loss did not improve for `--holdout-patience` accepted iterations.
    HoldoutStalled,
}

impl FitStop {
    /// The stop reason as written in the model file.
    pub fn as_str(self) -> &'static str {
        match self {
            FitStop::Optimizer(s) => s.as_str(),
            FitStop::Separable => "separable",
            FitStop::HoldoutStalled => "holdout-stalled",
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
    /// Mean weighted loss of the held-out rows at this iterate (with `--holdout`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub holdout_loss: Option<f64>,
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
    /// Something worth a line for the user (how passes read the data, the cache's size,
    /// the memory of a sparse design).
    Note(&'a str),
    /// A resumed fit has read its checkpoint and goes on from this iteration.
    Resumed {
        /// Iterations done before the checkpoint.
        iteration: u64,
        /// Passes done before the checkpoint.
        passes: u64,
        /// True when the checkpoint holds the partial sums of a pass in progress, which
        /// the resumed fit continues instead of starting the pass again.
        pass_in_progress: bool,
    },
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
    /// The L-BFGS history pairs `(s, y)` at the end (for a warm start of a related fit).
    pub history: Vec<(Vec<f64>, Vec<f64>)>,
    /// How the passes read their blocks at the end.
    pub cache: CacheStatus,
}

/// How a fit is watched from outside: a cancel flag and where to checkpoint.
#[derive(Debug, Clone, Default)]
pub struct Control {
    /// Set by a signal handler: the fit stops at the next block boundary with an
    /// [`crate::ErrorKind::Interrupted`] error, its last checkpoint intact.
    pub cancel: Option<Arc<AtomicBool>>,
    /// Run directory to checkpoint into after every accepted iteration (none: no
    /// checkpoints).
    pub checkpoint_dir: Option<PathBuf>,
    /// Inside a long pass, also checkpoint the partial sums this often (none: only
    /// between iterations).
    pub checkpoint_every: Option<Duration>,
    /// Live pass counters (pass number, rows done) that a progress display may read from
    /// another thread; the driver never prints.
    pub progress: Option<Arc<crate::pass::PassCounter>>,
}

/// What may change when a fit is resumed: nothing that changes the objective.
#[derive(Debug, Clone, Default)]
pub struct ResumeOverrides {
    /// New total pass budget.
    pub max_passes: Option<u64>,
    /// New time budget in seconds (for the whole fit).
    pub max_seconds: Option<f64>,
    /// Threads for the passes.
    pub threads: Option<usize>,
}

/// The statistics and design of a fit, fixed after the statistics pass; saved in
/// checkpoints so a resumed fit needs no second statistics pass.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct DesignRecord {
    features: Vec<Feature>,
    classes: Vec<String>,
    rows: u64,
    rows_skipped: u64,
    weight_sum: f64,
    warnings: Vec<String>,
    /// Driver counters that are part of the fit's state (the separation watch).
    separated_iterations: u32,
    /// The holdout's size and the driver's watch of its loss (with `--holdout`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    holdout: Option<HoldoutWatch>,
    /// Most frequent values of each hashed feature (for reading the model).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    frequent: Vec<crate::weights_file::Frequent>,
}

/// The held-out rows and the best holdout loss so far; part of the fit's state, saved in
/// every checkpoint so that a resumed fit stops where the uninterrupted one would.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
struct HoldoutWatch {
    /// Held-out rows (with a target).
    rows: u64,
    /// Their weight.
    weight: f64,
    /// Holdout loss at the last accepted iterate (iteration 0: the starting point).
    last: Option<f64>,
    /// Lowest holdout loss so far and its iteration.
    best: Option<f64>,
    best_iteration: u64,
    /// Accepted iterations since the best.
    since_best: u64,
}

impl HoldoutWatch {
    /// Takes the holdout loss of accepted iteration `iteration`.
    fn observe(&mut self, iteration: u64, loss: Option<f64>) {
        self.last = loss;
        match loss {
            Some(h) if self.best.is_none_or(|b| h < b) => {
                self.best = Some(h);
                self.best_iteration = iteration;
                self.since_best = 0;
            }
            Some(_) => self.since_best += 1,
            // Not known (no held-out row): nothing to compare.
            None => {}
        }
    }
}

/// A fit in progress: data, design, objective layout and where it stands.
struct Session {
    data: Vec<String>,
    settings: FitSettings,
    source: Source,
    plan: PassPlan,
    design: Design,
    record: DesignRecord,
    layout: Layout,
    started: Instant,
    prior_seconds: f64,
    /// The last checkpoint saved between iterations; checkpoints inside a pass extend it.
    latest: Mutex<Option<Checkpoint>>,
    /// Which iterations get a checkpoint.
    pacer: Mutex<checkpoint::Pacer>,
    /// The block cache.
    cache: CacheSlot,
}

/// The settings that define the objective and the iterates (compared on resume).
fn objective_settings(settings: &FitSettings) -> serde_json::Value {
    let mut v = serde_json::json!({
        "request": settings.request,
        "ridge": settings.ridge,
        "lasso": settings.lasso,
        "tol": settings.tol,
        "history": settings.history,
        "block_rows": settings.block_rows,
    });
    // Only when set, so that checkpoints of fits without a holdout stay as they were.
    if let (Some(h), Some(map)) = (&settings.holdout, v.as_object_mut()) {
        map.insert(
            "holdout".to_string(),
            serde_json::to_value(h).unwrap_or(serde_json::Value::Null),
        );
    }
    if let (true, Some(map)) = (settings.f32_values, v.as_object_mut()) {
        map.insert("precision".to_string(), serde_json::json!("f32"));
    }
    v
}

/// The block cache of a fit: keyed by data and feature settings (never the penalty),
/// in the directory `settings.cache` names.
fn cache_slot(
    source: &Source,
    design: &Design,
    settings: &FitSettings,
    control: &Control,
) -> CacheSlot {
    let holdout = settings
        .holdout
        .as_ref()
        .map(|h| serde_json::json!({"fraction": h.fraction, "key": h.key}));
    let key = CacheKey::new(source, design, holdout);
    let dir = settings.cache.dir(control.checkpoint_dir.as_deref());
    CacheSlot::open(dir.as_deref(), key)
}

/// Passes the cache's notes on as events.
fn cache_notes(slot: &CacheSlot, events: &mut dyn FnMut(FitEvent<'_>)) {
    for note in slot.take_notes() {
        if note.warning {
            events(FitEvent::Warning(&note.text));
        } else {
            events(FitEvent::Note(&note.text));
        }
    }
}

impl Session {
    fn identity(&self) -> RunIdentity {
        RunIdentity {
            data: self.data.clone(),
            fingerprint: self.source.fingerprint(),
            shards: self.settings.shard_count(),
            objective_settings: objective_settings(&self.settings),
            design: serde_json::to_value(&self.record).unwrap_or(serde_json::Value::Null),
        }
    }

    /// The objective over the session's data and design.
    fn objective(&self) -> GlmObjective<'_> {
        GlmObjective::new(
            &self.source,
            &self.plan,
            &self.design,
            self.layout,
            self.settings.ridge,
            self.record.weight_sum,
        )
        .with_cache(&self.cache)
    }

    fn seconds(&self) -> f64 {
        self.prior_seconds + self.started.elapsed().as_secs_f64()
    }

    /// Writes the checkpoint of the optimizer's state (the last accepted iterate).
    fn save_checkpoint(
        &self,
        control: &Control,
        optimizer: &mut Optimizer,
        passes: u64,
    ) -> Result<()> {
        self.write_checkpoint(control, optimizer, passes, self.seconds())
    }

    fn write_checkpoint(
        &self,
        control: &Control,
        optimizer: &mut Optimizer,
        passes: u64,
        seconds: f64,
    ) -> Result<()> {
        let Some(dir) = &control.checkpoint_dir else {
            return Ok(());
        };
        let started = Instant::now();
        let progress = Progress { passes, seconds };
        if self.layout.sparse > 0 {
            // The state of a sparse fit is long (2·history + 2 vectors of all hashed
            // weights): lent to the checkpoint instead of copied, and not kept for
            // checkpoints inside a pass, which sparse fits therefore skip.
            let identity = self.identity();
            optimizer.with_state(|state| {
                let cp = Checkpoint {
                    identity,
                    progress,
                    state,
                    partial: None,
                };
                let saved = checkpoint::save(dir, &cp);
                (cp.state, saved)
            })?;
        } else {
            let cp = Checkpoint {
                identity: self.identity(),
                progress,
                state: optimizer.state().clone(),
                partial: None,
            };
            checkpoint::save(dir, &cp)?;
            if let Ok(mut latest) = self.latest.lock() {
                *latest = Some(cp);
            }
        }
        if let Ok(mut pacer) = self.pacer.lock() {
            pacer.wrote(started, Instant::now());
        }
        Ok(())
    }

    /// The checkpoint after an accepted iteration, written when the [`checkpoint::Pacer`]
    /// says it is due, else only remembered (written on an interruption). Tells the user
    /// once when checkpoints start being spaced out.
    fn checkpoint_iteration(
        &self,
        control: &Control,
        optimizer: &mut Optimizer,
        passes: u64,
        events: &mut dyn FnMut(FitEvent<'_>),
    ) -> Result<()> {
        if control.checkpoint_dir.is_none() {
            return Ok(());
        }
        let state = optimizer.state();
        let vectors = 2 + state.s.len() + state.y.len();
        let bytes = (vectors * state.x.len() * 8) as u64;
        let due = self
            .pacer
            .lock()
            .map(|p| p.due(Instant::now(), bytes))
            .unwrap_or(true);
        if due {
            return self.save_checkpoint(control, optimizer, passes);
        }
        let seconds = self.seconds();
        let (first, took) = match self.pacer.lock() {
            Ok(mut p) => (p.skip(passes, seconds), p.last_write()),
            Err(_) => (false, None),
        };
        if self.layout.sparse == 0 {
            // Checkpoints inside a pass extend this state.
            if let Ok(mut latest) = self.latest.lock() {
                *latest = Some(Checkpoint {
                    identity: self.identity(),
                    progress: Progress { passes, seconds },
                    state: optimizer.state().clone(),
                    partial: None,
                });
            }
        }
        if first {
            let took = took.unwrap_or_default().as_secs_f64();
            events(FitEvent::Note(&format!(
                "a checkpoint takes {took:.2}s to write; it is now written after an iteration only once {:.0}s have passed since the last one ({}x its cost), and on Ctrl-C",
                took * f64::from(checkpoint::PACE),
                checkpoint::PACE
            )));
        }
        Ok(())
    }

    /// Writes the checkpoint skipped last, if any (an interrupted fit). The optimizer
    /// still holds that iterate: a step that fails commits nothing to its state.
    fn save_pending(&self, control: &Control, optimizer: &mut Optimizer) -> Result<()> {
        let pending = self.pacer.lock().ok().and_then(|p| p.pending());
        match pending {
            Some((passes, seconds)) => self.write_checkpoint(control, optimizer, passes, seconds),
            None => Ok(()),
        }
    }
}

/// The pass plan of a fit: its shard count, threads, cancel flag and progress counter.
fn pass_plan(source: &Source, settings: &FitSettings, control: &Control) -> PassPlan {
    let mut plan = PassPlan::new(source, settings.shard_count(), settings.threads);
    plan.cancel = control.cancel.clone();
    plan.progress = control.progress.clone();
    plan
}

/// Saves the last accepted state (`latest`) together with a pass in progress.
fn session_save_partial(
    latest: &Mutex<Option<Checkpoint>>,
    pacer: &Mutex<checkpoint::Pacer>,
    control: &Control,
    partial: PartialPass,
) -> Result<()> {
    let Some(dir) = &control.checkpoint_dir else {
        return Ok(());
    };
    let Some(mut cp) = latest.lock().ok().and_then(|l| l.clone()) else {
        return Ok(());
    };
    cp.partial = Some(partial);
    checkpoint::save(dir, &cp)?;
    // The state of a skipped checkpoint is in it.
    if let Ok(mut p) = pacer.lock() {
        p.saved_elsewhere();
    }
    Ok(())
}

/// Fits a model on the Parquet files named by `data`.
pub fn fit(
    data: &[String],
    settings: &FitSettings,
    control: &Control,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<FitOutcome> {
    let prepared = prepare(data, settings, control, events)?;
    fit_prepared(&prepared, settings, &Start::default(), control, events)
}

/// The data opened and the statistics pass done: what a fit needs before its first
/// evaluation. Several fits that differ only in their penalty share one (`outcore path`).
#[derive(Debug, Clone)]
pub struct Prepared {
    data: Vec<String>,
    /// The settings it was prepared with (request, holdout, block size, shards).
    settings: FitSettings,
    source: Source,
    summary: Summary,
    design: Design,
    warnings: Vec<String>,
    started: Instant,
}

impl Prepared {
    /// The data, as opened.
    pub fn source(&self) -> &Source {
        &self.source
    }

    /// The fixed design of the statistics pass (with the holdout split, if any).
    pub fn design(&self) -> &Design {
        &self.design
    }

    /// When the preparation began.
    pub fn started(&self) -> Instant {
        self.started
    }

    /// What the statistics pass saw.
    pub fn summary(&self) -> &Summary {
        &self.summary
    }

    /// The coefficient layout of a fit with or without a penalty.
    pub fn layout(&self, penalized: bool) -> Layout {
        Layout::new(
            self.settings.request.loss,
            self.design.width(),
            self.design.classes.len(),
            penalized,
        )
        .with_sparse(self.design.sparse_dim())
    }

    /// The intercept-only starting point of a fit (the null model).
    pub fn null_point(&self, penalized: bool) -> Result<Vec<f64>> {
        starting_point(&self.design, &self.summary, self.layout(penalized))
    }

    /// The gradient of the unpenalized mean training loss at `x` on the internal
    /// (standardized) scale: one pass.
    pub fn gradient_at(&self, x: &[f64], penalized: bool, control: &Control) -> Result<Vec<f64>> {
        use crate::optim::Objective;
        let plan = pass_plan(&self.source, &self.settings, control);
        let mut objective = GlmObjective::new(
            &self.source,
            &plan,
            &self.design,
            self.layout(penalized),
            0.0,
            self.summary.weight_sum,
        );
        let mut grad = vec![0.0; x.len()];
        objective.eval(x, &mut grad)?;
        Ok(grad)
    }
}

/// Where a fit on [`Prepared`] data starts, and whether it counts the statistics pass.
#[derive(Debug, Clone, Default)]
pub struct Start {
    /// Internal coefficients to start from (a warm start); none: the null model.
    pub x: Option<Vec<f64>>,
    /// Leave the statistics pass out of this fit's pass count and time (it was counted
    /// by an earlier fit on the same [`Prepared`] data).
    pub statistics_counted: bool,
    /// L-BFGS history pairs `(s, y)` to start with instead of none (a warm start that
    /// also keeps the curvature learnt by an earlier fit); `y` must be gradient changes
    /// of this fit's smooth objective. Pairs with `sᵀy ≤ 0` are dropped.
    pub history: Vec<(Vec<f64>, Vec<f64>)>,
}

/// Opens the data and runs the statistics pass ([`FitEvent::Statistics`] and warnings
/// are reported here).
pub fn prepare(
    data: &[String],
    settings: &FitSettings,
    control: &Control,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<Prepared> {
    settings.validate()?;
    let started = Instant::now();
    let source = Source::open_with_block_rows(data, settings.block_rows)?;
    let request = &settings.request;
    let candidates = features::resolve_columns(&source, request)?;
    let split = settings.holdout.as_ref().map(|h| h.split()).transpose()?;
    if let Some(split) = &split {
        split.check_columns(&source)?;
    }
    let plan = pass_plan(&source, settings, control);
    let summary =
        features::collect_stats_split(&source, &plan, request, &candidates, split.as_ref())?;
    check_rows(&source, request, &summary)?;
    let (design, mut warnings) = Design::new(request, &summary)?;
    let design = design
        .with_holdout(split)
        .with_f32_values(settings.f32_values);
    if design.holdout().is_some() && summary.held_out_rows == 0 {
        warnings.push(
            "the holdout holds no row (the data are too few for the --holdout fraction); \
             no holdout loss is reported"
                .to_string(),
        );
    }
    // Refused before any event, so that a fit with nothing to fit writes nothing.
    if design.width() == 0 && design.sparse_dim() == 0 {
        return Err(Error::data(format!(
            "no usable feature is left in {}: every candidate ({}) is constant or empty in the rows used; name other columns with --features",
            describe_files(&source),
            candidates.join(", ")
        )));
    }
    events(FitEvent::Statistics {
        summary: &summary,
        features: design.width(),
        seconds: started.elapsed().as_secs_f64(),
    });
    for w in &warnings {
        events(FitEvent::Warning(w));
    }
    Ok(Prepared {
        data: data.to_vec(),
        settings: settings.clone(),
        source,
        summary,
        design,
        warnings,
        started,
    })
}

/// Fits on prepared data with `settings` (which may differ from the prepared ones only
/// in what does not change the data pass: penalties, tolerance, budgets, history,
/// threads), starting where `start` says.
pub fn fit_prepared(
    prepared: &Prepared,
    settings: &FitSettings,
    start: &Start,
    control: &Control,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<FitOutcome> {
    settings.validate()?;
    let base = &prepared.settings;
    if settings.request != base.request
        || settings.holdout != base.holdout
        || settings.block_rows != base.block_rows
        || settings.shard_count() != base.shard_count()
    {
        return Err(Error::internal(
            "a fit on prepared data changed the features, holdout, block size or shards",
        ));
    }
    let started = if start.statistics_counted {
        Instant::now()
    } else {
        prepared.started
    };
    let source = prepared.source.clone();
    let design = prepared.design.clone();
    let summary = &prepared.summary;
    let plan = pass_plan(&source, settings, control);
    let layout = prepared.layout(settings.penalized());
    let x0 = match &start.x {
        Some(x) if x.len() == layout.dim() => x.clone(),
        Some(x) => {
            return Err(Error::internal(format!(
                "a warm start of {} coefficients where the design needs {}",
                x.len(),
                layout.dim()
            )))
        }
        None => starting_point(&design, summary, layout)?,
    };
    if layout.sparse > 0 {
        settings.check_gradient_memory(layout.dim())?;
        let memory =
            crate::objective::sparse_kernel::gradient_memory(settings.shard_count(), layout);
        let note = format!(
            "sparse design: {} coefficients ({} sparse per output); per-shard gradient buffers {:.1} MB ({} shards), L-BFGS history {:.1} MB",
            layout.dim(),
            layout.sparse,
            memory as f64 / 1048576.0,
            settings.shard_count(),
            (2 * settings.history * layout.dim() * 8) as f64 / 1048576.0
        );
        events(FitEvent::Note(&note));
    }
    let record = DesignRecord {
        features: design.features.clone(),
        classes: design.classes.clone(),
        rows: summary.rows,
        rows_skipped: summary.skipped_target,
        weight_sum: summary.weight_sum,
        warnings: prepared.warnings.clone(),
        separated_iterations: 0,
        holdout: design.holdout().map(|_| HoldoutWatch {
            rows: summary.held_out_rows,
            weight: summary.held_out_weight,
            last: None,
            best: None,
            best_iteration: 0,
            since_best: 0,
        }),
        frequent: match &design.sparse {
            Some(s) => s
                .hashed
                .iter()
                .zip(&summary.frequent)
                .map(|(f, sk)| crate::weights_file::Frequent::of_sketch(&f.name, sk))
                .collect(),
            None => Vec::new(),
        },
    };
    let cache = cache_slot(&source, &design, settings, control);
    cache_notes(&cache, events);
    // A fresh start has every row at the same margin: its evaluation comes from the
    // statistics pass, not from a pass of its own.
    let known_start = (start.x.is_none() && crate::objective::start::used_by_fits(design.loss))
        .then(|| crate::objective::start::start_totals(&design, summary, layout, &x0))
        .flatten();
    let mut session = Session {
        data: prepared.data.clone(),
        settings: settings.clone(),
        source,
        plan,
        design,
        record,
        layout,
        started,
        prior_seconds: 0.0,
        latest: Mutex::new(None),
        pacer: Mutex::new(checkpoint::Pacer::default()),
        cache,
    };
    let optim_settings = optimizer_settings(settings, layout);
    let mut objective = session.objective();
    if let Some(totals) = known_start {
        objective = objective.with_start_totals(&x0, totals);
    }
    let optimizer = Optimizer::new(&mut objective, &x0, optim_settings);
    cache_notes(&session.cache, events);
    let mut optimizer = optimizer?;
    if let Some(place) = objective.last_extras().and_then(|e| e.overflow.clone()) {
        return Err(poisson_overflow(&place));
    }
    if !start.history.is_empty() {
        let mut state = optimizer.state().clone();
        for (s, y) in &start.history {
            let sy: f64 = s.iter().zip(y).map(|(a, b)| a * b).sum();
            if s.len() == layout.dim() && y.len() == layout.dim() && sy > 0.0 && sy.is_finite() {
                state.s.push(s.clone());
                state.y.push(y.clone());
            }
        }
        optimizer = Optimizer::from_state(state)?;
    }
    let statistics_pass = u64::from(!start.statistics_counted);
    let passes = statistics_pass + objective.passes();
    // The starting point is iteration 0 of the holdout watch.
    let start_holdout = objective.holdout_loss_at(&x0);
    drop(objective);
    if let Some(watch) = session.record.holdout.as_mut() {
        watch.observe(0, start_holdout);
    }
    session.save_checkpoint(control, &mut optimizer, passes)?;
    drive(&mut session, optimizer, passes, None, control, events)
}

/// What a resumed fit needs besides the checkpoint: the data and settings it started with.
#[derive(Debug, Clone)]
pub struct ResumeSource {
    /// Data paths of the fit.
    pub data: Vec<String>,
    /// Settings of the fit.
    pub settings: FitSettings,
}

/// Continues a fit from the checkpoint in `dir`, ending exactly where the uninterrupted
/// fit would have ended. Refuses, naming what changed, when the data or the settings
/// that define the objective differ from the checkpoint's. Returns the outcome and a
/// warning when the older checkpoint had to be used.
pub fn resume(
    dir: &Path,
    started_with: &ResumeSource,
    overrides: &ResumeOverrides,
    control: &Control,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<FitOutcome> {
    let started = Instant::now();
    let loaded = checkpoint::load(dir)?;
    if let Some(w) = &loaded.warning {
        events(FitEvent::Warning(w));
    }
    let cp = loaded.checkpoint;
    events(FitEvent::Resumed {
        iteration: cp.state.iterations,
        passes: cp.progress.passes,
        pass_in_progress: cp.partial.is_some(),
    });
    let mut settings = started_with.settings.clone();
    if overrides.max_passes.is_some() {
        settings.max_passes = overrides.max_passes;
    }
    if overrides.max_seconds.is_some() {
        settings.max_seconds = overrides.max_seconds;
    }
    if let Some(t) = overrides.threads {
        settings.threads = t;
    }
    // The shard count is part of the fit: keep the recorded one whatever the threads.
    settings.shards = Some(cp.identity.shards);
    settings.validate()?;
    let record: DesignRecord = serde_json::from_value(cp.identity.design.clone()).map_err(|e| {
        Error::format(format!(
            "the checkpoint in {} holds no usable feature design ({e}); start the fit again",
            dir.display()
        ))
    })?;
    let source = Source::open_with_block_rows(&cp.identity.data, settings.block_rows)?;
    let now = RunIdentity {
        data: cp.identity.data.clone(),
        fingerprint: source.fingerprint(),
        shards: settings.shard_count(),
        objective_settings: objective_settings(&settings),
        design: serde_json::Value::Null,
    };
    checkpoint::check_resume(&cp.identity, &now)?;
    let request = &settings.request;
    let class_index = record
        .classes
        .iter()
        .enumerate()
        .map(|(i, c)| (c.clone(), i))
        .collect();
    let split = settings.holdout.as_ref().map(|h| h.split()).transpose()?;
    if let Some(split) = &split {
        split.check_columns(&source)?;
    }
    let design = Design::from_parts(
        request,
        record.classes.clone(),
        record.features.clone(),
        class_index,
    )
    .with_holdout(split)
    .with_f32_values(settings.f32_values);
    let plan = pass_plan(&source, &settings, control);
    let cache = cache_slot(&source, &design, &settings, control);
    cache_notes(&cache, events);
    let layout = Layout::new(
        request.loss,
        design.width(),
        design.classes.len(),
        settings.penalized(),
    )
    .with_sparse(design.sparse_dim());
    let mut session = Session {
        data: cp.identity.data.clone(),
        settings: settings.clone(),
        source,
        plan,
        design,
        record,
        layout,
        started,
        prior_seconds: cp.progress.seconds,
        latest: Mutex::new(None),
        pacer: Mutex::new(checkpoint::Pacer::default()),
        cache,
    };
    let mut state = cp.state;
    if state.x.len() != layout.dim() {
        return Err(Error::format(format!(
            "the checkpoint in {} holds {} coefficients where the design needs {}; start the fit again",
            dir.display(),
            state.x.len(),
            layout.dim()
        )));
    }
    let budget = optimizer_settings(&settings, layout);
    state.settings.max_evals = budget.max_evals;
    state.settings.max_seconds = budget.max_seconds;
    let optimizer = Optimizer::from_state(state)?;
    // Later mid-pass checkpoints extend the state the fit resumed from (not for sparse
    // fits, whose state is not copied; see `Session::save_checkpoint`).
    if layout.sparse == 0 {
        session.latest = Mutex::new(Some(Checkpoint {
            identity: session.identity(),
            progress: cp.progress.clone(),
            state: optimizer.state().clone(),
            partial: None,
        }));
    }
    drive(
        &mut session,
        optimizer,
        cp.progress.passes,
        cp.partial,
        control,
        events,
    )
}

fn optimizer_settings(settings: &FitSettings, layout: Layout) -> Settings {
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
    Settings {
        history: settings.history,
        tol: settings.tol,
        max_evals: settings.max_passes.map(|p| p.saturating_sub(1)),
        max_seconds: settings.max_seconds,
        l1,
        ..Settings::default()
    }
}

/// The iteration loop shared by a fresh and a resumed fit.
fn drive(
    session: &mut Session,
    mut optimizer: Optimizer,
    passes_before: u64,
    partial: Option<PartialPass>,
    control: &Control,
    events: &mut dyn FnMut(FitEvent<'_>),
) -> Result<FitOutcome> {
    let settings = session.settings.clone();
    let request = &settings.request;
    let layout = session.layout;
    let penalized = settings.penalized();
    let separable_watch = !penalized && matches!(request.loss, Loss::Logistic | Loss::Softmax);
    let save_partial =
        |p: PartialPass| session_save_partial(&session.latest, &session.pacer, control, p);
    // Built from the fields, not `session.objective()`: the loop below updates
    // `session.record` while the objective borrows the data and design.
    let mut objective = GlmObjective::new(
        &session.source,
        &session.plan,
        &session.design,
        layout,
        settings.ridge,
        session.record.weight_sum,
    )
    .with_cache(&session.cache);
    if let (Some(every), Some(_)) = (control.checkpoint_every, &control.checkpoint_dir) {
        objective = objective.with_mid_pass_checkpoints(MidPassCheckpoints {
            every,
            save: &save_partial,
        });
    }
    if let Some(p) = partial {
        objective.resume_pass(p);
    }
    // The objective counts evaluation passes; the statistics pass comes first.
    let passes_now = |objective: &GlmObjective<'_>| passes_before + objective.passes();
    let mut log = Vec::new();
    let mut message = None;
    let stop = loop {
        let outcome = optimizer.step(&mut objective);
        cache_notes(&session.cache, events);
        let outcome = match outcome {
            Err(e) if e.kind() == crate::ErrorKind::Interrupted => {
                session.save_pending(control, &mut optimizer)?;
                return Err(e);
            }
            other => other?,
        };
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
        if let Some(it) = &last {
            // Held-out rows were scored in the pass that evaluated the accepted point.
            let holdout_loss = session
                .record
                .holdout
                .as_ref()
                .and_then(|_| objective.holdout_loss_at(optimizer.x()));
            if let Some(watch) = session.record.holdout.as_mut() {
                watch.observe(it.iteration, holdout_loss);
            }
            let record = IterationRecord {
                iteration: it.iteration,
                passes: passes_now(&objective),
                objective: it.f,
                gradient_max: it.gradient_max,
                step: it.step,
                seconds: session.prior_seconds + session.started.elapsed().as_secs_f64(),
                pairs_skipped: it.pairs_skipped,
                holdout_loss,
            };
            events(FitEvent::Iteration(&record));
            log.push(record);
        }
        if let Some(stop) = stopped {
            if stop == Stop::LineSearchFailed {
                if let Some(place) = objective.last_extras().and_then(|e| e.overflow.clone()) {
                    return Err(poisson_overflow(&place));
                }
                // No step was ever accepted and some trial overflowed: the overflow is
                // what stopped the line search.
                if optimizer.state().iterations == 0 {
                    if let Some(place) = objective.first_overflow() {
                        return Err(poisson_overflow(place));
                    }
                }
            }
            break FitStop::Optimizer(stop);
        }
        if separable_watch {
            let separated = objective.last_extras().is_some_and(|e| {
                e.x.as_slice() == optimizer.x() && e.wrong_share == 0.0 && e.mean_loss < 1e-2
            });
            session.record.separated_iterations = if separated {
                session.record.separated_iterations + 1
            } else {
                0
            };
            if session.record.separated_iterations >= 3 {
                message = Some(
                    "the classes look perfectly separable: every training row is classified \
                     correctly and the coefficients grow without bound, so there is no finite \
                     optimum; add a penalty such as --ridge 1e-4"
                        .to_string(),
                );
                break FitStop::Separable;
            }
        }
        if let (Some(patience), Some(watch)) = (
            settings.holdout.as_ref().and_then(|h| h.patience),
            &session.record.holdout,
        ) {
            if last.is_some() && watch.since_best >= patience {
                message = Some(holdout_stalled_message(
                    watch,
                    patience,
                    optimizer.state().iterations,
                ));
                break FitStop::HoldoutStalled;
            }
        }
        if last.is_some() {
            let passes = passes_now(&objective);
            session.checkpoint_iteration(control, &mut optimizer, passes, events)?;
        }
    };
    let mut warnings = session.record.warnings.clone();
    if stop.is_converged() && separable_watch {
        large_coefficient_warning(
            &session.design,
            optimizer.x(),
            layout,
            &mut warnings,
            events,
        );
    }
    // Identifiability of an unpenalized fit (collinear or duplicated columns): one extra
    // pass for the information matrix at the optimum, for narrow dense models only.
    // `--inference` factors the same matrix and warns by itself.
    // It stays within the budgets: not after a budget stop, nor past --max-passes.
    let mut check_passes = 0;
    let within_budget = !matches!(
        stop,
        FitStop::Optimizer(Stop::PassBudget | Stop::TimeBudget | Stop::Interrupted)
    ) && settings
        .max_passes
        .is_none_or(|m| passes_now(&objective) < m);
    if settings.ridge == 0.0
        && settings.lasso == 0.0
        && !settings.inference
        && stop != FitStop::Separable
        && within_budget
        && layout.width <= crate::inference::IDENTIFIABILITY_MAX_FEATURES
        // The check factors the dense information matrix; hashed coordinates are not in
        // it (it named the intercept for an unpenalized hashed fit).
        && layout.sparse == 0
    {
        let training = session.design.training_only();
        let req = crate::inference::Request {
            source: &session.source,
            plan: &session.plan,
            design: &training,
            layout,
            x: optimizer.x(),
            ridge: 0.0,
            lasso: 0.0,
            weight_sum: session.record.weight_sum,
            max_features: crate::inference::IDENTIFIABILITY_MAX_FEATURES,
            stop,
        };
        check_passes = 1;
        if let Some(w) = crate::inference::identifiability(&req)? {
            events(FitEvent::Warning(&w));
            warnings.push(w);
        }
    }
    // Standard errors: one extra pass at the optimum; a failure is a warning, not an error.
    let inferred = if settings.inference {
        // The information matrix of the training rows only.
        let training = session.design.training_only();
        let req = crate::inference::Request {
            source: &session.source,
            plan: &session.plan,
            design: &training,
            layout,
            x: optimizer.x(),
            ridge: settings.ridge,
            lasso: settings.lasso,
            weight_sum: session.record.weight_sum,
            max_features: settings.inference_max_features,
            stop,
        };
        let out = crate::inference::after_fit(&req)?;
        if let Some(w) = &out.warning {
            events(FitEvent::Warning(w));
            warnings.push(w.clone());
        }
        out
    } else {
        crate::inference::AfterFit::default()
    };
    let fit = FitRecord {
        stop: stop.as_str().to_string(),
        message,
        objective: optimizer.f(),
        gradient_max: optimizer.gradient_max(),
        tol: settings.tol,
        iterations: optimizer.state().iterations,
        passes: passes_now(&objective) + check_passes + inferred.passes,
        seconds: session.prior_seconds + session.started.elapsed().as_secs_f64(),
        rows: session.record.rows,
        weight_sum: session.record.weight_sum,
        rows_skipped: session.record.rows_skipped,
        data_fingerprint: session.source.fingerprint(),
        shards: settings.shard_count(),
        history: settings.history,
        warnings,
        holdout: holdout_record(&settings, session.record.holdout.as_ref(), || {
            objective.holdout_loss_at(optimizer.x())
        }),
    };
    let model = Model {
        loss: request.loss,
        target: request.target.clone(),
        weight: request.weight.clone(),
        classes: session.design.classes.clone(),
        features: session.design.features.clone(),
        missing: session.design.missing,
        standardize: session.design.standardize,
        layout,
        internal: optimizer.x().to_vec(),
        penalty: Penalty {
            ridge: settings.ridge,
            lasso: settings.lasso,
        },
        fit,
        inference: inferred.table,
        sparse: settings
            .request
            .sparse
            .as_ref()
            .map(|r| crate::model::SparseModel {
                request: r.clone(),
                frequent: session.record.frequent.clone(),
            }),
    };
    let history = optimizer
        .state()
        .s
        .iter()
        .cloned()
        .zip(optimizer.state().y.iter().cloned())
        .collect();
    Ok(FitOutcome {
        model,
        stop,
        log,
        history,
        cache: session.cache.status(),
    })
}

/// The data files for a message: the path of a single file, or the count and the first.
fn describe_files(source: &Source) -> String {
    match source.files() {
        [one] => one.path.display().to_string(),
        [first, rest @ ..] => format!(
            "the {} data files ({} and {} more)",
            rest.len() + 1,
            first.path.display(),
            rest.len()
        ),
        [] => "the data".to_string(),
    }
}

/// Refuses data that leave nothing to fit, naming the files and the column at fault:
/// no rows, no positive weight, a single row, a single class.
fn check_rows(source: &Source, request: &FeatureRequest, summary: &Summary) -> Result<()> {
    let data = describe_files(source);
    let hold = if source.files().len() == 1 {
        "holds"
    } else {
        "hold"
    };
    let target = &request.target;
    if summary.rows == 0 {
        return Err(Error::data(format!(
            "{data} {hold} no rows; there is nothing to fit; check the step that wrote them"
        )));
    }
    if summary.rows_weighted == 0 || summary.weight_sum <= 0.0 {
        return Err(Error::data(match &request.weight {
            _ if summary.skipped_target >= summary.rows => format!(
                "every row of {data} has a null target '{target}' (skipped); there is nothing to fit"
            ),
            Some(w) => format!(
                "every row of {data} has weight 0 in the weight column '{w}'; at least two rows need a positive weight"
            ),
            None => format!("{data} {hold} no usable row; there is nothing to fit"),
        }));
    }
    if summary.rows_weighted == 1 {
        return Err(Error::data(format!(
            "{data} {hold} only 1 row (with a positive weight and a target '{target}'); a model needs at least 2 rows whose features vary"
        )));
    }
    match request.loss {
        Loss::Logistic => {
            let pos = summary.class_weights.first().copied().unwrap_or(0.0);
            if pos <= 0.0 || pos >= summary.weight_sum {
                return Err(Error::data(format!(
                    "every row of the target '{target}' in {data} is {}; logistic regression needs both 0s and 1s",
                    if pos <= 0.0 { 0 } else { 1 }
                )));
            }
        }
        Loss::Softmax if summary.classes.len() < 2 => {
            return Err(Error::data(format!(
                "the target '{target}' in {data} has only one class ({}); softmax needs at least two",
                summary.classes.first().map(String::as_str).unwrap_or("none")
            )));
        }
        _ => {}
    }
    Ok(())
}

/// The holdout part of the model file.
fn holdout_record(
    settings: &FitSettings,
    watch: Option<&HoldoutWatch>,
    final_loss: impl FnOnce() -> Option<f64>,
) -> Option<HoldoutRecord> {
    let (h, watch) = (settings.holdout.as_ref()?, watch?);
    Some(HoldoutRecord {
        fraction: h.fraction,
        key: h.key.clone(),
        patience: h.patience,
        rows: watch.rows,
        weight: watch.weight,
        loss: final_loss().or(watch.last),
        best_loss: watch.best,
        best_iteration: watch.best_iteration,
    })
}

/// What a `holdout-stalled` stop means, with where the best holdout loss was.
fn holdout_stalled_message(watch: &HoldoutWatch, patience: u64, iteration: u64) -> String {
    let at = |v: Option<f64>| v.map_or_else(|| "unknown".to_string(), |v| format!("{v:.6e}"));
    let best_at = if watch.best_iteration == 0 {
        "the starting point (iteration 0)".to_string()
    } else {
        format!("iteration {}", watch.best_iteration)
    };
    format!(
        "the holdout loss has not improved for {patience} iterations: the best, {}, was at {best_at}; \
         this model is the last iterate (iteration {iteration}, holdout loss {}), which fits the \
         training rows more closely but predicts held-out rows worse; a stronger --ridge or \
         --lasso usually helps",
        at(watch.best),
        at(watch.last)
    )
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
            if mean.is_nan() || mean <= 0.0 {
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
