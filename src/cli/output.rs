//! Printing: progress and messages on stderr, results on stdout; a closed stdout (a pipe
//! into `head`) ends quietly instead of panicking.

use std::io::Write;

/// Prints one line on stdout; a closed pipe is ignored.
pub fn line(text: &str) {
    let mut out = std::io::stdout().lock();
    let _ = writeln!(out, "{text}");
}

/// Prints one line on stderr.
pub fn note(text: &str) {
    let mut err = std::io::stderr().lock();
    let _ = writeln!(err, "{text}");
}

/// Prints a warning on stderr.
pub fn warning(text: &str) {
    note(&format!("warning: {text}"));
}

/// Prints an error on stderr: one sentence.
pub fn error(e: &outcore::Error) {
    note(&format!("error: {e}"));
}

/// `v` with `digits` significant digits: fixed notation for magnitudes from 1e-4 to
/// 1e6, scientific with a two-digit exponent otherwise.
pub fn sig(v: f64, digits: usize) -> String {
    let digits = digits.max(1);
    if v == 0.0 || !v.is_finite() {
        return format!("{v}");
    }
    let a = v.abs();
    if (1e-4..1e6).contains(&a) {
        let magnitude = a.log10().floor() as i32;
        let decimals = (digits as i32 - 1 - magnitude).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        sci(v, digits)
    }
}

/// A setting as the user would type it: `1e-6`, `0.5`, `0`.
pub fn compact(v: f64) -> String {
    let a = v.abs();
    if v != 0.0 && !(1e-3..1e6).contains(&a) {
        format!("{v:e}")
    } else {
        format!("{v}")
    }
}

/// `v` in scientific notation with `digits` significant digits and a two-digit exponent
/// (`3.10e-07`).
pub fn sci(v: f64, digits: usize) -> String {
    if !v.is_finite() {
        return format!("{v}");
    }
    let s = format!("{v:.prec$e}", prec = digits.max(1) - 1);
    match s.split_once('e') {
        Some((mantissa, exp)) => {
            let (sign, d) = match exp.strip_prefix('-') {
                Some(d) => ("-", d),
                None => ("+", exp),
            };
            format!("{mantissa}e{sign}{d:0>2}")
        }
        None => s,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_well() {
        assert_eq!(sig(0.454027191647, 12), "0.454027191647");
        assert_eq!(sig(-3.377386, 7), "-3.377386");
        assert_eq!(sig(1234.5, 3), "1234");
        assert_eq!(sig(2.5e-7, 3), "2.50e-07");
        assert_eq!(sci(9.212e-7, 3), "9.21e-07");
        assert_eq!(sci(12.0, 2), "1.2e+01");
        assert_eq!(sig(0.0, 5), "0");
    }
}
