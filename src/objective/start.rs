//! The first evaluation of a fit without a pass of its own.
//!
//! A fit starts with every coefficient 0 and the intercept at the fit of the intercept
//! alone, so every row has the same margin `b₀`. The loss, its gradient and the held-out
//! loss there are then functions of a few weighted sums that the statistics pass
//! already collects: `Σ w`, the target's mean `ȳ` and spread, and per feature the
//! weighted means and co-moment of the feature and the target ([`Comoments`]). With `μ₀`
//! the mean the margin `b₀` predicts (`σ(b₀)`, `b₀`, `e^{b₀}`):
//!
//! - intercept: `∂/∂b₀ = μ₀ − ȳ`;
//! - feature `j` (centre `c`, scale `s`):
//!   `((μ₀ − ȳ) Σ w (x̃ − c) − Σ w (y − ȳ)(x̃ − c)) / (s W)`,
//!   where `x̃` is the value as the design reads it (the imputed value for a null, 1 or 0
//!   for a missing-value indicator);
//! - loss: `W softplus(b₀) − b₀ Σ w y` (logistic), `(m₂ + W (b₀ − ȳ)²) / 2` (squared),
//!   `W e^{b₀} − b₀ Σ w y` (Poisson).
//!
//! The sums agree with those of a pass to rounding (the tests compare them), not
//! bitwise; later evaluations are passes as always. Fits use it for the logistic and
//! Poisson losses (see [`used_by_fits`] for squared loss); never for softmax, sparse
//! (hashed) coordinates, `--precision f32` (whose rounded values the statistics do not
//! see) or a start with a nonzero coefficient.

use crate::features::stats::Comoments;
use crate::features::{Design, Summary};

use super::glm::Layout;
use super::loss::{self, Loss};

/// The weighted sums of one evaluation, before the division by the training weight and
/// the penalty: what the shards of a pass add up to.
#[derive(Debug, Clone, PartialEq)]
pub struct PassTotals {
    /// `Σ w ℓ` over the training rows.
    pub loss: f64,
    /// `Σ w ∂ℓ/∂θ` over the training rows, one per coordinate.
    pub grad: Vec<f64>,
    /// Weight of the training rows classified wrongly (logistic).
    pub wrong: f64,
    /// `Σ w ℓ` over the held-out rows.
    pub holdout_loss: f64,
    /// Weight of the held-out rows.
    pub holdout_weight: f64,
}

/// Whether a fit of `loss` takes its first evaluation from [`start_totals`]. Squared
/// loss does not: on NIST's Longley case at `--tol 1e-11`, a start whose sums differ
/// from a pass's by rounding alone sends the fit along a path that stalls at float64's
/// floor short of the tolerance (as some block sizes do with a pass's own start), where
/// a pass's start keeps the certified digits.
pub fn used_by_fits(loss: Loss) -> bool {
    matches!(loss, Loss::Logistic | Loss::Poisson)
}

/// The sums of the evaluation at `x`, if `x` is a point where every row has the same
/// margin and the statistics pass has what they need; `None` otherwise (a pass is run).
pub fn start_totals(
    design: &Design,
    summary: &Summary,
    layout: Layout,
    x: &[f64],
) -> Option<PassTotals> {
    let single = matches!(design.loss, Loss::Logistic | Loss::Squared | Loss::Poisson);
    if !single
        || layout.sparse > 0
        || design.rounds_to_f32()
        || x.len() != layout.dim()
        || x[1..].iter().any(|v| *v != 0.0)
        || summary.target_columns.len() != summary.columns.len()
    {
        return None;
    }
    let b0 = x[0];
    let w = summary.weight_sum;
    let t = &summary.target;
    let wy = t.mean * t.weight;
    let (mu, sum_loss) = match design.loss {
        Loss::Logistic => (loss::sigmoid(b0), w * loss::softplus(b0) - b0 * wy),
        Loss::Squared => (b0, 0.5 * (t.m2 + t.weight * (b0 - t.mean) * (b0 - t.mean))),
        _ => {
            let mu = super::elementary::exp(b0);
            (mu, w * mu - b0 * wy)
        }
    };
    if !sum_loss.is_finite() {
        return None;
    }
    let mut grad = vec![0.0; layout.dim()];
    grad[0] = w * (mu - t.mean);
    for (j, f) in design.features.iter().enumerate() {
        let at = summary
            .columns
            .iter()
            .position(|(name, _)| *name == f.column)?;
        let c = &summary.target_columns[at];
        let (sw, swy) = feature_sums(f.indicator, f.impute, f.center, t.mean, c);
        grad[1 + j] = ((mu - t.mean) * sw - swy) / f.scale;
    }
    let wrong = match design.loss {
        // Every margin is b₀: the rows on the other side of 0 are wrong (y is 0 or 1).
        Loss::Logistic if b0 > 0.0 => w - wy,
        Loss::Logistic => wy,
        _ => 0.0,
    };
    let h = &summary.held_out_target;
    let (holdout_loss, holdout_weight) = if design.holdout().is_some() && h.weight > 0.0 {
        let hy = h.mean * h.weight;
        let l = match design.loss {
            Loss::Logistic => h.weight * loss::softplus(b0) - b0 * hy,
            Loss::Squared => 0.5 * (h.m2 + h.weight * (b0 - h.mean) * (b0 - h.mean)),
            _ => h.weight * super::elementary::exp(b0) - b0 * hy,
        };
        (l, h.weight)
    } else {
        (0.0, 0.0)
    };
    Some(PassTotals {
        loss: sum_loss,
        grad,
        wrong,
        holdout_loss,
        holdout_weight,
    })
}

/// `(Σ w (x̃ − c), Σ w (y − ȳ)(x̃ − c))` over the training rows, for a feature read from
/// a column with sums `s` against the target (whose training mean is `ybar`): from the
/// co-moment, so that a target far from 0 costs no precision.
fn feature_sums(indicator: bool, impute: f64, c: f64, ybar: f64, s: &Comoments) -> (f64, f64) {
    // Σ w (y − ȳ) over the null rows.
    let null_y = s.null_weight * (s.null_mean_y - ybar);
    if indicator {
        // x̃ = 1 on the null rows, 0 elsewhere (and Σ w (y − ȳ) = 0 over all rows).
        (s.null_weight - c * (s.weight + s.null_weight), null_y)
    } else {
        let dx = s.mean_less(c);
        (
            s.weight * dx + (impute - c) * s.null_weight,
            s.comoment + s.weight * (s.mean_y - ybar) * dx + (impute - c) * null_y,
        )
    }
}
