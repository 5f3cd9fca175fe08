//! Minimization of smooth convex objectives, with an optional L1 term: L-BFGS with a
//! Moré–Thuente line search, and OWL-QN when some coordinates carry an L1 penalty.
//!
//! This module knows nothing about data or files. A caller supplies an [`Objective`]
//! (dimension and a fallible cost-and-gradient evaluation) and drives an [`Optimizer`]
//! one iteration at a time, or calls [`minimize`] to run it to the end.
//!
//! **Invariant:** `optim` does no I/O and reads no clock except through
//! [`Settings::max_seconds`].
//!
//! **Invariant:** an optimizer rebuilt with [`Optimizer::from_state`] from a saved
//! [`State`] continues bitwise identically to one that was never stopped.

// CONTRACT: the public items below are used by the rest of the crate. Keep their names
// and signatures.

use serde::{Deserialize, Serialize};

use crate::Result;

mod lbfgs;
mod line_search;
mod optimizer;
mod owlqn;
#[cfg(test)]
mod tests;

pub use optimizer::{minimize, minimize_with, Optimizer};

/// A function to minimize: its dimension and a cost-and-gradient evaluation.
///
/// Each call of [`Objective::eval`] counts as one evaluation (for outcore, one pass over
/// the data). An error aborts the minimization and is returned to the caller.
pub trait Objective {
    /// Number of variables.
    fn dim(&self) -> usize;
    /// The value at `x`; writes the gradient into `grad` (of length [`Objective::dim`]).
    fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> Result<f64>;
}

/// Why a minimization stopped. The names are part of the model-file contract.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum Stop {
    /// The gradient test `‖g‖∞ ≤ tol · max(1, |f|)` was met (pseudo-gradient with L1).
    Converged,
    /// The objective stopped moving: relative decrease over the last
    /// [`Settings::flat_window`] iterations below [`Settings::flat_tol`].
    Flat,
    /// The evaluation budget ([`Settings::max_evals`]) or iteration budget ran out.
    PassBudget,
    /// The time budget ([`Settings::max_seconds`]) ran out.
    TimeBudget,
    /// The caller stopped the run (set by callers, never by the optimizer itself).
    Interrupted,
    /// The line search found no acceptable step.
    LineSearchFailed,
}

impl Stop {
    /// The stop reason as written in model files and logs.
    pub fn as_str(self) -> &'static str {
        match self {
            Stop::Converged => "converged",
            Stop::Flat => "flat",
            Stop::PassBudget => "pass-budget",
            Stop::TimeBudget => "time-budget",
            Stop::Interrupted => "interrupted",
            Stop::LineSearchFailed => "line-search-failed",
        }
    }

    /// True only when the gradient test was met.
    pub fn is_converged(self) -> bool {
        self == Stop::Converged
    }
}

impl std::fmt::Display for Stop {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Settings of a minimization. `Default` gives the documented defaults.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Settings {
    /// History pairs kept by L-BFGS (default 10).
    pub history: usize,
    /// Gradient tolerance: converged when `‖g‖∞ ≤ tol · max(1, |f|)` (default 1e-6).
    pub tol: f64,
    /// Sufficient-decrease constant of the Wolfe conditions (default 1e-4).
    pub c1: f64,
    /// Curvature constant of the strong Wolfe conditions (default 0.9).
    pub c2: f64,
    /// Most trial steps (evaluations) in one line search (default 20).
    pub max_line_search_trials: usize,
    /// Curvature threshold: a pair is skipped when `sᵀy ≤ eps · ‖s‖ · ‖y‖` (default 1e-10).
    pub curvature_eps: f64,
    /// Window (iterations) of the flat test (default 10).
    pub flat_window: usize,
    /// Relative decrease over the window below which the run is flat (default 1e-13).
    pub flat_tol: f64,
    /// Most evaluations, counting the first one (default: none).
    pub max_evals: Option<u64>,
    /// Most iterations (default: none).
    pub max_iterations: Option<u64>,
    /// Wall-clock budget in seconds, checked between iterations (default: none).
    pub max_seconds: Option<f64>,
    /// L1 penalty per coordinate (empty: none). When any entry is positive, OWL-QN runs
    /// and the reported `f` includes `Σ l1[j] · |x[j]|`.
    pub l1: Vec<f64>,
}

impl Default for Settings {
    fn default() -> Self {
        Settings {
            history: 10,
            tol: 1e-6,
            c1: 1e-4,
            c2: 0.9,
            max_line_search_trials: 20,
            curvature_eps: 1e-10,
            flat_window: 10,
            flat_tol: 1e-13,
            max_evals: None,
            max_iterations: None,
            max_seconds: None,
            l1: Vec::new(),
        }
    }
}

/// What one accepted iteration did; handed to observers and returned by [`Optimizer::step`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Iteration {
    /// Iterations completed (1 after the first step).
    pub iteration: u64,
    /// Evaluations so far, the first one included.
    pub evaluations: u64,
    /// Objective value (with the L1 term) at the new point.
    pub f: f64,
    /// `‖g‖∞` at the new point (of the pseudo-gradient with L1).
    pub gradient_max: f64,
    /// Accepted step length along the search direction.
    pub step: f64,
    /// History pairs skipped so far because the curvature condition failed.
    pub pairs_skipped: u64,
}

/// The complete optimizer state: enough to continue a run bitwise identically.
///
/// A plain record: callers serialize it (checkpoints) with any format that keeps `f64`
/// bits (JSON with `float_roundtrip`, or raw little-endian bytes).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct State {
    /// The settings in force.
    pub settings: Settings,
    /// Current point.
    pub x: Vec<f64>,
    /// Objective at `x` (with the L1 term).
    pub f: f64,
    /// Gradient of the smooth part at `x`.
    pub g: Vec<f64>,
    /// History steps `s_k`, oldest first.
    pub s: Vec<Vec<f64>>,
    /// History gradient changes `y_k`, oldest first.
    pub y: Vec<Vec<f64>>,
    /// Iterations completed.
    pub iterations: u64,
    /// Evaluations so far.
    pub evaluations: u64,
    /// Pairs skipped so far.
    pub pairs_skipped: u64,
    /// Objective values of recent iterations (for the flat test), oldest first.
    pub recent_f: Vec<f64>,
    /// Step length of the last accepted iteration (0 before the first).
    pub last_step: f64,
    /// Seconds spent before this state was saved (for the time budget across resumes).
    pub seconds: f64,
    /// Set once the run has stopped. A run stopped on a budget can be continued by
    /// clearing this (and raising the budget in `settings`) before
    /// [`Optimizer::from_state`].
    pub stopped: Option<Stop>,
    /// For [`Stop::LineSearchFailed`]: what happened and what the user can try.
    #[serde(default)]
    pub message: Option<String>,
}

/// Outcome of one call of [`Optimizer::step`].
#[derive(Debug, Clone, PartialEq)]
pub enum StepOutcome {
    /// An iteration was accepted; the run can go on.
    Continue(Iteration),
    /// The run stopped (possibly after accepting a last iteration, reported in `last`).
    Stopped {
        /// Why.
        stop: Stop,
        /// The iteration accepted in this call, if any.
        last: Option<Iteration>,
        /// For [`Stop::LineSearchFailed`]: what happened and what the user can try.
        message: Option<String>,
    },
}

/// Final result of [`minimize`].
#[derive(Debug, Clone, PartialEq)]
pub struct Minimum {
    /// Best point found (the last accepted iterate).
    pub x: Vec<f64>,
    /// Objective at `x` (with the L1 term).
    pub f: f64,
    /// `‖g‖∞` at `x` (pseudo-gradient with L1).
    pub gradient_max: f64,
    /// Why the run stopped.
    pub stop: Stop,
    /// Line-search failure explanation, if any.
    pub message: Option<String>,
    /// Iterations done.
    pub iterations: u64,
    /// Evaluations done.
    pub evaluations: u64,
    /// Pairs skipped.
    pub pairs_skipped: u64,
}
