//! The loss families of DESIGN §4, row by row, in numerically stable forms.

use serde::{Deserialize, Serialize};

use super::elementary::{exp, log1p_unit};
use crate::{Error, Result};

/// A loss family.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Loss {
    /// Binary logistic regression: `log(1 + e^z) − y·z`, y in {0, 1}.
    Logistic,
    /// Linear least squares: `(z − y)² / 2`.
    Squared,
    /// Poisson regression with log link: `e^z − y·z`, y ≥ 0.
    Poisson,
    /// Multinomial logistic regression over K classes.
    Softmax,
}

impl Loss {
    /// Parses a loss name as written on the command line and in model files.
    pub fn parse(name: &str) -> Result<Loss> {
        match name {
            "logistic" => Ok(Loss::Logistic),
            "squared" => Ok(Loss::Squared),
            "poisson" => Ok(Loss::Poisson),
            "softmax" => Ok(Loss::Softmax),
            other => Err(Error::usage(format!(
                "unknown loss '{other}'; choose logistic, squared, poisson or softmax"
            ))),
        }
    }

    /// The name as written on the command line and in model files.
    pub fn as_str(self) -> &'static str {
        match self {
            Loss::Logistic => "logistic",
            Loss::Squared => "squared",
            Loss::Poisson => "poisson",
            Loss::Softmax => "softmax",
        }
    }
}

/// Largest margin whose exponential is finite in `f64`.
pub const MAX_EXP_MARGIN: f64 = 709.0;

/// `log(1 + e^z)` without overflow or loss of precision.
#[inline(always)]
pub fn softplus(z: f64) -> f64 {
    z.max(0.0) + log1p_unit(exp(-z.abs()))
}

/// `1 / (1 + e^−z)` without overflow.
#[inline(always)]
pub fn sigmoid(z: f64) -> f64 {
    let e = exp(-z.abs());
    (if z > 0.0 { 1.0 } else { e }) / (1.0 + e)
}

/// Logistic loss and its derivative in `z`, from one exponential `e^−|z|`: bitwise
/// [`softplus`]`(z) − y·z` and [`sigmoid`]`(z) − y` (the kernels' hot path). Branch-free,
/// so a loop over rows vectorizes.
#[inline(always)]
pub fn logistic(z: f64, y: f64) -> (f64, f64) {
    let e = exp(-z.abs());
    let softplus = z.max(0.0) + log1p_unit(e);
    let sigmoid = (if z > 0.0 { 1.0 } else { e }) / (1.0 + e);
    (softplus - y * z, sigmoid - y)
}

/// Squared loss and its derivative in `z`.
#[inline(always)]
pub fn squared(z: f64, y: f64) -> (f64, f64) {
    let r = z - y;
    (0.5 * r * r, r)
}

/// Poisson loss and its derivative in `z` (infinite when `e^z` overflows).
#[inline(always)]
pub fn poisson(z: f64, y: f64) -> (f64, f64) {
    let mu = exp(z);
    (mu - y * z, mu - y)
}

/// Second derivative of the loss in `z` (for standard errors).
#[inline]
pub fn curvature(loss: Loss, z: f64) -> f64 {
    match loss {
        Loss::Logistic => {
            let p = sigmoid(z);
            p * (1.0 - p)
        }
        Loss::Squared => 1.0,
        Loss::Poisson => exp(z),
        Loss::Softmax => f64::NAN,
    }
}

/// Log-sum-exp of `z`, stable for large margins.
#[inline]
pub fn log_sum_exp(z: &[f64]) -> f64 {
    let m = z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + z.iter().map(|v| (v - m).exp()).sum::<f64>().ln()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn logistic_from_one_exponential_is_bitwise_the_two_function_form() {
        for z in [
            -800.0, -30.0, -1.5, -1e-300, -0.0, 0.0, 1e-300, 0.7, 36.0, 710.0,
        ] {
            for y in [0.0, 1.0] {
                let (l, d) = logistic(z, y);
                assert_eq!(l.to_bits(), (softplus(z) - y * z).to_bits(), "z = {z}");
                assert_eq!(d.to_bits(), (sigmoid(z) - y).to_bits(), "z = {z}");
            }
        }
    }

    #[test]
    fn logistic_is_stable_for_huge_margins() {
        let (l, d) = logistic(1e4, 1.0);
        assert_eq!(l, 0.0);
        assert_eq!(d, 0.0);
        let (l, d) = logistic(1e4, 0.0);
        assert_eq!(l, 1e4);
        assert_eq!(d, 1.0);
        let (l, d) = logistic(-1e4, 1.0);
        assert_eq!(l, 1e4);
        assert_eq!(d, -1.0);
    }

    #[test]
    fn log_sum_exp_is_stable() {
        let v = log_sum_exp(&[1e4, 1e4, -1e4]);
        assert!((v - (1e4 + 2f64.ln())).abs() < 1e-9);
    }

    #[test]
    fn softplus_matches_direct_formula_for_moderate_margins() {
        for z in [-20.0, -1.0, 0.0, 0.5, 3.0, 30.0] {
            let direct = (1.0 + f64::exp(z)).ln();
            assert!((softplus(z) - direct).abs() <= 1e-14 * direct.max(1.0));
        }
    }
}
