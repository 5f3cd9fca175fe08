//! The iteration driver: L-BFGS with the Moré–Thuente line search, or OWL-QN with a
//! projected backtracking line search when some coordinate carries an L1 weight.
//!
//! # One iteration
//!
//! 1. At the current point, the gradient test (`‖g‖∞ ≤ tol · max(1, |f|)`, with the
//!    pseudo-gradient under L1) and the budgets are checked; a run that is already done
//!    stops without evaluating anything.
//! 2. Direction: `d = −H g` from the two-loop recursion (OWL-QN: `−H_F ◇F` in the
//!    subspace of the free coordinates, then the sign constraint at coordinates at 0),
//!    first trial `α₀ = 1`. If `d` is not a descent
//!    direction, the history is reset and the scaled steepest-descent direction
//!    `d = −γ g` (`γ = sᵀy / yᵀy` of the newest pair) is used, still with `α₀ = 1`. With
//!    no history at all (the first iteration) `d = −g` and `α₀ = 1 / ‖d‖₂`, so the first
//!    trial point lies at unit distance.
//! 3. Line search. Each trial is one evaluation and is counted.
//!    - L-BFGS: Moré–Thuente for the strong Wolfe conditions. If the search ends short
//!      of them (trial cap, rounding errors, interval too small), the trial with the
//!      lowest value that meets the sufficient-decrease condition and lowers `f` is
//!      accepted instead; only when there is none has the search failed.
//!    - OWL-QN: trial points `π(x + α d; ξ)` projected onto the orthant `ξ`; accepted
//!      when `F(x⁺) ≤ F(x) + c1 · ◇F(x)ᵀ(x⁺ − x)`; otherwise `α` is halved.
//!    - Near the rounding limit. When the decrease a trial can show, predicted from the
//!      slope, is below [`ROUNDING_UNITS`] units of rounding of `F`, function values can
//!      no longer decide. Such a trial is accepted on the approximate Wolfe conditions
//!      of Hager & Zhang (2005, SIAM J. Optim. 16(1)): `F(x⁺) ≤ F(x) + ROUNDING_UNITS·ε·|F(x)|`
//!      and `|F'(x⁺; s)| ≤ c2 · |F'(x; s)|` for the step `s = x⁺ − x` (one-sided
//!      directional derivatives under L1). A search gives up after [`NOISY_TRIALS`]
//!      more such trials, so a hopeless search costs a few evaluations, not the trial
//!      cap.
//! 4. A failed search is retried once from the scaled steepest-descent direction with
//!    the history cleared; if that fails too, the run stops with
//!    [`Stop::LineSearchFailed`] (or [`Stop::Converged`] if, and only if, the current
//!    point meets the gradient test).
//! 5. The pair `s = x⁺ − x`, `y = g⁺ − g` (smooth gradients) is kept when
//!    `sᵀy > curvature_eps · ‖s‖ ‖y‖`, else skipped and counted.
//! 6. After the iteration, in this order: gradient test ([`Stop::Converged`]), flat test
//!    ([`Stop::Flat`]), evaluation and iteration budgets ([`Stop::PassBudget`]), time
//!    budget ([`Stop::TimeBudget`]).
//!
//! # State and resumption
//!
//! Everything the iteration reads lives in [`State`]; the optimizer itself only adds a
//! clock and scratch buffers that are overwritten before they are read. A state saved
//! after an accepted iteration and rebuilt with [`Optimizer::from_state`] therefore
//! continues bitwise identically (iterates, values, evaluation counts).
//!
//! When a step ends on the evaluation budget inside a line search, the state stays at
//! the last accepted iterate (history included, even if the step was about to reset it)
//! and the evaluations spent in that search are counted (they were real passes).
//! Continuing it with a larger budget gives the same iterates as a run that never
//! stopped, with those extra evaluations in the count. When an
//! evaluation returns an error, the state is left exactly as it was before the step.

use std::time::Instant;

use super::lbfgs::{curvature_ok, dot, norm2, norm_inf, push_pair, two_loop, two_loop_free};
use super::line_search::{MoreThuente, Next, Params, Warning};
use super::owlqn::{
    constrain_direction, free_set, l1_term, orthant, project, pseudo_gradient,
    pseudo_gradient_component,
};
use super::{Iteration, Minimum, Objective, Settings, State, StepOutcome, Stop};
use crate::{Error, Result};

/// Largest step the Moré–Thuente search may take (in units of the direction).
const STEP_MAX: f64 = 1e20;
/// Relative width of the interval of uncertainty below which the Moré–Thuente search
/// stops refining.
const XTOL: f64 = 1e-10;
/// Factor by which the OWL-QN backtracking search shrinks a rejected step.
const BACKTRACK: f64 = 0.5;
/// A trial whose decrease, predicted from the slope, is below this many units of
/// rounding of the objective's value is decided by rounding noise ("noisy").
const ROUNDING_UNITS: f64 = 10.0;
/// A line search gives up after this many noisy trials after the first: near the
/// rounding limit a noisy trial is sometimes accepted (and still improves the
/// gradient), but every evaluation is a pass over the data.
const NOISY_TRIALS: usize = 3;

/// How far above `f0` a trial decided by rounding may end and still be accepted.
fn rounding_slack(f0: f64) -> f64 {
    ROUNDING_UNITS * f64::EPSILON * f0.abs()
}

/// Whether a predicted change `predicted` of an objective of value `f0` is below the
/// resolution of float64 arithmetic (see [`ROUNDING_UNITS`]).
fn below_rounding(predicted: f64, f0: f64) -> bool {
    predicted.abs() <= ROUNDING_UNITS * f64::EPSILON * f0.abs().max(f64::MIN_POSITIVE)
}

/// What went wrong in a line search that found no acceptable step.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Failure {
    /// The Moré–Thuente step arithmetic cannot go on.
    Stuck(Warning),
    /// The trial cap was reached.
    TrialCap,
    /// Every trial was rejected and the steps became too small to move the point.
    NoMove,
    /// The decrease the next trial could show is below the objective's rounding error.
    BelowRounding,
}

impl Failure {
    fn describe(self, trials: usize) -> String {
        match self {
            Failure::Stuck(Warning::Rounding) => {
                "rounding errors prevent the line search from making progress".to_string()
            }
            Failure::Stuck(Warning::IntervalTooSmall) => {
                "the line search's interval of uncertainty became too small".to_string()
            }
            Failure::Stuck(Warning::AtMax) => {
                "the step reached its upper bound while the objective kept falling (the \
                 objective may be unbounded below)"
                    .to_string()
            }
            Failure::Stuck(Warning::AtMin) => {
                "the step reached its lower bound without lowering the objective".to_string()
            }
            Failure::TrialCap => format!("no acceptable step within {trials} trials"),
            Failure::NoMove => "the trial steps became too small to move the point".to_string(),
            Failure::BelowRounding => "the decrease still possible along the search direction \
                                       is below the rounding error of the objective"
                .to_string(),
        }
    }
}

/// How a line search ended.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Search {
    /// A step was accepted; the new point and gradient are in `work.xt`, `work.gt`.
    Accepted { step: f64, f: f64 },
    /// The evaluation budget would be exceeded by the next trial.
    Budget,
    /// No acceptable step.
    Failed(Failure),
}

/// Scratch buffers, overwritten before every read: not part of the state.
#[derive(Debug, Clone, Default)]
struct Work {
    /// Search direction.
    d: Vec<f64>,
    /// Pseudo-gradient at the current point (OWL-QN).
    pg: Vec<f64>,
    /// Orthant signs (OWL-QN).
    xi: Vec<f64>,
    /// Trial point and its gradient; after acceptance the new point.
    xt: Vec<f64>,
    gt: Vec<f64>,
    /// Best point found by a Moré–Thuente search that ended short of the Wolfe
    /// conditions.
    xb: Vec<f64>,
    gb: Vec<f64>,
    /// New history pair before it is stored.
    s: Vec<f64>,
    y: Vec<f64>,
    /// Two-loop coefficients.
    alpha: Vec<f64>,
    /// OWL-QN: which pairs the subspace two-loop uses.
    kept: Vec<bool>,
    /// OWL-QN: the coordinates free to move (not held at zero by the L1 kink).
    free: Vec<bool>,
}

impl Work {
    fn new(dim: usize, history: usize) -> Work {
        Work {
            d: vec![0.0; dim],
            pg: vec![0.0; dim],
            xi: vec![0.0; dim],
            xt: vec![0.0; dim],
            gt: vec![0.0; dim],
            xb: vec![0.0; dim],
            gb: vec![0.0; dim],
            s: vec![0.0; dim],
            y: vec![0.0; dim],
            alpha: vec![0.0; history],
            kept: vec![false; history],
            free: vec![true; dim],
        }
    }
}

/// An L-BFGS / OWL-QN minimization in progress, driven one iteration at a time with
/// [`Optimizer::step`].
///
/// ```
/// use outcore::optim::{Objective, Optimizer, Settings, StepOutcome};
///
/// struct Bowl;
/// impl Objective for Bowl {
///     fn dim(&self) -> usize { 2 }
///     fn eval(&mut self, x: &[f64], g: &mut [f64]) -> outcore::Result<f64> {
///         g[0] = 2.0 * (x[0] - 1.0);
///         g[1] = 20.0 * (x[1] + 2.0);
///         Ok((x[0] - 1.0).powi(2) + 10.0 * (x[1] + 2.0).powi(2))
///     }
/// }
///
/// let mut bowl = Bowl;
/// let mut opt = Optimizer::new(&mut bowl, &[0.0, 0.0], Settings::default()).unwrap();
/// loop {
///     match opt.step(&mut bowl).unwrap() {
///         StepOutcome::Continue(_) => {
///             // A caller would save `opt.state()` here.
///         }
///         StepOutcome::Stopped { stop, .. } => {
///             assert!(stop.is_converged());
///             break;
///         }
///     }
/// }
/// assert!((opt.x()[0] - 1.0).abs() < 1e-6 && (opt.x()[1] + 2.0).abs() < 1e-6);
/// ```
#[derive(Debug, Clone)]
pub struct Optimizer {
    state: State,
    clock: Instant,
    seconds_before: f64,
    work: Work,
}

impl Optimizer {
    /// Starts a minimization at `x0`: checks the settings and evaluates the objective
    /// once.
    ///
    /// Errors: [`crate::ErrorKind::Usage`] for bad settings or a starting point of the
    /// wrong length or with non-finite entries; [`crate::ErrorKind::Data`] when the
    /// objective or its gradient is not finite at `x0`; any error of
    /// [`Objective::eval`] unchanged.
    pub fn new(obj: &mut dyn Objective, x0: &[f64], settings: Settings) -> Result<Optimizer> {
        let clock = Instant::now();
        let dim = obj.dim();
        if x0.len() != dim {
            return Err(Error::usage(format!(
                "the starting point has {} entries but the objective has {dim} variables",
                x0.len()
            )));
        }
        validate_settings(&settings, dim)?;
        if let Some(j) = x0.iter().position(|v| !v.is_finite()) {
            return Err(Error::usage(format!(
                "the starting point is not finite at coordinate {j} ({})",
                x0[j]
            )));
        }
        let mut g = vec![0.0; dim];
        let smooth = obj.eval(x0, &mut g)?;
        let f = smooth + l1_term(&settings.l1, x0);
        if !f.is_finite() || g.iter().any(|v| !v.is_finite()) {
            return Err(Error::data(format!(
                "the starting point gives a non-finite objective (value {f}, or a non-finite \
                 gradient); check the data for extreme values, or start from other \
                 coefficients"
            )));
        }
        let work = Work::new(dim, settings.history);
        let state = State {
            settings,
            x: x0.to_vec(),
            f,
            g,
            s: Vec::new(),
            y: Vec::new(),
            iterations: 0,
            evaluations: 1,
            pairs_skipped: 0,
            recent_f: vec![f],
            last_step: 0.0,
            seconds: clock.elapsed().as_secs_f64(),
            stopped: None,
            message: None,
        };
        Ok(Optimizer {
            state,
            clock,
            seconds_before: 0.0,
            work,
        })
    }

    /// Rebuilds an optimizer from a saved state. It continues bitwise identically to the
    /// optimizer the state was taken from; the time budget counts `state.seconds` as
    /// already used.
    ///
    /// History pairs beyond `settings.history` are dropped, oldest first. Errors:
    /// [`crate::ErrorKind::Usage`] for bad settings, [`crate::ErrorKind::Format`] for a
    /// state whose parts do not fit together.
    pub fn from_state(mut state: State) -> Result<Optimizer> {
        let dim = state.x.len();
        validate_settings(&state.settings, dim)?;
        let bad = |what: String| {
            Err(Error::format(format!(
                "the saved optimizer state is inconsistent: {what}"
            )))
        };
        if state.g.len() != dim {
            return bad(format!(
                "the gradient has {} entries for {dim} variables",
                state.g.len()
            ));
        }
        if state.s.len() != state.y.len() {
            return bad(format!(
                "{} steps but {} gradient changes in the history",
                state.s.len(),
                state.y.len()
            ));
        }
        if let Some(v) = state.s.iter().chain(&state.y).find(|v| v.len() != dim) {
            return bad(format!(
                "a history vector has {} entries for {dim} variables",
                v.len()
            ));
        }
        if !state.f.is_finite()
            || state.x.iter().chain(&state.g).any(|v| !v.is_finite())
            || state
                .s
                .iter()
                .chain(&state.y)
                .flatten()
                .any(|v| !v.is_finite())
        {
            return bad("it holds non-finite numbers".to_string());
        }
        if !(state.seconds.is_finite() && state.seconds >= 0.0) {
            return bad(format!("the time used is {}", state.seconds));
        }
        if state.evaluations == 0 {
            return bad("it counts no evaluation".to_string());
        }
        let excess = state.s.len().saturating_sub(state.settings.history);
        state.s.drain(..excess);
        state.y.drain(..excess);
        let work = Work::new(dim, state.settings.history);
        let seconds_before = state.seconds;
        Ok(Optimizer {
            state,
            clock: Instant::now(),
            seconds_before,
            work,
        })
    }

    /// The complete state, for saving; `seconds` is current as of the last accepted
    /// iteration or stop.
    pub fn state(&self) -> &State {
        &self.state
    }

    /// Lends the complete state by value to `f` and takes it back, so that a caller can
    /// save it without copying its vectors (long ones with hashed features).
    pub fn with_state<R>(&mut self, f: impl FnOnce(State) -> (State, R)) -> R {
        let shell = State {
            settings: self.state.settings.clone(),
            x: Vec::new(),
            g: Vec::new(),
            s: Vec::new(),
            y: Vec::new(),
            recent_f: Vec::new(),
            message: None,
            ..self.state
        };
        let state = std::mem::replace(&mut self.state, shell);
        let (state, r) = f(state);
        self.state = state;
        r
    }

    /// The current point (the last accepted iterate).
    pub fn x(&self) -> &[f64] {
        &self.state.x
    }

    /// The objective at [`Optimizer::x`], with the L1 term.
    pub fn f(&self) -> f64 {
        self.state.f
    }

    /// `‖g‖∞` at [`Optimizer::x`] (of the pseudo-gradient with L1).
    pub fn gradient_max(&self) -> f64 {
        gradient_max(&self.state)
    }

    /// Marks the run as stopped for `stop` (for instance [`Stop::Interrupted`] on a
    /// signal, or [`Stop::TimeBudget`] for a budget the caller watches). Later calls of
    /// [`Optimizer::step`] do nothing.
    pub fn stop_as(&mut self, stop: Stop) {
        self.state.seconds = self.elapsed();
        self.state.stopped = Some(stop);
        if stop != Stop::LineSearchFailed {
            self.state.message = None;
        }
    }

    /// The result so far. If the run has not stopped, `stop` is
    /// [`Stop::Interrupted`]: the caller ended it.
    pub fn minimum(&self) -> Minimum {
        Minimum {
            x: self.state.x.clone(),
            f: self.state.f,
            gradient_max: self.gradient_max(),
            stop: self.state.stopped.unwrap_or(Stop::Interrupted),
            message: self.state.message.clone(),
            iterations: self.state.iterations,
            evaluations: self.state.evaluations,
            pairs_skipped: self.state.pairs_skipped,
        }
    }

    /// Does one iteration, or stops.
    ///
    /// Returns [`StepOutcome::Continue`] after an accepted iteration that ends none of
    /// the tests, else [`StepOutcome::Stopped`] (with the iteration accepted in this
    /// call, if any). Once stopped, every later call returns the same stop without
    /// evaluating. Errors of [`Objective::eval`] are returned unchanged and leave the
    /// state at the last accepted iterate.
    pub fn step(&mut self, obj: &mut dyn Objective) -> Result<StepOutcome> {
        if let Some(stop) = self.state.stopped {
            return Ok(StepOutcome::Stopped {
                stop,
                last: None,
                message: self.state.message.clone(),
            });
        }
        if obj.dim() != self.state.x.len() {
            return Err(Error::usage(format!(
                "the objective has {} variables but the optimizer was started with {}",
                obj.dim(),
                self.state.x.len()
            )));
        }
        if self.converged() {
            return Ok(self.finish(Stop::Converged, None, None));
        }
        if let Some(stop) = self.budget_spent() {
            return Ok(self.finish(stop, None, None));
        }
        self.iterate(obj)
    }

    /// Seconds used, this session and before.
    fn elapsed(&self) -> f64 {
        self.seconds_before + self.clock.elapsed().as_secs_f64()
    }

    fn l1_active(&self) -> bool {
        self.state.settings.l1.iter().any(|&v| v > 0.0)
    }

    /// The gradient test at the current point.
    fn converged(&self) -> bool {
        let gmax = self.gradient_max();
        gmax <= self.state.settings.tol * self.state.f.abs().max(1.0)
    }

    /// The flat test over the last `flat_window` iterations.
    fn flat(&self) -> bool {
        let w = self.state.settings.flat_window;
        let recent = &self.state.recent_f;
        if w == 0 || recent.len() <= w {
            return false;
        }
        let f = self.state.f;
        let old = recent[recent.len() - 1 - w];
        (old - f) / f.abs().max(1.0) < self.state.settings.flat_tol
    }

    /// The evaluation, iteration and time budgets, in that order.
    fn budget_spent(&self) -> Option<Stop> {
        let s = &self.state.settings;
        if s.max_evals.is_some_and(|m| self.state.evaluations >= m) {
            return Some(Stop::PassBudget);
        }
        if s.max_iterations.is_some_and(|m| self.state.iterations >= m) {
            return Some(Stop::PassBudget);
        }
        if s.max_seconds.is_some_and(|m| self.elapsed() >= m) {
            return Some(Stop::TimeBudget);
        }
        None
    }

    fn finish(
        &mut self,
        stop: Stop,
        last: Option<Iteration>,
        message: Option<String>,
    ) -> StepOutcome {
        self.state.seconds = self.elapsed();
        self.state.stopped = Some(stop);
        self.state.message = message.clone();
        StepOutcome::Stopped {
            stop,
            last,
            message,
        }
    }

    /// Clears the history (a reset to steepest descent).
    fn clear_history(&mut self) {
        self.state.s.clear();
        self.state.y.clear();
    }

    /// One iteration from a point that is not converged and has budget left.
    fn iterate(&mut self, obj: &mut dyn Objective) -> Result<StepOutcome> {
        let owl = self.l1_active();
        // Evaluations of this step, committed to the state only when the step ends
        // without an error.
        let mut used = 0u64;
        // Whether the history is to be cleared (non-descent direction or retry).
        let mut reset = false;
        let mut failure = Failure::TrialCap;
        let mut trials = 0usize;
        let mut attempts = 0;
        for _ in 0..2 {
            attempts += 1;
            let (steepest, step0) = self.direction(owl, &mut reset);
            let result = if owl {
                self.search_backtracking(obj, step0, &mut used, &mut trials)?
            } else {
                self.search_more_thuente(obj, step0, &mut used, &mut trials)?
            };
            match result {
                Search::Accepted { step, f } => {
                    self.state.evaluations += used;
                    if reset {
                        self.clear_history();
                    }
                    return Ok(self.accept(step, f));
                }
                Search::Budget => {
                    // The history is kept even when it was to be reset: continuing from
                    // this state redoes the same reset and the same search.
                    self.state.evaluations += used;
                    return Ok(self.finish(Stop::PassBudget, None, None));
                }
                Search::Failed(why) => {
                    failure = why;
                    if steepest {
                        break;
                    }
                    reset = true;
                }
            }
        }
        self.state.evaluations += used;
        if self.converged() {
            return Ok(self.finish(Stop::Converged, None, None));
        }
        let advice = if owl {
            "the tolerance may be below what float64 rounding allows at this point; try a \
             larger tolerance (--tol), or standardize the features or add a small ridge \
             penalty (--ridge)"
        } else {
            "the tolerance may be below what float64 rounding allows at this point; try a \
             larger tolerance (--tol), or standardize the features or add a small ridge \
             penalty (--ridge); check also that the gradient is that of the objective"
        };
        let retried = if attempts > 1 {
            "; also from the steepest-descent direction"
        } else {
            ", along the steepest-descent direction"
        };
        let message = format!(
            "the line search found no step that lowers the objective ({}{retried}): {advice}",
            failure.describe(trials)
        );
        Ok(self.finish(Stop::LineSearchFailed, None, Some(message)))
    }

    /// Fills `work.d` (and for OWL-QN `work.pg`, `work.xi`) with the search direction.
    /// Returns whether it is a steepest-descent direction (no history in use) and the
    /// first trial step.
    ///
    /// Steepest descent is `−g` with a first trial at unit distance when there is no
    /// history at all, and `−γ g` with `γ = sᵀy / yᵀy` of the newest pair and a first
    /// trial of 1 when a history is being reset (a non-descent direction, or the retry
    /// after a failed search): the newest pair's curvature is a far better step scale
    /// than unit distance near a minimum.
    fn direction(&mut self, owl: bool, reset: &mut bool) -> (bool, f64) {
        let st = &self.state;
        let w = &mut self.work;
        let grad: &[f64] = if owl {
            pseudo_gradient(&st.settings.l1, &st.x, &st.g, &mut w.pg);
            &w.pg
        } else {
            &st.g
        };
        if !*reset && !st.s.is_empty() {
            if owl {
                free_set(&st.settings.l1, &st.x, grad, &mut w.free);
                two_loop_free(
                    &st.s,
                    &st.y,
                    grad,
                    &w.free,
                    st.settings.curvature_eps,
                    &mut w.d,
                    &mut w.alpha,
                    &mut w.kept,
                );
                constrain_direction(&st.settings.l1, &st.x, grad, &mut w.d);
            } else {
                two_loop(&st.s, &st.y, grad, &mut w.d, &mut w.alpha);
            }
            let slope = dot(grad, &w.d);
            if slope < 0.0 && slope.is_finite() {
                if owl {
                    orthant(&st.x, &w.pg, &mut w.xi);
                }
                return (false, 1.0);
            }
            *reset = true;
        }
        let newest = st.s.len().checked_sub(1);
        let gamma = newest
            .map(|k| dot(&st.s[k], &st.y[k]) / dot(&st.y[k], &st.y[k]))
            .filter(|g| *g > 0.0 && g.is_finite());
        let step0 = match gamma {
            Some(gamma) => {
                for (d, g) in w.d.iter_mut().zip(grad) {
                    *d = -gamma * g;
                }
                1.0
            }
            None => {
                for (d, g) in w.d.iter_mut().zip(grad) {
                    *d = -g;
                }
                let n = norm2(&w.d);
                if n > 0.0 && n.is_finite() {
                    1.0 / n
                } else {
                    1.0
                }
            }
        };
        if owl {
            orthant(&st.x, &w.pg, &mut w.xi);
        }
        (true, step0)
    }

    /// Whether one more evaluation fits the budget.
    fn may_evaluate(&self, used: u64) -> bool {
        match self.state.settings.max_evals {
            Some(m) => self.state.evaluations + used < m,
            None => true,
        }
    }

    /// The Moré–Thuente search along `work.d` from the current point.
    fn search_more_thuente(
        &mut self,
        obj: &mut dyn Objective,
        step0: f64,
        used: &mut u64,
        trials_out: &mut usize,
    ) -> Result<Search> {
        let f0 = self.state.f;
        let d0 = dot(&self.state.g, &self.work.d);
        let s = &self.state.settings;
        let (mut search, mut step) = MoreThuente::start(
            f0,
            d0,
            step0,
            Params {
                c1: s.c1,
                c2: s.c2,
                xtol: XTOL,
                step_min: 0.0,
                step_max: STEP_MAX,
            },
        );
        let max_trials = s.max_line_search_trials;
        let c2 = s.c2;
        // The best trial that met sufficient decrease and lowered f: (step, f).
        let mut best: Option<(f64, f64)> = None;
        let mut trials = 0usize;
        let mut noisy = 0usize;
        let failure = loop {
            if trials >= max_trials {
                break Failure::TrialCap;
            }
            if !self.may_evaluate(*used) {
                return Ok(Search::Budget);
            }
            let w = &mut self.work;
            for ((xt, x), d) in w.xt.iter_mut().zip(&self.state.x).zip(&w.d) {
                *xt = x + step * d;
            }
            let f = obj.eval(&w.xt, &mut w.gt)?;
            *used += 1;
            trials += 1;
            *trials_out = trials;
            let moved = w.xt != self.state.x;
            let slope = if w.gt.iter().all(|v| v.is_finite()) {
                dot(&w.gt, &w.d)
            } else {
                f64::NAN
            };
            // A trial whose predicted decrease is below the rounding of f cannot show
            // sufficient decrease except by chance; accept it on the approximate Wolfe
            // conditions (no increase beyond rounding, strong curvature condition).
            if moved
                && below_rounding(step * d0, f0)
                && f <= f0 + rounding_slack(f0)
                && slope.is_finite()
                && slope.abs() <= c2 * (-d0)
            {
                return Ok(Search::Accepted { step, f });
            }
            if f.is_finite()
                && slope.is_finite()
                && moved
                && f < f0
                && f <= search.armijo_bound(step)
                && best.is_none_or(|(_, fb)| f < fb)
            {
                w.xb.copy_from_slice(&w.xt);
                w.gb.copy_from_slice(&w.gt);
                best = Some((step, f));
            }
            match search.next(step, f, slope) {
                Next::Converged if moved => return Ok(Search::Accepted { step, f }),
                Next::Converged => break Failure::Stuck(Warning::Rounding),
                Next::Evaluate(next) => {
                    if below_rounding(next * d0, f0) {
                        noisy += 1;
                        if noisy > NOISY_TRIALS {
                            break Failure::BelowRounding;
                        }
                    }
                    step = next
                }
                Next::Stuck(why) => break Failure::Stuck(why),
            }
        };
        match best {
            Some((step, f)) => {
                let w = &mut self.work;
                std::mem::swap(&mut w.xt, &mut w.xb);
                std::mem::swap(&mut w.gt, &mut w.gb);
                Ok(Search::Accepted { step, f })
            }
            None => Ok(Search::Failed(failure)),
        }
    }

    /// The OWL-QN projected backtracking search along `work.d`.
    fn search_backtracking(
        &mut self,
        obj: &mut dyn Objective,
        step0: f64,
        used: &mut u64,
        trials_out: &mut usize,
    ) -> Result<Search> {
        let f0 = self.state.f;
        let c1 = self.state.settings.c1;
        let c2 = self.state.settings.c2;
        let max_trials = self.state.settings.max_line_search_trials;
        let mut step = step0;
        let mut trials = 0usize;
        let mut noisy = 0usize;
        let mut moved_once = false;
        loop {
            if trials >= max_trials {
                return Ok(Search::Failed(if moved_once {
                    Failure::TrialCap
                } else {
                    Failure::NoMove
                }));
            }
            if !self.may_evaluate(*used) {
                return Ok(Search::Budget);
            }
            let l1 = &self.state.settings.l1;
            let w = &mut self.work;
            for ((xt, x), d) in w.xt.iter_mut().zip(&self.state.x).zip(&w.d) {
                *xt = x + step * d;
            }
            project(l1, &w.xi, &mut w.xt);
            let moved = w.xt != self.state.x;
            moved_once |= moved;
            let smooth = obj.eval(&w.xt, &mut w.gt)?;
            *used += 1;
            trials += 1;
            *trials_out = trials;
            let f = smooth + l1_term(l1, &w.xt);
            let predicted =
                w.pg.iter()
                    .zip(w.xt.iter().zip(&self.state.x))
                    .fold(0.0, |acc, (p, (xt, x))| acc + p * (xt - x));
            let finite = f.is_finite() && w.gt.iter().all(|v| v.is_finite());
            if finite && moved && predicted < 0.0 && f <= f0 + c1 * predicted {
                return Ok(Search::Accepted { step, f });
            }
            // Below the rounding of F: the approximate Wolfe conditions, with the
            // one-sided directional derivative of F at the trial along the step.
            if finite
                && moved
                && predicted < 0.0
                && below_rounding(predicted, f0)
                && f <= f0 + rounding_slack(f0)
            {
                let slope: f64 = (0..w.xt.len()).fold(0.0, |acc, j| {
                    let sj = w.xt[j] - self.state.x[j];
                    let lam = l1[j];
                    let kink = if lam <= 0.0 {
                        0.0
                    } else if w.xt[j] != 0.0 {
                        lam * w.xt[j].signum() * sj
                    } else {
                        lam * sj.abs()
                    };
                    acc + w.gt[j] * sj + kink
                });
                if slope.abs() <= c2 * (-predicted) {
                    return Ok(Search::Accepted { step, f });
                }
            }
            if moved && below_rounding(BACKTRACK * predicted, f0) {
                noisy += 1;
                if noisy > NOISY_TRIALS {
                    return Ok(Search::Failed(Failure::BelowRounding));
                }
            }
            step *= BACKTRACK;
        }
    }

    /// Accepts the point in `work.xt` / `work.gt`, updates the history and runs the
    /// end-of-iteration tests.
    fn accept(&mut self, step: f64, f: f64) -> StepOutcome {
        let now = self.elapsed();
        let st = &mut self.state;
        let w = &mut self.work;
        for j in 0..st.x.len() {
            w.s[j] = w.xt[j] - st.x[j];
            w.y[j] = w.gt[j] - st.g[j];
        }
        if curvature_ok(&w.s, &w.y, st.settings.curvature_eps) {
            push_pair(&mut st.s, &mut st.y, &w.s, &w.y, st.settings.history);
        } else {
            st.pairs_skipped += 1;
        }
        std::mem::swap(&mut st.x, &mut w.xt);
        std::mem::swap(&mut st.g, &mut w.gt);
        st.f = f;
        st.iterations += 1;
        st.last_step = step;
        st.recent_f.push(f);
        let keep = st.settings.flat_window + 1;
        if st.recent_f.len() > keep {
            let excess = st.recent_f.len() - keep;
            st.recent_f.drain(..excess);
        }
        st.seconds = now;
        let it = Iteration {
            iteration: self.state.iterations,
            evaluations: self.state.evaluations,
            f,
            gradient_max: self.gradient_max(),
            step,
            pairs_skipped: self.state.pairs_skipped,
        };
        if self.converged() {
            return self.finish(Stop::Converged, Some(it), None);
        }
        if self.flat() {
            return self.finish(Stop::Flat, Some(it), None);
        }
        if let Some(stop) = self.budget_spent() {
            return self.finish(stop, Some(it), None);
        }
        StepOutcome::Continue(it)
    }
}

/// `‖g‖∞` of the state (pseudo-gradient when an L1 weight is positive); NaN if any
/// component is NaN.
fn gradient_max(state: &State) -> f64 {
    let l1 = &state.settings.l1;
    if l1.iter().any(|&v| v > 0.0) {
        let mut m = 0.0_f64;
        for ((&lam, &x), &g) in l1.iter().zip(&state.x).zip(&state.g) {
            let v = pseudo_gradient_component(lam, x, g);
            if v.is_nan() {
                return f64::NAN;
            }
            m = m.max(v.abs());
        }
        m
    } else {
        norm_inf(&state.g)
    }
}

/// Checks the settings against the dimension.
fn validate_settings(s: &Settings, dim: usize) -> Result<()> {
    let bad = |m: String| Err(Error::usage(m));
    if s.history < 1 {
        return bad("the history must keep at least 1 pair".to_string());
    }
    if !(s.c1 > 0.0 && s.c1 < s.c2 && s.c2 < 1.0) {
        return bad(format!(
            "the line-search constants must satisfy 0 < c1 < c2 < 1 (got c1 = {}, c2 = {})",
            s.c1, s.c2
        ));
    }
    if !(s.tol >= 0.0 && s.tol.is_finite()) {
        return bad(format!(
            "the tolerance must be a finite number ≥ 0 (got {})",
            s.tol
        ));
    }
    if s.max_evals == Some(0) {
        return bad(
            "the evaluation budget must allow at least the evaluation at the start".to_string(),
        );
    }
    if s.max_line_search_trials < 1 {
        return bad("the line search needs at least 1 trial".to_string());
    }
    if !(s.curvature_eps >= 0.0 && s.curvature_eps.is_finite()) {
        return bad(format!(
            "the curvature threshold must be a finite number ≥ 0 (got {})",
            s.curvature_eps
        ));
    }
    if !(s.flat_tol >= 0.0 && s.flat_tol.is_finite()) {
        return bad(format!(
            "the flat tolerance must be a finite number ≥ 0 (got {})",
            s.flat_tol
        ));
    }
    if let Some(t) = s.max_seconds {
        if t.is_nan() || t < 0.0 {
            return bad(format!("the time budget must be ≥ 0 seconds (got {t})"));
        }
    }
    if !s.l1.is_empty() && s.l1.len() != dim {
        return bad(format!(
            "the L1 weights have {} entries for {dim} variables (give none or one per \
             variable)",
            s.l1.len()
        ));
    }
    if let Some(j) = s.l1.iter().position(|v| !(*v >= 0.0 && v.is_finite())) {
        return bad(format!(
            "the L1 weight of coordinate {j} must be a finite number ≥ 0 (got {})",
            s.l1[j]
        ));
    }
    Ok(())
}

/// Minimizes `obj` from `x0` to the end; see [`Optimizer`] for the method.
///
/// Accepts any `&mut T` with `T: Objective` (it coerces to `&mut dyn Objective`).
pub fn minimize(obj: &mut dyn Objective, x0: &[f64], settings: &Settings) -> Result<Minimum> {
    minimize_with(obj, x0, settings, |_| {})
}

/// Like [`minimize`], calling `observer` after every accepted iteration.
pub fn minimize_with(
    obj: &mut dyn Objective,
    x0: &[f64],
    settings: &Settings,
    mut observer: impl FnMut(&Iteration),
) -> Result<Minimum> {
    let mut opt = Optimizer::new(obj, x0, settings.clone())?;
    loop {
        match opt.step(obj)? {
            StepOutcome::Continue(it) => observer(&it),
            StepOutcome::Stopped { last, .. } => {
                if let Some(it) = last {
                    observer(&it);
                }
                return Ok(opt.minimum());
            }
        }
    }
}
