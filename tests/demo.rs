//! Tests of the invented demo dataset written by `outcore::demo::write_demo`: determinism,
//! file and row-group layout, the `truth.json` file, and statistical agreement between the
//! data and the models recorded in `truth.json`.
//!
//! The statistical checks are not Monte Carlo estimates of the truth: they compare a
//! target's sum with its expectation computed exactly from the same rows' features (read
//! back from the files) and the coefficients in `truth.json`, and allow 4 standard
//! deviations of the sum. The data are deterministic given the seed, so a check either
//! always passes or always fails.

use std::fs::{self, File};
use std::path::{Path, PathBuf};

use arrow::array::{Array, AsArray, RecordBatchReader};
use arrow::compute::{cast, concat_batches};
use arrow::datatypes::{DataType, Float64Type, Int64Type};
use arrow::record_batch::RecordBatch;
use outcore::demo::{
    write_demo, DemoOptions, DemoSummary, FEATURE_COLUMNS, SLOT_CLASSES, TARGET_COLUMNS,
    TRUTH_FORMAT, UNRELATED_COLUMNS,
};
use outcore::ErrorKind;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::basic::Compression;
use parquet::file::reader::{FileReader, SerializedFileReader};
use serde_json::Value;

/// Options with `rows` rows and the other settings at their defaults.
fn opts(rows: u64) -> DemoOptions {
    DemoOptions {
        rows,
        ..DemoOptions::default()
    }
}

/// Writes a demo into a fresh temporary directory.
fn write(options: &DemoOptions) -> (tempfile::TempDir, DemoSummary) {
    let dir = tempfile::tempdir().expect("temporary directory");
    let summary = write_demo(dir.path(), options).expect("demo written");
    (dir, summary)
}

/// All rows of `files`, in order, as one record batch.
fn read_all(files: &[PathBuf]) -> RecordBatch {
    let mut batches = Vec::new();
    let mut schema = None;
    for path in files {
        let file = File::open(path).expect("open demo file");
        let reader = ParquetRecordBatchReaderBuilder::try_new(file)
            .expect("parquet footer")
            .with_batch_size(8192)
            .build()
            .expect("reader");
        schema.get_or_insert_with(|| reader.schema());
        for batch in reader {
            batches.push(batch.expect("batch"));
        }
    }
    let schema = schema.expect("at least one file");
    concat_batches(&schema, &batches).expect("concat")
}

/// Column `name` of `batch` as f64 values (booleans as 0/1).
fn f64_column(batch: &RecordBatch, name: &str) -> Vec<f64> {
    let column = batch
        .column_by_name(name)
        .unwrap_or_else(|| panic!("column {name}"));
    assert_eq!(column.null_count(), 0, "{name} has nulls");
    let column = cast(column, &DataType::Float64).expect("cast to f64");
    column.as_primitive::<Float64Type>().values().to_vec()
}

/// Column `name` of `batch` as strings.
fn string_column(batch: &RecordBatch, name: &str) -> Vec<String> {
    let column = batch
        .column_by_name(name)
        .unwrap_or_else(|| panic!("column {name}"));
    column
        .as_string::<i32>()
        .iter()
        .map(|v| v.expect("non-null").to_string())
        .collect()
}

fn read_truth(summary: &DemoSummary) -> Value {
    let text = fs::read_to_string(&summary.truth_path).expect("truth.json");
    serde_json::from_str(&text).expect("truth.json is JSON")
}

/// `intercept + Σ coefficients[f] · x_f` for each row, from a `truth.json` model.
fn linear_predictor(batch: &RecordBatch, model: &Value) -> Vec<f64> {
    let intercept = model["intercept"].as_f64().expect("numeric intercept");
    linear_predictor_with(batch, intercept, &model["coefficients"], &model["features"])
}

fn linear_predictor_with(
    batch: &RecordBatch,
    intercept: f64,
    coefficients: &Value,
    features: &Value,
) -> Vec<f64> {
    let mut eta = vec![intercept; batch.num_rows()];
    for feature in features.as_array().expect("feature list") {
        let name = feature.as_str().expect("feature name");
        let beta = coefficients[name].as_f64().expect("coefficient");
        for (e, x) in eta.iter_mut().zip(f64_column(batch, name)) {
            *e += beta * x;
        }
    }
    eta
}

fn sigmoid(z: f64) -> f64 {
    1.0 / (1.0 + (-z).exp())
}

#[test]
fn same_seed_gives_same_bytes_and_rows() {
    let options = opts(3000);
    let (_a, first) = write(&options);
    let (_b, second) = write(&options);
    assert_eq!(first.files.len(), second.files.len());
    for (x, y) in first.files.iter().zip(&second.files) {
        assert_eq!(fs::read(x).expect("read"), fs::read(y).expect("read"));
    }
    assert_eq!(read_all(&first.files), read_all(&second.files));
    assert_eq!(
        fs::read(&first.truth_path).expect("read"),
        fs::read(&second.truth_path).expect("read")
    );
}

#[test]
fn different_seeds_give_different_rows() {
    let (_a, first) = write(&opts(500));
    let (_b, second) = write(&DemoOptions {
        seed: 8,
        ..opts(500)
    });
    let (x, y) = (read_all(&first.files), read_all(&second.files));
    assert_eq!(x.column_by_name("order_id"), y.column_by_name("order_id"));
    assert_ne!(f64_column(&x, "distance_km"), f64_column(&y, "distance_km"));
}

#[test]
fn rows_do_not_depend_on_file_or_row_group_split() {
    let (_a, whole) = write(&opts(5000));
    let (_b, split) = write(&DemoOptions {
        rows_per_file: 1300,
        row_group_rows: 256,
        ..opts(5000)
    });
    assert_eq!(whole.files.len(), 1);
    assert_eq!(split.files.len(), 4);
    assert_eq!(read_all(&whole.files), read_all(&split.files));
}

#[test]
fn files_are_split_and_row_groups_sized_as_asked() {
    let options = DemoOptions {
        rows: 2500,
        seed: 3,
        rows_per_file: 1000,
        row_group_rows: 300,
    };
    let (dir, summary) = write(&options);
    assert_eq!(summary.rows, 2500);
    let names: Vec<_> = summary
        .files
        .iter()
        .map(|p| p.file_name().expect("name").to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names,
        [
            "orders-00000.parquet",
            "orders-00001.parquet",
            "orders-00002.parquet"
        ]
    );
    assert_eq!(summary.truth_path, dir.path().join("truth.json"));

    let expected_groups: [&[i64]; 3] = [&[300, 300, 300, 100], &[300, 300, 300, 100], &[300, 200]];
    for (path, expected) in summary.files.iter().zip(expected_groups) {
        let reader = SerializedFileReader::new(File::open(path).expect("open")).expect("footer");
        let meta = reader.metadata();
        let groups: Vec<i64> = meta.row_groups().iter().map(|g| g.num_rows()).collect();
        assert_eq!(groups, expected, "{}", path.display());
        for group in meta.row_groups() {
            for column in group.columns() {
                assert_eq!(column.compression(), Compression::SNAPPY);
            }
        }
    }

    // Row ids run on across files.
    let all = read_all(&summary.files);
    assert_eq!(all.num_rows(), 2500);
    let ids = all
        .column_by_name("order_id")
        .expect("order_id")
        .as_primitive::<Int64Type>();
    assert!(ids.values().windows(2).all(|w| w[1] == w[0] + 1));

    // No temporary files are left behind.
    let leftovers: Vec<_> = fs::read_dir(dir.path())
        .expect("list")
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().ends_with(".partial"))
        .collect();
    assert!(leftovers.is_empty());
}

#[test]
fn columns_have_the_documented_types_and_no_nulls() {
    let (_d, summary) = write(&opts(400));
    let all = read_all(&summary.files);
    let expected = [
        ("order_id", DataType::Int64),
        ("zone", DataType::Utf8),
        ("store", DataType::Utf8),
        ("hour", DataType::Int32),
        ("peak_hour", DataType::Boolean),
        ("distance_km", DataType::Float64),
        ("basket_items", DataType::Int32),
        ("courier_load", DataType::Int32),
        ("rain_mm", DataType::Float64),
        ("courier_tenure_years", DataType::Float32),
        ("late", DataType::Int64),
        ("tip", DataType::Float64),
        ("substitutions", DataType::Int64),
        ("slot", DataType::Utf8),
    ];
    let schema = all.schema();
    let actual: Vec<_> = schema
        .fields()
        .iter()
        .map(|f| (f.name().as_str(), f.data_type().clone()))
        .collect();
    let expected: Vec<_> = expected.iter().map(|(n, t)| (*n, t.clone())).collect();
    assert_eq!(actual, expected);
    for column in all.columns() {
        assert_eq!(column.null_count(), 0);
    }
    let hours = f64_column(&all, "hour");
    let peak = f64_column(&all, "peak_hour");
    for (h, p) in hours.iter().zip(&peak) {
        assert!((0.0..=23.0).contains(h));
        let is_peak = [11.0, 12.0, 17.0, 18.0, 19.0].contains(h);
        assert_eq!(*p == 1.0, is_peak);
    }
    assert!(f64_column(&all, "late")
        .iter()
        .all(|&y| y == 0.0 || y == 1.0));
    assert!(f64_column(&all, "substitutions").iter().all(|&y| y >= 0.0));
    assert!(f64_column(&all, "distance_km").iter().all(|&d| d > 0.0));
    let zones: std::collections::BTreeSet<_> = string_column(&all, "zone").into_iter().collect();
    assert!(zones.len() > 6 && zones.len() <= 12, "{zones:?}");
}

#[test]
fn truth_json_is_well_formed() {
    let options = DemoOptions {
        rows: 1200,
        seed: 11,
        rows_per_file: 500,
        row_group_rows: 128,
    };
    let (_d, summary) = write(&options);
    let truth = read_truth(&summary);
    assert_eq!(truth["format"], TRUTH_FORMAT);
    assert_eq!(truth["seed"], 11);
    assert_eq!(truth["rows"], 1200);
    assert!(truth["note"]
        .as_str()
        .expect("note")
        .to_lowercase()
        .contains("invented"));
    let files: Vec<_> = truth["files"]
        .as_array()
        .expect("files")
        .iter()
        .map(|f| f.as_str().expect("file name").to_string())
        .collect();
    let written: Vec<_> = summary
        .files
        .iter()
        .map(|p| p.file_name().expect("name").to_string_lossy().into_owned())
        .collect();
    assert_eq!(files, written);
    assert_eq!(truth["features"], serde_json::json!(FEATURE_COLUMNS));
    assert_eq!(
        truth["unrelated_columns"],
        serde_json::json!(UNRELATED_COLUMNS)
    );

    let all = read_all(&summary.files);
    let schema = all.schema();
    let targets = truth["targets"].as_object().expect("targets");
    let mut names: Vec<_> = targets.keys().map(String::as_str).collect();
    names.sort_unstable();
    let mut sorted_targets = TARGET_COLUMNS.to_vec();
    sorted_targets.sort_unstable();
    assert_eq!(names, sorted_targets);
    let losses = [
        ("late", "logistic"),
        ("tip", "squared"),
        ("substitutions", "poisson"),
        ("slot", "softmax"),
    ];
    for (target, loss) in losses {
        let model = &targets[target];
        assert_eq!(model["loss"], loss, "{target}");
        assert!(schema.field_with_name(target).is_ok(), "{target}");
        let features = model["features"].as_array().expect("features");
        assert_eq!(model["features"], serde_json::json!(FEATURE_COLUMNS));
        for feature in features {
            let name = feature.as_str().expect("feature name");
            let field = schema.field_with_name(name).expect("feature is a column");
            assert!(
                field.data_type().is_numeric() || field.data_type() == &DataType::Boolean,
                "{name} is not numeric"
            );
            assert!(!TARGET_COLUMNS.contains(&name) && !UNRELATED_COLUMNS.contains(&name));
        }
        let coefficient_maps: Vec<&Value> = if loss == "softmax" {
            SLOT_CLASSES
                .iter()
                .map(|c| &model["coefficients"][*c])
                .collect()
        } else {
            assert!(model["intercept"].is_f64());
            vec![&model["coefficients"]]
        };
        for map in coefficient_maps {
            let keys: std::collections::BTreeSet<_> = map
                .as_object()
                .expect("coefficients")
                .keys()
                .cloned()
                .collect();
            let expected: std::collections::BTreeSet<_> =
                FEATURE_COLUMNS.iter().map(|s| s.to_string()).collect();
            assert_eq!(keys, expected, "{target}");
            assert!(map.as_object().expect("map").values().all(Value::is_f64));
        }
    }
    assert!(targets["tip"]["noise_sd"].as_f64().expect("noise sd") > 0.0);

    let slot = &targets["slot"];
    assert_eq!(slot["classes"], serde_json::json!(SLOT_CLASSES));
    let reference = slot["reference_class"].as_str().expect("reference");
    assert_eq!(slot["intercept"][reference], 0.0);
    assert!(slot["coefficients"][reference]
        .as_object()
        .expect("reference coefficients")
        .values()
        .all(|v| v == 0.0));
    // The centered form differs from the reference form by one shift per feature.
    for feature in FEATURE_COLUMNS {
        let shifts: Vec<f64> = SLOT_CLASSES
            .iter()
            .map(|c| {
                slot["coefficients"][*c][feature].as_f64().expect("coef")
                    - slot["centered"]["coefficients"][*c][feature]
                        .as_f64()
                        .expect("centered")
            })
            .collect();
        assert!(shifts.iter().all(|s| (s - shifts[0]).abs() < 1e-12));
        let sum: f64 = SLOT_CLASSES
            .iter()
            .map(|c| {
                slot["centered"]["coefficients"][*c][feature]
                    .as_f64()
                    .expect("centered")
            })
            .sum();
        assert!(sum.abs() < 1e-12);
    }
    // Every class appears in the data, and nothing else does.
    let seen: std::collections::BTreeSet<_> = string_column(&all, "slot").into_iter().collect();
    let classes: std::collections::BTreeSet<_> =
        SLOT_CLASSES.iter().map(|s| s.to_string()).collect();
    assert_eq!(seen, classes);
}

/// Bound used by the statistical checks: |observed sum − expected sum| ≤ 4 · sd of the sum.
const Z_BOUND: f64 = 4.0;

#[test]
fn late_rate_matches_truth_within_four_standard_errors() {
    let (_d, summary) = write(&opts(50_000));
    let truth = read_truth(&summary);
    let all = read_all(&summary.files);
    let p: Vec<f64> = linear_predictor(&all, &truth["targets"]["late"])
        .into_iter()
        .map(sigmoid)
        .collect();
    let y = f64_column(&all, "late");
    let n = y.len() as f64;
    let observed: f64 = y.iter().sum();
    let expected: f64 = p.iter().sum();
    let sd = p.iter().map(|p| p * (1.0 - p)).sum::<f64>().sqrt();
    let z = (observed - expected) / sd;
    assert!(
        z.abs() <= Z_BOUND,
        "late: observed {observed}, expected {expected}, z = {z}"
    );
    let rate = observed / n;
    assert!((0.15..=0.30).contains(&rate), "late rate {rate}");
    // The model also sorts rows: the late rate among the riskiest fifth is much higher
    // than among the safest fifth.
    let mut pairs: Vec<(f64, f64)> = p.iter().copied().zip(y.iter().copied()).collect();
    pairs.sort_by(|a, b| a.0.total_cmp(&b.0));
    let fifth = pairs.len() / 5;
    let low: f64 = pairs[..fifth].iter().map(|q| q.1).sum::<f64>() / fifth as f64;
    let high: f64 = pairs[pairs.len() - fifth..]
        .iter()
        .map(|q| q.1)
        .sum::<f64>()
        / fifth as f64;
    assert!(
        high > 3.0 * low,
        "riskiest fifth {high}, safest fifth {low}"
    );
}

#[test]
fn tip_substitutions_and_slot_match_truth_within_four_standard_errors() {
    let (_d, summary) = write(&opts(30_000));
    let truth = read_truth(&summary);
    let targets = &truth["targets"];
    let all = read_all(&summary.files);

    // tip: residuals have mean 0 and sd noise_sd.
    let mean = linear_predictor(&all, &targets["tip"]);
    let tip = f64_column(&all, "tip");
    let n = tip.len() as f64;
    let sd = targets["tip"]["noise_sd"].as_f64().expect("noise sd");
    let residuals: Vec<f64> = tip.iter().zip(&mean).map(|(y, m)| y - m).collect();
    let residual_sum: f64 = residuals.iter().sum();
    let z = residual_sum / (sd * n.sqrt());
    assert!(z.abs() <= Z_BOUND, "tip residual sum z = {z}");
    let residual_var = residuals.iter().map(|r| r * r).sum::<f64>() / n;
    // The sample variance of n normals has relative sd sqrt(2 / n).
    let z_var = (residual_var / (sd * sd) - 1.0) / (2.0 / n).sqrt();
    assert!(z_var.abs() <= Z_BOUND, "tip residual variance z = {z_var}");

    // substitutions: the count sum against the sum of Poisson means.
    let rates: Vec<f64> = linear_predictor(&all, &targets["substitutions"])
        .into_iter()
        .map(f64::exp)
        .collect();
    let counts = f64_column(&all, "substitutions");
    let expected: f64 = rates.iter().sum();
    let observed: f64 = counts.iter().sum();
    let z = (observed - expected) / expected.sqrt();
    assert!(z.abs() <= Z_BOUND, "substitutions z = {z}");

    // slot: each class count against the sum of its multinomial-logit probabilities.
    let slot = &targets["slot"];
    let etas: Vec<Vec<f64>> = SLOT_CLASSES
        .iter()
        .map(|c| {
            let intercept = slot["intercept"][*c].as_f64().expect("intercept");
            linear_predictor_with(
                &all,
                intercept,
                &slot["coefficients"][*c],
                &slot["features"],
            )
        })
        .collect();
    let labels = string_column(&all, "slot");
    for (k, class) in SLOT_CLASSES.iter().enumerate() {
        let mut expected = 0.0;
        let mut variance = 0.0;
        for i in 0..labels.len() {
            let top = etas.iter().map(|e| e[i]).fold(f64::NEG_INFINITY, f64::max);
            let total: f64 = etas.iter().map(|e| (e[i] - top).exp()).sum();
            let p = (etas[k][i] - top).exp() / total;
            expected += p;
            variance += p * (1.0 - p);
        }
        let observed = labels.iter().filter(|l| l == class).count() as f64;
        let z = (observed - expected) / variance.sqrt();
        assert!(z.abs() <= Z_BOUND, "slot {class}: z = {z}");
        assert!(observed / n > 0.05, "slot {class} is too rare");
    }
}

#[test]
fn rewriting_replaces_only_the_demo_files() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let out = dir.path().join("nested").join("demo");
    let big = write_demo(
        &out,
        &DemoOptions {
            rows_per_file: 100,
            ..opts(300)
        },
    )
    .expect("first demo");
    assert_eq!(big.files.len(), 3);
    let keep = ["notes.txt", "orders-extra.parquet", "orders-1.parquet"];
    for name in keep {
        fs::write(out.join(name), "not ours").expect("write");
    }

    let small = write_demo(&out, &opts(50)).expect("second demo");
    assert_eq!(small.files, vec![out.join("orders-00000.parquet")]);
    assert!(!out.join("orders-00001.parquet").exists());
    assert!(!out.join("orders-00002.parquet").exists());
    for name in keep {
        assert_eq!(
            fs::read_to_string(out.join(name)).expect("kept"),
            "not ours"
        );
    }
    assert_eq!(read_all(&small.files).num_rows(), 50);
    assert_eq!(read_truth(&small)["rows"], 50);
}

#[test]
fn zero_counts_are_usage_errors_and_write_nothing() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let out = dir.path().join("never");
    let bad = [
        opts(0),
        DemoOptions {
            rows_per_file: 0,
            ..opts(10)
        },
        DemoOptions {
            row_group_rows: 0,
            ..opts(10)
        },
    ];
    for options in bad {
        let err = write_demo(&out, &options).expect_err("refused");
        assert_eq!(err.kind(), ErrorKind::Usage, "{err}");
    }
    assert!(!out.exists());
}

#[test]
fn unwritable_directory_is_an_io_error_naming_the_path() {
    let dir = tempfile::tempdir().expect("temporary directory");
    let file = dir.path().join("plain-file");
    fs::write(&file, "x").expect("write");
    let out: &Path = &file.join("demo");
    let err = write_demo(out, &opts(10)).expect_err("refused");
    assert_eq!(err.kind(), ErrorKind::Io);
    assert!(err.message().contains("plain-file"), "{err}");
}

/// Solves the symmetric positive definite system `a · x = b` and returns `x` and the
/// diagonal of `a⁻¹`, by Gauss–Jordan elimination with partial pivoting.
fn solve_with_inverse_diagonal(mut a: Vec<Vec<f64>>, b: &[f64]) -> (Vec<f64>, Vec<f64>) {
    let n = b.len();
    // Augment with b and the identity.
    for (i, row) in a.iter_mut().enumerate() {
        row.push(b[i]);
        row.extend((0..n).map(|j| if i == j { 1.0 } else { 0.0 }));
    }
    for col in 0..n {
        let pivot = (col..n)
            .max_by(|&r, &s| a[r][col].abs().total_cmp(&a[s][col].abs()))
            .expect("rows");
        a.swap(col, pivot);
        let p = a[col][col];
        assert!(p.abs() > 1e-12, "singular design");
        for v in a[col].iter_mut() {
            *v /= p;
        }
        let pivot_row = a[col].clone();
        for (r, row) in a.iter_mut().enumerate() {
            if r != col {
                let factor = row[col];
                for (v, pv) in row.iter_mut().zip(&pivot_row) {
                    *v -= factor * pv;
                }
            }
        }
    }
    let x = a.iter().map(|row| row[n]).collect();
    let diag = (0..n).map(|i| a[i][n + 1 + i]).collect();
    (x, diag)
}

#[test]
fn tip_least_squares_recovers_truth_within_four_standard_errors() {
    let (_d, summary) = write(&opts(30_000));
    let truth = read_truth(&summary);
    let model = &truth["targets"]["tip"];
    let all = read_all(&summary.files);
    let columns: Vec<Vec<f64>> = FEATURE_COLUMNS
        .iter()
        .map(|name| f64_column(&all, name))
        .collect();
    let y = f64_column(&all, "tip");
    let p = FEATURE_COLUMNS.len() + 1;
    // Normal equations with the intercept first.
    let mut xtx = vec![vec![0.0; p]; p];
    let mut xty = vec![0.0; p];
    let mut row = vec![0.0; p];
    for i in 0..y.len() {
        row[0] = 1.0;
        for (j, column) in columns.iter().enumerate() {
            row[j + 1] = column[i];
        }
        for r in 0..p {
            xty[r] += row[r] * y[i];
            for c in 0..p {
                xtx[r][c] += row[r] * row[c];
            }
        }
    }
    let (beta, inverse_diagonal) = solve_with_inverse_diagonal(xtx, &xty);
    let sd = model["noise_sd"].as_f64().expect("noise sd");
    let mut names = vec!["intercept"];
    names.extend(FEATURE_COLUMNS);
    for (j, name) in names.iter().enumerate() {
        let true_value = if j == 0 {
            model["intercept"].as_f64().expect("intercept")
        } else {
            model["coefficients"][*name].as_f64().expect("coefficient")
        };
        let se = sd * inverse_diagonal[j].sqrt();
        let z = (beta[j] - true_value) / se;
        assert!(
            z.abs() <= Z_BOUND,
            "tip {name}: estimate {}, truth {true_value}, se {se}, z = {z}",
            beta[j]
        );
    }
}
