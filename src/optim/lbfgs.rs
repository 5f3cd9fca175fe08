//! The limited-memory BFGS direction: the two-loop recursion of Nocedal & Wright,
//! *Numerical Optimization*, 2nd ed., Algorithm 7.4, with the initial matrix
//! `H₀ = γ I`, `γ = sᵀy / yᵀy` of the newest pair (their eq. 7.20), and the rule that
//! keeps a pair only when its curvature is safely positive.
//!
//! All sums run in index order, so the result depends only on the inputs' bits.

/// `Σ a[i] · b[i]`, summed in index order.
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).fold(0.0, |acc, (x, y)| acc + x * y)
}

/// Euclidean norm.
pub(crate) fn norm2(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}

/// Largest absolute component (0 for an empty slice; NaN if any component is NaN).
pub(crate) fn norm_inf(a: &[f64]) -> f64 {
    a.iter().fold(0.0_f64, |m, v| {
        if v.is_nan() || m.is_nan() {
            f64::NAN
        } else {
            m.max(v.abs())
        }
    })
}

/// Writes `d = −H g` into `d`, where `H` is the L-BFGS inverse-Hessian approximation
/// built from the pairs `(s[i], y[i])`, oldest first. `alpha` is scratch space of at
/// least `s.len()` entries. With no pairs, `d = −g`.
pub(crate) fn two_loop(
    s: &[Vec<f64>],
    y: &[Vec<f64>],
    g: &[f64],
    d: &mut [f64],
    alpha: &mut [f64],
) {
    // q ← g (kept in d, negated at the end).
    d.copy_from_slice(g);
    let m = s.len();
    for i in (0..m).rev() {
        let rho = 1.0 / dot(&y[i], &s[i]);
        let a = rho * dot(&s[i], d);
        alpha[i] = a;
        for (q, yi) in d.iter_mut().zip(&y[i]) {
            *q -= a * yi;
        }
    }
    if m > 0 {
        let newest = m - 1;
        let gamma = dot(&s[newest], &y[newest]) / dot(&y[newest], &y[newest]);
        for q in d.iter_mut() {
            *q *= gamma;
        }
    }
    for i in 0..m {
        let rho = 1.0 / dot(&y[i], &s[i]);
        let beta = rho * dot(&y[i], d);
        let c = alpha[i] - beta;
        for (r, si) in d.iter_mut().zip(&s[i]) {
            *r += c * si;
        }
    }
    for v in d.iter_mut() {
        *v = -*v;
    }
}

/// True when the pair `(s, y)` has curvature safely above zero:
/// `sᵀy > eps · ‖s‖ · ‖y‖` (and everything finite).
pub(crate) fn curvature_ok(s: &[f64], y: &[f64], eps: f64) -> bool {
    let sy = dot(s, y);
    let bound = eps * norm2(s) * norm2(y);
    sy.is_finite() && bound.is_finite() && sy > bound && sy > 0.0
}

/// Appends the pair, dropping the oldest when `history` pairs are already kept. The
/// dropped pair's buffers are reused.
pub(crate) fn push_pair(
    s_hist: &mut Vec<Vec<f64>>,
    y_hist: &mut Vec<Vec<f64>>,
    s: &[f64],
    y: &[f64],
    history: usize,
) {
    if s_hist.len() >= history && !s_hist.is_empty() {
        let mut old_s = s_hist.remove(0);
        let mut old_y = y_hist.remove(0);
        old_s.copy_from_slice(s);
        old_y.copy_from_slice(y);
        s_hist.push(old_s);
        y_hist.push(old_y);
    } else {
        s_hist.push(s.to_vec());
        y_hist.push(y.to_vec());
    }
    while s_hist.len() > history {
        s_hist.remove(0);
        y_hist.remove(0);
    }
}
