//! Hashed and sparse-vector designs through the block cache: a fit whose passes read
//! the blocks' CSR sections from the cache is bitwise the fit that decodes and hashes
//! Parquet on every pass (`--no-cache`); the cache is reused by a refit with another
//! penalty; a damaged CSR section is caught (by the block checksum, or by the CSR checks
//! when the checksum was recomputed over a bad index) and rebuilt with a warning; a
//! cache built with other hash bits is stale. Also: the pair form of a sparse vector
//! (`--sparse-vector IDX,VAL:DIM`) gives the fit of the `list<struct>` form of the same
//! vectors, and a design of hashed features only (no dense column) reads blocks larger
//! than a tile.
//!
//! The comparison is against the project's own Parquet path, which `tests/sparse.rs`
//! checks against scipy (L-BFGS-B on a scipy.sparse design, logistic and softmax).

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow::array::{
    ArrayRef, Float64Array, Int64Array, ListArray, RecordBatch, StringArray, StructArray,
};
use arrow::buffer::OffsetBuffer;
use arrow::datatypes::{DataType, Field, Fields, Schema};
use serde_json::Value;

use common::{fit_in, write_parquet, FitOutcome};

/// SplitMix64 (Steele, Lea and Flood 2014) in [0, 1).
struct Mix(u64);

impl Mix {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }

    fn below(&mut self, n: usize) -> usize {
        ((self.next() * n as f64) as usize).min(n - 1)
    }
}

/// An invented Larkspur Fresh order log: zone (nulls), store, hour, tags (a token list
/// with null lists), basket (a sparse vector of dimension 16 whose values are exact
/// `f32`s), distance, weight w, late (0/1) and slot (3 classes); row groups of 2500
/// rows, so blocks of 1000 rows leave partial blocks.
fn write_orders(path: &Path, rows: usize) {
    let zones = [
        "harbor", "hill", "mill", "quay", "orchard", "fen", "moor", "glen",
    ];
    let words = ["eggs", "milk", "bread", "kale", "rice", "tea", "figs"];
    let mut u = Mix(20261202);
    let (mut zone, mut store, mut hour, mut dist, mut w, mut late, mut slot) =
        (vec![], vec![], vec![], vec![], vec![], vec![], vec![]);
    let mut tags: Vec<Option<Vec<Option<String>>>> = vec![];
    let (mut b_len, mut b_index, mut b_value) = (vec![], vec![], vec![]);
    for _ in 0..rows {
        let zi = u.below(9);
        zone.push(zones.get(zi).map(|z| z.to_string()));
        let s = u.below(40);
        store.push(format!("LF-{s:02}"));
        let h = u.below(24) as i64;
        hour.push(h);
        let t = if u.next() < 0.05 {
            None
        } else {
            let k = u.below(4);
            Some(
                (0..k)
                    .map(|_| Some(words[u.below(7)].to_string()))
                    .collect(),
            )
        };
        let kale = t
            .as_ref()
            .is_some_and(|v: &Vec<Option<String>>| v.iter().any(|w| w.as_deref() == Some("kale")));
        tags.push(t);
        let k = u.below(4);
        b_len.push(k);
        let mut basket = 0.0;
        for _ in 0..k {
            let ix = u.below(16) as i64;
            let v = (1 + u.below(12)) as f64 / 8.0;
            basket += if ix < 4 { v } else { -0.1 * v };
            b_index.push(ix);
            b_value.push(v);
        }
        let d = (u.next() * 8.0 * 100.0).round() / 100.0;
        dist.push(d);
        w.push(0.5 + u.next());
        let m = -0.4 + 0.3 * (d - 4.0) + 0.12 * zi as f64 - 0.05 * (h as f64 - 12.0).abs()
            + 0.3 * f64::from(u8::from(kale))
            + 0.5 * basket
            + 0.02 * (s as f64 - 20.0);
        late.push(i64::from(u.next() < 1.0 / (1.0 + (-m).exp())));
        slot.push(((m + 1.0 + u.next()).clamp(0.0, 2.999)) as i64);
    }
    let fields = Fields::from(vec![
        Field::new("index", DataType::Int64, false),
        Field::new("value", DataType::Float64, false),
    ]);
    let items = StructArray::new(
        fields.clone(),
        vec![
            Arc::new(Int64Array::from(b_index.clone())) as ArrayRef,
            Arc::new(Float64Array::from(b_value.clone())) as ArrayRef,
        ],
        None,
    );
    // The same vectors as a pair of list columns (indices, values).
    let basket_ids = ListArray::new(
        Arc::new(Field::new("item", DataType::Int64, false)),
        OffsetBuffer::from_lengths(b_len.clone()),
        Arc::new(Int64Array::from(b_index.clone())),
        None,
    );
    let basket_values = ListArray::new(
        Arc::new(Field::new("item", DataType::Float64, false)),
        OffsetBuffer::from_lengths(b_len.clone()),
        Arc::new(Float64Array::from(b_value.clone())),
        None,
    );
    let basket = ListArray::new(
        Arc::new(Field::new("item", DataType::Struct(fields), false)),
        OffsetBuffer::from_lengths(b_len),
        Arc::new(items),
        None,
    );
    let mut tb = arrow::array::ListBuilder::new(arrow::array::StringBuilder::new());
    for t in &tags {
        match t {
            None => tb.append_null(),
            Some(v) => {
                for s in v {
                    tb.values().append_option(s.as_deref());
                }
                tb.append(true);
            }
        }
    }
    let columns: Vec<(&str, ArrayRef)> = vec![
        ("zone", Arc::new(StringArray::from(zone))),
        ("store", Arc::new(StringArray::from(store))),
        ("hour", Arc::new(Int64Array::from(hour))),
        ("tags", Arc::new(tb.finish())),
        ("basket", Arc::new(basket)),
        ("basket_ids", Arc::new(basket_ids)),
        ("basket_values", Arc::new(basket_values)),
        ("distance", Arc::new(Float64Array::from(dist))),
        ("w", Arc::new(Float64Array::from(w))),
        ("late", Arc::new(Int64Array::from(late))),
        ("slot", Arc::new(Int64Array::from(slot))),
    ];
    let schema = Arc::new(Schema::new(
        columns
            .iter()
            .map(|(n, a)| Field::new(*n, a.data_type().clone(), true))
            .collect::<Vec<_>>(),
    ));
    let batch = RecordBatch::try_new(
        schema.clone(),
        columns.into_iter().map(|(_, a)| a).collect(),
    )
    .expect("batch");
    write_parquet(path, schema, &[batch], 2500);
}

fn data_dir(rows: usize) -> (tempfile::TempDir, PathBuf) {
    let dir = tempfile::tempdir().expect("temp dir");
    let data = dir.path().join("orders.parquet");
    write_orders(&data, rows);
    (dir, data)
}

/// Hashed categoricals, a token list, a cross, a sparse vector, a weight and a holdout.
const LOGISTIC: &[&str] = &[
    "--target",
    "late",
    "--features",
    "distance",
    "--categorical",
    "zone,store,hour,tags",
    "--cross",
    "zone*hour",
    "--sparse-vector",
    "basket:16",
    "--weight",
    "w",
    "--holdout",
    "0.2",
    "--hash-bits",
    "12",
    "--ridge",
    "1e-3",
];

fn fit(dir: &Path, name: &str, data: &Path, args: &[&str], extra: &[&str]) -> (FitOutcome, Value) {
    let mut all: Vec<String> = vec![
        "--data".into(),
        data.display().to_string(),
        "--block-rows".into(),
        "1000".into(),
        "--threads".into(),
        "2".into(),
        "--json".into(),
    ];
    all.extend(args.iter().chain(extra).map(|s| s.to_string()));
    let out = fit_in(dir, name, &all);
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

/// What the fit decided, exactly: the model's numbers as text (f64 round trip) and the
/// SHA-256 of the hashed-weights sidecar (its bytes: every hashed weight's bits).
fn fitted(out: &FitOutcome) -> (String, String) {
    use sha2::{Digest, Sha256};
    let m = out.model();
    let text = format!(
        "{} {} {} {} {} {}",
        m["intercept"],
        m["coefficients"],
        m["fit"]["objective"],
        m["fit"]["passes"],
        m["fit"]["holdout"],
        m["hashed"]["nonzero"],
    );
    let sidecar = m["hashed"]["weights"]
        .as_str()
        .map(|name| {
            let bytes =
                std::fs::read(out.model_path.with_file_name(name)).expect("hashed weights sidecar");
            Sha256::digest(&bytes)
                .iter()
                .map(|b| format!("{b:02x}"))
                .collect()
        })
        .unwrap_or_default();
    (text, sidecar)
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

fn u64_at(b: &[u8], at: usize) -> u64 {
    u64::from_le_bytes(b[at..at + 8].try_into().unwrap())
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    u32::from_le_bytes(b[at..at + 4].try_into().unwrap())
}

/// Where the data of section `kind` of the first block lie in a cache file (layout of
/// `src/cache.rs`: header, index entries of 40 bytes, section table of 24-byte rows).
fn first_block_section(bytes: &[u8], kind: u16) -> (usize, usize, usize) {
    let index = u64_at(bytes, 40) as usize;
    let block = u64_at(bytes, index) as usize;
    let sections = u32_at(bytes, block) as usize;
    for s in 0..sections {
        let t = block + 8 + 24 * s;
        if u16::from_le_bytes([bytes[t], bytes[t + 1]]) == kind {
            return (
                block,
                block + u64_at(bytes, t + 8) as usize,
                u64_at(bytes, t + 16) as usize,
            );
        }
    }
    panic!("the first block has no section of kind {kind}");
}

/// Recomputes the first block's checksum and the index checksum after an edit, so that
/// only the CSR checks can catch it.
fn reseal(bytes: &mut [u8]) {
    let key = u64_at(bytes, 24) as usize;
    let index = u64_at(bytes, 40) as usize;
    let (offset, len) = (
        u64_at(bytes, index) as usize,
        u64_at(bytes, index + 8) as usize,
    );
    let crc = crc32c::crc32c(&bytes[offset..offset + len]);
    bytes[index + 20..index + 24].copy_from_slice(&crc.to_le_bytes());
    let whole = crc32c::crc32c_append(crc32c::crc32c(&bytes[key..index]), &bytes[index..]);
    bytes[56..60].copy_from_slice(&whole.to_le_bytes());
}

const OFFSETS: u16 = 5;
const INDEX: u16 = 6;

#[test]
fn hashed_fits_with_the_cache_are_bitwise_the_fits_without() {
    let (dir, data) = data_dir(6000);
    let (cached, s1) = fit(dir.path(), "cached", &data, LOGISTIC, &[]);
    let (plain, s2) = fit(dir.path(), "plain", &data, LOGISTIC, &["--no-cache"]);
    assert_eq!(s1["cache"]["mode"], "cache", "{s1}");
    assert_eq!(s2["cache"]["mode"], "parquet", "{s2}");
    assert!(cached.passes() > 3, "{}", cached.summary());
    assert!(!cached.stderr.contains("warning"), "{}", cached.stderr);
    assert_eq!(fitted(&cached), fitted(&plain));
    assert!(!fitted(&cached).1.is_empty(), "no hashed weights sidecar");
    // The cache holds the CSR part: its first block has offsets and indices.
    let files = cache_files(&dir.path().join("cached.run"));
    assert_eq!(files.len(), 1, "{files:?}");
    let bytes = std::fs::read(&files[0]).unwrap();
    let (_, _, len) = first_block_section(&bytes, INDEX);
    assert!(len > 4 * 1000 * 5, "index section of {len} bytes");

    // Softmax over hashed features only: the values are all ±1 (stored as sign bits).
    let softmax = [
        "--target",
        "slot",
        "--loss",
        "softmax",
        "--features",
        "distance",
        "--categorical",
        "zone,store,tags",
        "--cross",
        "zone*hour",
        "--hash-bits",
        "10",
        "--ridge",
        "1e-2",
    ];
    let (c, sc) = fit(dir.path(), "softmax_cached", &data, &softmax, &[]);
    let (p, _) = fit(
        dir.path(),
        "softmax_plain",
        &data,
        &softmax,
        &["--no-cache"],
    );
    assert_eq!(sc["cache"]["mode"], "cache", "{sc}");
    assert_eq!(fitted(&c), fitted(&p));
    // A lasso fit (OWL-QN) through the cache, too.
    let lasso = ["--lasso", "2e-3"];
    let (lc, _) = fit(dir.path(), "lasso_cached", &data, LOGISTIC, &lasso);
    let (lp, _) = fit(
        dir.path(),
        "lasso_plain",
        &data,
        LOGISTIC,
        &["--lasso", "2e-3", "--no-cache"],
    );
    assert_eq!(fitted(&lc), fitted(&lp));
}

#[test]
fn a_hashed_refit_with_another_ridge_reuses_the_cache() {
    let (dir, data) = data_dir(4000);
    let cache = dir.path().join("shared-cache");
    let cache_arg = cache.display().to_string();
    let (_, s1) = fit(
        dir.path(),
        "first",
        &data,
        LOGISTIC,
        &["--cache", &cache_arg],
    );
    let files = cache_files(&cache);
    assert_eq!(files.len(), 1);
    let written = std::fs::metadata(&files[0]).unwrap().modified().unwrap();
    let mut stronger = LOGISTIC.to_vec();
    let at = stronger.iter().position(|s| *s == "--ridge").unwrap();
    stronger[at + 1] = "1e-1";
    let (second, s2) = fit(
        dir.path(),
        "second",
        &data,
        &stronger,
        &["--cache", &cache_arg],
    );
    assert_eq!(s1["cache"]["path"], s2["cache"]["path"]);
    assert_eq!(s2["cache"]["mode"], "cache");
    assert_eq!(
        std::fs::metadata(&files[0]).unwrap().modified().unwrap(),
        written,
        "the cache was rewritten"
    );
    assert!(!second.stderr.contains("warning"), "{}", second.stderr);
    let (plain, _) = fit(dir.path(), "plain", &data, &stronger, &["--no-cache"]);
    assert_eq!(fitted(&second), fitted(&plain));
    let (first, _) = fit(dir.path(), "first_plain", &data, LOGISTIC, &["--no-cache"]);
    assert_ne!(fitted(&first), fitted(&second), "the ridge changed nothing");
}

#[test]
fn a_damaged_csr_section_is_rebuilt_with_a_warning() {
    let (dir, data) = data_dir(4000);
    let (first, _) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    let file = cache_files(&dir.path().join("m.run")).remove(0);
    let good = std::fs::read(&file).unwrap();

    // Flipped bytes inside the index section: caught by the block checksum.
    let mut bytes = good.clone();
    let (_, at, len) = first_block_section(&bytes, INDEX);
    bytes[at + len / 2] ^= 0x5a;
    bytes[at + len / 3] ^= 0xa5;
    std::fs::write(&file, &bytes).unwrap();
    let (again, s) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    assert!(
        again.stderr.contains("fails its checksum") && again.stderr.contains("rebuilt"),
        "{}",
        again.stderr
    );
    assert_eq!(s["cache"]["mode"], "cache");
    assert_eq!(fitted(&first), fitted(&again));

    // An index beyond the sparse width, with the checksums recomputed: caught by the CSR
    // checks, never read out of bounds.
    let mut bytes = std::fs::read(&file).unwrap();
    let (_, at, _) = first_block_section(&bytes, INDEX);
    bytes[at..at + 4].copy_from_slice(&(1u32 << 20).to_le_bytes());
    reseal(&mut bytes);
    std::fs::write(&file, &bytes).unwrap();
    let (bad_index, _) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    assert!(
        bad_index.stderr.contains("sparse index") && bad_index.stderr.contains("rebuilt"),
        "{}",
        bad_index.stderr
    );
    assert_eq!(fitted(&first), fitted(&bad_index));

    // Row offsets out of order, resealed: caught the same way.
    let mut bytes = std::fs::read(&file).unwrap();
    let (_, at, _) = first_block_section(&bytes, OFFSETS);
    bytes[at + 4..at + 8].copy_from_slice(&u32::MAX.to_le_bytes());
    reseal(&mut bytes);
    std::fs::write(&file, &bytes).unwrap();
    let (bad_offsets, _) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    assert!(
        bad_offsets.stderr.contains("offsets") && bad_offsets.stderr.contains("rebuilt"),
        "{}",
        bad_offsets.stderr
    );
    assert_eq!(fitted(&first), fitted(&bad_offsets));

    // The rebuilt cache is whole again.
    let (quiet, _) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    assert!(!quiet.stderr.contains("warning"), "{}", quiet.stderr);
    assert_eq!(std::fs::read(&file).unwrap().len(), good.len());
}

#[test]
fn a_cache_built_with_other_hash_bits_is_stale() {
    let (dir, data) = data_dir(3000);
    let cache = dir.path().join("c");
    let cache_arg = cache.display().to_string();
    let with_bits = |bits: &'static str| {
        let mut a = LOGISTIC.to_vec();
        let at = a.iter().position(|s| *s == "--hash-bits").unwrap();
        a[at + 1] = bits;
        a
    };
    let c = ["--cache", cache_arg.as_str()];
    fit(dir.path(), "b12", &data, &with_bits("12"), &c);
    let twelve = cache_files(&cache);
    assert_eq!(twelve.len(), 1);
    // Other bits name another file: the two never meet by name.
    fit(dir.path(), "b13", &data, &with_bits("13"), &c);
    let both = cache_files(&cache);
    assert_eq!(both.len(), 2, "{both:?}");
    let thirteen = both.iter().find(|p| **p != twelve[0]).unwrap().clone();
    // Even under the other's name, the 12-bit cache is recognized as stale by its key.
    std::fs::copy(&twelve[0], &thirteen).unwrap();
    let (stale, s) = fit(dir.path(), "b13_again", &data, &with_bits("13"), &c);
    assert!(
        stale.stderr.contains("other hashing") && stale.stderr.contains("rebuilds"),
        "{}",
        stale.stderr
    );
    assert_eq!(s["cache"]["mode"], "cache");
    let (plain, _) = fit(
        dir.path(),
        "b13_plain",
        &data,
        &with_bits("13"),
        &["--no-cache"],
    );
    assert_eq!(fitted(&stale), fitted(&plain));
}

/// Checkpoints of a wide model (2^18 hashed weights, 20 history pairs: about 90 MB)
/// cost more than the iterations between them: they are spaced out (the fit says so),
/// and a fit stopped by a budget and resumed from its last, older checkpoint ends bitwise
/// where the uninterrupted fit ends.
#[test]
fn wide_checkpoints_are_spaced_out_and_a_resume_ends_identically() {
    let (dir, data) = data_dir(3000);
    let mut args: Vec<String> = [
        "--data",
        &data.display().to_string(),
        "--target",
        "late",
        "--categorical",
        "zone,store,hour,tags",
        "--cross",
        "zone*hour",
        "--hash-bits",
        "18",
        "--history",
        "20",
        "--ridge",
        "1e-3",
        "--tol",
        "1e-9",
        "--threads",
        "2",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect();
    let fit = |name: &str, extra: &[&str]| {
        let mut a = vec!["fit".to_string()];
        a.extend(args.iter().cloned());
        a.extend(extra.iter().map(|s| s.to_string()));
        a.extend([
            "--out".into(),
            dir.path()
                .join(format!("{name}.json"))
                .display()
                .to_string(),
            "--run".into(),
            dir.path().join(format!("{name}.run")).display().to_string(),
        ]);
        common::run_outcore(&a)
    };
    let full = fit("full", &[]);
    let err = String::from_utf8_lossy(&full.stderr).into_owned();
    // Converged, or stopped flat at this tight tolerance: either way deterministic.
    assert!(matches!(full.status.code(), Some(0 | 1)), "{err}");
    assert!(err.contains("model written"), "{err}");
    assert!(err.contains("a checkpoint takes"), "{err}");
    let model: Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("full.json")).unwrap()).unwrap();
    let iterations = model["fit"]["iterations"].as_u64().unwrap();
    assert!(iterations > 8, "{model}");
    let last = outcore::checkpoint::load(&dir.path().join("full.run")).expect("checkpoint");
    assert!(
        last.checkpoint.state.iterations + 1 < iterations,
        "checkpoint at iteration {} of {iterations}",
        last.checkpoint.state.iterations
    );

    let cut = fit("cut", &["--max-passes", "60"]);
    assert_eq!(
        cut.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&cut.stderr)
    );
    let run = dir.path().join("cut.run");
    let older = outcore::checkpoint::load(&run).expect("checkpoint");
    eprintln!(
        "the budget stop's last checkpoint is of iteration {}",
        older.checkpoint.state.iterations
    );
    let resumed = common::run_outcore(&[
        "resume".to_string(),
        run.display().to_string(),
        "--max-passes".into(),
        "100000".into(),
        "--quiet".into(),
    ]);
    assert_eq!(
        resumed.status.code(),
        full.status.code(),
        "{}",
        String::from_utf8_lossy(&resumed.stderr)
    );
    let again: Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("cut.json")).unwrap()).unwrap();
    for key in ["objective", "iterations", "passes", "gradient_max"] {
        assert_eq!(again["fit"][key], model["fit"][key], "{key}");
    }
    assert_eq!(again["intercept"], model["intercept"]);
    let weights = |name: &str| std::fs::read(dir.path().join(name)).unwrap();
    assert!(
        weights("cut.weights.bin") == weights("full.weights.bin"),
        "the hashed weights differ"
    );
    args.clear();
}

#[test]
fn a_pair_of_list_columns_is_the_same_sparse_vector() {
    let (dir, data) = data_dir(3000);
    let (structs, _) = fit(dir.path(), "structs", &data, LOGISTIC, &["--no-cache"]);
    let mut pair = LOGISTIC.to_vec();
    let at = pair.iter().position(|s| *s == "basket:16").unwrap();
    pair[at] = "basket_ids,basket_values:16";
    let (pairs, s) = fit(dir.path(), "pairs", &data, &pair, &[]);
    assert_eq!(s["cache"]["mode"], "cache");
    assert_eq!(fitted(&structs), fitted(&pairs));
    let m = pairs.model();
    assert!(
        m.to_string().contains("basket_values"),
        "the model names the values column"
    );
    // predict reads the pair form back from the model: the margins of both models agree.
    let margins = |model: &Path, name: &str| {
        let out = dir.path().join(name);
        common::predict(model, &[&data], &out, &[]);
        common::read_column_f64(&out, "margin")
    };
    let a = margins(&structs.model_path, "structs.parquet");
    let b = margins(&pairs.model_path, "pairs.parquet");
    assert_eq!(a.len(), 3000);
    assert_eq!(
        a.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
        b.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
    );
}

/// Hashed features only: the blocks have no dense part and more rows than one tile.
#[test]
fn a_design_of_hashed_features_only_reads_the_cache() {
    let dir = tempfile::tempdir().expect("temp dir");
    let data = dir.path().join("hashed_only.parquet");
    let mut u = Mix(5);
    let n = 5000;
    let zone: Vec<String> = (0..n).map(|_| format!("z{}", u.below(30))).collect();
    let store: Vec<i64> = (0..n).map(|_| u.below(200) as i64).collect();
    let late: Vec<i64> = (0..n)
        .map(|i| i64::from(u.next() < 0.3 + 0.01 * (store[i] % 40) as f64))
        .collect();
    let columns: Vec<(&str, ArrayRef)> = vec![
        ("zone", Arc::new(StringArray::from(zone))),
        ("store", Arc::new(Int64Array::from(store))),
        ("late", Arc::new(Int64Array::from(late))),
    ];
    let schema = Arc::new(Schema::new(
        columns
            .iter()
            .map(|(n, a)| Field::new(*n, a.data_type().clone(), false))
            .collect::<Vec<_>>(),
    ));
    let batch = RecordBatch::try_new(
        schema.clone(),
        columns.into_iter().map(|(_, a)| a).collect(),
    )
    .expect("batch");
    write_parquet(&data, schema, &[batch], 5000);
    let args = [
        "--target",
        "late",
        "--categorical",
        "zone,store",
        "--cross",
        "zone*store",
        "--hash-bits",
        "12",
        "--ridge",
        "1e-3",
    ];
    let (cached, s) = fit(dir.path(), "cached", &data, &args, &[]);
    let (plain, _) = fit(dir.path(), "plain", &data, &args, &["--no-cache"]);
    assert_eq!(s["cache"]["mode"], "cache");
    assert_eq!(fitted(&cached), fitted(&plain));
    assert_eq!(cached.model()["coefficients"], serde_json::json!({}));
}

/// A cache of an older format (another version in its header, under another name, as a
/// format change names caches anew) is removed when the new one is built; other files
/// are left alone.
#[test]
fn a_cache_of_an_older_format_is_removed() {
    let (dir, data) = data_dir(2000);
    let (first, _) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    let run = dir.path().join("m.run");
    let current = cache_files(&run).remove(0);
    let mut bytes = std::fs::read(&current).unwrap();
    bytes[16..20].copy_from_slice(&1u32.to_le_bytes());
    let old = run.join("blocks-0123456789abcdef.ocache");
    std::fs::write(&old, &bytes).unwrap();
    std::fs::remove_file(&current).unwrap();
    let stranger = run.join("blocks-notours.ocache");
    std::fs::write(&stranger, b"not a block cache").unwrap();
    let (again, s) = fit(dir.path(), "m", &data, LOGISTIC, &[]);
    assert_eq!(s["cache"]["mode"], "cache");
    assert!(!old.exists(), "the old-format cache is still there");
    assert!(stranger.exists());
    assert!(current.exists());
    assert_eq!(fitted(&first), fitted(&again));
}
