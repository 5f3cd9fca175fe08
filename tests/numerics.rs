//! Numerics end to end through the binary: collinear and duplicated columns, columns on
//! wildly different scales, constant columns, and logistic and softmax margins of 1e4.
//!
//! Reference values: scikit-learn 1.9.1 `LogisticRegression` (lbfgs, tol 1e-12), computed
//! by `tests/reference/numerics_reference.py`, which also made the data; both are kept in
//! `tests/data/numerics/cases.json`.

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array, Int64Array, StringArray};
use arrow::datatypes::{Field, Schema};
use arrow::record_batch::RecordBatch;
use serde_json::Value;

use common::{fit_in, read_json, test_data, write_parquet, FitOutcome};

fn cases() -> Value {
    read_json(&test_data("numerics/cases.json"))
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

fn ints(v: &Value) -> Vec<i64> {
    v.as_array()
        .expect("an array")
        .iter()
        .map(|x| x.as_i64().expect("an integer"))
        .collect()
}

/// Writes the named columns to `dir/name.parquet`.
fn write(dir: &Path, name: &str, columns: Vec<(&str, ArrayRef)>) -> PathBuf {
    let path = dir.join(format!("{name}.parquet"));
    let fields: Vec<Field> = columns
        .iter()
        .map(|(n, a)| Field::new(*n, a.data_type().clone(), false))
        .collect();
    let schema = Arc::new(Schema::new(fields));
    let batch = RecordBatch::try_new(
        schema.clone(),
        columns.into_iter().map(|(_, a)| a).collect(),
    )
    .expect("batch");
    write_parquet(&path, schema, &[batch], 128);
    path
}

fn f64s(v: Vec<f64>) -> ArrayRef {
    Arc::new(Float64Array::from(v))
}

fn coef(m: &Value, name: &str) -> f64 {
    m["coefficients"][name]
        .as_f64()
        .unwrap_or_else(|| panic!("no coefficient {name}: {m}"))
}

fn intercept(m: &Value) -> f64 {
    m["intercept"].as_f64().expect("intercept")
}

fn close(got: f64, want: f64, rel: f64, abs: f64, what: &str) {
    assert!(
        (got - want).abs() <= rel * want.abs() + abs,
        "{what}: got {got:e}, want {want:e}"
    );
}

fn warnings(m: &Value) -> Vec<String> {
    m["fit"]["warnings"]
        .as_array()
        .map(|a| {
            a.iter()
                .map(|w| w.as_str().unwrap_or("").to_string())
                .collect()
        })
        .unwrap_or_default()
}

fn collinear_data(dir: &Path) -> PathBuf {
    let c = &cases()["collinear"];
    write(
        dir,
        "collinear",
        vec![
            ("a", f64s(floats(&c["columns"]["a"]))),
            ("b", f64s(floats(&c["columns"]["b"]))),
            ("c", f64s(floats(&c["columns"]["c"]))),
            ("d", f64s(floats(&c["columns"]["d"]))),
            ("y", Arc::new(Int64Array::from(ints(&c["y"])))),
        ],
    )
}

/// c = a + b and d = a: unpenalized, the direction is not identified; the fit warns on
/// stderr and in the model file, naming the columns, and still reaches the optimum of the
/// objective (which is that of the model on a and b alone: scikit-learn reference).
#[test]
fn collinear_columns_unpenalized_warn_and_name_the_columns() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = collinear_data(dir.path());
    let c = &cases()["collinear"];
    let fit = fit_in(
        dir.path(),
        "m",
        &["--data", data.to_str().unwrap(), "--target", "y"],
    );
    // fit_in passes --quiet, which keeps warnings: they are not progress.
    assert!(fit.code == 0 || fit.code == 1, "{}", fit.summary());
    let w = warnings(fit.model());
    let found: Vec<&String> = w.iter().filter(|w| w.contains("not identified")).collect();
    assert_eq!(found.len(), 1, "warnings: {w:?}");
    let msg = found[0];
    eprintln!("the warning: {msg}");
    // Both dependences are named: c on a and b, d on a.
    assert!(
        msg.contains("'c' is (almost) a linear combination of")
            && msg.contains("'d' is (almost) a linear combination of 'a'"),
        "{msg}"
    );
    assert!(msg.contains("'a'") && msg.contains("'b'"), "{msg}");
    assert!(msg.contains("--ridge"), "{msg}");
    assert!(
        fit.stderr.contains("warning: ") && fit.stderr.contains("not identified"),
        "stderr: {}",
        fit.stderr
    );
    close(
        fit.objective(),
        c["unpenalized_mean_loss"].as_f64().unwrap(),
        1e-8,
        0.0,
        "mean log-loss at the optimum",
    );
}

/// With ridge the same data are fine: no warning, and the coefficients are scikit-learn's
/// (C = 1 / (n · ridge), raw scale).
#[test]
fn collinear_columns_with_ridge_fit_the_reference_without_warning() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = collinear_data(dir.path());
    let c = &cases()["collinear"];
    let ridge = c["ridge"].as_f64().unwrap().to_string();
    let fit = fit_in(
        dir.path(),
        "m",
        &[
            "--data",
            data.to_str().unwrap(),
            "--target",
            "y",
            "--ridge",
            &ridge,
            "--no-standardize",
            "--tol",
            "1e-10",
        ],
    );
    assert_eq!(fit.code, 0, "{}", fit.summary());
    assert!(!fit.stderr.contains("warning"), "{}", fit.stderr);
    assert!(
        warnings(fit.model()).is_empty(),
        "{:?}",
        warnings(fit.model())
    );
    let m = fit.model();
    close(
        intercept(m),
        c["ridge_intercept"].as_f64().unwrap(),
        1e-6,
        1e-8,
        "intercept",
    );
    for name in ["a", "b", "c", "d"] {
        close(
            coef(m, name),
            c["ridge_coefficients"][name].as_f64().unwrap(),
            1e-6,
            1e-8,
            name,
        );
    }
}

/// Columns scaled by 1e-6, 1 and 1e8 fit to the optimum of the well-scaled columns, mapped
/// to the original scale; the well-scaled fit by the tool itself and scikit-learn agree.
#[test]
fn wildly_different_scales_fit_as_well_as_rescaled_by_hand() {
    let dir = tempfile::tempdir().expect("tempdir");
    let c = &cases()["scales"];
    let scales = floats(&c["scales"]);
    let u: Vec<Vec<f64>> = (1..=3).map(|j| floats(&c["u"][format!("u{j}")])).collect();
    let y = || -> ArrayRef { Arc::new(Int64Array::from(ints(&c["y"]))) };
    let scaled = write(
        dir.path(),
        "scaled",
        vec![
            ("s1", f64s(u[0].iter().map(|v| v * scales[0]).collect())),
            ("s2", f64s(u[1].iter().map(|v| v * scales[1]).collect())),
            ("s3", f64s(u[2].iter().map(|v| v * scales[2]).collect())),
            ("y", y()),
        ],
    );
    let plain = write(
        dir.path(),
        "plain",
        vec![
            ("s1", f64s(u[0].clone())),
            ("s2", f64s(u[1].clone())),
            ("s3", f64s(u[2].clone())),
            ("y", y()),
        ],
    );
    let run = |name: &str, data: &Path| -> FitOutcome {
        let f = fit_in(
            dir.path(),
            name,
            &[
                "--data",
                data.to_str().unwrap(),
                "--target",
                "y",
                "--tol",
                "1e-10",
            ],
        );
        assert_eq!(f.code, 0, "{name}: {}", f.summary());
        f
    };
    let a = run("scaled", &scaled);
    let b = run("plain", &plain);
    close(
        a.objective(),
        b.objective(),
        1e-10,
        0.0,
        "objective, scaled vs rescaled",
    );
    close(
        a.objective(),
        c["mean_loss"].as_f64().unwrap(),
        1e-8,
        0.0,
        "objective vs scikit-learn",
    );
    close(
        intercept(a.model()),
        c["intercept"].as_f64().unwrap(),
        1e-5,
        1e-8,
        "intercept",
    );
    for (j, s) in scales.iter().enumerate() {
        let name = format!("s{}", j + 1);
        let got = coef(a.model(), &name);
        close(got, coef(b.model(), &name) / s, 1e-6, 0.0, &name);
        close(
            got,
            c["coefficients"][&name].as_f64().unwrap(),
            1e-5,
            0.0,
            &name,
        );
    }
}

/// A constant column is left out with a warning (stderr and model file) and the fit
/// goes on with the others.
#[test]
fn constant_columns_are_dropped_with_a_warning() {
    let dir = tempfile::tempdir().expect("tempdir");
    let c = &cases()["scales"];
    let n = ints(&c["y"]).len();
    let data = write(
        dir.path(),
        "constant",
        vec![
            ("u1", f64s(floats(&c["u"]["u1"]))),
            ("flat", f64s(vec![3.25; n])),
            ("y", Arc::new(Int64Array::from(ints(&c["y"])))),
        ],
    );
    let fit = fit_in(
        dir.path(),
        "m",
        &["--data", data.to_str().unwrap(), "--target", "y"],
    );
    assert_eq!(fit.code, 0, "{}", fit.summary());
    let w = warnings(fit.model());
    assert!(
        w.iter()
            .any(|w| w.contains("'flat'") && w.contains("constant")),
        "{w:?}"
    );
    assert!(fit.stderr.contains("'flat'"), "{}", fit.stderr);
    assert!(fit.model()["coefficients"].get("flat").is_none());
    assert!(fit.model()["coefficients"].get("u1").is_some());
}

/// Logistic with rows at |x| = 1e4..2e4 on the side the rest predicts: at the optimum
/// their margins are about 3.8e4 (scikit-learn), during the line search larger. The
/// objective and gradient stay finite and the coefficients are the reference's, with
/// and without standardization.
#[test]
fn logistic_margins_of_ten_thousand_are_stable() {
    let dir = tempfile::tempdir().expect("tempdir");
    let c = &cases()["margins_logistic"];
    assert!(c["max_abs_margin"].as_f64().unwrap() > 1e4);
    let data = write(
        dir.path(),
        "far",
        vec![
            ("x", f64s(floats(&c["x"]))),
            ("y", Arc::new(Int64Array::from(ints(&c["y"])))),
        ],
    );
    for extra in [None, Some("--no-standardize")] {
        let mut args = vec!["--data", data.to_str().unwrap(), "--target", "y"];
        args.extend(extra);
        let fit = fit_in(dir.path(), "m", &args);
        assert_eq!(fit.code, 0, "{extra:?}: {}", fit.summary());
        assert!(fit.objective().is_finite() && fit.gradient_max().is_finite());
        let m = fit.model();
        close(
            coef(m, "x"),
            c["coefficient"].as_f64().unwrap(),
            1e-4,
            0.0,
            "x",
        );
        close(
            intercept(m),
            c["intercept"].as_f64().unwrap(),
            1e-4,
            1e-6,
            "intercept",
        );
    }
}

/// Softmax with far rows (|x| up to 2e4) in each class's direction: margins about 3e4
/// at the optimum; finite objective, and the coefficients relative to the first class are
/// scikit-learn's multinomial fit.
#[test]
fn softmax_margins_of_ten_thousand_are_stable() {
    let dir = tempfile::tempdir().expect("tempdir");
    let c = &cases()["margins_softmax"];
    assert!(c["max_abs_margin"].as_f64().unwrap() > 1e4);
    let classes: Vec<String> = c["cls"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let data = write(
        dir.path(),
        "far3",
        vec![
            ("x1", f64s(floats(&c["x1"]))),
            ("x2", f64s(floats(&c["x2"]))),
            ("cls", Arc::new(StringArray::from(classes))),
        ],
    );
    let fit = fit_in(
        dir.path(),
        "m",
        &[
            "--data",
            data.to_str().unwrap(),
            "--target",
            "cls",
            "--loss",
            "softmax",
            "--tol",
            "1e-9",
        ],
    );
    assert_eq!(fit.code, 0, "{}", fit.summary());
    assert!(fit.objective().is_finite() && fit.gradient_max().is_finite());
    let m = fit.model();
    let at = |class: &str, feature: &str| -> f64 {
        m["coefficients"][class][feature]
            .as_f64()
            .unwrap_or_else(|| panic!("no coefficient {class}/{feature}: {m}"))
    };
    for (k, class) in ["k0", "k1", "k2"].iter().enumerate() {
        let b = m["intercept"][class].as_f64().unwrap() - m["intercept"]["k0"].as_f64().unwrap();
        close(
            b,
            c["intercept_vs_first"][k].as_f64().unwrap(),
            1e-3,
            1e-4,
            &format!("intercept {class}"),
        );
        for (j, feature) in ["x1", "x2"].iter().enumerate() {
            close(
                at(class, feature) - at("k0", feature),
                c["coefficients_vs_first"][k][j].as_f64().unwrap(),
                1e-3,
                1e-5,
                &format!("{class}/{feature}"),
            );
        }
    }
}
