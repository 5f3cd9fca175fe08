//! The penalty path: one fit per strength of a geometric grid, strong to weak, each
//! warm-started from the solution before it, all on one opening of the data and one
//! statistics pass, judged by the loss of the held-out rows.
//!
//! Every fit goes through the same driver entry point as `outcore fit`
//! ([`fit::fit_prepared`]), so whatever the driver does for its passes (a block cache,
//! checkpoints, progress) every strength of the path does too.
//!
//! # What is measured and how the best strength is chosen
//!
//! The measure is the **holdout loss**: the mean weighted loss of the held-out rows
//! (`--holdout` is required), the same loss the fit minimizes without the penalty —
//! log-loss for logistic and softmax, half the squared error for squared, `e^z − y·z`
//! for Poisson. The driver scores held-out rows in the passes of the fit, so the loss at
//! each strength's optimum costs no extra pass.
//!
//! The standard error of that mean comes from one extra scoring pass over the data at
//! the end of the path, shared by all strengths: for each strength, the weighted
//! per-row losses `ℓ_i` of the held-out rows give `s² = Σ w_i (ℓ_i − ℓ̄)² / (W − 1)` with
//! `W = Σ w_i` (frequency weights: a row of weight 3 is three rows), and
//! `se = s / √W` (Welford's running form, so no cancellation).
//!
//! The best strength has the lowest holdout loss. With the one-standard-error rule the
//! chosen strength is the strongest one whose holdout loss is at most the best loss
//! plus the best strength's standard error.
//!
//! # Automatic start
//!
//! For lasso and elastic net the grid may start at the smallest strength where every
//! penalized coefficient is zero: at the intercept-only fit (the null model, optimal
//! for zero coefficients) the subgradient condition holds exactly when
//! `lasso ≥ max_j |∂L/∂β_j|`, the largest absolute gradient of the unpenalized mean
//! training loss on the standardized scale (one pass). For elastic net with lasso share
//! `mix`, the start is that value divided by `mix`.

use crate::features::Design;
use crate::fit::{self, Control, FitEvent, FitSettings, FitStop, IterationRecord, Prepared, Start};
use crate::model::Model;
use crate::objective::glm::margins;
use crate::objective::loss::{log_sum_exp, logistic, poisson, squared};
use crate::objective::{Layout, Loss};
use crate::source::Source;
use crate::{Error, Result};

/// Which penalty the strength scales.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum PenaltyKind {
    /// `ridge = λ`.
    Ridge,
    /// `lasso = λ`.
    Lasso,
    /// `lasso = mix · λ`, `ridge = (1 − mix) · λ`.
    Elastic {
        /// Share of the strength that goes to the lasso term (0 < mix < 1).
        mix: f64,
    },
}

impl PenaltyKind {
    /// Parses `ridge`, `lasso` or `elastic` (the latter with its mix).
    pub fn parse(name: &str, mix: Option<f64>) -> Result<PenaltyKind> {
        let kind = match name {
            "ridge" => PenaltyKind::Ridge,
            "lasso" => PenaltyKind::Lasso,
            "elastic" => {
                let mix = mix.ok_or_else(|| {
                    Error::usage("--penalty elastic needs --mix A, the lasso share (0 < A < 1)")
                })?;
                if !(mix > 0.0 && mix < 1.0) {
                    return Err(Error::usage(format!(
                        "--mix must lie strictly between 0 and 1, not {mix}"
                    )));
                }
                PenaltyKind::Elastic { mix }
            }
            other => {
                return Err(Error::usage(format!(
                    "unknown --penalty '{other}'; use ridge, lasso or elastic"
                )))
            }
        };
        if mix.is_some() && !matches!(kind, PenaltyKind::Elastic { .. }) {
            return Err(Error::usage("--mix only goes with --penalty elastic"));
        }
        Ok(kind)
    }

    /// The name used on the command line and in the table.
    pub fn as_str(self) -> &'static str {
        match self {
            PenaltyKind::Ridge => "ridge",
            PenaltyKind::Lasso => "lasso",
            PenaltyKind::Elastic { .. } => "elastic",
        }
    }

    /// `(ridge, lasso)` of strength `lambda`.
    pub fn split(self, lambda: f64) -> (f64, f64) {
        match self {
            PenaltyKind::Ridge => (lambda, 0.0),
            PenaltyKind::Lasso => (0.0, lambda),
            PenaltyKind::Elastic { mix } => ((1.0 - mix) * lambda, mix * lambda),
        }
    }
}

/// The strengths to fit.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Grid {
    /// `count` strengths from `start` to `end`, equally spaced on a log scale.
    Range {
        /// First (strongest) strength.
        start: f64,
        /// Last (weakest) strength.
        end: f64,
        /// How many.
        count: usize,
    },
    /// From the automatic start (all penalized coefficients zero) down to
    /// `start · span`.
    Auto {
        /// How many.
        count: usize,
        /// Last strength over first (0 < span < 1).
        span: f64,
    },
}

/// Most strengths of one path.
pub const MAX_GRID: usize = 1000;

impl Grid {
    /// Parses `START:END:COUNT` or `auto:COUNT`.
    pub fn parse(text: &str, span: Option<f64>) -> Result<Grid> {
        let bad = || {
            Error::usage(format!(
                "--grid '{text}' is not START:END:COUNT (e.g. 1:1e-4:20) or auto:COUNT (e.g. auto:20)"
            ))
        };
        let parts: Vec<&str> = text.split(':').map(str::trim).collect();
        let count_of = |s: &str| -> Result<usize> {
            let n: usize = s.parse().map_err(|_| bad())?;
            if n == 0 || n > MAX_GRID {
                return Err(Error::usage(format!(
                    "--grid asks for {n} strengths; give between 1 and {MAX_GRID}"
                )));
            }
            Ok(n)
        };
        let grid = match parts.as_slice() {
            ["auto", count] => {
                let span = span.unwrap_or(1e-3);
                if !(span > 0.0 && span < 1.0) {
                    return Err(Error::usage(format!(
                        "--span must lie strictly between 0 and 1 (last strength over first), not {span}"
                    )));
                }
                Grid::Auto {
                    count: count_of(count)?,
                    span,
                }
            }
            [start, end, count] => {
                let start: f64 = start.parse().map_err(|_| bad())?;
                let end: f64 = end.parse().map_err(|_| bad())?;
                for v in [start, end] {
                    if !(v.is_finite() && v > 0.0) {
                        return Err(Error::usage(format!(
                            "--grid strengths must be positive numbers, not {v}"
                        )));
                    }
                }
                Grid::Range {
                    start,
                    end,
                    count: count_of(count)?,
                }
            }
            _ => return Err(bad()),
        };
        if span.is_some() && matches!(grid, Grid::Range { .. }) {
            return Err(Error::usage(
                "--span only goes with --grid auto:COUNT (START:END:COUNT names its end)",
            ));
        }
        Ok(grid)
    }
}

/// The strengths from `start` to `end` (either order), strongest first, equally spaced in
/// `log λ`.
pub fn geometric(start: f64, end: f64, count: usize) -> Vec<f64> {
    let (hi, lo) = if start >= end {
        (start, end)
    } else {
        (end, start)
    };
    if count <= 1 {
        return vec![hi];
    }
    let ratio = (lo / hi).ln();
    (0..count)
        .map(|i| {
            if i == 0 {
                hi
            } else if i + 1 == count {
                lo
            } else {
                hi * (ratio * i as f64 / (count - 1) as f64).exp()
            }
        })
        .collect()
}

/// How the chosen strength is picked from the table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Rule {
    /// The lowest holdout loss.
    Best,
    /// The strongest strength within one standard error of the best.
    OneSe,
}

impl Rule {
    /// The name used in the table.
    pub fn as_str(self) -> &'static str {
        match self {
            Rule::Best => "lowest-holdout-loss",
            Rule::OneSe => "one-standard-error",
        }
    }
}

/// What a path does besides the fit settings.
#[derive(Debug, Clone, PartialEq)]
pub struct PathSettings {
    /// The penalty the strength scales.
    pub kind: PenaltyKind,
    /// The strengths.
    pub grid: Grid,
    /// Start each fit from the previous strength's solution (default); off: every fit
    /// starts from the null model (for comparisons).
    pub warm: bool,
    /// How to choose.
    pub rule: Rule,
}

/// One strength of the path, fitted.
#[derive(Debug, Clone)]
pub struct PathStep {
    /// Position in the grid (0: strongest).
    pub index: usize,
    /// The strength λ.
    pub strength: f64,
    /// The model (penalty, fit record and holdout loss inside).
    pub model: Model,
    /// Why its fit stopped.
    pub stop: FitStop,
    /// The fit's log.
    pub log: Vec<IterationRecord>,
    /// Non-zero penalized coefficients.
    pub nonzero: usize,
    /// Mean holdout loss at the solution (from the fit's own passes).
    pub holdout_loss: Option<f64>,
    /// Its standard error (from the scoring pass at the end; none until then).
    pub holdout_se: Option<f64>,
}

/// The whole path.
#[derive(Debug, Clone)]
pub struct PathOutcome {
    /// The strengths, strongest first.
    pub steps: Vec<PathStep>,
    /// Index of the lowest holdout loss.
    pub best: usize,
    /// Index chosen by the rule.
    pub chosen: usize,
    /// The automatic start, when the grid was automatic.
    pub auto_start: Option<f64>,
    /// Every data pass of the path: statistics, the automatic start's gradient, the
    /// fits' evaluations and the scoring pass of the standard errors.
    pub passes: u64,
    /// Passes of the fits alone (their evaluations; statistics pass not counted).
    pub fit_passes: u64,
    /// Wall-clock seconds of the whole path.
    pub seconds: f64,
}

/// What a path reports while it works.
#[derive(Debug)]
pub enum PathEvent<'a> {
    /// The grid is known (after the statistics pass, and the gradient pass of an
    /// automatic start).
    Grid {
        /// The strengths, strongest first.
        strengths: &'a [f64],
        /// The automatic start, if any.
        auto_start: Option<f64>,
    },
    /// A strength's fit begins.
    Begin {
        /// Its index.
        index: usize,
        /// Its strength.
        strength: f64,
    },
    /// An event of the current strength's fit (of the statistics pass for `index` 0
    /// before any `Begin`).
    Fit(usize, FitEvent<'a>),
    /// A strength's fit ended; the caller saves its model. An error stops the path.
    Done(&'a PathStep),
}

/// A strength's fit settings.
fn step_settings(base: &FitSettings, kind: PenaltyKind, strength: f64) -> FitSettings {
    let mut s = base.clone();
    (s.ridge, s.lasso) = kind.split(strength);
    s
}

/// Runs the path. `control.checkpoint_dir`, when set, is the root under which each
/// strength checkpoints into its own directory (see [`step_dir_name`]).
pub fn run_path(
    data: &[String],
    base: &FitSettings,
    path: &PathSettings,
    control: &Control,
    events: &mut dyn FnMut(PathEvent<'_>) -> Result<()>,
) -> Result<PathOutcome> {
    if base.holdout.is_none() {
        return Err(Error::usage(
            "outcore path judges each strength by the loss of held-out rows: pass --holdout FRACTION (e.g. --holdout 0.2)",
        ));
    }
    if matches!(path.grid, Grid::Auto { .. }) && path.kind == PenaltyKind::Ridge {
        return Err(Error::usage(
            "a ridge path has no strength where every coefficient is exactly zero, so it cannot start automatically; give --grid START:END:COUNT",
        ));
    }
    // The penalties of the first strength decide nothing in the preparation.
    let probe = step_settings(base, path.kind, 1.0);
    probe.validate()?;
    let mut pending: Option<crate::Error> = None;
    let prepared = fit::prepare(data, &probe, control, &mut |e| {
        if let Err(err) = events(PathEvent::Fit(0, e)) {
            pending.get_or_insert(err);
        }
    })?;
    if let Some(e) = pending.take() {
        return Err(e);
    }
    let mut passes = 1u64;
    let (strengths, auto_start) = match path.grid {
        Grid::Range { start, end, count } => (geometric(start, end, count), None),
        Grid::Auto { count, span } => {
            let start = auto_start(&prepared, path.kind, control)?;
            passes += 1;
            (geometric(start, start * span, count), Some(start))
        }
    };
    events(PathEvent::Grid {
        strengths: &strengths,
        auto_start,
    })?;
    let mut steps: Vec<PathStep> = Vec::with_capacity(strengths.len());
    let mut fit_passes = 0u64;
    let layout = prepared.layout(true);
    let mut pairs: Vec<(Vec<f64>, Vec<f64>)> = Vec::new();
    for (index, &strength) in strengths.iter().enumerate() {
        events(PathEvent::Begin { index, strength })?;
        let mut settings = step_settings(base, path.kind, strength);
        if let (fit::CacheSetting::Run, Some(root)) = (&settings.cache, &control.checkpoint_dir) {
            // One block cache for every strength (its key leaves the penalty out), beside
            // their run directories, instead of one per strength.
            settings.cache = fit::CacheSetting::Dir(root.clone());
        }
        let (x, history) = match (path.warm, steps.last()) {
            (true, Some(prev)) => (
                Some(predicted_start(&steps, strength, layout)),
                carried_history(&pairs, prev.model.penalty.ridge, settings.ridge, layout),
            ),
            _ => (None, Vec::new()),
        };
        let start = Start {
            x,
            statistics_counted: index > 0,
            history,
        };
        let mut step_control = control.clone();
        step_control.checkpoint_dir = control
            .checkpoint_dir
            .as_ref()
            .map(|root| root.join(step_dir_name(index)));
        let mut pending: Option<crate::Error> = None;
        let outcome = fit::fit_prepared(&prepared, &settings, &start, &step_control, &mut |e| {
            if let Err(err) = events(PathEvent::Fit(index, e)) {
                pending.get_or_insert(err);
            }
        })?;
        if let Some(e) = pending.take() {
            return Err(e);
        }
        pairs = outcome.history.clone();
        let evaluations = outcome.model.fit.passes - u64::from(index == 0);
        fit_passes += evaluations;
        passes += evaluations;
        let step = PathStep {
            index,
            strength,
            nonzero: nonzero(&outcome.model),
            holdout_loss: outcome.model.fit.holdout.as_ref().and_then(|h| h.loss),
            holdout_se: None,
            stop: outcome.stop,
            log: outcome.log,
            model: outcome.model,
        };
        events(PathEvent::Done(&step))?;
        steps.push(step);
    }
    // One scoring pass for the standard errors of every strength.
    let internals: Vec<&[f64]> = steps.iter().map(|s| s.model.internal.as_slice()).collect();
    let scored = holdout_losses(prepared.source(), prepared.design(), layout, &internals)?;
    passes += 1;
    for (step, acc) in steps.iter_mut().zip(&scored) {
        step.holdout_se = acc.se();
        // The fit's own figure stays (it is the one in the model file); the scoring pass
        // fills it only where the fit had none.
        if step.holdout_loss.is_none() {
            step.holdout_loss = acc.mean();
        }
    }
    let losses: Vec<Option<f64>> = steps.iter().map(|s| s.holdout_loss).collect();
    let ses: Vec<Option<f64>> = steps.iter().map(|s| s.holdout_se).collect();
    let (best, chosen) = choose(&losses, &ses, path.rule).ok_or_else(|| {
        Error::data(
            "no strength has a holdout loss (the holdout holds no row); use a larger --holdout or more data",
        )
    })?;
    Ok(PathOutcome {
        steps,
        best,
        chosen,
        auto_start,
        passes,
        fit_passes,
        seconds: prepared_seconds(&prepared),
    })
}

/// The start of the next strength: the previous solution, moved along the secant of
/// the last two solutions in `log λ` (a first-order predictor of the solution path).
/// With lasso a coordinate is moved only when it is non-zero in both, so exact zeros stay
/// zero unless the fit moves them; the secant is also dropped for coordinates where it
/// would flip a sign.
fn predicted_start(steps: &[PathStep], strength: f64, layout: Layout) -> Vec<f64> {
    let last = &steps[steps.len() - 1];
    let mut x = last.model.internal.clone();
    let Some(before) = steps.len().checked_sub(2).map(|i| &steps[i]) else {
        return x;
    };
    let t = (strength.ln() - last.strength.ln()) / (last.strength.ln() - before.strength.ln());
    if !(t.is_finite() && t > 0.0) {
        return x;
    }
    let (a, b) = (&before.model.internal, &last.model.internal);
    for i in 0..x.len() {
        let moved = b[i] + t * (b[i] - a[i]);
        let lasso_zero = last.model.penalty.lasso > 0.0 && (a[i] == 0.0 || b[i] == 0.0);
        if !layout.is_intercept(i) && lasso_zero {
            continue;
        }
        if moved.is_finite() && (moved * b[i] > 0.0 || layout.is_intercept(i)) {
            x[i] = moved;
        }
    }
    x
}

/// The previous strength's L-BFGS pairs for the next one. The loss part of the
/// objective is the same; only the ridge term `ridge/2 · ‖β‖²` changes, whose gradient
/// change along a step `s` is `ridge · s` on the penalized coordinates, so each `y`
/// gains `(new − old) · s` there and the pairs stay exact gradient changes of the new
/// objective (lasso pairs are of the smooth part and carry over unchanged).
fn carried_history(
    pairs: &[(Vec<f64>, Vec<f64>)],
    old_ridge: f64,
    new_ridge: f64,
    layout: Layout,
) -> Vec<(Vec<f64>, Vec<f64>)> {
    let delta = new_ridge - old_ridge;
    pairs
        .iter()
        .map(|(s, y)| {
            let y = y
                .iter()
                .zip(s)
                .enumerate()
                .map(|(i, (yi, si))| {
                    if layout.is_intercept(i) {
                        *yi
                    } else {
                        yi + delta * si
                    }
                })
                .collect();
            (s.clone(), y)
        })
        .collect()
}

fn prepared_seconds(prepared: &Prepared) -> f64 {
    prepared.started().elapsed().as_secs_f64()
}

/// The directory name of strength `index` (under the path's run root and model folder).
pub fn step_dir_name(index: usize) -> String {
    format!("s{:03}", index + 1)
}

/// Best and chosen index by `rule`: the lowest loss; with [`Rule::OneSe`] the first
/// (strongest) index whose loss is within the best's standard error of the best.
pub fn choose(losses: &[Option<f64>], ses: &[Option<f64>], rule: Rule) -> Option<(usize, usize)> {
    let mut best: Option<(usize, f64)> = None;
    for (i, l) in losses.iter().enumerate() {
        if let Some(l) = *l {
            if best.is_none_or(|(_, b)| l < b) {
                best = Some((i, l));
            }
        }
    }
    let (bi, bl) = best?;
    let chosen = match rule {
        Rule::Best => bi,
        Rule::OneSe => {
            let limit = bl + ses.get(bi).copied().flatten().unwrap_or(0.0);
            losses
                .iter()
                .position(|l| l.is_some_and(|l| l <= limit))
                .unwrap_or(bi)
        }
    };
    Some((bi, chosen))
}

/// Non-zero penalized (non-intercept) coefficients of a model.
pub fn nonzero(model: &Model) -> usize {
    let l = model.layout;
    (0..l.dim())
        .filter(|&i| !l.is_intercept(i) && model.internal[i] != 0.0)
        .count()
}

/// The automatic start: the largest |gradient| of the unpenalized mean training loss
/// over the penalized coefficients at the null model, divided by the lasso share.
fn auto_start(prepared: &Prepared, kind: PenaltyKind, control: &Control) -> Result<f64> {
    let x0 = prepared.null_point(true)?;
    let g = prepared.gradient_at(&x0, true, control)?;
    let layout = prepared.layout(true);
    let top = (0..layout.dim())
        .filter(|&i| !layout.is_intercept(i))
        .map(|i| g[i].abs())
        .fold(0.0, f64::max);
    let share = match kind {
        PenaltyKind::Elastic { mix } => mix,
        _ => 1.0,
    };
    if !(top.is_finite() && top > 0.0) {
        return Err(Error::data(
            "the loss does not change with any feature at the intercept-only model, so there is no automatic start; give --grid START:END:COUNT",
        ));
    }
    Ok(top / share)
}

/// Weighted mean and spread of per-row losses (Welford's update with weights).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct LossSpread {
    /// Rows seen.
    pub rows: u64,
    /// Their weight.
    pub weight: f64,
    mean: f64,
    m2: f64,
}

impl LossSpread {
    /// Adds a row of loss `l` and weight `w`.
    pub fn push(&mut self, l: f64, w: f64) {
        if w <= 0.0 {
            return;
        }
        self.rows += 1;
        self.weight += w;
        let d = l - self.mean;
        self.mean += d * w / self.weight;
        self.m2 += w * d * (l - self.mean);
    }

    /// The weighted mean loss.
    pub fn mean(&self) -> Option<f64> {
        (self.weight > 0.0).then_some(self.mean)
    }

    /// The standard error of the mean, frequency weights (`W − 1` degrees of freedom).
    pub fn se(&self) -> Option<f64> {
        (self.weight > 1.0).then(|| (self.m2 / (self.weight - 1.0) / self.weight).sqrt())
    }
}

/// One row's loss with margins `z` (one per group) and label `y`.
fn row_loss(loss: Loss, layout: Layout, z: &[f64], y: f64, scratch: &mut Vec<f64>) -> f64 {
    match loss {
        Loss::Logistic => logistic(z[0], y).0,
        Loss::Squared => squared(z[0], y).0,
        Loss::Poisson => poisson(z[0], y).0,
        Loss::Softmax => {
            scratch.clear();
            if layout.reference {
                scratch.push(0.0);
            }
            scratch.extend_from_slice(z);
            log_sum_exp(scratch) - scratch[y as usize]
        }
    }
}

/// Per-strength loss spread over the held-out rows of `design`, one sequential pass.
pub fn holdout_losses(
    source: &Source,
    design: &Design,
    layout: Layout,
    models: &[&[f64]],
) -> Result<Vec<LossSpread>> {
    let mut out = vec![LossSpread::default(); models.len()];
    let columns: Vec<String> = design
        .training_columns()
        .into_iter()
        .map(str::to_string)
        .collect();
    let columns: Vec<&str> = columns.iter().map(String::as_str).collect();
    let mut block = crate::features::Block::default();
    let mut z = Vec::new();
    let mut row_z = vec![0.0; layout.groups];
    let mut scratch = Vec::new();
    source.read_all(&columns, |at| {
        design.build_block(source, &at, true, &mut block)?;
        let n = block.rows;
        if !(0..n).any(|i| block.is_held_out(i)) {
            return Ok(());
        }
        for (x, acc) in models.iter().zip(out.iter_mut()) {
            margins(&block, x, layout, &mut z);
            for i in 0..n {
                if !block.is_held_out(i) {
                    continue;
                }
                for (g, zg) in row_z.iter_mut().enumerate() {
                    *zg = z[g * n + i];
                }
                let l = row_loss(design.loss, layout, &row_z, block.y[i], &mut scratch);
                acc.push(l, block.weight(i));
            }
        }
        Ok(())
    })?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grid_is_geometric_strong_to_weak() {
        let g = geometric(1e-4, 1.0, 5);
        assert_eq!(g.len(), 5);
        assert_eq!(g[0], 1.0);
        assert_eq!(g[4], 1e-4);
        for w in g.windows(2) {
            assert!((w[1] / w[0] - 0.1).abs() < 1e-12);
        }
        assert_eq!(geometric(3.0, 1.0, 1), vec![3.0]);
    }

    #[test]
    fn grid_parsing() {
        assert_eq!(
            Grid::parse("1:1e-3:4", None).unwrap(),
            Grid::Range {
                start: 1.0,
                end: 1e-3,
                count: 4
            }
        );
        assert_eq!(
            Grid::parse("auto:10", Some(1e-2)).unwrap(),
            Grid::Auto {
                count: 10,
                span: 1e-2
            }
        );
        for bad in ["1:2", "0:1:3", "1:1e-3:0", "auto:x", "a:b:c", "1:-1:3"] {
            assert!(Grid::parse(bad, None).is_err(), "{bad}");
        }
        assert!(Grid::parse("auto:5", Some(2.0)).is_err());
        assert!(Grid::parse("1:1e-3:4", Some(0.1)).is_err());
    }

    #[test]
    fn one_standard_error_rule_takes_the_strongest_within_reach() {
        let losses = [Some(0.50), Some(0.41), Some(0.40), Some(0.43)];
        let ses = [Some(0.02), Some(0.02), Some(0.015), Some(0.02)];
        assert_eq!(choose(&losses, &ses, Rule::Best), Some((2, 2)));
        // 0.41 ≤ 0.40 + 0.015; 0.50 is not.
        assert_eq!(choose(&losses, &ses, Rule::OneSe), Some((2, 1)));
        assert_eq!(choose(&[None, None], &[None, None], Rule::Best), None);
    }

    #[test]
    fn loss_spread_matches_the_two_pass_formula() {
        // Rows (loss, weight); a weight-2 row counts as two rows.
        let rows = [(0.3, 1.0), (1.2, 2.0), (0.7, 1.0), (2.5, 3.0)];
        let mut s = LossSpread::default();
        for (l, w) in rows {
            s.push(l, w);
        }
        let expanded: Vec<f64> = rows
            .iter()
            .flat_map(|&(l, w)| std::iter::repeat_n(l, w as usize))
            .collect();
        let n = expanded.len() as f64;
        let mean = expanded.iter().sum::<f64>() / n;
        let var = expanded.iter().map(|l| (l - mean).powi(2)).sum::<f64>() / (n - 1.0);
        assert!((s.mean().unwrap() - mean).abs() < 1e-15);
        assert!((s.se().unwrap() - (var / n).sqrt()).abs() < 1e-15);
    }

    #[test]
    fn elastic_split() {
        let (r, l) = PenaltyKind::Elastic { mix: 0.25 }.split(2.0);
        assert_eq!((r, l), (1.5, 0.5));
        assert!(PenaltyKind::parse("elastic", None).is_err());
        assert!(PenaltyKind::parse("ridge", Some(0.5)).is_err());
        assert!(PenaltyKind::parse("elastic", Some(1.0)).is_err());
    }
}
