//! The holdout: a deterministic split of the rows into training and held-out rows.
//!
//! A row is held out when `h / 2^64 < fraction`, where `h` is the 64-bit XXH3 hash
//! (seed 0, from the `twox-hash` crate) of
//!
//! - by position (no key): the file's index in the sorted list of inputs and the row's
//!   position within that file (0-based), as two little-endian `u64`s (16 bytes);
//! - by key (`--split-key COL`): the key's text as UTF-8 bytes; integer keys are hashed
//!   as their decimal text, so the id `42` splits the same whether it is stored as an
//!   integer or as the string `"42"`. Every row whose key is null is one entity (the hash
//!   of the empty input with seed 1).
//!
//! The split depends on the data and the fraction only: never on the thread count, the
//! shard count or the block size. Training passes score held-out rows (their loss only)
//! in the same pass as the training rows, see [`crate::objective::GlmObjective`].

use arrow::array::{Array, AsArray};
use arrow::compute::cast;
use arrow::datatypes::{DataType, Int64Type};
use serde::{Deserialize, Serialize};
use twox_hash::XxHash3_64;

use crate::source::{BatchAt, ColumnClass, Source};
use crate::{Error, Result};

/// What the user asked for: how many rows to hold out, by what, and whether to stop
/// early on them.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct HoldoutSettings {
    /// Share of the rows (or of the keys) held out, strictly between 0 and 1.
    pub fraction: f64,
    /// Split by the value of this string or integer column instead of by row position.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub key: Option<String>,
    /// Stop when the holdout loss has not improved for this many accepted iterations.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub patience: Option<u64>,
}

impl HoldoutSettings {
    /// Checks the numbers a user gave.
    pub fn validate(&self) -> Result<()> {
        if !(self.fraction.is_finite() && self.fraction > 0.0 && self.fraction < 1.0) {
            return Err(Error::usage(format!(
                "--holdout must be a fraction strictly between 0 and 1, not {}",
                self.fraction
            )));
        }
        if self.patience == Some(0) {
            return Err(Error::usage("--holdout-patience must be at least 1"));
        }
        if self.key.as_deref() == Some("") {
            return Err(Error::usage("--split-key needs a column name"));
        }
        Ok(())
    }

    /// The split these settings define.
    pub fn split(&self) -> Result<RowSplit> {
        RowSplit::new(self.fraction, self.key.clone())
    }
}

/// The deterministic split of rows into training and held-out rows.
#[derive(Debug, Clone, PartialEq)]
pub struct RowSplit {
    fraction: f64,
    /// Held out when the hash is below this (`ceil(fraction · 2^64)`).
    threshold: u64,
    key: Option<String>,
}

/// The hash of a row by its position: file index and row within the file.
pub fn position_hash(file: usize, row: u64) -> u64 {
    let mut bytes = [0u8; 16];
    bytes[..8].copy_from_slice(&(file as u64).to_le_bytes());
    bytes[8..].copy_from_slice(&row.to_le_bytes());
    XxHash3_64::oneshot(&bytes)
}

/// The hash of a key value (`None`: a null key). Integer keys are passed as their
/// decimal text.
pub fn key_hash(key: Option<&str>) -> u64 {
    match key {
        Some(k) => XxHash3_64::oneshot(k.as_bytes()),
        None => XxHash3_64::oneshot_with_seed(1, &[]),
    }
}

impl RowSplit {
    /// The split that holds out `fraction` of the rows, by position or by `key`.
    pub fn new(fraction: f64, key: Option<String>) -> Result<RowSplit> {
        if !(fraction.is_finite() && fraction > 0.0 && fraction < 1.0) {
            return Err(Error::usage(format!(
                "the holdout fraction must be strictly between 0 and 1, not {fraction}"
            )));
        }
        // fraction · 2^64 is exact in f64 (a power-of-two scaling) and below 2^64, so
        // `h < ceil(fraction · 2^64)` is exactly `h / 2^64 < fraction` for integers h.
        let threshold = (fraction * 2f64.powi(64)).ceil() as u64;
        Ok(RowSplit {
            fraction,
            threshold,
            key,
        })
    }

    /// The share held out.
    pub fn fraction(&self) -> f64 {
        self.fraction
    }

    /// The key column, when the split is by key.
    pub fn key(&self) -> Option<&str> {
        self.key.as_deref()
    }

    /// True when a row of this hash is held out.
    #[inline]
    pub fn holds_out_hash(&self, hash: u64) -> bool {
        hash < self.threshold
    }

    /// True when the row at `row` (0-based) of file `file` is held out (split by position).
    pub fn holds_out_position(&self, file: usize, row: u64) -> bool {
        self.holds_out_hash(position_hash(file, row))
    }

    /// True when the rows of this key value are held out (split by key).
    pub fn holds_out_key(&self, key: Option<&str>) -> bool {
        self.holds_out_hash(key_hash(key))
    }

    /// Checks that the key column is in every file and is a string or integer column.
    pub fn check_columns(&self, source: &Source) -> Result<()> {
        let Some(key) = &self.key else {
            return Ok(());
        };
        source.require_columns(&[key.as_str()])?;
        let Some(data_type) = source.column_type(key) else {
            return Err(Error::usage(format!("the data have no column '{key}'")));
        };
        if !key_type_ok(data_type) {
            return Err(Error::usage(format!(
                "the split key '{key}' of {} is a {} column ({data_type}); --split-key needs a string or integer column",
                source.files()[0].path.display(),
                ColumnClass::of(data_type).describe()
            )));
        }
        Ok(())
    }

    /// Which rows of a decoded batch are held out (the key column must be decoded).
    pub fn mask(&self, source: &Source, at: &BatchAt) -> Result<Vec<bool>> {
        let n = at.batch.num_rows();
        let Some(key) = &self.key else {
            return Ok((0..n as u64)
                .map(|i| self.holds_out_position(at.file, at.first_row + i))
                .collect());
        };
        let array = at
            .batch
            .column_by_name(key)
            .ok_or_else(|| Error::internal(format!("the split key '{key}' was not decoded")))?;
        let file = || source.files()[at.file].path.display().to_string();
        if !key_type_ok(array.data_type()) {
            return Err(Error::data(format!(
                "the split key '{key}' of {} is a {} column; --split-key needs a string or integer column",
                file(),
                array.data_type()
            )));
        }
        if array.data_type().is_integer() {
            let ints = cast(array, &DataType::Int64).map_err(|e| {
                Error::data(format!(
                    "the split key '{key}' of {} cannot be read as integers: {e}",
                    file()
                ))
            })?;
            let ints = ints.as_primitive::<Int64Type>();
            let mut text = String::new();
            Ok((0..n)
                .map(|i| {
                    if ints.is_null(i) {
                        self.holds_out_key(None)
                    } else {
                        text.clear();
                        text.push_str(&ints.value(i).to_string());
                        self.holds_out_key(Some(&text))
                    }
                })
                .collect())
        } else {
            let strings = cast(array, &DataType::Utf8).map_err(|e| {
                Error::data(format!(
                    "the split key '{key}' of {} cannot be read as text: {e}",
                    file()
                ))
            })?;
            let strings = strings.as_string::<i32>();
            Ok((0..n)
                .map(|i| self.holds_out_key(strings.is_valid(i).then(|| strings.value(i))))
                .collect())
        }
    }
}

/// String or integer (also dictionary-encoded).
fn key_type_ok(data_type: &DataType) -> bool {
    match data_type {
        DataType::Dictionary(_, value) => key_type_ok(value),
        t => t.is_integer() || ColumnClass::of(t) == ColumnClass::Text,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn threshold_matches_the_fraction_definition() {
        let s = RowSplit::new(0.25, None).unwrap();
        assert!(s.holds_out_hash(0));
        assert!(s.holds_out_hash((1u64 << 62) - 1));
        assert!(!s.holds_out_hash(1u64 << 62));
        assert!(!s.holds_out_hash(u64::MAX));
    }

    #[test]
    fn fractions_outside_zero_one_are_refused() {
        for f in [0.0, 1.0, -0.1, f64::NAN, 2.0] {
            assert!(RowSplit::new(f, None).is_err(), "{f}");
        }
    }

    #[test]
    fn integer_and_text_keys_agree() {
        assert_eq!(key_hash(Some("42")), key_hash(Some(&42i64.to_string())));
        assert_ne!(key_hash(None), key_hash(Some("")));
    }

    #[test]
    fn hashes_are_the_published_xxh3() {
        // XXH3-64 of the empty input with seed 0 (reference value of the xxHash project).
        assert_eq!(XxHash3_64::oneshot(&[]), 0x2D06_8005_38D3_94C2);
    }
}
