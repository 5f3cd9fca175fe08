//! Shared helpers for the integration tests: running the `outcore` binary, reading model
//! files and `expected.json` fixtures, comparing numbers with an `abs + rel·|expected|`
//! tolerance, and reading/writing Parquet through arrow.
//!
//! Include it from a test crate with `mod common;`. Keep helpers here general (not tied
//! to one test file); every test crate compiles this whole module, so unused helpers are
//! allowed.

#![allow(dead_code)]

use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;

use arrow::array::{Array, ArrayRef, Float64Array};
use arrow::datatypes::{DataType, SchemaRef};
use arrow::record_batch::RecordBatch;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;
use parquet::file::properties::WriterProperties;
use serde_json::Value;

// ---------------------------------------------------------------------------------------
// Paths and fixtures
// ---------------------------------------------------------------------------------------

/// The `outcore` binary built for this test run.
pub fn outcore_bin() -> &'static str {
    env!("CARGO_BIN_EXE_outcore")
}

/// The crate root (where `Cargo.toml` is).
pub fn manifest_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// `tests/data/<rel>` inside the crate.
pub fn test_data(rel: &str) -> PathBuf {
    manifest_dir().join("tests").join("data").join(rel)
}

/// Folder of one reference case: `tests/data/reference/<case>/`.
pub fn reference_case_dir(case: &str) -> PathBuf {
    test_data("reference").join(case)
}

/// A file of one reference case, e.g. `reference_file("longley_linear_nist", "data.parquet")`.
pub fn reference_file(case: &str, file: &str) -> PathBuf {
    let p = reference_case_dir(case).join(file);
    assert!(p.exists(), "missing fixture {}", p.display());
    p
}

/// Reads and parses a JSON file, panicking with the path on failure.
pub fn read_json(path: &Path) -> Value {
    let text = std::fs::read_to_string(path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("bad JSON in {}: {e}", path.display()))
}

/// The parsed `expected.json` of a reference case.
pub fn load_expected(case: &str) -> Value {
    read_json(&reference_file(case, "expected.json"))
}

/// `v[a][b]...` as f64, panicking with the path when absent or not a number.
pub fn json_f64(v: &Value, path: &[&str]) -> f64 {
    json_at(v, path)
        .as_f64()
        .unwrap_or_else(|| panic!("{} is not a number", path.join(".")))
}

/// `v[a][b]...`, panicking with the path when absent.
pub fn json_at<'a>(v: &'a Value, path: &[&str]) -> &'a Value {
    let mut cur = v;
    for (i, key) in path.iter().enumerate() {
        cur = cur
            .get(*key)
            .unwrap_or_else(|| panic!("missing key {}", path[..=i].join(".")));
    }
    cur
}

/// Feature column names of a reference case (`feature_columns`).
pub fn expected_features(expected: &Value) -> Vec<String> {
    json_at(expected, &["feature_columns"])
        .as_array()
        .expect("feature_columns is an array")
        .iter()
        .map(|v| v.as_str().expect("feature name").to_string())
        .collect()
}

/// The averaged-form penalties (ridge, lasso) of a reference case:
/// `objective.mean_form.{l2,l1}_mean_form` (= summed-form l2/W, l1/W).
pub fn mean_form_penalties(expected: &Value) -> (f64, f64) {
    (
        json_f64(expected, &["objective", "mean_form", "l2_mean_form"]),
        json_f64(expected, &["objective", "mean_form", "l1_mean_form"]),
    )
}

// ---------------------------------------------------------------------------------------
// Running the binary
// ---------------------------------------------------------------------------------------

/// Runs `outcore <args>` and returns its raw output.
pub fn run_outcore<S: AsRef<std::ffi::OsStr>>(args: &[S]) -> Output {
    Command::new(outcore_bin())
        .args(args)
        .output()
        .expect("failed to start the outcore binary")
}

/// Exit code of a finished process (-1 when killed by a signal).
pub fn exit_code(out: &Output) -> i32 {
    out.status.code().unwrap_or(-1)
}

/// The result of one `outcore fit`.
#[derive(Debug)]
pub struct FitOutcome {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
    pub model_path: PathBuf,
    /// The model file's text, when one was written.
    pub model_text: Option<String>,
    /// The parsed model file, when one was written.
    pub model: Option<Value>,
}

impl FitOutcome {
    /// The parsed model, panicking (with stderr) when none was written.
    pub fn model(&self) -> &Value {
        self.model.as_ref().unwrap_or_else(|| {
            panic!(
                "no model written (exit {}); stderr:\n{}",
                self.code, self.stderr
            )
        })
    }

    /// `fit.stop` of the model file.
    pub fn stop(&self) -> &str {
        self.model()["fit"]["stop"].as_str().unwrap_or("?")
    }

    /// `fit.objective` (mean form) of the model file.
    pub fn objective(&self) -> f64 {
        json_f64(self.model(), &["fit", "objective"])
    }

    /// `fit.passes` of the model file.
    pub fn passes(&self) -> u64 {
        self.model()["fit"]["passes"].as_u64().unwrap_or(0)
    }

    /// `fit.gradient_max` of the model file.
    pub fn gradient_max(&self) -> f64 {
        self.model()["fit"]["gradient_max"]
            .as_f64()
            .unwrap_or(f64::NAN)
    }

    /// One line for test logs: exit code, stop reason, passes, gradient.
    pub fn summary(&self) -> String {
        match &self.model {
            Some(_) => format!(
                "exit {} stop={} passes={} iterations={} gradient_max={:.2e} objective={:.17e}",
                self.code,
                self.stop(),
                self.passes(),
                self.model()["fit"]["iterations"],
                self.gradient_max(),
                self.objective()
            ),
            None => format!("exit {} (no model); stderr: {}", self.code, self.stderr),
        }
    }
}

/// Runs `outcore fit <args> --out <dir>/<name>.json --run <dir>/<name>.run --quiet` and
/// reads back the model file when there is one.
pub fn fit_in<S: AsRef<str>>(dir: &Path, name: &str, args: &[S]) -> FitOutcome {
    let model_path = dir.join(format!("{name}.json"));
    let run_dir = dir.join(format!("{name}.run"));
    let mut full: Vec<String> = vec!["fit".into()];
    full.extend(args.iter().map(|a| a.as_ref().to_string()));
    full.extend([
        "--out".into(),
        model_path.display().to_string(),
        "--run".into(),
        run_dir.display().to_string(),
        "--quiet".into(),
    ]);
    let out = run_outcore(&full);
    let model_text = std::fs::read_to_string(&model_path).ok();
    let model = model_text.as_ref().map(|t| {
        serde_json::from_str(t)
            .unwrap_or_else(|e| panic!("model file {} is not JSON: {e}", model_path.display()))
    });
    FitOutcome {
        code: exit_code(&out),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
        model_path,
        model_text,
        model,
    }
}

/// Runs `outcore predict --model M --data D... --out OUT [--keep COLS]`, panicking on a
/// non-zero exit.
pub fn predict(model: &Path, data: &[&Path], out: &Path, keep: &[&str]) {
    let mut args: Vec<String> = vec![
        "predict".into(),
        "--model".into(),
        model.display().to_string(),
        "--data".into(),
    ];
    args.extend(data.iter().map(|p| p.display().to_string()));
    args.extend(["--out".into(), out.display().to_string()]);
    if !keep.is_empty() {
        args.extend(["--keep".into(), keep.join(",")]);
    }
    let res = run_outcore(&args);
    assert_eq!(
        exit_code(&res),
        0,
        "outcore predict failed: {}",
        String::from_utf8_lossy(&res.stderr)
    );
}

// ---------------------------------------------------------------------------------------
// Model parameters
// ---------------------------------------------------------------------------------------

/// Named parameters of a coefficient block, flattened: `intercept` and `coef:<feature>`
/// for one linear predictor; `<class>/intercept` and `<class>/coef:<feature>` per class.
pub type Params = Vec<(String, f64)>;

fn push_linear(prefix: &str, intercept: &Value, coefs: &Value, out: &mut Params) {
    out.push((
        format!("{prefix}intercept"),
        intercept.as_f64().expect("intercept is a number"),
    ));
    for (f, v) in coefs.as_object().expect("coefficients is an object") {
        out.push((
            format!("{prefix}coef:{f}"),
            v.as_f64()
                .unwrap_or_else(|| panic!("coefficient {f} is not a number")),
        ));
    }
}

/// Parameters of a model file: `intercept` (number, or `{class: v}` for softmax) and
/// `coefficients` (`{feature: v}`, or `{class: {feature: v}}`).
pub fn model_params(model: &Value) -> Params {
    let mut out = Params::new();
    match &model["intercept"] {
        Value::Object(by_class) => {
            for (k, b) in by_class {
                push_linear(&format!("{k}/"), b, &model["coefficients"][k], &mut out);
            }
        }
        b => push_linear("", b, &model["coefficients"], &mut out),
    }
    out
}

/// Parameters of an expected block in the reference format: `{intercept, coefficients}`,
/// `{coefficients_by_class: {class: {intercept, coefficients}}}`, or directly
/// `{class: {intercept, coefficients}}`.
pub fn expected_params(block: &Value) -> Params {
    let mut out = Params::new();
    if block.get("intercept").is_some() {
        push_linear("", &block["intercept"], &block["coefficients"], &mut out);
        return out;
    }
    let by_class = block.get("coefficients_by_class").unwrap_or(block);
    for (k, c) in by_class.as_object().expect("class map") {
        if c.get("intercept").is_some() {
            push_linear(
                &format!("{k}/"),
                &c["intercept"],
                &c["coefficients"],
                &mut out,
            );
        }
    }
    out
}

/// Centers the per-class intercepts (`<class>/intercept`) to sum 0; a no-op when there is
/// a single intercept.
pub fn center_intercepts(params: &mut Params) {
    let idx: Vec<usize> = (0..params.len())
        .filter(|&i| params[i].0.ends_with("/intercept"))
        .collect();
    if idx.len() < 2 {
        return;
    }
    let mean = idx.iter().map(|&i| params[i].1).sum::<f64>() / idx.len() as f64;
    for i in idx {
        params[i].1 -= mean;
    }
}

/// The value of a named parameter.
pub fn param(params: &Params, name: &str) -> Option<f64> {
    params.iter().find(|(n, _)| n == name).map(|(_, v)| *v)
}

// ---------------------------------------------------------------------------------------
// Tolerances and comparisons
// ---------------------------------------------------------------------------------------

/// Per-value tolerance `|got − expected| ≤ abs + rel·|expected|`.
#[derive(Clone, Copy, Debug)]
pub struct Tol {
    pub abs: f64,
    pub rel: f64,
}

impl Tol {
    pub const fn new(abs: f64, rel: f64) -> Tol {
        Tol { abs, rel }
    }

    /// Reads `{"abs": .., "rel": ..}` (a missing key counts as 0).
    pub fn from_json(v: &Value) -> Tol {
        Tol {
            abs: v.get("abs").and_then(Value::as_f64).unwrap_or(0.0),
            rel: v.get("rel").and_then(Value::as_f64).unwrap_or(0.0),
        }
    }

    /// `expected.tolerance.<key>` of a reference case.
    pub fn of_case(expected: &Value, key: &str) -> Tol {
        Tol::from_json(json_at(expected, &["tolerance", key]))
    }

    pub fn bound(&self, expected: f64) -> f64 {
        self.abs + self.rel * expected.abs()
    }

    pub fn allows(&self, got: f64, expected: f64) -> bool {
        got.is_finite() && (got - expected).abs() <= self.bound(expected)
    }

    /// `|got − expected| / bound`: at most 1 when within tolerance.
    pub fn ratio(&self, got: f64, expected: f64) -> f64 {
        let b = self.bound(expected);
        let d = (got - expected).abs();
        if !got.is_finite() {
            f64::INFINITY
        } else if b == 0.0 {
            if d == 0.0 {
                0.0
            } else {
                f64::INFINITY
            }
        } else {
            d / b
        }
    }
}

/// Relative error `|got − expected| / |expected|` (absolute error when expected is 0).
pub fn rel_err(got: f64, expected: f64) -> f64 {
    let d = (got - expected).abs();
    if expected == 0.0 {
        d
    } else {
        d / expected.abs()
    }
}

/// Log relative error (digits of agreement), capped at 16 like NIST's LRE.
pub fn lre(got: f64, expected: f64) -> f64 {
    let r = rel_err(got, expected);
    if r == 0.0 {
        16.0
    } else {
        (-r.log10()).min(16.0)
    }
}

/// One compared value.
#[derive(Clone, Debug)]
pub struct Checked {
    pub name: String,
    pub got: f64,
    pub expected: f64,
    pub tol: Tol,
}

/// Accumulates named comparisons and reports them together.
#[derive(Debug, Default)]
pub struct Report {
    pub label: String,
    pub items: Vec<Checked>,
    pub missing: Vec<String>,
}

impl Report {
    pub fn new(label: impl Into<String>) -> Report {
        Report {
            label: label.into(),
            ..Default::default()
        }
    }

    pub fn check(&mut self, name: impl Into<String>, got: f64, expected: f64, tol: Tol) {
        self.items.push(Checked {
            name: name.into(),
            got,
            expected,
            tol,
        });
    }

    /// Compares every expected parameter with the parameter of the same name in `got`.
    pub fn check_params(&mut self, got: &Params, expected: &Params, tol: Tol) {
        for (name, e) in expected {
            match param(got, name) {
                Some(g) => self.check(name.clone(), g, *e, tol),
                None => self.missing.push(name.clone()),
            }
        }
    }

    fn filtered(&self, prefix: &str) -> impl Iterator<Item = &Checked> {
        let prefix = prefix.to_string();
        self.items
            .iter()
            .filter(move |c| c.name.starts_with(&prefix))
    }

    /// Largest relative error among the items whose name starts with `prefix`.
    pub fn max_rel(&self, prefix: &str) -> f64 {
        self.filtered(prefix)
            .map(|c| rel_err(c.got, c.expected))
            .fold(0.0, f64::max)
    }

    /// Largest absolute error among the items whose name starts with `prefix`.
    pub fn max_abs(&self, prefix: &str) -> f64 {
        self.filtered(prefix)
            .map(|c| (c.got - c.expected).abs())
            .fold(0.0, f64::max)
    }

    /// Largest `error / bound` (≤ 1 when everything passes).
    pub fn worst_ratio(&self) -> f64 {
        self.items
            .iter()
            .map(|c| c.tol.ratio(c.got, c.expected))
            .fold(0.0, f64::max)
    }

    pub fn failures(&self) -> Vec<&Checked> {
        self.items
            .iter()
            .filter(|c| !c.tol.allows(c.got, c.expected))
            .collect()
    }

    /// Prints every item (shown with `--nocapture` or on failure) and panics listing the
    /// values outside their tolerance.
    pub fn assert_ok(&self) {
        eprintln!("[{}]", self.label);
        for c in &self.items {
            eprintln!(
                "  {:<40} got {:>24.16e} expected {:>24.16e} rel {:.2e} (bound ratio {:.3})",
                c.name,
                c.got,
                c.expected,
                rel_err(c.got, c.expected),
                c.tol.ratio(c.got, c.expected)
            );
        }
        let fails = self.failures();
        assert!(
            self.missing.is_empty() && fails.is_empty(),
            "[{}] missing {:?}; outside tolerance: {}",
            self.label,
            self.missing,
            fails
                .iter()
                .map(|c| format!(
                    "{}: got {:e}, expected {:e}, |diff| {:.3e} > {:.3e}",
                    c.name,
                    c.got,
                    c.expected,
                    (c.got - c.expected).abs(),
                    c.tol.bound(c.expected)
                ))
                .collect::<Vec<_>>()
                .join("; ")
        );
    }
}

// ---------------------------------------------------------------------------------------
// Parquet
// ---------------------------------------------------------------------------------------

/// All record batches of a Parquet file, with its arrow schema.
pub fn read_parquet(path: &Path) -> (SchemaRef, Vec<RecordBatch>) {
    let file = File::open(path).unwrap_or_else(|e| panic!("cannot open {}: {e}", path.display()));
    let builder = ParquetRecordBatchReaderBuilder::try_new(file)
        .unwrap_or_else(|e| panic!("not Parquet: {}: {e}", path.display()));
    let schema = builder.schema().clone();
    let reader = builder.build().expect("parquet reader");
    let batches = reader
        .collect::<Result<Vec<_>, _>>()
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    (schema, batches)
}

/// The whole file as one record batch.
pub fn read_parquet_batch(path: &Path) -> RecordBatch {
    let (schema, batches) = read_parquet(path);
    arrow::compute::concat_batches(&schema, &batches).expect("concat batches")
}

/// Number of row groups in a Parquet file.
pub fn parquet_row_groups(path: &Path) -> usize {
    let file = File::open(path).expect("open parquet");
    let builder = ParquetRecordBatchReaderBuilder::try_new(file).expect("parquet");
    builder.metadata().num_row_groups()
}

/// A numeric column converted to f64 (nulls become NaN).
pub fn column_f64(batch: &RecordBatch, col: &str) -> Vec<f64> {
    let arr: &ArrayRef = batch
        .column_by_name(col)
        .unwrap_or_else(|| panic!("no column {col}"));
    let cast = arrow::compute::cast(arr, &DataType::Float64)
        .unwrap_or_else(|e| panic!("column {col} is not numeric: {e}"));
    let f = cast
        .as_any()
        .downcast_ref::<Float64Array>()
        .expect("Float64Array");
    (0..f.len())
        .map(|i| if f.is_null(i) { f64::NAN } else { f.value(i) })
        .collect()
}

/// A numeric column of a Parquet file as f64.
pub fn read_column_f64(path: &Path, col: &str) -> Vec<f64> {
    column_f64(&read_parquet_batch(path), col)
}

/// Writes batches to a Parquet file with at most `row_group_rows` rows per row group.
pub fn write_parquet(
    path: &Path,
    schema: SchemaRef,
    batches: &[RecordBatch],
    row_group_rows: usize,
) {
    let props = WriterProperties::builder()
        .set_max_row_group_row_count(Some(row_group_rows))
        .build();
    let file =
        File::create(path).unwrap_or_else(|e| panic!("cannot create {}: {e}", path.display()));
    let mut writer = ArrowWriter::try_new(file, schema, Some(props)).expect("arrow writer");
    for b in batches {
        writer.write(b).expect("write batch");
    }
    writer.close().expect("close parquet writer");
}

/// Splits `batch` at the given row offsets (`cuts`, increasing) into consecutive slices.
pub fn split_batch(batch: &RecordBatch, cuts: &[usize]) -> Vec<RecordBatch> {
    let mut out = Vec::new();
    let mut start = 0;
    for &c in cuts.iter().chain(std::iter::once(&batch.num_rows())) {
        assert!(c >= start && c <= batch.num_rows(), "bad cut {c}");
        out.push(batch.slice(start, c - start));
        start = c;
    }
    out
}

/// A schema handle for a batch (convenience for `write_parquet`).
pub fn schema_of(batch: &RecordBatch) -> SchemaRef {
    Arc::clone(&batch.schema())
}
