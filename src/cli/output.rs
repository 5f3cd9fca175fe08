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
