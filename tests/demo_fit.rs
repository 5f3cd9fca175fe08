//! The demo data through the binary: a fit on enough rows recovers the true coefficients
//! saved beside the data, within sampling error.
//!
#![allow(clippy::needless_range_loop)]
//! Bound used: every coefficient within 5 standard errors of its true value, the standard
//! errors taken from the inverse of the Fisher information at the fitted coefficients
//! (computed here from the data and the predicted probabilities). For 7 coefficients
//! and correct standard errors, a miss at 5 SE has probability below 1e-5.

use std::fs::File;
use std::path::Path;
use std::process::Command;

use arrow::array::{Array, Float64Array};
use arrow::datatypes::DataType;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use serde_json::Value;

fn column(path: &Path, name: &str) -> Vec<f64> {
    let reader = ParquetRecordBatchReaderBuilder::try_new(File::open(path).unwrap())
        .unwrap()
        .build()
        .unwrap();
    let mut out = Vec::new();
    for batch in reader {
        let batch = batch.unwrap();
        let col =
            arrow::compute::cast(batch.column_by_name(name).unwrap(), &DataType::Float64).unwrap();
        let col = col.as_any().downcast_ref::<Float64Array>().unwrap();
        assert_eq!(col.null_count(), 0);
        out.extend(col.values().iter().copied());
    }
    out
}

/// Inverse of a small symmetric positive definite matrix by Gauss–Jordan elimination.
fn invert(mut a: Vec<Vec<f64>>) -> Vec<Vec<f64>> {
    let n = a.len();
    let mut inv: Vec<Vec<f64>> = (0..n)
        .map(|i| (0..n).map(|j| f64::from(i == j)).collect())
        .collect();
    for c in 0..n {
        let p = (c..n)
            .max_by(|i, j| a[*i][c].abs().total_cmp(&a[*j][c].abs()))
            .unwrap();
        a.swap(c, p);
        inv.swap(c, p);
        let d = a[c][c];
        for j in 0..n {
            a[c][j] /= d;
            inv[c][j] /= d;
        }
        for r in 0..n {
            if r != c {
                let f = a[r][c];
                for j in 0..n {
                    a[r][j] -= f * a[c][j];
                    inv[r][j] -= f * inv[c][j];
                }
            }
        }
    }
    inv
}

#[test]
fn demo_fit_recovers_the_true_coefficients() {
    let dir = tempfile::tempdir().unwrap();
    let bin = env!("CARGO_BIN_EXE_outcore");
    let data = dir.path().join("data");
    let o = Command::new(bin)
        .args([
            "demo",
            "--out",
            data.to_str().unwrap(),
            "--rows",
            "150000",
            "--seed",
            "11",
        ])
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let truth: Value =
        serde_json::from_slice(&std::fs::read(data.join("truth.json")).unwrap()).unwrap();
    let late = &truth["targets"]["late"];
    let features: Vec<String> = late["features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap().to_string())
        .collect();
    let model = dir.path().join("late.json");
    let o = Command::new(bin)
        .args([
            "fit",
            "--data",
            data.to_str().unwrap(),
            "--target",
            "late",
            "--features",
            &features.join(","),
            "--out",
            model.to_str().unwrap(),
            "--tol",
            "1e-9",
            "--quiet",
        ])
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let m: Value = serde_json::from_slice(&std::fs::read(&model).unwrap()).unwrap();

    // Fisher information X'WX with W = p(1-p), from the data and the fitted margins.
    let file = data.join("orders-00000.parquet");
    let cols: Vec<Vec<f64>> = features.iter().map(|f| column(&file, f)).collect();
    let n = cols[0].len();
    let b = m["intercept"].as_f64().unwrap();
    let beta: Vec<f64> = features
        .iter()
        .map(|f| m["coefficients"][f].as_f64().unwrap())
        .collect();
    let k = features.len() + 1;
    let mut info = vec![vec![0.0; k]; k];
    let mut row = vec![0.0; k];
    for i in 0..n {
        row[0] = 1.0;
        let mut z = b;
        for (j, c) in cols.iter().enumerate() {
            row[j + 1] = c[i];
            z += beta[j] * c[i];
        }
        let p = 1.0 / (1.0 + (-z).exp());
        let h = p * (1.0 - p);
        for a in 0..k {
            for c in 0..=a {
                info[a][c] += h * row[a] * row[c];
            }
        }
    }
    for a in 0..k {
        for c in 0..a {
            info[c][a] = info[a][c];
        }
    }
    let cov = invert(info);
    let true_b = late["intercept"].as_f64().unwrap();
    let se0 = cov[0][0].sqrt();
    assert!(
        (b - true_b).abs() <= 5.0 * se0,
        "intercept {b} vs {true_b} (se {se0})"
    );
    for (j, f) in features.iter().enumerate() {
        let truth_j = late["coefficients"][f].as_f64().unwrap();
        let se = cov[j + 1][j + 1].sqrt();
        assert!(
            (beta[j] - truth_j).abs() <= 5.0 * se,
            "{f}: {} vs {truth_j} (se {se})",
            beta[j]
        );
    }
}
