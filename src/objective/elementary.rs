//! `exp` and `log1p` written so that a loop over many arguments vectorizes: straight-line
//! arithmetic and selects, no calls, no branches. The loss kernels call them once per
//! row, where the system library's scalar functions were a large part of a pass.
//!
//! Method (the classic one: Cody and Waite's argument reduction, a series on the reduced
//! range): `exp(x) = 2^n · e^r` with `n = round(x / ln 2)`, `r = x − n ln 2` in two parts
//! (`|r| ≤ ln 2 / 2`) and e^r by its Taylor series to degree 13 (truncation below 5e-18
//! relative); `log1p(e) = log(u) + (e − (u − 1)) / u` for `u = 1 + e`, with `log(u)` from
//! `u = 2^k m`, `m ∈ [√2/2, √2]`, and `log(m) = 2 atanh(f / (2 + f))` (`f = m − 1`) by its
//! series to `s^23`. Both stay within a few units in the last place of the correctly
//! rounded value (the tests compare with the system library over their whole range).
//! They are deterministic: the same bits on every machine, whatever vector width the
//! compiler picks, because each lane does the same operations in the same order.

/// `ln 2` in two parts: the upper one has 21 trailing zero bits, so `n · LN2_HI` is exact
/// for every `|n| < 2^11` (fdlibm's split; checked against 200-bit `ln 2` with mpmath).
const LN2_HI: f64 = 0.693_147_180_369_123_8;
const LN2_LO: f64 = 1.908_214_929_270_587_7e-10;
const LOG2E: f64 = std::f64::consts::LOG2_E;
/// `1.5 · 2^52`: adding it rounds to an integer held in the low bits of the mantissa.
const ROUNDER: f64 = 6_755_399_441_055_744.0;
/// Below this `exp` returns 0 (the true value is below 1e-307, near the subnormals).
const EXP_LOW: f64 = -707.0;
/// Above this `exp` overflows to infinity (`ln f64::MAX` ≈ 709.78).
const EXP_HIGH: f64 = 709.782_712_893_384;

/// `e^x`: 0 below −707 (where the true value is below 1e-307), infinity
/// above `ln f64::MAX`, NaN for NaN.
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    let xc = x.clamp(EXP_LOW, EXP_HIGH);
    let t = xc * LOG2E + ROUNDER;
    let n = t - ROUNDER;
    let r = (xc - n * LN2_HI) - n * LN2_LO;
    // Taylor series of e^r to r^13, in Horner form.
    let mut p = 1.0 / 6_227_020_800.0;
    p = p * r + 1.0 / 479_001_600.0;
    p = p * r + 1.0 / 39_916_800.0;
    p = p * r + 1.0 / 3_628_800.0;
    p = p * r + 1.0 / 362_880.0;
    p = p * r + 1.0 / 40_320.0;
    p = p * r + 1.0 / 5_040.0;
    p = p * r + 1.0 / 720.0;
    p = p * r + 1.0 / 120.0;
    p = p * r + 1.0 / 24.0;
    p = p * r + 1.0 / 6.0;
    p = p * r + 0.5;
    p = p * r + 1.0;
    p = p * r + 1.0;
    // 2^(n − 1) from the integer n in the low mantissa bits of `t` (n ∈ [−1020, 1024],
    // so p 2^(n − 1) is a normal number and doubling it is exact).
    let half_scale = f64::from_bits(
        t.to_bits()
            .wrapping_sub(ROUNDER.to_bits())
            .wrapping_add(1022)
            << 52,
    );
    let y = (p * half_scale) * 2.0;
    if x < EXP_LOW {
        0.0
    } else if x >= EXP_HIGH {
        f64::INFINITY
    } else if x.is_nan() {
        x
    } else {
        y
    }
}

/// `ln(1 + e)` for `e ∈ [0, 1]` (the range a logistic loss needs, `e = exp(−|z|)`).
#[inline(always)]
pub fn log1p_unit(e: f64) -> f64 {
    let u = 1.0 + e;
    // 1 + e = u + c exactly (u − 1 is exact for u ∈ [1, 2]), so ln(1 + e) ≈ ln u + c / u.
    let c = e - (u - 1.0);
    let upper = u > std::f64::consts::SQRT_2;
    let m = if upper { 0.5 * u } else { u };
    let k = if upper { 1.0 } else { 0.0 };
    let f = m - 1.0;
    let s = f / (2.0 + f);
    let z = s * s;
    // 2 atanh(s) = f − s (f − z P(z)) with P(z) = Σ 2 z^i / (2i + 3).
    let mut p = 2.0 / 23.0;
    p = p * z + 2.0 / 21.0;
    p = p * z + 2.0 / 19.0;
    p = p * z + 2.0 / 17.0;
    p = p * z + 2.0 / 15.0;
    p = p * z + 2.0 / 13.0;
    p = p * z + 2.0 / 11.0;
    p = p * z + 2.0 / 9.0;
    p = p * z + 2.0 / 7.0;
    p = p * z + 2.0 / 5.0;
    p = p * z + 2.0 / 3.0;
    let log_m = f - s * (f - z * p);
    k * LN2_HI + (log_m + (k * LN2_LO + c / u))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Distance in units in the last place between two finite doubles of one sign.
    fn ulps(a: f64, b: f64) -> u64 {
        (a.to_bits() as i64 - b.to_bits() as i64).unsigned_abs()
    }

    /// Compared with the system library's `exp` (glibc's is within one unit of the
    /// correctly rounded value, its documented bound) over the whole finite range.
    #[test]
    fn exp_is_within_two_units_of_the_system_library() {
        let mut worst = 0;
        let mut x = -707.0;
        while x < 709.78 {
            for d in [0.0, 1e-9, 0.123_456_789, 0.5] {
                let v = x + d;
                if v < EXP_HIGH {
                    worst = worst.max(ulps(exp(v), v.exp()));
                }
            }
            x += 0.013;
        }
        // Near 0, where r is the argument itself.
        for i in 0..20_000 {
            let v = (i as f64 - 10_000.0) * 1e-7;
            worst = worst.max(ulps(exp(v), v.exp()));
        }
        assert!(worst <= 2, "worst {worst} ulps");
        assert_eq!(exp(0.0), 1.0);
        assert_eq!(exp(-1000.0), 0.0);
        assert_eq!(exp(800.0), f64::INFINITY);
        assert_eq!(exp(f64::NEG_INFINITY), 0.0);
        assert!(exp(f64::NAN).is_nan());
    }

    /// Compared with the system library's `ln_1p` over `[0, 1]` and at tiny arguments.
    #[test]
    fn log1p_is_within_two_units_of_the_system_library() {
        let mut worst = 0;
        for i in 0..=200_000 {
            let e = i as f64 / 200_000.0;
            worst = worst.max(ulps(log1p_unit(e), e.ln_1p()));
        }
        for p in 1..320 {
            let e = 10f64.powi(-p);
            worst = worst.max(ulps(log1p_unit(e), e.ln_1p()));
            let e = 3.7 * e;
            if e <= 1.0 {
                worst = worst.max(ulps(log1p_unit(e), e.ln_1p()));
            }
        }
        assert!(worst <= 2, "worst {worst} ulps");
        assert_eq!(log1p_unit(0.0), 0.0);
        assert_eq!(log1p_unit(1.0).to_bits(), std::f64::consts::LN_2.to_bits());
        assert_eq!(log1p_unit(5e-324), 5e-324);
    }
}
