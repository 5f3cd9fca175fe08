//! The command line driven as a user drives it: fit → model file → predict → inspect,
//! settings files, exit codes, and bad input that must leave existing files untouched.

use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array, Int64Array, RecordBatch, StringArray};
use arrow::datatypes::{Field, Schema};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;
use parquet::file::properties::WriterProperties;
use serde_json::Value;

fn outcore(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_outcore"))
        .args(args)
        .output()
        .expect("the outcore binary runs")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn write_parquet(path: &Path, columns: Vec<(&str, ArrayRef)>, row_group: usize) {
    let fields: Vec<Field> = columns
        .iter()
        .map(|(n, a)| Field::new(*n, a.data_type().clone(), true))
        .collect();
    let schema = Arc::new(Schema::new(fields));
    let batch = RecordBatch::try_new(
        schema.clone(),
        columns.into_iter().map(|(_, a)| a).collect(),
    )
    .expect("valid batch");
    let props = WriterProperties::builder()
        .set_max_row_group_row_count(Some(row_group))
        .build();
    let mut w = ArrowWriter::try_new(File::create(path).expect("create"), schema, Some(props))
        .expect("writer");
    w.write(&batch).expect("write");
    w.close().expect("close");
}

fn read_f64(path: &Path, column: &str) -> Vec<f64> {
    let reader = ParquetRecordBatchReaderBuilder::try_new(File::open(path).expect("open"))
        .expect("parquet")
        .build()
        .expect("reader");
    let mut out = Vec::new();
    for batch in reader {
        let batch = batch.expect("batch");
        let col = batch.column_by_name(column).expect("column");
        let col = arrow::compute::cast(col, &arrow::datatypes::DataType::Float64).expect("cast");
        let col = col.as_any().downcast_ref::<Float64Array>().expect("f64");
        out.extend(col.values().iter().copied());
    }
    out
}

/// A small logistic data set from a fixed generator: y depends on x1 and x2.
fn logistic_data(dir: &Path, n: usize) -> PathBuf {
    let mut state = 12345u64;
    let mut uniform = move || {
        // SplitMix64: a published 64-bit generator, enough for test data.
        state = state.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut x1 = Vec::new();
    let mut x2 = Vec::new();
    let mut y = Vec::new();
    let mut id = Vec::new();
    for i in 0..n {
        let a = uniform() * 4.0 - 2.0;
        let b = uniform() * 10.0;
        let z = -0.5 + 1.5 * a - 0.2 * b;
        let p = 1.0 / (1.0 + (-z).exp());
        x1.push(a);
        x2.push(b);
        y.push(i64::from(uniform() < p));
        id.push(i as i64);
    }
    let path = dir.join("train.parquet");
    write_parquet(
        &path,
        vec![
            ("id", Arc::new(Int64Array::from(id)) as ArrayRef),
            ("x1", Arc::new(Float64Array::from(x1))),
            ("x2", Arc::new(Float64Array::from(x2))),
            ("label", Arc::new(Int64Array::from(y))),
        ],
        700,
    );
    path
}

fn read_json(path: &Path) -> Value {
    serde_json::from_slice(&std::fs::read(path).expect("read")).expect("json")
}

#[test]
fn fit_predict_inspect_end_to_end() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = logistic_data(dir.path(), 3000);
    let model = dir.path().join("m.json");
    let o = outcore(&[
        "fit",
        "--data",
        data.to_str().unwrap(),
        "--target",
        "label",
        "--features",
        "x1,x2",
        "--out",
        model.to_str().unwrap(),
        "--json",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    // --json: exactly one JSON object on stdout.
    let stdout = String::from_utf8(o.stdout.clone()).expect("utf8");
    assert_eq!(stdout.lines().count(), 1);
    let summary: Value = serde_json::from_str(&stdout).expect("one JSON object");
    assert_eq!(summary["stop"], "converged");
    // Model file keys of DESIGN §6.
    let m = read_json(&model);
    assert_eq!(m["format"], "outcore-model/1");
    assert_eq!(m["loss"], "logistic");
    assert_eq!(m["target"], "label");
    assert!(m["intercept"].is_f64());
    assert!(m["coefficients"]["x1"].is_f64() && m["coefficients"]["x2"].is_f64());
    assert!(m["standardization"]["x1"]["mean"].is_f64());
    assert!(m["standardization"]["x1"]["std"].is_f64());
    assert_eq!(m["penalty"]["ridge"], 0.0);
    for key in [
        "stop",
        "objective",
        "gradient_max",
        "iterations",
        "passes",
        "seconds",
        "rows",
        "data_fingerprint",
    ] {
        assert!(!m["fit"][key].is_null(), "fit.{key} missing");
    }
    assert_eq!(m["fit"]["rows"], 3000);
    assert!(m["fit"]["passes"].as_u64().unwrap() >= 3);
    // Coefficients near the generating ones (3000 rows: within 0.3).
    assert!((m["coefficients"]["x1"].as_f64().unwrap() - 1.5).abs() < 0.3);
    assert!((m["coefficients"]["x2"].as_f64().unwrap() + 0.2).abs() < 0.1);
    // Run directory: settings and one log line per iteration.
    let run = dir.path().join("m.run");
    assert!(run.join("settings.json").is_file());
    let log = std::fs::read_to_string(run.join("log.jsonl")).expect("log");
    assert_eq!(
        log.lines().count() as u64,
        m["fit"]["iterations"].as_u64().unwrap()
    );

    // Predict keeps row order and passes columns through.
    let scores = dir.path().join("scores.parquet");
    let o = outcore(&[
        "predict",
        "--model",
        model.to_str().unwrap(),
        "--data",
        data.to_str().unwrap(),
        "--out",
        scores.to_str().unwrap(),
        "--keep",
        "id",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let ids = read_f64(&scores, "id");
    assert_eq!(ids, (0..3000).map(|i| i as f64).collect::<Vec<_>>());
    let p = read_f64(&scores, "probability");
    let margin = read_f64(&scores, "margin");
    let x1 = read_f64(&data, "x1");
    let x2 = read_f64(&data, "x2");
    let b = m["intercept"].as_f64().unwrap();
    let c1 = m["coefficients"]["x1"].as_f64().unwrap();
    let c2 = m["coefficients"]["x2"].as_f64().unwrap();
    for i in 0..3000 {
        let z = b + c1 * x1[i] + c2 * x2[i];
        assert!(
            (margin[i] - z).abs() < 1e-9,
            "row {i}: {} vs {z}",
            margin[i]
        );
        assert!((p[i] - 1.0 / (1.0 + (-z).exp())).abs() < 1e-12);
    }

    // Inspect shows the fit and both features.
    let o = outcore(&["inspect", model.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(0));
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("converged") && text.contains("x1") && text.contains("x2"),
        "{text}"
    );
}

#[test]
fn settings_file_with_flags_overriding() {
    let dir = tempfile::tempdir().expect("tempdir");
    logistic_data(dir.path(), 500);
    let config = dir.path().join("run.toml");
    std::fs::write(
        &config,
        "data = [\"train.parquet\"]\ntarget = \"label\"\nfeatures = [\"x1\", \"x2\"]\nridge = 0.5\nout = \"cfg.json\"\n",
    )
    .unwrap();
    let o = outcore(&[
        "fit",
        "--config",
        config.to_str().unwrap(),
        "--ridge",
        "0.25",
        "--quiet",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let m = read_json(&dir.path().join("cfg.json"));
    assert_eq!(m["penalty"]["ridge"], 0.25);

    // An unknown key is refused, naming the key and its line.
    std::fs::write(
        &config,
        "data = [\"train.parquet\"]\ntarget = \"label\"\nridgee = 1\nout = \"x.json\"\n",
    )
    .unwrap();
    let o = outcore(&["fit", "--config", config.to_str().unwrap()]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("ridgee") && e.contains("line 3"), "{e}");
    assert!(!dir.path().join("x.json").exists());
}

#[test]
fn a_budget_stop_is_exit_one_and_marked_in_the_model() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = logistic_data(dir.path(), 500);
    let model = dir.path().join("m.json");
    let o = outcore(&[
        "fit",
        "--data",
        data.to_str().unwrap(),
        "--target",
        "label",
        "--features",
        "x1,x2",
        "--out",
        model.to_str().unwrap(),
        "--max-passes",
        "3",
        "--tol",
        "1e-12",
    ]);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    let m = read_json(&model);
    assert_eq!(m["fit"]["stop"], "pass-budget");
    assert!(m["fit"]["passes"].as_u64().unwrap() <= 3);
}

#[test]
fn bad_input_exits_two_and_leaves_the_old_model_alone() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = logistic_data(dir.path(), 300);
    let model = dir.path().join("m.json");
    std::fs::write(&model, "precious").unwrap();
    let d = data.to_str().unwrap();
    let m = model.to_str().unwrap();
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["--target", "nope"], "nope"),
        (vec!["--target", "label", "--features", "x1,zzz"], "zzz"),
        (vec!["--target", "label", "--ridge", "-1"], "--ridge"),
        (vec!["--target", "x1"], "0 or 1"),
        (vec!["--target", "label", "--loss", "cubic"], "cubic"),
        (vec!["--target", "label", "--features", "x1,x1"], "twice"),
    ];
    for (extra, needle) in cases {
        let mut args = vec!["fit", "--data", d, "--out", m];
        args.extend(extra.iter());
        let o = outcore(&args);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {}", stderr(&o));
        let e = stderr(&o);
        assert!(e.contains(needle), "{args:?}: {e}");
        assert_eq!(e.trim().lines().count(), 1, "one sentence: {e}");
        assert_eq!(std::fs::read_to_string(&model).unwrap(), "precious");
    }
    // A file that is not Parquet.
    let junk = dir.path().join("junk.parquet");
    std::fs::write(&junk, b"this is not parquet at all").unwrap();
    let o = outcore(&[
        "fit",
        "--data",
        junk.to_str().unwrap(),
        "--target",
        "label",
        "--out",
        m,
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("junk.parquet"));
    assert_eq!(std::fs::read_to_string(&model).unwrap(), "precious");
    // --out in a directory that does not exist.
    let o = outcore(&[
        "fit",
        "--data",
        d,
        "--target",
        "label",
        "--out",
        "/nonexistent/dir/m.json",
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("does not exist"));
}

#[test]
fn nan_in_a_feature_is_named_with_its_row() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("nan.parquet");
    write_parquet(
        &path,
        vec![
            (
                "x",
                Arc::new(Float64Array::from(vec![1.0, 2.0, f64::NAN, 4.0])) as ArrayRef,
            ),
            ("y", Arc::new(Int64Array::from(vec![0, 1, 0, 1]))),
        ],
        10,
    );
    let out = dir.path().join("m.json");
    let o = outcore(&[
        "fit",
        "--data",
        path.to_str().unwrap(),
        "--target",
        "y",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("'x'") && e.contains("NaN") && e.contains("row 3"),
        "{e}"
    );
    assert!(!out.exists());
}

#[test]
fn nulls_error_by_default_and_mean_imputation_adds_an_indicator() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("nulls.parquet");
    let n = 400;
    let x: Vec<Option<f64>> = (0..n)
        .map(|i| {
            if i % 10 == 3 {
                None
            } else {
                Some((i % 17) as f64)
            }
        })
        .collect();
    let y: Vec<i64> = (0..n).map(|i| ((i * 7) % 3 == 0) as i64).collect();
    let label: Vec<&str> = (0..n).map(|i| ["a", "b", "c"][i % 3]).collect();
    write_parquet(
        &path,
        vec![
            ("x", Arc::new(Float64Array::from(x)) as ArrayRef),
            ("y", Arc::new(Int64Array::from(y))),
            ("tag", Arc::new(StringArray::from(label))),
        ],
        100,
    );
    let out = dir.path().join("m.json");
    let p = path.to_str().unwrap();
    let o = outcore(&[
        "fit",
        "--data",
        p,
        "--target",
        "y",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("40 null") && e.contains("row 4"), "{e}");
    let o = outcore(&[
        "fit",
        "--data",
        p,
        "--target",
        "y",
        "--missing",
        "mean",
        "--ridge",
        "1e-3",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let m = read_json(&out);
    assert!(
        m["coefficients"]["x.missing"].is_f64(),
        "{}",
        m["coefficients"]
    );
}

#[test]
fn softmax_with_string_classes_predicts_a_probability_per_class() {
    let dir = tempfile::tempdir().expect("tempdir");
    let path = dir.path().join("s.parquet");
    let n = 600;
    let x: Vec<f64> = (0..n).map(|i| (i % 30) as f64 / 3.0).collect();
    let label: Vec<&str> = (0..n)
        .map(|i| {
            let v = (i % 30) as f64 / 3.0 + ((i * 37) % 11) as f64 / 3.0;
            if v < 4.0 {
                "low"
            } else if v < 8.0 {
                "mid"
            } else {
                "high"
            }
        })
        .collect();
    write_parquet(
        &path,
        vec![
            ("x", Arc::new(Float64Array::from(x)) as ArrayRef),
            ("band", Arc::new(StringArray::from(label))),
        ],
        128,
    );
    let out = dir.path().join("m.json");
    let p = path.to_str().unwrap();
    let o = outcore(&[
        "fit",
        "--data",
        p,
        "--target",
        "band",
        "--loss",
        "softmax",
        "--ridge",
        "1e-3",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let m = read_json(&out);
    assert_eq!(m["classes"], serde_json::json!(["high", "low", "mid"]));
    let scores = dir.path().join("p.parquet");
    let o = outcore(&[
        "predict",
        "--model",
        out.to_str().unwrap(),
        "--data",
        p,
        "--out",
        scores.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let a = read_f64(&scores, "probability_high");
    let b = read_f64(&scores, "probability_low");
    let c = read_f64(&scores, "probability_mid");
    for i in 0..n {
        assert!((a[i] + b[i] + c[i] - 1.0).abs() < 1e-12);
    }
    // Predicting on data that lack the feature names the column.
    let other = dir.path().join("o.parquet");
    write_parquet(
        &other,
        vec![("z", Arc::new(Float64Array::from(vec![1.0])) as ArrayRef)],
        10,
    );
    let o = outcore(&[
        "predict",
        "--model",
        out.to_str().unwrap(),
        "--data",
        other.to_str().unwrap(),
        "--out",
        scores.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("'x'"), "{}", stderr(&o));
}

#[test]
fn a_damaged_model_file_is_refused() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = logistic_data(dir.path(), 100);
    let model = dir.path().join("bad.json");
    let scores = dir.path().join("s.parquet");
    for text in [
        "{",
        "{\"format\": \"outcore-model/9\"}",
        "{\"format\": \"outcore-model/1\", \"loss\": 3}",
    ] {
        std::fs::write(&model, text).unwrap();
        let o = outcore(&[
            "predict",
            "--model",
            model.to_str().unwrap(),
            "--data",
            data.to_str().unwrap(),
            "--out",
            scores.to_str().unwrap(),
        ]);
        assert_eq!(o.status.code(), Some(2), "{text}");
        assert!(stderr(&o).contains("bad.json"));
        assert!(!scores.exists());
    }
}

#[test]
fn decimal_and_integer_features_with_a_boolean_target() {
    use arrow::array::{BooleanArray, Decimal128Array, Int32Array};
    let dir = tempfile::tempdir().expect("tempdir");
    let n = 400;
    // price in cents as decimal(10, 2), items as int32; y is a boolean.
    let cents: Vec<i128> = (0..n).map(|i| 100 + ((i * 37) % 900) as i128).collect();
    let items: Vec<i32> = (0..n).map(|i| ((i * 13) % 7) as i32).collect();
    let y: Vec<bool> = (0..n)
        .map(|i| {
            (cents[i] as f64 / 100.0) * 0.8 - items[i] as f64 * 0.5 + ((i * 17) % 5) as f64 - 4.0
                > 0.0
        })
        .collect();
    let decimal = Decimal128Array::from(cents.clone())
        .with_precision_and_scale(10, 2)
        .expect("decimal");
    let path = dir.path().join("typed.parquet");
    write_parquet(
        &path,
        vec![
            ("price", Arc::new(decimal) as ArrayRef),
            ("items", Arc::new(Int32Array::from(items.clone()))),
            ("bought", Arc::new(BooleanArray::from(y.clone()))),
        ],
        128,
    );
    let out = dir.path().join("m.json");
    let o = outcore(&[
        "fit",
        "--data",
        path.to_str().unwrap(),
        "--target",
        "bought",
        "--ridge",
        "1e-3",
        "--out",
        out.to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let m = read_json(&out);
    // The decimal column is read as its value (cents / 100), not as the raw integer.
    let mean = m["standardization"]["price"]["mean"].as_f64().unwrap();
    let expected_mean = cents.iter().map(|c| *c as f64 / 100.0).sum::<f64>() / n as f64;
    assert!(
        (mean - expected_mean).abs() < 1e-12,
        "{mean} vs {expected_mean}"
    );
    assert!(m["coefficients"]["price"].as_f64().unwrap() > 0.0);
    assert!(m["coefficients"]["items"].as_f64().unwrap() < 0.0);
}
