//! The limited-memory BFGS direction: the two-loop recursion of Nocedal & Wright,
//! *Numerical Optimization*, 2nd ed., Algorithm 7.4, with the initial matrix
//! `H₀ = γ I`, `γ = sᵀy / yᵀy` of the newest pair (their eq. 7.20), and the rule that
//! keeps a pair only when its curvature is safely positive.
//!
//! Every sum runs in a fixed order, so the result depends only on the inputs' bits.

/// Vectors at least this long are summed in eight interleaved partial sums; shorter
/// ones in index order. One sequential sum costs an addition's latency per entry, which
/// for the millions of hashed coordinates of a sparse model made the optimizer's vector
/// work as slow as a pass; the partial sums vectorize. Short vectors (every dense model)
/// keep the sequential order, so their fits keep their exact trajectories: on NIST's
/// Longley case at `--tol 1e-11` a rounding-level change is enough to stall the fit at
/// float64's floor (see `objective::start::used_by_fits`).
const LANES_FROM: usize = 4096;

/// `Σ a[i] · b[i]`: in index order for short vectors, in eight interleaved partial sums
/// combined in a fixed order from [`LANES_FROM`] entries on.
pub(crate) fn dot(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len().min(b.len());
    if n < LANES_FROM {
        return a.iter().zip(b).fold(0.0, |acc, (x, y)| acc + x * y);
    }
    let (a, b) = (&a[..n], &b[..n]);
    let mut lanes = [0.0f64; 8];
    let ca = a.chunks_exact(8);
    let cb = b.chunks_exact(8);
    let tail = ca
        .remainder()
        .iter()
        .zip(cb.remainder())
        .fold(0.0, |acc, (x, y)| acc + x * y);
    for (x, y) in ca.zip(cb) {
        for k in 0..8 {
            lanes[k] += x[k] * y[k];
        }
    }
    ((lanes[0] + lanes[1]) + (lanes[2] + lanes[3]))
        + ((lanes[4] + lanes[5]) + (lanes[6] + lanes[7]))
        + tail
}

/// Euclidean norm.
pub(crate) fn norm2(a: &[f64]) -> f64 {
    dot(a, a).sqrt()
}

/// Largest absolute component (0 for an empty slice; NaN if any component is NaN).
/// Eight running maxima (a maximum does not depend on the order, so this is exactly the
/// one-at-a-time maximum), so that the loop vectorizes.
pub(crate) fn norm_inf(a: &[f64]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let mut nan = false;
    let c = a.chunks_exact(8);
    for v in c.remainder() {
        nan |= v.is_nan();
        lanes[0] = lanes[0].max(v.abs());
    }
    for x in c {
        for k in 0..8 {
            nan |= x[k].is_nan();
            lanes[k] = lanes[k].max(x[k].abs());
        }
    }
    if nan {
        return f64::NAN;
    }
    lanes.iter().fold(0.0_f64, |m, v| m.max(*v))
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
    // yᵀs of every pair, once (the products are the same either way round, so this is
    // bitwise the sᵀy of the initial matrix too).
    let mut ys = [0.0f64; 64];
    let mut ys_long = Vec::new();
    let ys: &mut [f64] = if m <= ys.len() {
        &mut ys[..m]
    } else {
        ys_long.resize(m, 0.0);
        &mut ys_long
    };
    for i in 0..m {
        ys[i] = dot(&y[i], &s[i]);
    }
    for i in (0..m).rev() {
        let rho = 1.0 / ys[i];
        let a = rho * dot(&s[i], d);
        alpha[i] = a;
        for (q, yi) in d.iter_mut().zip(&y[i]) {
            *q -= a * yi;
        }
    }
    if m > 0 {
        let newest = m - 1;
        let gamma = ys[newest] / dot(&y[newest], &y[newest]);
        for q in d.iter_mut() {
            *q *= gamma;
        }
    }
    for i in 0..m {
        let rho = 1.0 / ys[i];
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

/// `Σ a[i] · b[i]` over the indices where `free[i]`, summed in index order.
fn dot_free(a: &[f64], b: &[f64], free: &[bool]) -> f64 {
    a.iter()
        .zip(b)
        .zip(free)
        .fold(0.0, |acc, ((x, y), f)| if *f { acc + x * y } else { acc })
}

/// The two-loop recursion restricted to the subspace of the coordinates where
/// `free[i]`: every pair is replaced by its restriction `(s_F, y_F)`, pairs whose
/// restriction fails [`curvature_ok`] (with `eps`) are left out, and `d` is 0 outside
/// the subspace. The result is `d_F = −H_F g_F` for the L-BFGS inverse-Hessian
/// approximation `H_F` of the reduced problem; when the fixed coordinates did not move
/// in a step (`s_A = 0`), `y_F = ∇²f_FF s_F` holds exactly for a quadratic, so the
/// restricted pair is a true secant pair of the reduced Hessian. With every coordinate
/// free this is [`two_loop`] (same operations, same bits) except that pairs are checked
/// again. `alpha` and `kept` are scratch of at least `s.len()` entries.
#[allow(clippy::too_many_arguments)]
pub(crate) fn two_loop_free(
    s: &[Vec<f64>],
    y: &[Vec<f64>],
    g: &[f64],
    free: &[bool],
    eps: f64,
    d: &mut [f64],
    alpha: &mut [f64],
    kept: &mut [bool],
) {
    for (q, (gi, f)) in d.iter_mut().zip(g.iter().zip(free)) {
        *q = if *f { *gi } else { 0.0 };
    }
    let m = s.len();
    let mut newest = None;
    for i in 0..m {
        let sy = dot_free(&s[i], &y[i], free);
        let bound = eps * dot_free(&s[i], &s[i], free).sqrt() * dot_free(&y[i], &y[i], free).sqrt();
        kept[i] = sy.is_finite() && bound.is_finite() && sy > bound && sy > 0.0;
        if kept[i] {
            newest = Some(i);
        }
    }
    for i in (0..m).rev() {
        if !kept[i] {
            continue;
        }
        let rho = 1.0 / dot_free(&y[i], &s[i], free);
        let a = rho * dot_free(&s[i], d, free);
        alpha[i] = a;
        for ((q, yi), f) in d.iter_mut().zip(&y[i]).zip(free) {
            if *f {
                *q -= a * yi;
            }
        }
    }
    if let Some(k) = newest {
        let gamma = dot_free(&s[k], &y[k], free) / dot_free(&y[k], &y[k], free);
        for q in d.iter_mut() {
            *q *= gamma;
        }
    }
    for i in 0..m {
        if !kept[i] {
            continue;
        }
        let rho = 1.0 / dot_free(&y[i], &s[i], free);
        let beta = rho * dot_free(&y[i], d, free);
        let c = alpha[i] - beta;
        for ((r, si), f) in d.iter_mut().zip(&s[i]).zip(free) {
            if *f {
                *r += c * si;
            }
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
