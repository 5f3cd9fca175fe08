//! The pieces of OWL-QN (G. Andrew and J. Gao (2007), "Scalable training of
//! L1-regularized log-linear models", ICML) for `F(x) = f(x) + Σ λ_j |x_j|` with
//! per-coordinate weights `λ_j ≥ 0` (0 leaves a coordinate unpenalized, such as an
//! intercept).
//!
//! - the pseudo-gradient `◇F(x)`: the one-sided derivative of `F` that points downhill,
//!   0 at a kink whose subdifferential contains 0;
//! - the orthant `ξ`: `sign(x_j)` where `x_j ≠ 0`, else `sign(−◇F_j)`;
//! - the free set: every coordinate except the penalized ones at exactly 0 whose
//!   subdifferential contains 0 (`◇F_j = 0`); the quasi-Newton direction is computed in
//!   the subspace of the free coordinates (see `lbfgs::two_loop_free`);
//! - the direction constraint, at coordinates at 0 only: a component whose sign differs
//!   from `−◇F_j` is set to 0. Andrew & Gao apply it to every coordinate; away from 0
//!   that discards valid quasi-Newton components (`F` is smooth there, and the
//!   projection below already keeps the trial in the orthant), which on correlated
//!   columns wrecked the direction (see docs/optim.md, "Direction under L1");
//! - the projection of a trial point onto the orthant: a penalized component that
//!   leaves it (changes sign, or moves off 0 in a coordinate where `ξ_j = 0`) is set to
//!   exactly 0.0. This is what produces exact zeros.

/// `Σ λ_j |x_j|`, summed in index order.
pub(crate) fn l1_term(l1: &[f64], x: &[f64]) -> f64 {
    l1.iter().zip(x).fold(
        0.0,
        |acc, (l, v)| if *l > 0.0 { acc + l * v.abs() } else { acc },
    )
}

/// One component of the pseudo-gradient: weight `lam`, coordinate `x`, smooth
/// derivative `g`.
pub(crate) fn pseudo_gradient_component(lam: f64, x: f64, g: f64) -> f64 {
    if lam <= 0.0 {
        g
    } else if x > 0.0 {
        g + lam
    } else if x < 0.0 {
        g - lam
    } else if g + lam < 0.0 {
        g + lam
    } else if g - lam > 0.0 {
        g - lam
    } else {
        0.0
    }
}

/// Writes the pseudo-gradient of `f + Σ λ|x|` at `x` (smooth gradient `g`) into `pg`.
pub(crate) fn pseudo_gradient(l1: &[f64], x: &[f64], g: &[f64], pg: &mut [f64]) {
    for j in 0..x.len() {
        pg[j] = pseudo_gradient_component(l1[j], x[j], g[j]);
    }
}

/// Sets to 0 each penalized component of `d` at a coordinate with `x_j = 0` whose sign
/// disagrees with `−pg` (there `F` is not differentiable and a move against `−pg` does
/// not descend). Coordinates away from 0 keep their component. Removing components with
/// `d_j · pg_j ≥ 0` never makes `pgᵀd` less negative, so a descent direction stays one.
pub(crate) fn constrain_direction(l1: &[f64], x: &[f64], pg: &[f64], d: &mut [f64]) {
    for j in 0..d.len() {
        if l1[j] > 0.0 && x[j] == 0.0 && d[j] * pg[j] >= 0.0 {
            d[j] = 0.0;
        }
    }
}

/// Marks the coordinates free to move: all but the penalized ones at exactly zero whose
/// subdifferential contains 0 (`pg_j = 0`), which the orthant holds at zero.
pub(crate) fn free_set(l1: &[f64], x: &[f64], pg: &[f64], free: &mut [bool]) {
    for j in 0..x.len() {
        free[j] = !(l1[j] > 0.0 && x[j] == 0.0 && pg[j] == 0.0);
    }
}

/// Writes the orthant sign of each coordinate (`−1`, `0` or `1`) into `xi`.
pub(crate) fn orthant(x: &[f64], pg: &[f64], xi: &mut [f64]) {
    for j in 0..x.len() {
        xi[j] = if x[j] > 0.0 {
            1.0
        } else if x[j] < 0.0 {
            -1.0
        } else if pg[j] < 0.0 {
            1.0
        } else if pg[j] > 0.0 {
            -1.0
        } else {
            0.0
        };
    }
}

/// Projects the penalized components of `x` onto the orthant `xi`: a component whose
/// sign is not that of `xi_j` becomes exactly 0.0.
pub(crate) fn project(l1: &[f64], xi: &[f64], x: &mut [f64]) {
    for j in 0..x.len() {
        let inside = x[j] * xi[j] > 0.0;
        if l1[j] > 0.0 && !inside {
            x[j] = 0.0;
        }
    }
}
