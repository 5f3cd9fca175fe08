//! The `fit` settings file (`--config RUN.toml`): the same keys as the `fit` flags, with
//! underscores. Parsing lives here, in the library, so that it can be tested and fuzzed
//! on its own ([`parse`] takes the text); the binary merges the result under its flags.
//!
//! Unknown keys and values of the wrong type are refused with one sentence that names the
//! file, the line, the column and the key.

use std::path::{Path, PathBuf};

use serde::Deserialize;

use crate::{Error, Result};

/// The settings file. Every key is optional; a flag given on the command line wins.
#[derive(Debug, Default, Clone, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
#[allow(missing_docs)]
pub struct SettingsFile {
    pub data: Option<Vec<String>>,
    pub target: Option<String>,
    pub weight: Option<String>,
    pub features: Option<Vec<String>>,
    pub loss: Option<String>,
    pub ridge: Option<f64>,
    pub lasso: Option<f64>,
    pub tol: Option<f64>,
    pub max_passes: Option<u64>,
    pub max_seconds: Option<f64>,
    pub history: Option<usize>,
    pub threads: Option<usize>,
    pub shards: Option<usize>,
    pub block_rows: Option<usize>,
    pub missing: Option<String>,
    pub skip_missing_target: Option<bool>,
    pub standardize: Option<bool>,
    pub inference: Option<bool>,
    pub inference_max_features: Option<usize>,
    pub holdout: Option<f64>,
    pub split_key: Option<String>,
    pub holdout_patience: Option<u64>,
    pub run: Option<PathBuf>,
    pub out: Option<PathBuf>,
    pub checkpoint_every: Option<String>,
    pub categorical: Option<Vec<String>>,
    pub cross: Option<Vec<String>>,
    pub hash_bits: Option<u32>,
    pub sparse_vector: Option<Vec<String>>,
    pub gradient_memory: Option<f64>,
    pub cache: Option<PathBuf>,
    pub no_cache: Option<bool>,
    pub precision: Option<String>,
}

/// Reads and parses the settings file at `path`.
pub fn read(path: &Path) -> Result<SettingsFile> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    parse(&text, path)
}

/// Parses the text of a settings file; `path` only names the file in messages. Any text
/// gives a value or an [`Error`] of kind [`Usage`](crate::ErrorKind::Usage), never a
/// panic.
pub fn parse(text: &str, path: &Path) -> Result<SettingsFile> {
    toml::from_str(text).map_err(|e| {
        let (line, col) = e.span().map(|s| line_col(text, s.start)).unwrap_or((0, 0));
        // Name the key of that line when the parser's message does not (wrong types).
        let key = text
            .lines()
            .nth(line.saturating_sub(1))
            .and_then(|l| l.split_once('='))
            .map(|(k, _)| k.trim().trim_matches('"'))
            .filter(|k| !k.is_empty() && !e.message().contains(*k));
        let message = match key {
            Some(k) => format!("key '{k}': {}", e.message()),
            None => e.message().to_string(),
        };
        Error::usage(format!(
            "the settings file {} is wrong at line {line}, column {col}: {}",
            path.display(),
            message.trim_end()
        ))
    })
}

/// Line and column (both from 1, the column in characters) of byte `offset` of `text`.
fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let mut end = offset.min(text.len());
    while !text.is_char_boundary(end) {
        end -= 1;
    }
    let before = &text[..end];
    let line = before.matches('\n').count() + 1;
    let start = before.rfind('\n').map_or(0, |i| i + 1);
    let col = before[start..].chars().count() + 1;
    (line, col)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keys_parse_and_errors_name_line_and_key() {
        let p = Path::new("run.toml");
        let s = parse("target = \"y\"\nridge = 0.5\ndata = [\"a.parquet\"]\n", p).unwrap();
        assert_eq!(s.target.as_deref(), Some("y"));
        assert_eq!(s.ridge, Some(0.5));
        assert_eq!(s.data, Some(vec!["a.parquet".to_string()]));
        let e = parse("target = \"y\"\n\nmax_passes = \"many\"\n", p).unwrap_err();
        assert!(e.message().contains("line 3"), "{e}");
        assert!(e.message().contains("max_passes"), "{e}");
        let e = parse("rigde = 1\n", p).unwrap_err();
        assert!(
            e.message().contains("rigde") && e.message().contains("line 1"),
            "{e}"
        );
    }

    #[test]
    fn columns_count_characters_not_bytes() {
        // "é = 1\n" is 7 bytes; 'x' is byte 7, 'é' bytes 8 and 9.
        assert_eq!(line_col("é = 1\nxé", 8), (2, 2));
        assert_eq!(line_col("é = 1\nxé", 10), (2, 3));
        // An offset inside a character does not panic.
        assert_eq!(line_col("é = 1\nxé", 9), (2, 2));
        assert_eq!(line_col("é", 1), (1, 1));
    }
}
