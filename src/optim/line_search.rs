//! The Moré–Thuente line search, written from J. J. Moré and D. J. Thuente (1994),
//! "Line search algorithms with guaranteed sufficient decrease", ACM TOMS 20(3).
//!
//! The search looks for a step `α > 0` along a descent direction that meets the strong
//! Wolfe conditions
//!
//! ```text
//! φ(α) ≤ φ(0) + c1 · α · φ'(0)        (sufficient decrease)
//! |φ'(α)| ≤ c2 · |φ'(0)|              (curvature)
//! ```
//!
//! It keeps an interval of uncertainty `[α_l, α_u]` (the paper's `α_l` is the trial with
//! the least value of the working function; `α_u` the other end) and chooses each new
//! trial by a safeguarded cubic or quadratic interpolation of the two ends and the last
//! trial (the paper's §4, "trial value selection", cases 1 to 4). While no trial has
//! both met the sufficient decrease condition and shown a non-negative derivative, the
//! search works on the auxiliary function `ψ(α) = φ(α) − φ(0) − c1 · α · φ'(0)` (stage 1);
//! from then on on `φ` itself (stage 2). Until an interval is bracketed, trials are
//! extrapolated within `[α + 1.1 (α − α_l), α + 4 (α − α_l)]`; once bracketed, a trial
//! that does not shrink the interval by a third after two trials is replaced by the
//! bisection point.
//!
//! This type only does the step arithmetic: it never evaluates anything. The caller
//! evaluates `φ` and `φ'` at the step it is handed and reports back, so the same code
//! serves the optimizer and the unit tests on the paper's one-dimensional functions.

/// Lower extrapolation factor (the paper's `δ_min`-like bound before bracketing).
const EXTRAPOLATE_LOW: f64 = 1.1;
/// Upper extrapolation factor before an interval is bracketed.
const EXTRAPOLATE_HIGH: f64 = 4.0;
/// Once bracketed, a width that has not shrunk below this share of the width two trials
/// back forces a bisection.
const SHRINK: f64 = 0.66;

/// Why the search cannot go on (the step arithmetic alone says so).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Warning {
    /// A new trial fell outside the bracketing interval: rounding errors prevent
    /// progress.
    Rounding,
    /// The bracketing interval is narrower than the relative tolerance.
    IntervalTooSmall,
    /// The step reached its upper bound while the function still decreases steeply.
    AtMax,
    /// The step reached its lower bound without sufficient decrease.
    AtMin,
}

/// What the caller does next.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Next {
    /// Evaluate `φ` and `φ'` at this step and call [`MoreThuente::next`] again.
    Evaluate(f64),
    /// The last step reported meets the strong Wolfe conditions.
    Converged,
    /// No acceptable step can be found from here.
    Stuck(Warning),
}

/// The constants of a search.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Params {
    /// Sufficient-decrease constant (`0 < c1 < c2`).
    pub(crate) c1: f64,
    /// Curvature constant (`c2 < 1`).
    pub(crate) c2: f64,
    /// Relative width of the interval below which the search gives up refining.
    pub(crate) xtol: f64,
    /// Smallest step.
    pub(crate) step_min: f64,
    /// Largest step.
    pub(crate) step_max: f64,
}

/// The state of one Moré–Thuente search.
#[derive(Debug, Clone)]
pub(crate) struct MoreThuente {
    f0: f64,
    d0: f64,
    /// `c1 · φ'(0)`: slope of the sufficient-decrease line.
    slope: f64,
    c2: f64,
    xtol: f64,
    step_min: f64,
    step_max: f64,
    bracketed: bool,
    stage_one: bool,
    /// Best end of the interval: step, value, derivative.
    lo: Point,
    /// Other end of the interval.
    hi: Point,
    /// Current bounds for the next trial.
    lower: f64,
    upper: f64,
    width: f64,
    width_before: f64,
}

/// A step with its value and derivative.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Point {
    step: f64,
    f: f64,
    d: f64,
}

impl MoreThuente {
    /// Start a search from `φ(0) = f0`, `φ'(0) = d0 < 0` with first trial `step`
    /// (clamped into `[step_min, step_max]`). Returns the search and the first trial.
    pub(crate) fn start(f0: f64, d0: f64, step: f64, p: Params) -> (MoreThuente, f64) {
        let Params {
            c1,
            c2,
            xtol,
            step_min,
            step_max,
        } = p;
        let step = step.clamp(step_min, step_max);
        let origin = Point {
            step: 0.0,
            f: f0,
            d: d0,
        };
        let width = step_max - step_min;
        let search = MoreThuente {
            f0,
            d0,
            slope: c1 * d0,
            c2,
            xtol,
            step_min,
            step_max,
            bracketed: false,
            stage_one: true,
            lo: origin,
            hi: origin,
            lower: 0.0,
            upper: step + EXTRAPOLATE_HIGH * step,
            width,
            width_before: 2.0 * width,
        };
        (search, step)
    }

    /// The sufficient-decrease bound at `step`.
    pub(crate) fn armijo_bound(&self, step: f64) -> f64 {
        self.f0 + step * self.slope
    }

    /// Report `φ(step) = f`, `φ'(step) = d` for the step last handed out; get what to do
    /// next.
    pub(crate) fn next(&mut self, step: f64, f: f64, d: f64) -> Next {
        if !f.is_finite() || !d.is_finite() {
            // Not in the paper: the objective overflowed or failed at this step. Treat
            // the step as an upper limit and retreat halfway towards the best end.
            let retreat = self.lo.step + 0.5 * (step - self.lo.step);
            self.step_max = self.step_max.min(retreat);
            if self.bracketed {
                self.upper = self.upper.min(self.step_max);
            }
            if retreat <= self.step_min || retreat <= self.lo.step {
                return Next::Stuck(Warning::Rounding);
            }
            return Next::Evaluate(retreat);
        }

        let bound = self.armijo_bound(step);
        if self.stage_one && f <= bound && d >= 0.0 {
            self.stage_one = false;
        }

        // Convergence: the strong Wolfe conditions.
        if f <= bound && d.abs() <= self.c2 * (-self.d0) {
            return Next::Converged;
        }
        // Conditions under which no better step can be found.
        if self.bracketed && (step <= self.lower || step >= self.upper) {
            return Next::Stuck(Warning::Rounding);
        }
        if self.bracketed && self.upper - self.lower <= self.xtol * self.upper {
            return Next::Stuck(Warning::IntervalTooSmall);
        }
        if step == self.step_max && f <= bound && d <= self.slope {
            return Next::Stuck(Warning::AtMax);
        }
        if step == self.step_min && (f > bound || d >= self.slope) {
            return Next::Stuck(Warning::AtMin);
        }

        let trial = Point { step, f, d };
        let mut next_step = if self.stage_one && f <= self.lo.f && f > bound {
            // Stage 1 with a lower value than the best end but no sufficient decrease:
            // choose the step on the auxiliary function ψ, whose values and
            // derivatives are φ's minus the sufficient-decrease line.
            let shift = |p: Point| Point {
                step: p.step,
                f: p.f - p.step * self.slope,
                d: p.d - self.slope,
            };
            let unshift = |p: Point| Point {
                step: p.step,
                f: p.f + p.step * self.slope,
                d: p.d + self.slope,
            };
            let mut lo = shift(self.lo);
            let mut hi = shift(self.hi);
            let chosen = choose_step(
                &mut lo,
                &mut hi,
                shift(trial),
                &mut self.bracketed,
                self.lower,
                self.upper,
            );
            self.lo = unshift(lo);
            self.hi = unshift(hi);
            chosen
        } else {
            choose_step(
                &mut self.lo,
                &mut self.hi,
                trial,
                &mut self.bracketed,
                self.lower,
                self.upper,
            )
        };

        // Force enough shrinking of the bracket.
        if self.bracketed {
            let width = (self.hi.step - self.lo.step).abs();
            if width >= SHRINK * self.width_before {
                next_step = self.lo.step + 0.5 * (self.hi.step - self.lo.step);
            }
            self.width_before = self.width;
            self.width = width;
        }

        // Bounds for the next trial.
        if self.bracketed {
            self.lower = self.lo.step.min(self.hi.step);
            self.upper = self.lo.step.max(self.hi.step);
        } else {
            let advance = next_step - self.lo.step;
            self.lower = next_step + EXTRAPOLATE_LOW * advance;
            self.upper = next_step + EXTRAPOLATE_HIGH * advance;
        }

        next_step = next_step.clamp(self.step_min, self.step_max);

        // When rounding errors leave no room, or the interval has collapsed, try the best
        // step so far one last time (the checks above then end the search).
        if self.bracketed
            && (next_step <= self.lower
                || next_step >= self.upper
                || self.upper - self.lower <= self.xtol * self.upper)
        {
            next_step = self.lo.step;
        }
        Next::Evaluate(next_step)
    }
}

/// The safeguarded step selection of the paper's §4 (cases 1–4). Updates the interval
/// ends `lo` (best) and `hi` with the new `trial`, sets `bracketed` when a minimizer is
/// known to lie between them, and returns the next trial step, within
/// `[lower, upper]` when not bracketed.
fn choose_step(
    lo: &mut Point,
    hi: &mut Point,
    trial: Point,
    bracketed: &mut bool,
    lower: f64,
    upper: f64,
) -> f64 {
    let t = trial.step;
    // The sign test of the paper: a zero derivative at `lo` gives NaN, which is
    // "not opposite".
    let opposite_sign = trial.d * (lo.d / lo.d.abs()) < 0.0;

    let next = if trial.f > lo.f {
        // Case 1: higher value. A minimizer lies between lo and the trial. Take the
        // cubic step if it is closer to lo than the quadratic (value-based) step, else
        // the midpoint of the two.
        let cubic = cubic_minimizer(*lo, trial);
        let quad = quadratic_with_slope(*lo, trial);
        *bracketed = true;
        if (cubic - lo.step).abs() < (quad - lo.step).abs() {
            cubic
        } else {
            cubic + 0.5 * (quad - cubic)
        }
    } else if opposite_sign {
        // Case 2: lower value, derivatives of opposite sign: bracketed. Take the step
        // farther from the trial of the cubic and the secant steps.
        let cubic = cubic_minimizer(trial, *lo);
        let secant = secant_step(trial, *lo);
        *bracketed = true;
        if (cubic - t).abs() > (secant - t).abs() {
            cubic
        } else {
            secant
        }
    } else if trial.d.abs() < lo.d.abs() {
        // Case 3: lower value, same derivative sign, derivative decreasing in magnitude.
        // The cubic may have no minimizer in the right direction; then go to the bound.
        let cubic = match cubic_minimizer_towards(trial, *lo) {
            Some(c) => c,
            None => {
                if t > lo.step {
                    upper
                } else {
                    lower
                }
            }
        };
        let secant = secant_step(trial, *lo);
        if *bracketed {
            let chosen = if (cubic - t).abs() < (secant - t).abs() {
                cubic
            } else {
                secant
            };
            // Stay well inside the interval.
            if t > lo.step {
                chosen.min(t + SHRINK * (hi.step - t))
            } else {
                chosen.max(t + SHRINK * (hi.step - t))
            }
        } else {
            let chosen = if (cubic - t).abs() > (secant - t).abs() {
                cubic
            } else {
                secant
            };
            chosen.clamp(lower.min(upper), upper.max(lower))
        }
    } else {
        // Case 4: lower value, same derivative sign, derivative not decreasing. If
        // bracketed, the cubic through the trial and hi; else go to the bound.
        if *bracketed {
            cubic_minimizer(trial, *hi)
        } else if t > lo.step {
            upper
        } else {
            lower
        }
    };

    // Update the interval.
    if trial.f > lo.f {
        *hi = trial;
    } else {
        if opposite_sign {
            *hi = *lo;
        }
        *lo = trial;
    }
    next
}

/// The minimizer of the cubic that interpolates `a` and `b` (values and derivatives),
/// computed in the scaled form that avoids overflow.
fn cubic_minimizer(a: Point, b: Point) -> f64 {
    let theta = 3.0 * (a.f - b.f) / (b.step - a.step) + a.d + b.d;
    let scale = theta.abs().max(a.d.abs()).max(b.d.abs());
    let disc = (theta / scale) * (theta / scale) - (a.d / scale) * (b.d / scale);
    let mut gamma = scale * disc.max(0.0).sqrt();
    if b.step < a.step {
        gamma = -gamma;
    }
    let p = (gamma - a.d) + theta;
    let q = ((gamma - a.d) + gamma) + b.d;
    let r = p / q;
    a.step + r * (b.step - a.step)
}

/// Case 3's cubic step from `trial` towards `best`, when the cubic's minimizer lies
/// beyond the trial in the direction of descent; `None` when the cubic has none there.
fn cubic_minimizer_towards(trial: Point, best: Point) -> Option<f64> {
    let theta = 3.0 * (best.f - trial.f) / (trial.step - best.step) + best.d + trial.d;
    let scale = theta.abs().max(best.d.abs()).max(trial.d.abs());
    let disc = (theta / scale) * (theta / scale) - (best.d / scale) * (trial.d / scale);
    let mut gamma = scale * disc.max(0.0).sqrt();
    if trial.step > best.step {
        gamma = -gamma;
    }
    let p = (gamma - trial.d) + theta;
    let q = (gamma + (best.d - trial.d)) + gamma;
    let r = p / q;
    if r < 0.0 && gamma != 0.0 {
        Some(trial.step + r * (best.step - trial.step))
    } else {
        None
    }
}

/// The minimizer of the quadratic through `a` (value and derivative) and `b`'s value.
fn quadratic_with_slope(a: Point, b: Point) -> f64 {
    let h = b.step - a.step;
    a.step + (a.d / ((a.f - b.f) / h + a.d)) / 2.0 * h
}

/// The zero of the secant of the derivatives of `a` and `b` (the minimizer of the
/// quadratic through both derivatives), measured from `a`.
fn secant_step(a: Point, b: Point) -> f64 {
    a.step + (a.d / (a.d - b.d)) * (b.step - a.step)
}
