//! Hashed categoricals, crosses and token lists through the binary.
//!
//! Outside references:
//! - `hashed_fit_matches_scipy_sparse_lbfgsb`: tests/reference/sparse_hashed.py builds the
//!   same hashed design with python-xxhash (the reference C library's XXH3) and
//!   scipy.sparse, and fits it with scipy's L-BFGS-B (fixture tests/data/sparse/).
//! - `hashed_softmax_matches_scipy_sparse_lbfgsb`: the same script fits a 3-class softmax
//!   (one coefficient vector per class, ridge on every non-intercept coefficient) on the
//!   same hashed design with scipy's L-BFGS-B (fixture
//!   tests/data/sparse/hashed_softmax_expected.json).
//! - `collision_free_hashing_equals_explicit_dummies`: explicit 0/1 dummy columns built
//!   here, fitted as dense features.
//! - `predict_gives_the_margins_the_fit_saw`: margins and the objective recomputed here
//!   from the model's weights and the raw values.
//!
//! The hash function itself is checked against the xxHash sanity vectors in
//! src/features/hashing.rs.

mod common;

use std::collections::BTreeMap;
use std::fs::File;
use std::path::Path;
use std::sync::Arc;

use arrow::array::{ArrayRef, AsArray, Float64Array, Int64Array, RecordBatch, StringArray};
use arrow::datatypes::{Field, Schema};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;

use common::{fit_in, json_f64, read_json, run_outcore, test_data};
use outcore::features::hashing::{HashedFeature, Part};
use outcore::model::Model;

fn write(path: &Path, columns: Vec<(&str, ArrayRef)>) {
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
    let mut w =
        ArrowWriter::try_new(File::create(path).expect("create"), schema, None).expect("writer");
    w.write(&batch).expect("write");
    w.close().expect("close");
}

fn read_f64(path: &Path, column: &str) -> Vec<f64> {
    let file = File::open(path).expect("open");
    let reader = ParquetRecordBatchReaderBuilder::try_new(file)
        .expect("reader")
        .build()
        .expect("build");
    let mut out = Vec::new();
    for b in reader {
        let b = b.expect("batch");
        let a = b.column_by_name(column).expect("column");
        out.extend(
            a.as_primitive::<arrow::datatypes::Float64Type>()
                .values()
                .iter(),
        );
    }
    out
}

fn part(c: &str) -> Part {
    Part {
        column: c.into(),
        bin: None,
    }
}

/// A small order log: zone (8 levels and nulls), hour (0..6), x1, late.
struct Orders {
    zone: Vec<Option<String>>,
    hour: Vec<i64>,
    x1: Vec<f64>,
    late: Vec<i64>,
}

fn orders(n: usize) -> Orders {
    let zones = [
        "harbor", "hill", "mill", "quay", "orchard", "fen", "moor", "glen",
    ];
    let mut s = 7u64;
    let mut u = move || {
        s = s.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = s;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    };
    let mut o = Orders {
        zone: vec![],
        hour: vec![],
        x1: vec![],
        late: vec![],
    };
    for _ in 0..n {
        let zi = (u() * 9.0) as usize;
        let zone = zones.get(zi).map(|z| z.to_string());
        let hour = (u() * 6.0) as i64;
        let x1 = u() * 2.0 - 1.0;
        let m = -0.3 + 0.8 * x1 + 0.15 * zi as f64 - 0.2 * hour as f64;
        let late = i64::from(u() < 1.0 / (1.0 + (-m).exp()));
        o.zone.push(zone);
        o.hour.push(hour);
        o.x1.push(x1);
        o.late.push(late);
    }
    o
}

fn text_of(v: &Option<String>) -> Vec<u8> {
    match v {
        Some(s) => s.as_bytes().to_vec(),
        None => vec![0xFF],
    }
}

/// The hashed bytes of each feature of row `i`: zone, hour, zone*hour.
fn row_values(o: &Orders, i: usize) -> Vec<(usize, Vec<u8>)> {
    let z = text_of(&o.zone[i]);
    let h = o.hour[i].to_string().into_bytes();
    let mut cross = z.clone();
    cross.push(0xFE);
    cross.extend_from_slice(&h);
    vec![(0, z), (1, h), (2, cross)]
}

#[test]
fn hashed_fit_matches_scipy_sparse_lbfgsb() {
    let expected = read_json(&test_data("sparse/hashed_expected.json"));
    let data = test_data("sparse/hashed.parquet");
    let dir = tempfile::tempdir().expect("tempdir");
    let fit = fit_in(
        dir.path(),
        "hashed",
        &[
            "--data",
            &data.display().to_string(),
            "--target",
            "late",
            "--features",
            "distance",
            "--categorical",
            "zone,store,hour,tags",
            "--cross",
            "zone*hour",
            "--cross",
            "store*distance/2",
            "--hash-bits",
            "12",
            "--ridge",
            "1e-3",
            "--tol",
            "1e-10",
            "--threads",
            "2",
        ],
    );
    let ours = fit.objective();
    let theirs = json_f64(&expected, &["objective"]);
    assert!(
        ((ours - theirs) / theirs).abs() < 1e-8,
        "objective {ours} vs scipy {theirs}; {}",
        fit.summary()
    );
    let m = fit.model();
    assert_eq!(
        m["hashed"]["nonzero"].as_u64(),
        expected["nonzero_buckets"].as_u64(),
        "nonzero hashed weights"
    );
    assert_eq!(m["hashed"]["weights"].as_str(), Some("hashed.weights.bin"));
    // Individual weights: the model's bucket weights against scipy's.
    let model = Model::load(&fit.model_path).expect("load");
    let w = model.sparse_weights();
    for (k, v) in expected["weights_sample"].as_object().expect("sample") {
        let k: usize = k.parse().expect("bucket");
        let v = v.as_f64().expect("number");
        assert!((w[k] - v).abs() < 1e-5, "bucket {k}: {} vs {v}", w[k]);
    }
}

#[test]
fn hashed_softmax_matches_scipy_sparse_lbfgsb() {
    let expected = read_json(&test_data("sparse/hashed_softmax_expected.json"));
    let data = test_data("sparse/hashed.parquet");
    let dir = tempfile::tempdir().expect("tempdir");
    let fit = fit_in(
        dir.path(),
        "softmax",
        &[
            "--data",
            &data.display().to_string(),
            "--target",
            "slot",
            "--loss",
            "softmax",
            "--features",
            "distance",
            "--categorical",
            "zone,store,hour,tags",
            "--cross",
            "zone*hour",
            "--cross",
            "store*distance/2",
            "--hash-bits",
            "12",
            "--ridge",
            "1e-3",
            "--tol",
            "1e-10",
            "--threads",
            "2",
        ],
    );
    let ours = fit.objective();
    let theirs = json_f64(&expected, &["objective"]);
    assert!(
        ((ours - theirs) / theirs).abs() < 1e-8,
        "objective {ours} vs scipy {theirs}; {}",
        fit.summary()
    );
    let m = fit.model();
    assert_eq!(m["classes"], expected["classes"], "class order");
    assert_eq!(
        m["hashed"]["nonzero"].as_u64(),
        expected["nonzero_buckets"].as_u64(),
        "nonzero hashed weights"
    );
    // Internal (standardized) coefficients: per class an intercept and distance, then
    // every class's buckets. The intercepts are determined up to a common shift.
    let internal: Vec<f64> = m["internal"]["coefficients"]
        .as_array()
        .expect("internal coefficients")
        .iter()
        .map(|v| v.as_f64().expect("number"))
        .collect();
    let mean = (internal[0] + internal[2] + internal[4]) / 3.0;
    for k in 0..3 {
        let b = internal[2 * k] - mean;
        let want = expected["intercepts_centred"][k].as_f64().expect("number");
        assert!((b - want).abs() < 1e-5, "intercept {k}: {b} vs {want}");
        let d = internal[2 * k + 1];
        let want = expected["distance"][k].as_f64().expect("number");
        assert!((d - want).abs() < 1e-5, "distance {k}: {d} vs {want}");
    }
    let model = Model::load(&fit.model_path).expect("load");
    let w = model.sparse_weights();
    let buckets = 1usize << 12;
    assert_eq!(w.len(), 3 * buckets);
    for (k, sample) in expected["weights_sample"].as_object().expect("sample") {
        let k: usize = k.parse().expect("class");
        for (j, v) in sample.as_object().expect("class sample") {
            let j: usize = j.parse().expect("bucket");
            let v = v.as_f64().expect("number");
            let got = w[k * buckets + j];
            assert!((got - v).abs() < 1e-5, "class {k} bucket {j}: {got} vs {v}");
        }
    }
}

#[test]
fn collision_free_hashing_equals_explicit_dummies() {
    let bits = 18;
    let o = orders(1500);
    let features = [
        HashedFeature::new(vec![part("zone")]),
        HashedFeature::new(vec![part("hour")]),
        HashedFeature::new(vec![part("zone"), part("hour")]),
    ];
    // Every distinct value, with its bucket and sign; no two share a bucket.
    let mut levels: BTreeMap<(usize, Vec<u8>), (u32, f64)> = BTreeMap::new();
    for i in 0..o.late.len() {
        for (f, bytes) in row_values(&o, i) {
            let loc = features[f].locate(&bytes, bits);
            levels.insert((f, bytes), loc);
        }
    }
    let mut buckets: Vec<u32> = levels.values().map(|(b, _)| *b).collect();
    buckets.sort();
    buckets.dedup();
    assert_eq!(buckets.len(), levels.len(), "a collision at 2^{bits}");
    let keys: Vec<(usize, Vec<u8>)> = levels.keys().cloned().collect();
    let dir = tempfile::tempdir().expect("tempdir");
    let hashed_data = dir.path().join("hashed.parquet");
    write(
        &hashed_data,
        vec![
            ("zone", Arc::new(StringArray::from(o.zone.clone()))),
            ("hour", Arc::new(Int64Array::from(o.hour.clone()))),
            ("x1", Arc::new(Float64Array::from(o.x1.clone()))),
            ("late", Arc::new(Int64Array::from(o.late.clone()))),
        ],
    );
    let dummy_data = dir.path().join("dummies.parquet");
    let names: Vec<String> = (0..keys.len()).map(|k| format!("d{k}")).collect();
    let mut cols: Vec<(&str, ArrayRef)> = vec![
        ("x1", Arc::new(Float64Array::from(o.x1.clone()))),
        ("late", Arc::new(Int64Array::from(o.late.clone()))),
    ];
    for (k, key) in keys.iter().enumerate() {
        let v: Vec<f64> = (0..o.late.len())
            .map(|i| f64::from(row_values(&o, i).contains(key)))
            .collect();
        cols.push((names[k].as_str(), Arc::new(Float64Array::from(v))));
    }
    write(&dummy_data, cols);
    let common = ["--ridge", "0.01", "--no-standardize", "--tol", "1e-12"];
    let mut a: Vec<String> = [
        "--data",
        &hashed_data.display().to_string(),
        "--target",
        "late",
        "--features",
        "x1",
        "--categorical",
        "zone,hour",
        "--cross",
        "zone*hour",
        "--hash-bits",
        &bits.to_string(),
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    a.extend(common.iter().map(|s| s.to_string()));
    let hashed = fit_in(dir.path(), "h", &a);
    let mut b: Vec<String> = [
        "--data",
        &dummy_data.display().to_string(),
        "--target",
        "late",
        "--features",
        &format!("x1,{}", names.join(",")),
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    b.extend(common.iter().map(|s| s.to_string()));
    let dummies = fit_in(dir.path(), "d", &b);
    let (fh, fd) = (hashed.objective(), dummies.objective());
    assert!(
        (fh - fd).abs() <= 1e-9 * fd.abs(),
        "objective {fh} vs {fd}\n{}\n{}",
        hashed.summary(),
        dummies.summary()
    );
    let hm = Model::load(&hashed.model_path).expect("load");
    let dm = dummies.model();
    let w = hm.sparse_weights();
    let tol = 1e-9;
    assert!((hm.internal[0] - json_f64(dm, &["intercept"])).abs() < tol);
    assert!((hm.internal[1] - json_f64(dm, &["coefficients", "x1"])).abs() < tol);
    for (k, key) in keys.iter().enumerate() {
        let (bucket, sign) = levels[key];
        let d = json_f64(dm, &["coefficients", &names[k]]);
        assert!(
            (sign * w[bucket as usize] - d).abs() < tol,
            "{key:?}: hashed {} vs dummy {d}",
            sign * w[bucket as usize]
        );
    }
    // Every other bucket stayed exactly zero.
    let nonzero = w.iter().filter(|v| **v != 0.0).count();
    assert_eq!(nonzero, keys.len());
    assert_eq!(
        hashed.model()["hashed"]["nonzero"].as_u64(),
        Some(keys.len() as u64)
    );
}

#[test]
fn predict_gives_the_margins_the_fit_saw_and_inspect_names_values() {
    let bits = 12;
    let o = orders(2000);
    let dir = tempfile::tempdir().expect("tempdir");
    let data = dir.path().join("orders.parquet");
    write(
        &data,
        vec![
            ("zone", Arc::new(StringArray::from(o.zone.clone()))),
            ("hour", Arc::new(Int64Array::from(o.hour.clone()))),
            ("x1", Arc::new(Float64Array::from(o.x1.clone()))),
            ("late", Arc::new(Int64Array::from(o.late.clone()))),
        ],
    );
    let ridge = 0.003;
    let fit = fit_in(
        dir.path(),
        "m",
        &[
            "--data",
            &data.display().to_string(),
            "--target",
            "late",
            "--features",
            "x1",
            "--categorical",
            "zone,hour",
            "--cross",
            "zone*hour",
            "--hash-bits",
            &bits.to_string(),
            "--ridge",
            &ridge.to_string(),
            "--threads",
            "2",
        ],
    );
    assert_eq!(fit.code, 0, "{}", fit.stderr);
    let model = Model::load(&fit.model_path).expect("load");
    let scores = dir.path().join("scores.parquet");
    common::predict(&fit.model_path, &[&data], &scores, &[]);
    let margins = read_f64(&scores, "margin");
    assert_eq!(margins.len(), o.late.len());
    let features = [
        HashedFeature::new(vec![part("zone")]),
        HashedFeature::new(vec![part("hour")]),
        HashedFeature::new(vec![part("zone"), part("hour")]),
    ];
    let f = &model.features[0];
    let (b0, b1) = (model.internal[0], model.internal[1]);
    let w = model.sparse_weights();
    let mut loss = 0.0;
    for (i, margin) in margins.iter().enumerate() {
        let mut z = b0 + b1 * (o.x1[i] - f.center) / f.scale;
        for (k, bytes) in row_values(&o, i) {
            let (b, s) = features[k].locate(&bytes, bits);
            z += s * w[b as usize];
        }
        assert!((z - margin).abs() < 1e-12, "row {i}: {z} vs {margin}");
        let y = o.late[i] as f64;
        loss += (1.0 + z.exp()).ln() - y * z;
    }
    let penalty: f64 = model.internal[1..].iter().map(|v| v * v).sum();
    let objective = loss / o.late.len() as f64 + 0.5 * ridge * penalty;
    let reported = fit.objective();
    assert!(
        (objective - reported).abs() < 1e-12,
        "recomputed objective {objective} vs the fit's {reported}"
    );
    let out = run_outcore(&[
        "inspect",
        &fit.model_path.display().to_string(),
        "--top",
        "40",
    ]);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        text.contains("zone=harbor (") || text.contains("zone=harbor × hour="),
        "{text}"
    );
    assert!(text.contains(" × hour="), "{text}");
    let nonzero = w.iter().filter(|v| **v != 0.0).count();
    assert!(
        text.contains(&format!(
            "{nonzero} of 4096 hashed and sparse weights are nonzero"
        )),
        "{text}"
    );
}

#[test]
fn lasso_gives_exact_zeros_in_the_hashed_weights() {
    let data = test_data("sparse/hashed.parquet");
    let dir = tempfile::tempdir().expect("tempdir");
    let fit = fit_in(
        dir.path(),
        "l1",
        &[
            "--data",
            &data.display().to_string(),
            "--target",
            "late",
            "--categorical",
            "zone,store,hour,tags",
            "--cross",
            "zone*hour",
            "--hash-bits",
            "12",
            "--lasso",
            "0.004",
        ],
    );
    assert_eq!(fit.code, 0, "{}", fit.stderr);
    let m = fit.model();
    let nonzero = m["hashed"]["nonzero"].as_u64().expect("nonzero");
    // The strongest effects survive; most of the ~500 used buckets are set to zero.
    assert!(nonzero > 0 && nonzero < 100, "{nonzero} nonzero");
    let model = Model::load(&fit.model_path).expect("load");
    let zeros = model.sparse_weights().iter().filter(|v| **v == 0.0).count();
    assert_eq!(zeros as u64, 4096 - nonzero);
}

/// An unpenalized hashed fit skips the identifiability check of dense fits (which
/// factors the dense information matrix only, and once named the intercept as not
/// identified for such a fit).
#[test]
fn unpenalized_hashed_fit_has_no_identifiability_warning() {
    let data = test_data("sparse/hashed.parquet");
    let dir = tempfile::tempdir().expect("tempdir");
    let fit = fit_in(
        dir.path(),
        "plain",
        &[
            "--data",
            &data.display().to_string(),
            "--target",
            "late",
            "--features",
            "distance",
            "--categorical",
            "zone",
            "--hash-bits",
            "10",
            "--max-passes",
            "200",
        ],
    );
    assert!(
        matches!(fit.code, 0 | 1),
        "exit {}: {}",
        fit.code,
        fit.stderr
    );
    assert!(
        !fit.stderr.contains("not identified"),
        "stderr: {}",
        fit.stderr
    );
}
