//! An invented demonstration dataset: the order log of "Larkspur Fresh", a fictional
//! grocery-delivery service in the fictional city of Vellmoor.
//!
//! [`write_demo`] writes the log as Parquet files `orders-00000.parquet`,
//! `orders-00001.parquet`, ... and a `truth.json` that records the exact models the
//! targets were drawn from. Every company, place, store and number in it is made up.
//!
//! # The scenario
//!
//! Each row is one delivered order. The features describe the order and the moment it was
//! delivered: how far the courier rode, how many items
//! were in the basket, how many orders the courier carried at once, whether it was a peak
//! hour, how much rain fell, and how long the courier had worked for the service. Four
//! targets are drawn from generalized linear models of these six features:
//!
//! | target | type | model |
//! |---|---|---|
//! | `late` | int64 0/1 | Bernoulli, logit link (`logistic`) |
//! | `tip` | float64 | linear with Normal noise (`squared`) |
//! | `substitutions` | int64 count | Poisson, log link (`poisson`) |
//! | `slot` | string, 3 classes | multinomial logit (`softmax`) |
//!
//! The remaining columns (`order_id`, `hour`, `zone`, `store`) do not enter any target
//! once the six features are known: a fit on the six features recovers the coefficients in
//! `truth.json` in expectation, and a fit that adds them should find zero effects. `zone`
//! and `store` are strings meant for hashed categorical features; `zone` is correlated
//! with `distance_km` (outer districts are farther) and `hour` with `peak_hour`, as in a
//! real log, but neither carries information of its own about the targets.
//!
//! # Streaming and determinism
//!
//! Rows are generated one row group at a time into Arrow arrays and written at once, so
//! the memory used does not grow with the row count. All random numbers come from one
//! [`StdRng`] stream seeded with [`DemoOptions::seed`] and consumed row by row in a fixed
//! order, so the rows depend only on the seed and their position — not on how they are
//! split into files or row groups.
//!
//! # Files
//!
//! Files are first written under hidden temporary names and renamed over the final names
//! only when every file and `truth.json` is complete; on failure the temporary files are
//! removed and an earlier demo in the directory is left as it was. After a successful
//! write, files named `orders-NNNNN.parquet` beyond the new file count (left by an
//! earlier, larger demo) are removed, so `orders-*.parquet` always names exactly this
//! demo. No other file in the directory is touched.

use std::collections::BTreeMap;
use std::fs::{self, File};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::StringArray;
use arrow::array::{ArrayRef, BooleanArray, Float32Array, Float64Array, Int32Array, Int64Array};
use arrow::datatypes::{DataType, Field, Schema, SchemaRef};
use arrow::record_batch::RecordBatch;
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Exp, Gamma, Poisson, StandardNormal};
use serde_json::json;

use crate::{Error, Result};

/// The six numeric feature columns every target is generated from, in this order.
///
/// `peak_hour` is a boolean column; the models use it as 0 (false) or 1 (true).
pub const FEATURE_COLUMNS: [&str; 6] = [
    "distance_km",
    "basket_items",
    "courier_load",
    "peak_hour",
    "rain_mm",
    "courier_tenure_years",
];

/// The target columns, one per loss: `late` (logistic), `tip` (squared),
/// `substitutions` (poisson) and `slot` (softmax).
pub const TARGET_COLUMNS: [&str; 4] = ["late", "tip", "substitutions", "slot"];

/// The columns that enter no target: an identifier, the hour of delivery (whose effect
/// passes entirely through `peak_hour`) and the two string columns meant for hashed
/// categorical features.
pub const UNRELATED_COLUMNS: [&str; 4] = ["order_id", "hour", "zone", "store"];

/// The classes of the `slot` target, in sorted order; the first, `eco`, is the reference
/// class whose coefficients are zero in `truth.json`.
pub const SLOT_CLASSES: [&str; 3] = ["eco", "express", "standard"];

/// The format tag written into `truth.json`.
pub const TRUTH_FORMAT: &str = "outcore-demo-truth/1";

/// The name of the file that records the generating models, beside the data files.
pub const TRUTH_FILE: &str = "truth.json";

/// Settings of [`write_demo`].
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoOptions {
    /// Total number of rows (orders) to write; at least 1.
    pub rows: u64,
    /// Seed of the random number stream; the same seed gives the same rows.
    pub seed: u64,
    /// Largest number of rows in one file; at least 1. Default 1 000 000.
    pub rows_per_file: u64,
    /// Rows per Parquet row group (the last group of a file may be smaller); at least 1.
    /// Default 65 536. This is also the number of rows held in memory at once.
    pub row_group_rows: usize,
}

impl Default for DemoOptions {
    fn default() -> Self {
        DemoOptions {
            rows: 100_000,
            seed: 7,
            rows_per_file: 1_000_000,
            row_group_rows: 65_536,
        }
    }
}

/// What [`write_demo`] wrote.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DemoSummary {
    /// The data files, in order (`orders-00000.parquet`, ...).
    pub files: Vec<PathBuf>,
    /// Total number of rows written.
    pub rows: u64,
    /// The `truth.json` file describing the generating models.
    pub truth_path: PathBuf,
}

/// Writes the invented Larkspur Fresh order log to `out_dir` (created if missing).
///
/// Returns the files written. The data are Parquet with Snappy compression, at most
/// [`DemoOptions::rows_per_file`] rows per file and row groups of
/// [`DemoOptions::row_group_rows`] rows. See the [module documentation](self) for the
/// columns, the models and how existing files are treated.
///
/// # Errors
///
/// [`Error::usage`] when a count in `options` is zero or the number of files would exceed
/// 100 000; an I/O error naming the file when a directory or file cannot be created,
/// written or renamed.
///
/// # Example
///
/// ```no_run
/// use outcore::demo::{write_demo, DemoOptions};
///
/// let summary = write_demo(
///     std::path::Path::new("demo-out"),
///     &DemoOptions { rows: 10_000, ..DemoOptions::default() },
/// )?;
/// assert_eq!(summary.rows, 10_000);
/// # Ok::<(), outcore::Error>(())
/// ```
pub fn write_demo(out_dir: &Path, options: &DemoOptions) -> Result<DemoSummary> {
    validate(options)?;
    fs::create_dir_all(out_dir).map_err(|e| Error::io(out_dir, e))?;

    let file_count = options.rows.div_ceil(options.rows_per_file);
    let finals: Vec<PathBuf> = (0..file_count)
        .map(|i| out_dir.join(data_file_name(i)))
        .collect();
    let truth_path = out_dir.join(TRUTH_FILE);

    let mut temps = TempFiles::default();
    let schema = schema();
    let props = writer_properties(options);
    let mut generator = Generator::new(options.seed)?;
    let mut rows_left = options.rows;
    for final_path in &finals {
        let file_rows = rows_left.min(options.rows_per_file);
        let temp = temp_name(final_path);
        temps.paths.push(temp.clone());
        write_file(
            &temp,
            final_path,
            file_rows,
            options.row_group_rows,
            &schema,
            &props,
            &mut generator,
        )?;
        rows_left -= file_rows;
    }

    let truth_temp = temp_name(&truth_path);
    temps.paths.push(truth_temp.clone());
    let names: Vec<String> = (0..file_count).map(data_file_name).collect();
    let truth = truth_document(options, &names);
    let text = serde_json::to_string_pretty(&truth)
        .map_err(|e| Error::internal(format!("cannot encode {TRUTH_FILE}: {e}")))?;
    write_text_synced(&truth_temp, &truth_path, &(text + "\n"))?;

    // Everything is complete: move the new files into place, truth last.
    for (temp, final_path) in temps.paths.iter().zip(finals.iter().chain([&truth_path])) {
        fs::rename(temp, final_path).map_err(|e| Error::io(final_path, e))?;
    }
    temps.paths.clear();
    remove_stale_files(out_dir, file_count)?;
    sync_dir(out_dir)?;

    Ok(DemoSummary {
        files: finals,
        rows: options.rows,
        truth_path,
    })
}

/// Checks the counts of `options`.
fn validate(options: &DemoOptions) -> Result<()> {
    if options.rows == 0 {
        return Err(Error::usage(
            "the demo needs at least 1 row; pass a positive --rows",
        ));
    }
    if options.rows_per_file == 0 {
        return Err(Error::usage("rows per file must be at least 1"));
    }
    if options.row_group_rows == 0 {
        return Err(Error::usage("rows per row group must be at least 1"));
    }
    if options.rows.div_ceil(options.rows_per_file) > 100_000 {
        return Err(Error::usage(format!(
            "{} rows at {} rows per file would make more than 100000 files; raise the rows per file",
            options.rows, options.rows_per_file
        )));
    }
    Ok(())
}

/// `orders-NNNNN.parquet` for file number `index`.
fn data_file_name(index: u64) -> String {
    format!("orders-{index:05}.parquet")
}

/// The hidden temporary name a file is written under before it is renamed to `path`.
fn temp_name(path: &Path) -> PathBuf {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    path.with_file_name(format!(".{name}.partial"))
}

/// Temporary files that are removed when dropped, unless taken out of `paths`.
#[derive(Default)]
struct TempFiles {
    paths: Vec<PathBuf>,
}

impl Drop for TempFiles {
    fn drop(&mut self) {
        for path in &self.paths {
            // Best effort: the file may never have been created.
            let _ = fs::remove_file(path);
        }
    }
}

/// Removes `orders-NNNNN.parquet` files in `dir` numbered `keep` or higher.
fn remove_stale_files(dir: &Path, keep: u64) -> Result<()> {
    let entries = fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    for entry in entries {
        let entry = entry.map_err(|e| Error::io(dir, e))?;
        let name = entry.file_name();
        let Some(name) = name.to_str() else { continue };
        let Some(index) = name
            .strip_prefix("orders-")
            .and_then(|rest| rest.strip_suffix(".parquet"))
            .filter(|digits| digits.len() == 5 && digits.bytes().all(|b| b.is_ascii_digit()))
            .and_then(|digits| digits.parse::<u64>().ok())
        else {
            continue;
        };
        if index >= keep {
            let path = entry.path();
            fs::remove_file(&path).map_err(|e| Error::io(&path, e))?;
        }
    }
    Ok(())
}

/// Flushes the directory entry of renamed files to disk, where the platform allows it.
fn sync_dir(dir: &Path) -> Result<()> {
    #[cfg(unix)]
    {
        File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(|e| Error::io(dir, e))?;
    }
    #[cfg(not(unix))]
    let _ = dir;
    Ok(())
}

/// Writes `text` to `temp` and flushes it to disk; errors name `final_path`'s file.
fn write_text_synced(temp: &Path, final_path: &Path, text: &str) -> Result<()> {
    let io = |e| Error::io(final_path, e);
    let mut file = File::create(temp).map_err(io)?;
    std::io::Write::write_all(&mut file, text.as_bytes()).map_err(io)?;
    file.sync_all().map_err(io)
}

/// The Parquet writer settings: Snappy, row groups of the requested size, a note.
fn writer_properties(options: &DemoOptions) -> WriterProperties {
    WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .set_max_row_group_row_count(Some(options.row_group_rows))
        .set_key_value_metadata(Some(vec![KeyValue::new(
            "outcore.demo".to_string(),
            format!(
                "invented data: Larkspur Fresh order log, Vellmoor (fictional); seed {}",
                options.seed
            ),
        )]))
        .build()
}

/// Writes one data file of `rows` rows to `temp`, in row groups of `group_rows`.
/// Errors name `final_path`, the file the user asked for.
fn write_file(
    temp: &Path,
    final_path: &Path,
    rows: u64,
    group_rows: usize,
    schema: &SchemaRef,
    props: &WriterProperties,
    generator: &mut Generator,
) -> Result<()> {
    let parquet_err = |e: parquet::errors::ParquetError| {
        Error::new(
            crate::ErrorKind::Io,
            format!("cannot write {}: {e}", final_path.display()),
        )
    };
    let file = File::create(temp).map_err(|e| Error::io(final_path, e))?;
    let mut writer =
        ArrowWriter::try_new(file, schema.clone(), Some(props.clone())).map_err(parquet_err)?;
    let mut left = rows;
    while left > 0 {
        // `left.min(group_rows)` fits in usize because group_rows does.
        let n = usize::try_from(left.min(group_rows as u64))
            .map_err(|_| Error::internal("row group size does not fit in usize"))?;
        let batch = generator.batch(n, schema)?;
        writer.write(&batch).map_err(parquet_err)?;
        writer.flush().map_err(parquet_err)?;
        left -= n as u64;
    }
    let file = writer.into_inner().map_err(parquet_err)?;
    file.sync_all().map_err(|e| Error::io(final_path, e))
}

/// The Arrow schema of the data files; every column is non-null.
fn schema() -> SchemaRef {
    Arc::new(Schema::new(vec![
        Field::new("order_id", DataType::Int64, false),
        Field::new("zone", DataType::Utf8, false),
        Field::new("store", DataType::Utf8, false),
        Field::new("hour", DataType::Int32, false),
        Field::new("peak_hour", DataType::Boolean, false),
        Field::new("distance_km", DataType::Float64, false),
        Field::new("basket_items", DataType::Int32, false),
        Field::new("courier_load", DataType::Int32, false),
        Field::new("rain_mm", DataType::Float64, false),
        Field::new("courier_tenure_years", DataType::Float32, false),
        Field::new("late", DataType::Int64, false),
        Field::new("tip", DataType::Float64, false),
        Field::new("substitutions", DataType::Int64, false),
        Field::new("slot", DataType::Utf8, false),
    ]))
}

// ---------------------------------------------------------------------------------------
// The generating models. Coefficients are on the original scale of the columns and in the
// order of FEATURE_COLUMNS.
// ---------------------------------------------------------------------------------------

/// `late`: logit P(late) = LATE_INTERCEPT + LATE_COEF · x.
const LATE_INTERCEPT: f64 = -3.4;
const LATE_COEF: [f64; 6] = [0.22, 0.035, 0.40, 0.55, 0.14, -0.18];

/// `tip`: tip = TIP_INTERCEPT + TIP_COEF · x + Normal(0, TIP_NOISE_SD).
const TIP_INTERCEPT: f64 = 1.10;
const TIP_COEF: [f64; 6] = [0.28, 0.09, -0.12, 0.35, 0.18, 0.06];
const TIP_NOISE_SD: f64 = 0.9;

/// `substitutions`: log E[count] = SUBS_INTERCEPT + SUBS_COEF · x.
const SUBS_INTERCEPT: f64 = -1.6;
const SUBS_COEF: [f64; 6] = [0.015, 0.075, 0.05, 0.20, 0.03, -0.04];

/// `slot`: log P(class) / P(eco) = SLOT_INTERCEPT[k] + SLOT_COEF[k] · x, in the order of
/// SLOT_CLASSES; the reference class `eco` has all zeros.
const SLOT_INTERCEPT: [f64; 3] = [0.0, -1.0, 1.4];
const SLOT_COEF: [[f64; 6]; 3] = [
    [0.0; 6],
    [0.05, -0.04, 0.10, 0.45, 0.20, 0.03],
    [-0.12, 0.03, -0.08, 0.15, 0.10, 0.02],
];

/// The invented districts of Vellmoor and the mean delivery distance in each, in km.
const ZONES: [(&str, f64); 12] = [
    ("Old Vellmoor", 1.6),
    ("Quillmarsh", 2.0),
    ("Cindergate", 2.4),
    ("Loomside", 2.8),
    ("Brassfen", 3.0),
    ("Wrenfold", 3.3),
    ("Hobbet Quay", 3.6),
    ("Saltreach", 4.0),
    ("Marrowby", 4.5),
    ("Thistlecombe", 5.0),
    ("Tarnwick Heights", 5.8),
    ("Undercroft", 6.5),
];

/// Relative order volume of each zone (central districts are busier).
const ZONE_WEIGHTS: [f64; 12] = [
    14.0, 12.0, 11.0, 10.0, 9.0, 8.0, 8.0, 7.0, 7.0, 6.0, 5.0, 3.0,
];

/// Each zone has this many home stores, named `LF-<zone><letter>`.
const STORES_PER_ZONE: usize = 3;

/// Relative order volume of each delivery hour, from 07:00 to 22:00.
const FIRST_HOUR: i32 = 7;
const HOUR_WEIGHTS: [f64; 16] = [
    2.0, 3.0, 4.0, 5.0, 8.0, 9.0, 7.0, 5.0, 4.0, 5.0, 8.0, 10.0, 9.0, 6.0, 4.0, 2.0,
];

/// The hours counted as peak: lunch (11–12) and after work (17–19).
fn is_peak(hour: i32) -> bool {
    matches!(hour, 11 | 12 | 17 | 18 | 19)
}

/// The first `order_id`; ids then count up by one per row.
const FIRST_ORDER_ID: i64 = 100_000_001;

/// `truth.json`: the generating models and how the data were made.
fn truth_document(options: &DemoOptions, files: &[String]) -> serde_json::Value {
    let coef_map = |coef: &[f64; 6]| -> BTreeMap<&str, f64> {
        FEATURE_COLUMNS
            .iter()
            .copied()
            .zip(coef.iter().copied())
            .collect()
    };
    // Sum-to-zero form of the softmax coefficients: what a ridge-penalized fit of all
    // classes (which has no reference class) converges to as ridge → 0.
    let mean_coef: Vec<f64> = (0..6)
        .map(|j| SLOT_COEF.iter().map(|c| c[j]).sum::<f64>() / 3.0)
        .collect();
    let mean_intercept = SLOT_INTERCEPT.iter().sum::<f64>() / 3.0;
    let mut slot_intercept = BTreeMap::new();
    let mut slot_coef = BTreeMap::new();
    let mut centered_intercept = BTreeMap::new();
    let mut centered_coef = BTreeMap::new();
    for (k, class) in SLOT_CLASSES.iter().enumerate() {
        slot_intercept.insert(*class, SLOT_INTERCEPT[k]);
        slot_coef.insert(*class, coef_map(&SLOT_COEF[k]));
        centered_intercept.insert(*class, SLOT_INTERCEPT[k] - mean_intercept);
        let centered: [f64; 6] = std::array::from_fn(|j| SLOT_COEF[k][j] - mean_coef[j]);
        centered_coef.insert(*class, coef_map(&centered));
    }
    json!({
        "format": TRUTH_FORMAT,
        "note": "Invented data. Larkspur Fresh and the city of Vellmoor are fictional; every \
                 row was drawn by `outcore demo` from the models below and describes no real \
                 company, place or person.",
        "scenario": "Order log of a fictional grocery-delivery service: one row per delivered order.",
        "seed": options.seed,
        "rows": options.rows,
        "rows_per_file": options.rows_per_file,
        "row_group_rows": options.row_group_rows,
        "files": files,
        "features": FEATURE_COLUMNS,
        "feature_note": "Coefficients are on the original scale of the columns; peak_hour \
                         counts as 1 when true and 0 when false. A fit on exactly these \
                         features recovers the coefficients in expectation.",
        "unrelated_columns": UNRELATED_COLUMNS,
        "targets": {
            "late": {
                "loss": "logistic",
                "model": "late ~ Bernoulli(sigmoid(intercept + sum_j coefficients[j] * x_j))",
                "features": FEATURE_COLUMNS,
                "intercept": LATE_INTERCEPT,
                "coefficients": coef_map(&LATE_COEF),
            },
            "tip": {
                "loss": "squared",
                "model": "tip = intercept + sum_j coefficients[j] * x_j + Normal(0, noise_sd)",
                "features": FEATURE_COLUMNS,
                "intercept": TIP_INTERCEPT,
                "coefficients": coef_map(&TIP_COEF),
                "noise_sd": TIP_NOISE_SD,
            },
            "substitutions": {
                "loss": "poisson",
                "model": "substitutions ~ Poisson(exp(intercept + sum_j coefficients[j] * x_j))",
                "features": FEATURE_COLUMNS,
                "intercept": SUBS_INTERCEPT,
                "coefficients": coef_map(&SUBS_COEF),
            },
            "slot": {
                "loss": "softmax",
                "model": "P(slot = k) proportional to exp(intercept[k] + sum_j coefficients[k][j] * x_j)",
                "features": FEATURE_COLUMNS,
                "classes": SLOT_CLASSES,
                "reference_class": SLOT_CLASSES[0],
                "intercept": slot_intercept,
                "coefficients": slot_coef,
                "centered": {
                    "note": "The same model with intercepts and each feature's coefficients \
                             summing to zero over the classes; only differences between \
                             classes are identified.",
                    "intercept": centered_intercept,
                    "coefficients": centered_coef,
                },
            },
        },
    })
}

/// The row generator: one random stream consumed row by row in a fixed order.
struct Generator {
    rng: StdRng,
    next_order_id: i64,
    stores: Vec<String>,
    zone_cdf: Vec<f64>,
    hour_cdf: Vec<f64>,
    /// Distance shape; the scale of each zone is its mean divided by this.
    distance_shape: f64,
    rain_amount: Gamma<f64>,
    tenure: Exp<f64>,
    basket_extra: Poisson<f64>,
}

/// One row group's worth of columns, in schema order.
struct Chunk {
    order_id: Vec<i64>,
    zone: Vec<&'static str>,
    store: Vec<usize>,
    hour: Vec<i32>,
    peak_hour: Vec<bool>,
    distance_km: Vec<f64>,
    basket_items: Vec<i32>,
    courier_load: Vec<i32>,
    rain_mm: Vec<f64>,
    courier_tenure_years: Vec<f32>,
    late: Vec<i64>,
    tip: Vec<f64>,
    substitutions: Vec<i64>,
    slot: Vec<&'static str>,
}

impl Chunk {
    fn with_capacity(n: usize) -> Self {
        Chunk {
            order_id: Vec::with_capacity(n),
            zone: Vec::with_capacity(n),
            store: Vec::with_capacity(n),
            hour: Vec::with_capacity(n),
            peak_hour: Vec::with_capacity(n),
            distance_km: Vec::with_capacity(n),
            basket_items: Vec::with_capacity(n),
            courier_load: Vec::with_capacity(n),
            rain_mm: Vec::with_capacity(n),
            courier_tenure_years: Vec::with_capacity(n),
            late: Vec::with_capacity(n),
            tip: Vec::with_capacity(n),
            substitutions: Vec::with_capacity(n),
            slot: Vec::with_capacity(n),
        }
    }
}

/// The cumulative sums of `weights`, normalized to end at 1.
fn cdf(weights: &[f64]) -> Vec<f64> {
    let total: f64 = weights.iter().sum();
    let mut acc = 0.0;
    weights
        .iter()
        .map(|w| {
            acc += w / total;
            acc
        })
        .collect()
}

/// The index of the first entry of `cdf` above `u` (u in [0, 1)).
fn pick(cdf: &[f64], u: f64) -> usize {
    cdf.iter()
        .position(|&c| u < c)
        .unwrap_or(cdf.len().saturating_sub(1))
}

/// The index drawn by `u` (in [0, 1)) from unnormalized `weights`.
fn pick_weighted(weights: &[f64], u: f64) -> usize {
    let target = u * weights.iter().sum::<f64>();
    let mut acc = 0.0;
    for (k, w) in weights.iter().enumerate() {
        acc += w;
        if target < acc {
            return k;
        }
    }
    weights.len().saturating_sub(1)
}

/// Rounds to `decimals` decimal places.
fn round_to(x: f64, decimals: i32) -> f64 {
    let scale = 10f64.powi(decimals);
    (x * scale).round() / scale
}

/// `intercept + coef · x`.
fn linear(intercept: f64, coef: &[f64; 6], x: &[f64; 6]) -> f64 {
    intercept + coef.iter().zip(x).map(|(c, v)| c * v).sum::<f64>()
}

/// The logistic function, computed without overflow.
fn sigmoid(z: f64) -> f64 {
    if z >= 0.0 {
        1.0 / (1.0 + (-z).exp())
    } else {
        let e = z.exp();
        e / (1.0 + e)
    }
}

impl Generator {
    fn new(seed: u64) -> Result<Self> {
        let invalid = |what: &str| Error::internal(format!("demo {what} distribution is invalid"));
        let stores = (0..ZONES.len())
            .flat_map(|z| {
                (0..STORES_PER_ZONE)
                    .map(move |k| format!("LF-{:02}{}", z + 1, (b'A' + k as u8) as char))
            })
            .collect();
        Ok(Generator {
            rng: StdRng::seed_from_u64(seed),
            next_order_id: FIRST_ORDER_ID,
            stores,
            zone_cdf: cdf(&ZONE_WEIGHTS),
            hour_cdf: cdf(&HOUR_WEIGHTS),
            distance_shape: 2.5,
            rain_amount: Gamma::new(1.3, 2.2).map_err(|_| invalid("rain"))?,
            tenure: Exp::new(1.0 / 2.6).map_err(|_| invalid("tenure"))?,
            basket_extra: Poisson::new(9.0).map_err(|_| invalid("basket"))?,
        })
    }

    /// Generates the next `n` rows as a record batch of `schema`.
    fn batch(&mut self, n: usize, schema: &SchemaRef) -> Result<RecordBatch> {
        let mut c = Chunk::with_capacity(n);
        for _ in 0..n {
            self.row(&mut c)?;
        }
        let store = StringArray::from_iter_values(c.store.iter().map(|&i| self.stores[i].as_str()));
        let columns: Vec<ArrayRef> = vec![
            Arc::new(Int64Array::from(c.order_id)),
            Arc::new(StringArray::from(c.zone)),
            Arc::new(store),
            Arc::new(Int32Array::from(c.hour)),
            Arc::new(BooleanArray::from(c.peak_hour)),
            Arc::new(Float64Array::from(c.distance_km)),
            Arc::new(Int32Array::from(c.basket_items)),
            Arc::new(Int32Array::from(c.courier_load)),
            Arc::new(Float64Array::from(c.rain_mm)),
            Arc::new(Float32Array::from(c.courier_tenure_years)),
            Arc::new(Int64Array::from(c.late)),
            Arc::new(Float64Array::from(c.tip)),
            Arc::new(Int64Array::from(c.substitutions)),
            Arc::new(StringArray::from(c.slot)),
        ];
        RecordBatch::try_new(schema.clone(), columns)
            .map_err(|e| Error::internal(format!("demo record batch does not fit its schema: {e}")))
    }

    /// Draws one row and appends it to `c`. The order of draws is fixed.
    fn row(&mut self, c: &mut Chunk) -> Result<()> {
        let rng = &mut self.rng;

        let zone = pick(&self.zone_cdf, rng.random::<f64>());
        let store = if rng.random::<f64>() < 0.85 {
            zone * STORES_PER_ZONE + rng.random_range(0..STORES_PER_ZONE)
        } else {
            rng.random_range(0..self.stores.len())
        };
        let hour = FIRST_HOUR + pick(&self.hour_cdf, rng.random::<f64>()) as i32;
        let peak = is_peak(hour);
        let load_p = if peak { 0.55 } else { 0.30 };
        let courier_load = 1 + (0..3).filter(|_| rng.random::<f64>() < load_p).count() as i32;
        let mean_km = ZONES[zone].1;
        let distance = Gamma::new(self.distance_shape, mean_km / self.distance_shape)
            .map_err(|e| Error::internal(format!("demo distance distribution: {e}")))?
            .sample(rng);
        let distance_km = round_to(distance.clamp(0.2, 30.0), 2);
        let basket_items = 1 + self.basket_extra.sample(rng) as i32;
        let rain_mm = if rng.random::<f64>() < 0.28 {
            round_to(self.rain_amount.sample(rng), 1)
        } else {
            0.0
        };
        let tenure = round_to(self.tenure.sample(rng).min(15.0), 1) as f32;

        // The models see exactly the values stored in the file.
        let x = [
            distance_km,
            f64::from(basket_items),
            f64::from(courier_load),
            if peak { 1.0 } else { 0.0 },
            rain_mm,
            f64::from(tenure),
        ];

        let late = rng.random::<f64>() < sigmoid(linear(LATE_INTERCEPT, &LATE_COEF, &x));
        let noise: f64 = StandardNormal.sample(rng);
        let tip = linear(TIP_INTERCEPT, &TIP_COEF, &x) + TIP_NOISE_SD * noise;
        let rate = linear(SUBS_INTERCEPT, &SUBS_COEF, &x).exp();
        let substitutions = Poisson::new(rate)
            .map_err(|e| Error::internal(format!("demo substitution rate {rate}: {e}")))?
            .sample(rng) as i64;
        let eta: [f64; 3] = std::array::from_fn(|k| linear(SLOT_INTERCEPT[k], &SLOT_COEF[k], &x));
        let top = eta.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let weights = eta.map(|e| (e - top).exp());
        let slot = SLOT_CLASSES[pick_weighted(&weights, rng.random::<f64>())];

        c.order_id.push(self.next_order_id);
        self.next_order_id += 1;
        c.zone.push(ZONES[zone].0);
        c.store.push(store);
        c.hour.push(hour);
        c.peak_hour.push(peak);
        c.distance_km.push(distance_km);
        c.basket_items.push(basket_items);
        c.courier_load.push(courier_load);
        c.rain_mm.push(rain_mm);
        c.courier_tenure_years.push(tenure);
        c.late.push(i64::from(late));
        c.tip.push(tip);
        c.substitutions.push(substitutions);
        c.slot.push(slot);
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn generator_builds() {
        assert!(Generator::new(1).is_ok());
    }

    #[test]
    fn pick_follows_the_cdf() {
        let c = cdf(&[1.0, 1.0, 2.0]);
        assert_eq!(pick(&c, 0.0), 0);
        assert_eq!(pick(&c, 0.3), 1);
        assert_eq!(pick(&c, 0.99), 2);
        assert_eq!(pick_weighted(&[1.0, 1.0, 2.0], 0.3), 1);
        assert_eq!(pick_weighted(&[1.0, 1.0, 2.0], 0.6), 2);
    }

    #[test]
    fn temp_names_are_hidden_and_distinct() {
        let t = temp_name(Path::new("/x/orders-00001.parquet"));
        assert_eq!(t, Path::new("/x/.orders-00001.parquet.partial"));
    }
}
