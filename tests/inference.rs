//! `fit --inference`: standard errors, z/t statistics, p-values and 95% intervals, run
//! through the binary and checked against outside references.
//!
//! Sources, one per test:
//! - NIST StRD Longley (certified standard deviations of the estimates), via
//!   `tests/data/reference/longley_linear_nist/expected.json`.
//! - statsmodels 0.15.0 `Logit` standard errors of breast_cancer3
//!   (`tests/data/reference/breast_cancer3_logit_unpenalized/expected.json`) and the
//!   frequency-weighted / duplicated-rows pair (`breast_cancer3_logit_freq_weights`,
//!   `breast_cancer3_logit_rows_duplicated`).
//! - statsmodels 0.15.0 `GLM(Poisson)` on the RAND HIE data without penalty:
//!   `tests/data/inference/randhie_poisson_unpenalized.json`, computed by
//!   `tests/reference/inference_randhie_poisson.py`.
//! - statsmodels 0.15.0 `MNLogit` on invented data, and a numpy Newton solution of the
//!   ridge-penalized logistic case: `tests/data/inference/softmax3_synthetic.json`,
//!   `tests/data/inference/breast_cancer3_logit_ridge_conditional.json`, computed by
//!   `tests/reference/inference_softmax_ridge.py`.
//!
//! Every comparison prints a `MEASURE` line with the largest relative error.

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array};
use arrow::datatypes::{DataType, Field, Schema};
use arrow::record_batch::RecordBatch;
use serde_json::Value;

use common::*;

const MAX_PASSES: &str = "5000";

fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().expect("temporary directory")
}

/// `fit --inference` of a reference case: data, target, features, loss, weight from the
/// fixture's JSON, a tight tolerance, plus `extra` flags.
fn fit_case(
    dir: &Path,
    name: &str,
    data: &Path,
    spec: &Value,
    loss: &str,
    extra: &[&str],
) -> FitOutcome {
    let mut args: Vec<String> = vec![
        "--data".into(),
        data.display().to_string(),
        "--target".into(),
        spec["label_column"]
            .as_str()
            .expect("label_column")
            .to_string(),
        "--features".into(),
        expected_features(spec).join(","),
        "--loss".into(),
        loss.into(),
        "--max-passes".into(),
        MAX_PASSES.into(),
        "--inference".into(),
    ];
    if let Some(w) = spec["weight_column"].as_str() {
        args.extend(["--weight".into(), w.to_string()]);
    }
    if !extra.contains(&"--tol") {
        args.extend(["--tol".into(), "1e-12".into()]);
    }
    args.extend(extra.iter().map(|s| s.to_string()));
    let out = fit_in(dir, name, &args);
    eprintln!("{name}: {}", out.summary());
    out
}

/// The fit reached its optimum (converged, or flat at the float64 floor) and wrote a
/// table.
fn inference_of<'a>(out: &'a FitOutcome, label: &str) -> &'a Value {
    assert!(
        matches!(out.stop(), "converged" | "flat"),
        "{label}: stop {} (exit {}); stderr:\n{}",
        out.stop(),
        out.code,
        out.stderr
    );
    out.model()
        .get("inference")
        .unwrap_or_else(|| panic!("{label}: no inference table; stderr:\n{}", out.stderr))
}

fn rel(got: f64, want: f64) -> f64 {
    if want == 0.0 {
        got.abs()
    } else {
        ((got - want) / want).abs()
    }
}

/// Compares `key` of every entry of `got` (`{intercept, coefficients}`) with `want`
/// (`{intercept: number|{key}, coefficients: {name: number|{key}}}`); returns the largest
/// relative error and prints a MEASURE line.
fn max_rel_error(
    label: &str,
    key: &str,
    got: &Value,
    want_intercept: &Value,
    want_coefs: &Value,
) -> f64 {
    let pick = |v: &Value| -> f64 {
        match v {
            Value::Object(_) => v[key].as_f64().expect("expected number"),
            other => other.as_f64().expect("expected number"),
        }
    };
    let mut worst = (
        "intercept".to_string(),
        rel(json_f64(got, &["intercept", key]), pick(want_intercept)),
    );
    for (name, w) in want_coefs.as_object().expect("coefficients") {
        let g = got["coefficients"][name][key]
            .as_f64()
            .unwrap_or_else(|| panic!("{label}: no {key} for '{name}' in {got}"));
        let r = rel(g, pick(w));
        if r > worst.1 || r.is_nan() {
            worst = (name.clone(), r);
        }
    }
    eprintln!(
        "MEASURE {label}: max relative {key} error {:.3e} (at {})",
        worst.1, worst.0
    );
    worst.1
}

/// Source: NIST StRD Longley certified standard deviations of the estimates.
#[test]
fn longley_nist_certified_standard_errors() {
    let case = "longley_linear_nist";
    let e = load_expected(case);
    let dir = tempdir();
    let out = fit_case(
        dir.path(),
        "longley",
        &reference_file(case, "data.parquet"),
        &e,
        "squared",
        &["--tol", "1e-11"],
    );
    let inf = inference_of(&out, case);
    assert_eq!(inf["statistic"], "t");
    assert_eq!(json_f64(inf, &["df"]), 9.0, "df = n − p − 1 = 16 − 7");
    assert!(
        inf.get("note").is_none(),
        "no caveat for an unpenalized converged fit: {inf}"
    );
    let se = &e["expected"]["standard_errors"];
    let worst = max_rel_error(
        "longley NIST se",
        "se",
        inf,
        &se["intercept"],
        &se["coefficients"],
    );
    assert!(
        worst <= 1e-6,
        "Longley: certified standard errors to 6 significant digits (got {worst:.2e})"
    );
    // The statistic is estimate / se and the interval uses the t quantile with 9 df.
    let t975 = 2.262157162740991;
    for (name, v) in inf["coefficients"].as_object().unwrap() {
        let est = json_f64(v, &["estimate"]);
        let s = json_f64(v, &["se"]);
        assert!(rel(json_f64(v, &["stat"]), est / s) < 1e-12, "{name}");
        assert!(rel(json_f64(v, &["high"]) - est, t975 * s) < 1e-9, "{name}");
    }
    // The extra pass is counted.
    let plain = fit_in(
        dir.path(),
        "longley_plain",
        &[
            "--data",
            reference_file(case, "data.parquet").to_str().unwrap(),
            "--target",
            "y",
            "--loss",
            "squared",
            "--tol",
            "1e-11",
            "--max-passes",
            MAX_PASSES,
        ],
    );
    assert!(
        plain.model().get("inference").is_none(),
        "no table without --inference"
    );
    // An unpenalized fit without --inference makes one pass after the fit for its
    // identifiability check (DEVELOPERS.md, Numerics); with --inference the standard-error
    // pass takes its place. Both count in fit.passes.
    assert_eq!(
        out.passes(),
        plain.passes(),
        "the inference pass counts in fit.passes"
    );
}

/// Source: statsmodels 0.15.0 Logit bse (breast_cancer3_logit_unpenalized/expected.json).
#[test]
fn breast_cancer3_logit_unpenalized_statsmodels_standard_errors() {
    let case = "breast_cancer3_logit_unpenalized";
    let e = load_expected(case);
    let dir = tempdir();
    let out = fit_case(
        dir.path(),
        "bc3",
        &reference_file(case, "data.parquet"),
        &e,
        "logistic",
        &[],
    );
    let inf = inference_of(&out, case);
    assert_eq!(inf["statistic"], "z");
    let se = &e["expected"]["standard_errors"];
    let worst = max_rel_error(
        "breast_cancer3 statsmodels se",
        "se",
        inf,
        &se["intercept"],
        &se["coefficients"],
    );
    assert!(worst <= 1e-5, "relative SE error {worst:.2e} > 1e-5");
}

/// Source: statsmodels 0.15.0 GLM Poisson on RAND HIE, unpenalized
/// (tests/reference/inference_randhie_poisson.py).
#[test]
fn randhie_poisson_unpenalized_statsmodels_table() {
    let spec = read_json(&test_data("inference/randhie_poisson_unpenalized.json"));
    let data = reference_file("randhie_poisson_l2", "data.parquet");
    let dir = tempdir();
    let out = fit_case(dir.path(), "randhie", &data, &spec, "poisson", &[]);
    let inf = inference_of(&out, "randhie");
    let want = &spec["expected"];
    let se = max_rel_error(
        "randhie statsmodels GLM Poisson se",
        "se",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    assert!(se <= 1e-5, "relative SE error {se:.2e} > 1e-5");
    let est = max_rel_error(
        "randhie statsmodels estimate",
        "estimate",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    assert!(est <= 1e-5, "relative estimate error {est:.2e}");
    let stat = max_rel_error(
        "randhie statsmodels z",
        "stat",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    assert!(stat <= 1e-5, "relative z error {stat:.2e}");
    let low = max_rel_error(
        "randhie statsmodels 95% low",
        "low",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    let high = max_rel_error(
        "randhie statsmodels 95% high",
        "high",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    assert!(
        low <= 1e-5 && high <= 1e-5,
        "interval ends {low:.2e} {high:.2e}"
    );
    // p-values: relative to statsmodels where they are representable (z errors of 1e-6
    // move tiny tail probabilities by about |z|² · 1e-6 relative).
    for (name, w) in want["coefficients"].as_object().unwrap() {
        let g = json_f64(&inf["coefficients"][name], &["p"]);
        let p = json_f64(w, &["p"]);
        assert!(g == p || rel(g, p) < 1e-2, "p of {name}: {g:e} vs {p:e}");
    }
}

/// Source: the statsmodels frequency-weighted Fisher information of
/// breast_cancer3_logit_freq_weights / _rows_duplicated (expected.json of both).
#[test]
fn freq_weights_equal_duplicated_rows_standard_errors() {
    let dir = tempdir();
    let mut tables = Vec::new();
    for case in [
        "breast_cancer3_logit_freq_weights",
        "breast_cancer3_logit_rows_duplicated",
    ] {
        let e = load_expected(case);
        let out = fit_case(
            dir.path(),
            case,
            &reference_file(case, "data.parquet"),
            &e,
            "logistic",
            &[],
        );
        let inf = inference_of(&out, case).clone();
        let se = &e["expected"]["standard_errors"];
        let worst = max_rel_error(
            &format!("{case} statsmodels se"),
            "se",
            &inf,
            &se["intercept"],
            &se["coefficients"],
        );
        assert!(worst <= 1e-5, "{case}: relative SE error {worst:.2e}");
        tables.push(inf);
    }
    let (a, b) = (&tables[0], &tables[1]);
    let mut worst: f64 = rel(
        json_f64(a, &["intercept", "se"]),
        json_f64(b, &["intercept", "se"]),
    );
    for (name, v) in a["coefficients"].as_object().unwrap() {
        worst = worst.max(rel(
            json_f64(v, &["se"]),
            json_f64(&b["coefficients"][name], &["se"]),
        ));
    }
    eprintln!("MEASURE weights vs duplicated rows: max relative se difference {worst:.3e}");
    assert!(
        worst <= 1e-7,
        "weighted and duplicated standard errors differ by {worst:.2e}"
    );
}

/// Source: numpy Newton on the ridge-penalized mean-form objective
/// (tests/reference/inference_softmax_ridge.py).
#[test]
fn ridge_table_is_conditional_and_labelled() {
    let spec = read_json(&test_data(
        "inference/breast_cancer3_logit_ridge_conditional.json",
    ));
    let data = reference_file("breast_cancer3_logit_unpenalized", "data.parquet");
    let dir = tempdir();
    let ridge = json_f64(&spec, &["ridge_mean_form"]).to_string();
    let out = fit_case(
        dir.path(),
        "ridge",
        &data,
        &spec,
        "logistic",
        &["--ridge", &ridge],
    );
    let inf = inference_of(&out, "ridge");
    let note = inf["note"].as_str().unwrap_or("");
    assert!(
        note.contains("conditional on the penalty; approximate"),
        "note: {note}"
    );
    let want = &spec["expected"];
    let worst = max_rel_error(
        "breast_cancer3 ridge conditional se (numpy)",
        "se",
        inf,
        &want["intercept"],
        &want["coefficients"],
    );
    assert!(worst <= 1e-6, "relative SE error {worst:.2e}");
    let inspect = run_outcore(&["inspect".to_string(), out.model_path.display().to_string()]);
    let text = String::from_utf8_lossy(&inspect.stdout);
    assert!(
        text.contains("coefficient table") && text.contains("conditional on the penalty"),
        "{text}"
    );
    assert!(
        text.contains("std. error") && text.contains("mean_radius"),
        "{text}"
    );
}

/// Source: statsmodels 0.15.0 MNLogit on invented data
/// (tests/reference/inference_softmax_ridge.py).
#[test]
fn softmax_reference_class_statsmodels_standard_errors() {
    let spec = read_json(&test_data("inference/softmax3_synthetic.json"));
    let data = test_data("inference/softmax3_synthetic.parquet");
    let dir = tempdir();
    let out = fit_case(dir.path(), "softmax", &data, &spec, "softmax", &[]);
    let inf = inference_of(&out, "softmax");
    assert_eq!(inf["reference_class"], "0");
    let mut worst: f64 = 0.0;
    for (class, want) in spec["expected"].as_object().unwrap() {
        let got = serde_json::json!({
            "intercept": inf["intercept"][class],
            "coefficients": inf["coefficients"][class],
        });
        worst = worst.max(max_rel_error(
            &format!("softmax class {class} statsmodels MNLogit se"),
            "se",
            &got,
            &want["intercept"],
            &want["coefficients"],
        ));
    }
    assert!(worst <= 1e-5, "relative SE error {worst:.2e}");
}

/// Source: invented data (a column and its exact copy); the expected outcome is a clear
/// message naming both columns, with the model still written.
#[test]
fn duplicated_column_is_named_and_the_model_is_still_written() {
    let dir = tempdir();
    let data = reference_file("breast_cancer3_logit_unpenalized", "data.parquet");
    let batch = read_parquet_batch(&data);
    let radius = column_f64(&batch, "mean_radius");
    let texture = column_f64(&batch, "mean_texture");
    let y = column_f64(&batch, "y");
    let schema = Arc::new(Schema::new(vec![
        Field::new("mean_radius", DataType::Float64, false),
        Field::new("radius_copy", DataType::Float64, false),
        Field::new("mean_texture", DataType::Float64, false),
        Field::new("y", DataType::Float64, false),
    ]));
    let cols: Vec<ArrayRef> = vec![
        Arc::new(Float64Array::from(radius.clone())),
        Arc::new(Float64Array::from(radius)),
        Arc::new(Float64Array::from(texture)),
        Arc::new(Float64Array::from(y)),
    ];
    let batch = RecordBatch::try_new(schema.clone(), cols).unwrap();
    let path: PathBuf = dir.path().join("dup.parquet");
    write_parquet(&path, schema, &[batch], 10_000);
    let out = fit_in(
        dir.path(),
        "dup",
        &[
            "--data",
            path.to_str().unwrap(),
            "--target",
            "y",
            "--loss",
            "logistic",
            "--tol",
            "1e-10",
            "--max-passes",
            MAX_PASSES,
            "--inference",
        ],
    );
    eprintln!("dup: {}\n{}", out.summary(), out.stderr);
    assert!(
        matches!(out.code, 0 | 1),
        "the fit itself stands (exit {})",
        out.code
    );
    let m = out.model();
    assert!(
        m.get("inference").is_none(),
        "no table for a singular matrix"
    );
    let warnings = m["fit"]["warnings"].to_string();
    for needle in ["singular", "'radius_copy'", "'mean_radius'"] {
        assert!(
            out.stderr.contains(needle),
            "stderr lacks {needle}: {}",
            out.stderr
        );
        assert!(
            warnings.contains(needle),
            "fit.warnings lacks {needle}: {warnings}"
        );
    }
    assert!(!out.stderr.contains("'mean_texture' is"), "{}", out.stderr);
    assert!(!out.model_text.as_deref().unwrap_or("").contains("NaN"));
}

/// More features than `--inference-max-features`: a warning naming the limit and the
/// flag; the model is written without a table.
#[test]
fn too_many_features_names_the_limit_and_the_flag() {
    let dir = tempdir();
    let data = reference_file("breast_cancer3_logit_unpenalized", "data.parquet");
    let out = fit_in(
        dir.path(),
        "wide",
        &[
            "--data",
            data.to_str().unwrap(),
            "--target",
            "y",
            "--tol",
            "1e-8",
            "--inference",
            "--inference-max-features",
            "2",
        ],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(out.model().get("inference").is_none());
    assert!(
        out.stderr.contains("at most 2") && out.stderr.contains("--inference-max-features"),
        "{}",
        out.stderr
    );
}

/// Lasso: the table covers the nonzero coefficients only and says so.
/// Source of the data: diabetes_linear_l1 (scikit-learn's diabetes data).
#[test]
fn lasso_table_covers_the_nonzero_coefficients() {
    let case = "diabetes_linear_l1";
    let e = load_expected(case);
    let (_, lasso) = mean_form_penalties(&e);
    let dir = tempdir();
    let lasso = lasso.to_string();
    let out = fit_case(
        dir.path(),
        "lasso",
        &reference_file(case, "data.parquet"),
        &e,
        "squared",
        &["--lasso", &lasso, "--no-standardize", "--tol", "1e-8"],
    );
    let inf = inference_of(&out, case);
    let m = out.model();
    let nonzero: Vec<&String> = m["coefficients"]
        .as_object()
        .unwrap()
        .iter()
        .filter(|(_, v)| v.as_f64() != Some(0.0))
        .map(|(k, _)| k)
        .collect();
    let listed: Vec<&String> = inf["coefficients"].as_object().unwrap().keys().collect();
    assert!(
        !nonzero.is_empty() && nonzero.len() < 10,
        "some coefficients are zero: {nonzero:?}"
    );
    assert_eq!(listed, nonzero);
    let note = inf["note"].as_str().unwrap_or("");
    assert!(
        note.contains("conditional on the penalty") && note.contains("nonzero"),
        "{note}"
    );
    let w = json_f64(m, &["fit", "weight_sum"]);
    assert_eq!(json_f64(inf, &["df"]), w - (nonzero.len() as f64 + 1.0));
}

/// The table depends on the shard count only: one thread and four give the same bytes.
#[test]
fn table_is_independent_of_the_thread_count() {
    let case = "randhie_poisson_l2";
    let e = load_expected(case);
    let dir = tempdir();
    let data = reference_file(case, "data.parquet");
    let flags = |t: &'static str| {
        vec![
            "--shards",
            "4",
            "--threads",
            t,
            "--block-rows",
            "1000",
            "--tol",
            "1e-8",
        ]
    };
    let a = fit_case(dir.path(), "t1", &data, &e, "poisson", &flags("1"));
    let b = fit_case(dir.path(), "t4", &data, &e, "poisson", &flags("4"));
    assert_eq!(inference_of(&a, "t1"), inference_of(&b, "t4"));
}

/// A penalized softmax model gets no table (its intercepts are defined only up to a
/// shift) and the warning says what to do. Data: iris_multinomial_l2 (Fisher's iris).
#[test]
fn penalized_softmax_is_refused_with_a_clear_warning() {
    let case = "iris_multinomial_l2";
    let e = load_expected(case);
    let (ridge, _) = mean_form_penalties(&e);
    let ridge = ridge.to_string();
    let dir = tempdir();
    let out = fit_case(
        dir.path(),
        "iris",
        &reference_file(case, "data.parquet"),
        &e,
        "softmax",
        &["--ridge", &ridge, "--tol", "1e-8"],
    );
    assert_eq!(out.code, 0, "{}", out.stderr);
    assert!(out.model().get("inference").is_none());
    assert!(
        out.stderr.contains("penalized softmax") && out.stderr.contains("without a penalty"),
        "{}",
        out.stderr
    );
}

/// `inference = true` in a settings file turns the table on like the flag.
#[test]
fn settings_file_key_turns_inference_on() {
    let dir = tempdir();
    let data = reference_file("breast_cancer3_logit_unpenalized", "data.parquet");
    let config = dir.path().join("run.toml");
    std::fs::write(
        &config,
        format!(
            "data = [{:?}]\ntarget = \"y\"\ntol = 1e-10\ninference = true\ninference_max_features = 10\n",
            data.display().to_string()
        ),
    )
    .unwrap();
    let out = fit_in(dir.path(), "cfg", &["--config", config.to_str().unwrap()]);
    assert_eq!(out.code, 0, "{}", out.stderr);
    let inf = out.model().get("inference").expect("a table");
    assert_eq!(inf["coefficients"].as_object().unwrap().len(), 3);
}

/// `outcore inference` on a model fitted without `--inference` gives the same table as
/// `fit --inference`, and refuses data other than the training data.
#[test]
fn inference_command_adds_the_same_table_to_an_existing_model() {
    let case = "breast_cancer3_logit_unpenalized";
    let e = load_expected(case);
    let dir = tempdir();
    let data = reference_file(case, "data.parquet");
    let with = fit_case(dir.path(), "with", &data, &e, "logistic", &[]);
    let args: Vec<String> = vec![
        "--data".into(),
        data.display().to_string(),
        "--target".into(),
        e["label_column"]
            .as_str()
            .expect("label_column")
            .to_string(),
        "--features".into(),
        expected_features(&e).join(","),
        "--max-passes".into(),
        MAX_PASSES.into(),
        "--tol".into(),
        "1e-12".into(),
    ];
    let without = fit_in(dir.path(), "without", &args);
    assert!(without.model()["inference"].is_null());
    let added = dir.path().join("added.json");
    let o = run_outcore(&[
        "inference",
        without.model_path.to_str().unwrap(),
        "--data",
        data.to_str().unwrap(),
        "--out",
        added.to_str().unwrap(),
    ]);
    assert_eq!(exit_code(&o), 0, "{}", String::from_utf8_lossy(&o.stderr));
    let added: Value = read_json(&added);
    assert_eq!(added["inference"], with.model()["inference"]);
    assert_eq!(added["fit"]["passes"].as_u64(), Some(without.passes() + 1));

    // Other data than the training data: refused, nothing written.
    let other = reference_file("breast_cancer3_logit_rows_duplicated", "data.parquet");
    let refused = dir.path().join("refused.json");
    let o = run_outcore(&[
        "inference",
        without.model_path.to_str().unwrap(),
        "--data",
        other.to_str().unwrap(),
        "--out",
        refused.to_str().unwrap(),
    ]);
    assert_eq!(exit_code(&o), 2);
    assert!(String::from_utf8_lossy(&o.stderr).contains("not the data the model was fitted on"));
    assert!(!refused.exists());
}
