//! Turning Arrow columns into `f64` values or class labels, with the checks every use
//! shares: non-finite values are an error naming file, column and row.

use arrow::array::{Array, ArrayRef, AsArray, Float64Array};
use arrow::compute::cast;
use arrow::datatypes::DataType;

use crate::source::SourceFile;
use crate::{Error, Result};

/// Where a value came from, for messages.
#[derive(Debug, Clone, Copy)]
pub struct Place<'a> {
    /// The file.
    pub file: &'a SourceFile,
    /// Row number within the file of the block's first row (0-based).
    pub first_row: u64,
}

impl Place<'_> {
    /// "row R of FILE" for the block's `offset`-th row, counting rows from 1.
    pub fn row(&self, offset: usize) -> String {
        format!(
            "row {} of {}",
            self.first_row + offset as u64 + 1,
            self.file.path.display()
        )
    }
}

/// The column as `f64`, nulls kept as nulls. Integers, floats, decimals, booleans and
/// dictionaries of those are accepted.
pub fn as_f64(array: &ArrayRef, column: &str, place: Place<'_>) -> Result<Float64Array> {
    let converted = if array.data_type() == &DataType::Float64 {
        array.clone()
    } else {
        cast(array, &DataType::Float64).map_err(|e| {
            Error::data(format!(
                "column '{column}' of {} ({}) cannot be read as numbers: {e}",
                place.file.path.display(),
                array.data_type()
            ))
        })?
    };
    Ok(converted
        .as_primitive::<arrow::datatypes::Float64Type>()
        .clone())
}

/// The first non-finite value of a column, as an error naming it.
pub fn check_finite(values: &Float64Array, column: &str, place: Place<'_>) -> Result<()> {
    for (i, v) in values.values().iter().enumerate() {
        if !v.is_finite() && values.is_valid(i) {
            return Err(Error::data(format!(
                "column '{column}' holds {} at {}; replace or remove non-finite values before fitting",
                describe_non_finite(*v),
                place.row(i)
            )));
        }
    }
    Ok(())
}

fn describe_non_finite(v: f64) -> &'static str {
    if v.is_nan() {
        "NaN"
    } else if v > 0.0 {
        "+infinity"
    } else {
        "-infinity"
    }
}

/// The column as strings (for class labels), nulls as `None`.
pub fn as_strings(array: &ArrayRef, column: &str, place: Place<'_>) -> Result<Vec<Option<String>>> {
    let converted = cast(array, &DataType::Utf8).map_err(|e| {
        Error::data(format!(
            "column '{column}' of {} ({}) cannot be read as class labels: {e}",
            place.file.path.display(),
            array.data_type()
        ))
    })?;
    let strings = converted.as_string::<i32>();
    Ok((0..strings.len())
        .map(|i| strings.is_valid(i).then(|| strings.value(i).to_string()))
        .collect())
}
