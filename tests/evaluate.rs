//! `outcore evaluate` against scikit-learn, and as a user meets it.
//!
//! The fixtures in `tests/data/metrics/<case>/` hold the data, a model fit on it by
//! `outcore fit`, the scores `outcore predict` wrote, and `expected.json`: the metrics
//! scikit-learn computed on those scores (`tests/reference/metrics_reference.py`). The
//! tests re-run `evaluate` on model + data and compare: 1e-12 relative for the exact
//! measures; the histogram AUC within the bound it states.

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array, RecordBatch};
use arrow::datatypes::{Field, Schema};
use serde_json::Value;

use common::{
    json_at, json_f64, read_json, read_parquet_batch, rel_err, run_outcore, schema_of, split_batch,
    test_data, write_parquet,
};

/// Every case of `tests/data/metrics/`.
const CASES: &[&str] = &[
    "logistic_breast_cancer",
    "logistic_breast_cancer_weighted",
    "logistic_synthetic",
    "logistic_tied_scores",
    "softmax_iris_weighted",
    "squared_diabetes",
    "squared_diabetes_weighted",
    "poisson_randhie_weighted",
];

/// Relative tolerance of the exact measures.
const EXACT: f64 = 1e-12;

fn case_file(case: &str, file: &str) -> PathBuf {
    let p = test_data("metrics").join(case).join(file);
    assert!(p.exists(), "missing fixture {}", p.display());
    p
}

fn stderr(o: &std::process::Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// Runs `outcore evaluate --json` and parses its stdout, which must be one JSON object.
fn evaluate_json(model: &Path, data: &[&Path], extra: &[&str]) -> Value {
    let mut args: Vec<String> = vec![
        "evaluate".into(),
        "--model".into(),
        model.display().to_string(),
        "--data".into(),
    ];
    args.extend(data.iter().map(|d| d.display().to_string()));
    args.push("--json".into());
    args.extend(extra.iter().map(|s| s.to_string()));
    let out = run_outcore(&args);
    assert_eq!(
        out.status.code(),
        Some(0),
        "evaluate failed: {}",
        stderr(&out)
    );
    let text = String::from_utf8(out.stdout).expect("utf-8 stdout");
    assert_eq!(
        text.trim_end().lines().count(),
        1,
        "stdout is not one line: {text}"
    );
    let v: Value = serde_json::from_str(text.trim()).expect("stdout is JSON");
    assert!(v.is_object());
    v
}

fn evaluate_case(case: &str, extra: &[&str]) -> Value {
    evaluate_json(
        &case_file(case, "model.json"),
        &[&case_file(case, "data.parquet")],
        extra,
    )
}

/// The scalar metrics of a case that scikit-learn computed.
fn scalar_metrics(expected: &Value) -> Vec<(String, f64)> {
    json_at(expected, &["metrics"])
        .as_object()
        .expect("metrics object")
        .iter()
        .filter_map(|(k, v)| v.as_f64().map(|x| (k.clone(), x)))
        .collect()
}

#[test]
fn evaluate_matches_scikit_learn_on_every_fixture() {
    let mut worst: Vec<(String, f64)> = Vec::new();
    for case in CASES {
        let expected = read_json(&case_file(case, "expected.json"));
        let got = evaluate_case(case, &[]);
        assert_eq!(got["loss"], expected["loss"], "{case}");
        assert_eq!(got["rows"], expected["rows"], "{case}: rows");
        assert_eq!(got["weight_column"], expected["weight_column"], "{case}");
        let ws = json_f64(&got, &["weight_sum"]);
        assert!(rel_err(ws, json_f64(&expected, &["weight_sum"])) <= EXACT);
        for (key, want) in scalar_metrics(&expected) {
            let have = json_f64(&got, &[key.as_str()]);
            let err = rel_err(have, want);
            eprintln!("{case:34} {key:14} ours {have:.17e} sklearn {want:.17e} rel {err:.1e}");
            assert!(
                err <= EXACT,
                "{case}: {key} = {have:e}, scikit-learn {want:e} (rel {err:e})"
            );
            match worst.iter_mut().find(|(k, _)| *k == key) {
                Some((_, e)) => *e = e.max(err),
                None => worst.push((key, err)),
            }
        }
        if got["loss"] == "logistic" {
            assert_eq!(got["auc_method"], "exact", "{case}");
            assert_eq!(json_f64(&got, &["auc_error_bound"]), 0.0);
            let cross = json_f64(
                &expected,
                &["metrics", "cross_check", "log_loss_from_margins"],
            );
            assert!(rel_err(json_f64(&got, &["log_loss"]), cross) <= EXACT);
        }
        if got["loss"] == "softmax" {
            assert_eq!(got["classes"], expected["metrics"]["classes"], "{case}");
            let ours = got["confusion_matrix"].as_array().expect("matrix");
            let theirs = expected["metrics"]["confusion_matrix"]
                .as_array()
                .expect("matrix");
            assert_eq!(ours.len(), theirs.len());
            for (a, b) in ours.iter().zip(theirs) {
                let a: Vec<f64> = a
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|v| v.as_f64().unwrap())
                    .collect();
                let b: Vec<f64> = b
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|v| v.as_f64().unwrap())
                    .collect();
                assert_eq!(a, b, "{case}: confusion matrix row");
            }
        }
    }
    for (key, err) in &worst {
        eprintln!("largest relative difference from scikit-learn, {key}: {err:.1e}");
    }
}

#[test]
fn predict_still_reproduces_the_committed_scores() {
    // expected.json was computed from predictions.parquet; if scoring changed, the
    // comparison above would fail for a reason that is not the metrics.
    let dir = tempfile::tempdir().expect("tempdir");
    for case in CASES {
        let committed = read_parquet_batch(&case_file(case, "predictions.parquet"));
        let expected = read_json(&case_file(case, "expected.json"));
        let mut keep = "y".to_string();
        if let Some(w) = expected["weight_column"].as_str() {
            keep.push(',');
            keep.push_str(w);
        }
        let out = dir.path().join(format!("{case}.parquet"));
        let o = run_outcore(&[
            "predict".to_string(),
            "--model".into(),
            case_file(case, "model.json").display().to_string(),
            "--data".into(),
            case_file(case, "data.parquet").display().to_string(),
            "--out".into(),
            out.display().to_string(),
            "--keep".into(),
            keep,
        ]);
        assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
        let fresh = read_parquet_batch(&out);
        assert_eq!(fresh.schema(), committed.schema(), "{case}");
        for field in committed.schema().fields() {
            let (a, b) = (
                fresh.column_by_name(field.name()).unwrap(),
                committed.column_by_name(field.name()).unwrap(),
            );
            if let (Some(a), Some(b)) = (
                a.as_any().downcast_ref::<Float64Array>(),
                b.as_any().downcast_ref::<Float64Array>(),
            ) {
                for (x, y) in a.values().iter().zip(b.values()) {
                    assert!(
                        rel_err(*x, *y) <= 1e-15,
                        "{case}: {} {x} vs {y}",
                        field.name()
                    );
                }
            } else {
                assert_eq!(a, b, "{case}: {}", field.name());
            }
        }
    }
}

#[test]
fn histogram_auc_lies_within_its_stated_bound() {
    for case in [
        "logistic_synthetic",
        "logistic_tied_scores",
        "logistic_breast_cancer",
        "logistic_breast_cancer_weighted",
    ] {
        let exact = evaluate_case(case, &[]);
        let sklearn = json_f64(
            &read_json(&case_file(case, "expected.json")),
            &["metrics", "auc"],
        );
        // 0: histogram from the first row; 0.01 MB = 655 rows: moved there mid-stream.
        for memory in ["0", "0.01"] {
            let h = evaluate_case(case, &["--auc-memory", memory]);
            let rows = h["rows"].as_u64().unwrap();
            if memory == "0.01" && rows <= 655 {
                assert_eq!(h["auc_method"], "exact", "{case}: fits in 655 rows");
                continue;
            }
            assert_eq!(h["auc_method"], "histogram", "{case} --auc-memory {memory}");
            assert_eq!(h["auc_bins"], 65536);
            let auc = json_f64(&h, &["auc"]);
            let bound = json_f64(&h, &["auc_error_bound"]);
            let diff = (auc - sklearn).abs();
            eprintln!(
                "{case:32} --auc-memory {memory:4}: histogram AUC {auc:.15} exact {sklearn:.15} |diff| {diff:.1e} bound {bound:.1e}"
            );
            assert!(
                diff <= bound + 1e-15,
                "{case}: off by {diff:e}, bound {bound:e}"
            );
            assert!(bound < 1e-3, "{case}: bound {bound:e}");
            assert!(json_f64(&h, &["auc_low"]) <= sklearn + 1e-15);
            assert!(json_f64(&h, &["auc_high"]) >= sklearn - 1e-15);
            // Nothing else depends on the AUC's memory.
            for key in ["log_loss", "accuracy", "brier"] {
                assert_eq!(h[key], exact[key], "{case}: {key}");
            }
            let weights = |v: &Value| -> f64 {
                v["calibration"]
                    .as_array()
                    .unwrap()
                    .iter()
                    .map(|r| r["weight"].as_f64().unwrap())
                    .sum()
            };
            assert!(rel_err(weights(&h), weights(&exact)) <= 1e-12);
        }
    }
}

#[test]
fn calibration_table_adds_up_and_is_ordered() {
    for case in [
        "logistic_synthetic",
        "logistic_breast_cancer_weighted",
        "logistic_tied_scores",
    ] {
        let v = evaluate_case(case, &[]);
        let table = v["calibration"].as_array().expect("calibration table");
        assert!(!table.is_empty() && table.len() <= 10);
        let w_total = json_f64(&v, &["weight_sum"]);
        let (mut w, mut pw, mut yw) = (0.0, 0.0, 0.0);
        let mut last_max = 0.0;
        for row in table {
            let rw = json_f64(row, &["weight"]);
            w += rw;
            pw += rw * json_f64(row, &["mean_predicted"]);
            yw += rw * json_f64(row, &["observed_rate"]);
            let (lo, hi) = (
                json_f64(row, &["min_predicted"]),
                json_f64(row, &["max_predicted"]),
            );
            assert!(lo <= hi && lo >= last_max, "{case}: deciles overlap");
            last_max = hi;
        }
        assert!(rel_err(w, w_total) <= 1e-12, "{case}");
        assert!(
            rel_err(pw / w, json_f64(&v, &["mean_predicted"])) <= 1e-12,
            "{case}"
        );
        assert!(
            rel_err(yw / w, json_f64(&v, &["positive_rate"])) <= 1e-12,
            "{case}"
        );
        if case == "logistic_synthetic" {
            // Distinct scores: ten deciles of 400 rows each.
            assert_eq!(table.len(), 10);
            assert!(table.iter().all(|r| r["rows"] == 400));
        }
    }
}

#[test]
fn several_files_and_row_groups_give_the_same_measures() {
    let dir = tempfile::tempdir().expect("tempdir");
    for case in [
        "logistic_synthetic",
        "softmax_iris_weighted",
        "poisson_randhie_weighted",
    ] {
        let one = evaluate_case(case, &[]);
        let batch = read_parquet_batch(&case_file(case, "data.parquet"));
        let n = batch.num_rows();
        let parts = split_batch(&batch, &[n / 3, 2 * n / 3]);
        let mut paths = Vec::new();
        for (i, part) in parts.iter().enumerate() {
            let p = dir.path().join(format!("{case}-{i}.parquet"));
            write_parquet(&p, schema_of(part), std::slice::from_ref(part), 37);
            paths.push(p);
        }
        let refs: Vec<&Path> = paths.iter().map(PathBuf::as_path).collect();
        let three = evaluate_json(&case_file(case, "model.json"), &refs, &[]);
        assert_eq!(three["files"], 3);
        assert_eq!(three["rows"], one["rows"]);
        for (key, value) in one.as_object().unwrap() {
            if key == "files" {
                continue;
            }
            if let (Some(a), Some(b)) = (value.as_f64(), three[key].as_f64()) {
                assert!(rel_err(b, a) <= 1e-13, "{case}: {key} {a} vs {b}");
            }
        }
    }
}

#[test]
fn weights_count_as_duplicated_rows() {
    // The freq-weights fixture and its rows-duplicated twin hold the same rows; a
    // weighted model evaluated on the twin (no weight column) counts each row once.
    let model = case_file("logistic_breast_cancer_weighted", "model.json");
    let weighted = evaluate_case("logistic_breast_cancer_weighted", &[]);
    let twin = test_data("reference/breast_cancer3_logit_rows_duplicated/data.parquet");
    let out = run_outcore(&[
        "evaluate".to_string(),
        "--model".into(),
        model.display().to_string(),
        "--data".into(),
        twin.display().to_string(),
        "--json".into(),
    ]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    assert!(
        stderr(&out).contains("'weight'"),
        "no warning: {}",
        stderr(&out)
    );
    let dup: Value = serde_json::from_slice(&out.stdout).expect("json");
    assert_eq!(dup["weight_column"], Value::Null);
    assert!(!dup["warnings"].as_array().unwrap().is_empty());
    assert_eq!(
        json_f64(&dup, &["weight_sum"]),
        json_f64(&weighted, &["weight_sum"])
    );
    for key in ["log_loss", "auc", "accuracy", "brier"] {
        let (a, b) = (json_f64(&weighted, &[key]), json_f64(&dup, &[key]));
        assert!(rel_err(b, a) <= 1e-13, "{key}: {a} vs {b}");
    }
}

#[test]
fn human_table_names_every_measure() {
    let expect: &[(&str, &[&str])] = &[
        (
            "logistic_breast_cancer",
            &["log-loss", "AUC", "accuracy", "Brier", "calibration"],
        ),
        (
            "softmax_iris_weighted",
            &["log-loss", "accuracy", "confusion matrix", "versicolor"],
        ),
        ("squared_diabetes", &["RMSE", "MAE", "R²"]),
        ("poisson_randhie_weighted", &["mean deviance"]),
    ];
    for (case, words) in expect {
        let out = run_outcore(&[
            "evaluate".to_string(),
            "--model".into(),
            case_file(case, "model.json").display().to_string(),
            "--data".into(),
            case_file(case, "data.parquet").display().to_string(),
        ]);
        assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
        let text = String::from_utf8_lossy(&out.stdout);
        for w in *words {
            assert!(text.contains(w), "{case}: no '{w}' in\n{text}");
        }
    }
}

/// Writes `columns` to a one-file Parquet data set.
fn write_columns(path: &Path, columns: Vec<(&str, ArrayRef)>) {
    let fields: Vec<Field> = columns
        .iter()
        .map(|(n, a)| Field::new(*n, a.data_type().clone(), true))
        .collect();
    let schema = Arc::new(Schema::new(fields));
    let batch = RecordBatch::try_new(
        schema.clone(),
        columns.into_iter().map(|(_, a)| a).collect(),
    )
    .expect("batch");
    write_parquet(path, schema, &[batch], 1000);
}

/// The synthetic logistic fixture's columns, with `y` replaced by `y`.
fn synthetic_with(y: Option<Float64Array>, drop: &str) -> Vec<(&'static str, ArrayRef)> {
    let batch = read_parquet_batch(&case_file("logistic_synthetic", "data.parquet"));
    let mut out: Vec<(&'static str, ArrayRef)> = Vec::new();
    for name in ["x0", "x1", "x2"] {
        if name != drop {
            out.push((name, batch.column_by_name(name).unwrap().clone()));
        }
    }
    if let Some(y) = y {
        out.push(("y", Arc::new(y)));
    }
    out
}

fn evaluate_raw(model: &Path, data: &Path, extra: &[&str]) -> std::process::Output {
    let mut args = vec![
        "evaluate".to_string(),
        "--model".into(),
        model.display().to_string(),
        "--data".into(),
        data.display().to_string(),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    run_outcore(&args)
}

#[test]
fn missing_target_or_feature_is_named() {
    let dir = tempfile::tempdir().expect("tempdir");
    let model = case_file("logistic_synthetic", "model.json");
    let no_target = dir.path().join("no_target.parquet");
    write_columns(&no_target, synthetic_with(None, ""));
    let out = evaluate_raw(&model, &no_target, &["--json"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(out.stdout.is_empty());
    let msg = stderr(&out);
    assert!(
        msg.contains("'y'") && msg.contains("no_target.parquet"),
        "{msg}"
    );
    assert_eq!(msg.trim().lines().count(), 1, "{msg}");

    let y: Float64Array = (0..4000).map(|i| Some((i % 2) as f64)).collect();
    let no_feature = dir.path().join("no_feature.parquet");
    write_columns(&no_feature, synthetic_with(Some(y), "x1"));
    let out = evaluate_raw(&model, &no_feature, &[]);
    assert_eq!(out.status.code(), Some(2));
    let msg = stderr(&out);
    assert!(
        msg.contains("'x1'") && msg.contains("no_feature.parquet"),
        "{msg}"
    );
}

#[test]
fn a_null_target_is_refused_unless_skipped() {
    let dir = tempfile::tempdir().expect("tempdir");
    let model = case_file("logistic_synthetic", "model.json");
    let labels = read_parquet_batch(&case_file("logistic_synthetic", "data.parquet"));
    let labels = common::column_f64(&labels, "y");
    let y: Float64Array = labels
        .iter()
        .enumerate()
        .map(|(i, v)| if i % 10 == 3 { None } else { Some(*v) })
        .collect();
    let data = dir.path().join("nulls.parquet");
    write_columns(&data, synthetic_with(Some(y), ""));
    let out = evaluate_raw(&model, &data, &["--json"]);
    assert_eq!(out.status.code(), Some(2));
    let msg = stderr(&out);
    assert!(
        msg.contains("'y'") && msg.contains("--skip-missing-target"),
        "{msg}"
    );

    let out = evaluate_raw(&model, &data, &["--json", "--skip-missing-target"]);
    assert_eq!(out.status.code(), Some(0), "{}", stderr(&out));
    let v: Value = serde_json::from_slice(&out.stdout).expect("json");
    assert_eq!(v["rows"], 3600);
    assert_eq!(v["rows_skipped"], 400);
}

#[test]
fn bad_flags_and_files_exit_two() {
    let model = case_file("logistic_synthetic", "model.json");
    let data = case_file("logistic_synthetic", "data.parquet");
    let out = evaluate_raw(&model, &data, &["--auc-memory", "-1"]);
    assert_eq!(out.status.code(), Some(2));
    assert!(stderr(&out).contains("--auc-memory"), "{}", stderr(&out));
    // A data file given as the model.
    let out = evaluate_raw(&data, &data, &[]);
    assert_eq!(out.status.code(), Some(2));
    assert!(stderr(&out).contains("model"), "{}", stderr(&out));
    // A model whose target is of another kind: the poisson model on logistic data.
    let out = evaluate_raw(&case_file("squared_diabetes", "model.json"), &data, &[]);
    assert_eq!(out.status.code(), Some(2));
}
