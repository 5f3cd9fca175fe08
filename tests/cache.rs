//! The block cache through the binary: fits that read the cache are bitwise the fits
//! that decode Parquet on every pass (`--no-cache`), the cache is reused across fits
//! that differ only in the penalty, and damaged, stale or unwritable caches are rebuilt
//! or bypassed with a warning, never used and never an error.
//!
//! The comparison is against the project's own Parquet path, which the reference tests
//! (`tests/reference_fits.rs`: NIST, statsmodels, scikit-learn) check against outside
//! values; those run with the cache on (the default).

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::{ArrayRef, BooleanArray, Float32Array, Float64Array, Int32Array};
use arrow::datatypes::{DataType, Field, Schema};
use arrow::record_batch::RecordBatch;
use serde_json::Value;

use common::{fit_in, write_parquet, FitOutcome};

/// A seeded linear congruential stream in [0, 1) (Knuth's MMIX constants).
struct Stream(u64);

impl Stream {
    fn next(&mut self) -> f64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// Logistic data with a float64 column of full precision, a float32 column, a small
/// integer, a boolean, a float64 column with nulls, a weight and a 3-class target;
/// row groups of 7000 rows (blocks of 4096 leave partial blocks).
fn write_data(path: &Path, rows: usize, seed: u64) {
    let mut s = Stream(seed);
    let (mut x64, mut x32, mut xi, mut xb, mut xn, mut w, mut y, mut k) = (
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
        vec![],
    );
    for _ in 0..rows {
        let a = 1000.0 + s.next() * std::f64::consts::PI;
        let b = (s.next() * 4.0 - 2.0) as f32;
        let c = (s.next() * 10.0) as i32 - 5;
        let d = s.next() < 0.3;
        let e = if s.next() < 0.1 {
            None
        } else {
            Some(s.next() * 2.0 - 1.0)
        };
        let z = 1.5 * (a - 1001.5) - 0.8 * b as f64
            + 0.1 * c as f64
            + 0.5 * d as u8 as f64
            + 0.7 * e.unwrap_or(0.0);
        let p = 1.0 / (1.0 + (-z).exp());
        x64.push(a);
        x32.push(b);
        xi.push(c);
        xb.push(d);
        xn.push(e);
        w.push(0.5 + s.next());
        y.push(if s.next() < p { 1.0 } else { 0.0 });
        k.push(((z + 1.5).clamp(0.0, 2.999)) as i32);
    }
    let schema = Arc::new(Schema::new(vec![
        Field::new("x64", DataType::Float64, false),
        Field::new("x32", DataType::Float32, false),
        Field::new("xi", DataType::Int32, false),
        Field::new("xb", DataType::Boolean, false),
        Field::new("xn", DataType::Float64, true),
        Field::new("w", DataType::Float64, false),
        Field::new("y", DataType::Float64, false),
        Field::new("k", DataType::Int32, false),
    ]));
    let columns: Vec<ArrayRef> = vec![
        Arc::new(Float64Array::from(x64)),
        Arc::new(Float32Array::from(x32)),
        Arc::new(Int32Array::from(xi)),
        Arc::new(BooleanArray::from(xb)),
        Arc::new(Float64Array::from(xn)),
        Arc::new(Float64Array::from(w)),
        Arc::new(Float64Array::from(y)),
        Arc::new(Int32Array::from(k)),
    ];
    let batch = RecordBatch::try_new(schema.clone(), columns).expect("batch");
    write_parquet(path, schema, &[batch], 7000);
}

fn data_dir(rows: usize) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().expect("temp dir");
    let data = dir.path().join("data.parquet");
    write_data(&data, rows, 11);
    (dir, data)
}

fn fit(dir: &Path, name: &str, data: &Path, extra: &[&str]) -> (FitOutcome, Value) {
    let mut args: Vec<String> = vec![
        "--data".into(),
        data.display().to_string(),
        "--block-rows".into(),
        "4096".into(),
        "--threads".into(),
        "2".into(),
        "--json".into(),
    ];
    args.extend(extra.iter().map(|s| s.to_string()));
    let out = fit_in(dir, name, &args);
    assert!(
        out.code == 0,
        "fit {name} failed: {}\n{}",
        out.summary(),
        out.stderr
    );
    let summary: Value = serde_json::from_str(out.stdout.trim())
        .unwrap_or_else(|e| panic!("--json output of {name} is not JSON ({e}): {}", out.stdout));
    (out, summary)
}

/// The numbers of a model file that the fit decided, as exact text (f64 round trip).
fn fitted(out: &FitOutcome) -> String {
    let m = out.model();
    format!(
        "{} {} {} {} {}",
        m["intercept"],
        m["coefficients"],
        m["fit"]["objective"],
        m["fit"]["passes"],
        m["fit"]["holdout"]
    )
}

fn cache_files(dir: &Path) -> Vec<PathBuf> {
    let mut v: Vec<PathBuf> = std::fs::read_dir(dir)
        .map(|d| {
            d.flatten()
                .map(|e| e.path())
                .filter(|p| p.extension().is_some_and(|e| e == "ocache"))
                .collect()
        })
        .unwrap_or_default();
    v.sort();
    v
}

const LOGISTIC: &[&str] = &[
    "--target",
    "y",
    "--features",
    "x64,x32,xi,xb,xn",
    "--weight",
    "w",
    "--missing",
    "mean",
    "--holdout",
    "0.2",
    "--ridge",
    "1e-3",
];

#[test]
fn cached_passes_give_bitwise_the_fit_of_parquet_passes() {
    let (dir, data) = data_dir(30_000);
    let (cached, s1) = fit(dir.path(), "cached", &data, LOGISTIC);
    let mut plain_args = LOGISTIC.to_vec();
    plain_args.push("--no-cache");
    let (plain, s2) = fit(dir.path(), "plain", &data, &plain_args);
    assert_eq!(s1["cache"]["mode"], "cache", "{s1}");
    assert_eq!(s2["cache"]["mode"], "parquet", "{s2}");
    assert!(cached.passes() > 3, "{}", cached.summary());
    assert_eq!(fitted(&cached), fitted(&plain));
    // The float32, integer and boolean columns are stored as f32, the float64 ones as
    // f64: the file is smaller than eight bytes for every value.
    let files = cache_files(&dir.path().join("cached.run"));
    assert_eq!(files.len(), 1, "{files:?}");
    let bytes = std::fs::metadata(&files[0]).unwrap().len();
    let all_f64 = 30_000u64 * 8 * 8;
    assert!(bytes < all_f64 * 3 / 4, "cache of {bytes} bytes");
    assert_eq!(s1["cache"]["bytes"], bytes);
    assert!(s1["memory"]["peak_resident_bytes"].as_u64().unwrap_or(0) > 0);

    // Softmax with a numeric class target: labels are class indices in the cache.
    let softmax = [
        "--target",
        "k",
        "--loss",
        "softmax",
        "--features",
        "x64,x32",
        "--ridge",
        "1e-2",
    ];
    let (c, _) = fit(dir.path(), "softmax_cached", &data, &softmax);
    let mut plain = softmax.to_vec();
    plain.push("--no-cache");
    let (p, _) = fit(dir.path(), "softmax_plain", &data, &plain);
    assert_eq!(fitted(&c), fitted(&p));
}

#[test]
fn a_refit_with_another_penalty_reuses_the_cache() {
    let (dir, data) = data_dir(20_000);
    let cache = dir.path().join("shared-cache");
    let cache_arg = cache.display().to_string();
    let with = |ridge: &'static str| {
        let mut a = LOGISTIC.to_vec();
        a.retain(|s| *s != "1e-3");
        a.retain(|s| *s != "--ridge");
        a.extend(["--ridge", ridge]);
        a
    };
    let mut first = with("1e-3");
    first.extend(["--cache", &cache_arg]);
    let (_, s1) = fit(dir.path(), "first", &data, &first);
    let files = cache_files(&cache);
    assert_eq!(files.len(), 1);
    let written = std::fs::metadata(&files[0]).unwrap().modified().unwrap();
    let mut second = with("1e-1");
    second.extend(["--cache", &cache_arg]);
    let (out, s2) = fit(dir.path(), "second", &data, &second);
    assert_eq!(s1["cache"]["path"], s2["cache"]["path"]);
    assert_eq!(
        std::fs::metadata(&files[0]).unwrap().modified().unwrap(),
        written,
        "the cache was rewritten"
    );
    assert!(!out.stderr.contains("warning"), "{}", out.stderr);
    let mut plain = with("1e-1");
    plain.push("--no-cache");
    let (p, _) = fit(dir.path(), "plain", &data, &plain);
    assert_eq!(fitted(&out), fitted(&p));

    // A refit into the same run directory keeps the cache of the fit it replaces.
    let (_, a) = fit(dir.path(), "again", &data, &with("1e-3"));
    let (_, b) = fit(dir.path(), "again", &data, &with("1e-2"));
    assert_eq!(a["cache"]["path"], b["cache"]["path"]);
    assert_eq!(cache_files(&dir.path().join("again.run")).len(), 1);
}

#[test]
fn a_corrupt_cache_is_rebuilt_with_a_warning() {
    let (dir, data) = data_dir(20_000);
    let (first, _) = fit(dir.path(), "m", &data, LOGISTIC);
    let files = cache_files(&dir.path().join("m.run"));
    assert_eq!(files.len(), 1);
    // One flipped byte inside the blocks: caught by the block's checksum in the pass.
    let mut bytes = std::fs::read(&files[0]).unwrap();
    let at = bytes.len() / 3;
    bytes[at] ^= 0x5a;
    std::fs::write(&files[0], &bytes).unwrap();
    let (again, s) = fit(dir.path(), "m", &data, LOGISTIC);
    assert!(
        again.stderr.contains("fails its checksum") && again.stderr.contains("rebuilt"),
        "{}",
        again.stderr
    );
    assert_eq!(s["cache"]["mode"], "cache");
    assert_eq!(fitted(&first), fitted(&again));
    // The rebuilt cache is whole: the next fit reads it without a word.
    let (third, _) = fit(dir.path(), "m", &data, LOGISTIC);
    assert!(!third.stderr.contains("warning"), "{}", third.stderr);
    assert_eq!(fitted(&first), fitted(&third));

    // A damaged header: the file is not used at all.
    let files = cache_files(&dir.path().join("m.run"));
    let mut bytes = std::fs::read(&files[0]).unwrap();
    bytes[3] = b'X';
    std::fs::write(&files[0], &bytes).unwrap();
    let (fourth, _) = fit(dir.path(), "m", &data, LOGISTIC);
    assert!(
        fourth.stderr.contains("cannot be used") && fourth.stderr.contains("header"),
        "{}",
        fourth.stderr
    );
    assert_eq!(fitted(&first), fitted(&fourth));
}

#[test]
fn changed_data_at_the_same_path_make_the_cache_stale() {
    let (dir, data) = data_dir(20_000);
    let cache = dir.path().join("c");
    let mut args = LOGISTIC.to_vec();
    let cache_arg = cache.display().to_string();
    args.extend(["--cache", &cache_arg]);
    fit(dir.path(), "old", &data, &args);
    // Other values, other size: the fingerprint changes, the file name does not.
    write_data(&data, 21_000, 12);
    let (new, _) = fit(dir.path(), "new", &data, &args);
    assert!(
        new.stderr.contains("built for other data"),
        "{}",
        new.stderr
    );
    let mut plain = LOGISTIC.to_vec();
    plain.push("--no-cache");
    let (p, _) = fit(dir.path(), "plain", &data, &plain);
    assert_eq!(fitted(&new), fitted(&p));
    assert_eq!(cache_files(&cache).len(), 1);
}

#[test]
fn an_unwritable_cache_directory_falls_back_to_parquet_with_a_warning() {
    let (dir, data) = data_dir(10_000);
    let not_a_dir = dir.path().join("a-file");
    std::fs::write(&not_a_dir, b"not a directory").unwrap();
    let mut args = LOGISTIC.to_vec();
    let cache_arg = not_a_dir.display().to_string();
    args.extend(["--cache", &cache_arg]);
    let (out, s) = fit(dir.path(), "m", &data, &args);
    assert!(
        out.stderr.contains("warning") && out.stderr.contains("every pass reads Parquet"),
        "{}",
        out.stderr
    );
    assert_eq!(s["cache"]["mode"], "parquet");
    assert_eq!(std::fs::read(&not_a_dir).unwrap(), b"not a directory");
}

#[test]
fn f32_precision_is_the_same_with_and_without_the_cache_and_halves_the_cache() {
    let (dir, data) = data_dir(20_000);
    let base = ["--target", "y", "--features", "x64,xn", "--missing", "mean"];
    let (stored, s_stored) = fit(dir.path(), "stored", &data, &base);
    let mut f32_args = base.to_vec();
    f32_args.extend(["--precision", "f32"]);
    let (rounded, s_f32) = fit(dir.path(), "rounded", &data, &f32_args);
    let mut plain = f32_args.clone();
    plain.push("--no-cache");
    let (rounded_plain, _) = fit(dir.path(), "rounded_plain", &data, &plain);
    assert_eq!(fitted(&rounded), fitted(&rounded_plain));
    assert_ne!(fitted(&stored), fitted(&rounded));
    let (a, b) = (
        s_stored["cache"]["bytes"].as_u64().unwrap(),
        s_f32["cache"]["bytes"].as_u64().unwrap(),
    );
    assert!(b * 10 < a * 7, "f32 cache {b} bytes vs stored {a}");
    // Rounding x64 (about 1000 + 3 digits) to f32 keeps about 4 digits after the point:
    // the objective moves only a little.
    let rel = (stored.objective() - rounded.objective()).abs() / stored.objective();
    assert!(rel < 1e-4, "relative change {rel}");
}
