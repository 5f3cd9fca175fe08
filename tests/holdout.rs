//! The holdout (`fit --holdout FRACTION [--split-key COL] [--holdout-patience K]`): the
//! split itself, the training objective it leaves, the holdout loss it reports, the
//! early stop, and resume identity with it.

mod common;

use std::path::Path;
use std::sync::Arc;

use arrow::array::{ArrayRef, Float64Array, Int64Array, StringArray};
use arrow::datatypes::{DataType, Field, Schema};
use arrow::record_batch::RecordBatch;
use serde_json::Value;

use common::{fit_in, json_f64, read_column_f64, read_json, run_outcore, write_parquet};
use outcore::holdout::RowSplit;

/// SplitMix64, a published 64-bit generator, for the test data.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A logistic data set: `features` uniform features, a weak signal on the first
/// `signal` of them (probabilities stay well inside (0, 1)), an integer key `id` shared
/// by `rows_per_key` consecutive rows, and the same key as text in `name`.
struct Data {
    rows: usize,
    features: usize,
    signal: usize,
    rows_per_key: usize,
    /// Scale of the true coefficients.
    strength: f64,
    seed: u64,
}

impl Data {
    fn columns(&self) -> (Vec<Vec<f64>>, Vec<f64>, Vec<i64>) {
        let mut rng = Rng(self.seed);
        let mut x = vec![Vec::with_capacity(self.rows); self.features];
        let mut y = Vec::with_capacity(self.rows);
        let mut id = Vec::with_capacity(self.rows);
        for i in 0..self.rows {
            let mut z = -0.2;
            for (j, c) in x.iter_mut().enumerate() {
                let v = rng.next() * 2.0 - 1.0;
                if j < self.signal {
                    z += self.strength * if j % 2 == 0 { 0.8 } else { -0.6 } * v;
                }
                c.push(v);
            }
            y.push(f64::from(rng.next() < 1.0 / (1.0 + (-z).exp())));
            id.push((i / self.rows_per_key) as i64 * 7 + 1000);
        }
        (x, y, id)
    }

    fn batch(&self, keep: &dyn Fn(usize) -> bool) -> RecordBatch {
        let (x, y, id) = self.columns();
        let rows: Vec<usize> = (0..self.rows).filter(|i| keep(*i)).collect();
        let pick = |v: &[f64]| -> Vec<f64> { rows.iter().map(|i| v[*i]).collect() };
        let mut fields = Vec::new();
        let mut arrays: Vec<ArrayRef> = Vec::new();
        for (j, c) in x.iter().enumerate() {
            fields.push(Field::new(format!("x{j}"), DataType::Float64, false));
            arrays.push(Arc::new(Float64Array::from(pick(c))));
        }
        fields.push(Field::new("y", DataType::Float64, false));
        arrays.push(Arc::new(Float64Array::from(pick(&y))));
        fields.push(Field::new("id", DataType::Int64, false));
        arrays.push(Arc::new(Int64Array::from(
            rows.iter().map(|i| id[*i]).collect::<Vec<_>>(),
        )));
        fields.push(Field::new("name", DataType::Utf8, false));
        arrays.push(Arc::new(StringArray::from(
            rows.iter().map(|i| id[*i].to_string()).collect::<Vec<_>>(),
        )));
        RecordBatch::try_new(Arc::new(Schema::new(fields)), arrays).expect("batch")
    }

    /// Writes the rows for which `keep(row)` holds.
    fn write(&self, path: &Path, keep: &dyn Fn(usize) -> bool) {
        let batch = self.batch(keep);
        write_parquet(path, batch.schema(), &[batch], 1000);
    }

    fn features_arg(&self) -> String {
        (0..self.features)
            .map(|j| format!("x{j}"))
            .collect::<Vec<_>>()
            .join(",")
    }
}

fn s(v: &[&str]) -> Vec<String> {
    v.iter().map(|a| a.to_string()).collect()
}

fn log_lines(run: &Path) -> Vec<Value> {
    let text = std::fs::read_to_string(run.join("log.jsonl")).expect("log.jsonl");
    text.lines()
        .map(|l| serde_json::from_str(l).expect("log line is JSON"))
        .collect()
}

fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs().max(1e-300)
}

/// Binomial bound: |count − n·p| ≤ 4·sqrt(n·p·(1−p)) (fails by chance with probability
/// below 1e-4 for a fixed hash, and the hash is fixed, so the outcome is too).
fn assert_binomial(count: usize, n: usize, p: f64, what: &str) {
    let mean = n as f64 * p;
    let sigma = (n as f64 * p * (1.0 - p)).sqrt();
    assert!(
        (count as f64 - mean).abs() <= 4.0 * sigma,
        "{what}: {count} of {n} held out, expected {mean:.0} ± {:.0} (4σ)",
        4.0 * sigma
    );
}

#[test]
fn split_by_position_is_deterministic_and_close_to_the_fraction() {
    for fraction in [0.05, 0.2, 0.5] {
        let a = RowSplit::new(fraction, None).expect("split");
        let b = RowSplit::new(fraction, None).expect("split");
        let n = 40_000usize;
        let mut count = 0;
        for file in 0..2 {
            for row in 0..(n / 2) as u64 {
                let held = a.holds_out_position(file, row);
                assert_eq!(held, b.holds_out_position(file, row));
                count += usize::from(held);
            }
        }
        assert_binomial(count, n, fraction, "by position");
    }
    // The same rows are held out by the binary: fit.holdout.rows counts them.
    let dir = tempfile::tempdir().expect("tempdir");
    let data = Data {
        rows: 3000,
        features: 3,
        signal: 3,
        rows_per_key: 3,
        strength: 1.0,
        seed: 5,
    };
    let path = dir.path().join("d.parquet");
    data.write(&path, &|_| true);
    let split = RowSplit::new(0.2, None).expect("split");
    let expected = (0..3000u64)
        .filter(|r| split.holds_out_position(0, *r))
        .count();
    let p = path.display().to_string();
    for threads in ["1", "3"] {
        let out = fit_in(
            dir.path(),
            &format!("m{threads}"),
            &s(&[
                "--data",
                &p,
                "--target",
                "y",
                "--features",
                &data.features_arg(),
                "--holdout",
                "0.2",
                "--threads",
                threads,
                "--shards",
                "3",
            ]),
        );
        assert_eq!(out.code, 0, "{}", out.stderr);
        let h = &out.model()["fit"]["holdout"];
        assert_eq!(h["rows"].as_u64(), Some(expected as u64));
        assert_eq!(out.model()["fit"]["rows"].as_u64(), Some(3000));
    }
    // Thread count changes nothing.
    let m1 = read_json(&dir.path().join("m1.json"));
    let m3 = read_json(&dir.path().join("m3.json"));
    assert_eq!(m1["internal"], m3["internal"]);
    assert_eq!(m1["fit"]["holdout"], m3["fit"]["holdout"]);
}

#[test]
fn split_by_key_keeps_every_key_on_one_side() {
    let split = RowSplit::new(0.3, Some("id".into())).expect("split");
    // Keys: a share of them close to the fraction is held out.
    let keys = 20_000usize;
    let held_keys = (0..keys as i64)
        .filter(|k| split.holds_out_key(Some(&k.to_string())))
        .count();
    assert_binomial(held_keys, keys, 0.3, "by key");

    // The binary splits by key: every row of a key on one side, so the held-out row
    // count is rows_per_key times the held-out keys, for the integer key and the same
    // key written as text alike.
    let dir = tempfile::tempdir().expect("tempdir");
    let data = Data {
        rows: 3000,
        features: 3,
        signal: 3,
        rows_per_key: 5,
        strength: 1.0,
        seed: 8,
    };
    let path = dir.path().join("d.parquet");
    data.write(&path, &|_| true);
    let (_, _, ids) = data.columns();
    let mut distinct = ids.clone();
    distinct.dedup();
    let held: Vec<i64> = distinct
        .iter()
        .copied()
        .filter(|k| split.holds_out_key(Some(&k.to_string())))
        .collect();
    let expected_rows = ids.iter().filter(|k| held.contains(k)).count();
    assert_eq!(expected_rows, held.len() * 5);
    let p = path.display().to_string();
    let mut holdout_losses = Vec::new();
    for key in ["id", "name"] {
        let out = fit_in(
            dir.path(),
            key,
            &s(&[
                "--data",
                &p,
                "--target",
                "y",
                "--features",
                &data.features_arg(),
                "--holdout",
                "0.3",
                "--split-key",
                key,
            ]),
        );
        assert_eq!(out.code, 0, "{}", out.stderr);
        let h = &out.model()["fit"]["holdout"];
        assert_eq!(h["key"].as_str(), Some(key));
        assert_eq!(h["rows"].as_u64(), Some(expected_rows as u64), "{key}");
        holdout_losses.push(json_f64(h, &["loss"]));
    }
    assert_eq!(holdout_losses[0].to_bits(), holdout_losses[1].to_bits());

    // A float key is refused as bad usage, before anything is written.
    let out = fit_in(
        dir.path(),
        "float",
        &s(&[
            "--data",
            &p,
            "--target",
            "y",
            "--features",
            "x1,x2",
            "--holdout",
            "0.3",
            "--split-key",
            "x0",
        ]),
    );
    assert_eq!(out.code, 2, "{}", out.stderr);
    assert!(out.stderr.contains("string or integer"), "{}", out.stderr);
    assert!(out.model.is_none());
}

/// Fits with `--holdout 0.3` on one file and, in the test, computes everything the fit
/// should have seen from the library's split function.
#[test]
fn training_objective_and_holdout_loss_match_a_direct_computation() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = Data {
        rows: 4000,
        features: 4,
        signal: 4,
        rows_per_key: 1,
        strength: 1.0,
        seed: 21,
    };
    let all = dir.path().join("all.parquet");
    data.write(&all, &|_| true);
    let split = RowSplit::new(0.3, None).expect("split");
    let held = |r: usize| split.holds_out_position(0, r as u64);
    let train = dir.path().join("train.parquet");
    data.write(&train, &|r| !held(r));
    let common = |p: &Path| {
        s(&[
            "--data",
            &p.display().to_string(),
            "--target",
            "y",
            "--features",
            &data.features_arg(),
            "--ridge",
            "1e-3",
            "--tol",
            "1e-10",
        ])
    };
    let mut with = common(&all);
    with.extend(s(&["--holdout", "0.3"]));
    let h = fit_in(dir.path(), "with", &with);
    let t = fit_in(dir.path(), "train", &common(&train));
    assert_eq!(h.code, 0, "{}", h.stderr);
    assert_eq!(t.code, 0, "{}", t.stderr);
    // The objective is that of the training rows alone (standardization included).
    let (fh, ft) = (h.objective(), t.objective());
    eprintln!(
        "with holdout: {}\ntraining rows only: {}",
        h.summary(),
        t.summary()
    );
    assert!(rel(fh, ft) <= 1e-12, "objective {fh:e} vs {ft:e}");
    assert_eq!(
        h.model()["fit"]["weight_sum"].as_f64(),
        t.model()["fit"]["weight_sum"].as_f64()
    );
    for j in 0..data.features {
        let name = format!("x{j}");
        let a = json_f64(h.model(), &["standardization", &name, "mean"]);
        let b = json_f64(t.model(), &["standardization", &name, "mean"]);
        assert!(rel(a, b) <= 1e-12, "mean of {name}: {a} vs {b}");
    }

    // The holdout loss of the last log line and of the model file is the mean log-loss
    // of `outcore predict` probabilities on the held-out rows.
    let scores = dir.path().join("scores.parquet");
    common::predict(&h.model_path, &[&all], &scores, &[]);
    let prob = read_column_f64(&scores, "probability");
    let y = read_column_f64(&all, "y");
    let (mut sum, mut n) = (0.0, 0usize);
    for (i, (p, yi)) in prob.iter().zip(&y).enumerate() {
        if held(i) {
            sum += -(yi * p.ln() + (1.0 - yi) * (1.0 - p).ln());
            n += 1;
        }
    }
    let expected = sum / n as f64;
    let record = &h.model()["fit"]["holdout"];
    assert_eq!(record["rows"].as_u64(), Some(n as u64));
    let lines = log_lines(&dir.path().join("with.run"));
    let last = json_f64(lines.last().expect("a log line"), &["holdout_loss"]);
    let in_model = json_f64(record, &["loss"]);
    eprintln!(
        "holdout loss: log {last:.17e}, predict {expected:.17e}, rel {:.1e}",
        rel(last, expected)
    );
    assert!(rel(last, expected) <= 1e-12, "log {last:e} vs {expected:e}");
    assert_eq!(last.to_bits(), in_model.to_bits());
    // Every log line has one, and a fit without a holdout writes none.
    assert!(lines.iter().all(|l| l["holdout_loss"].is_f64()));
    assert!(log_lines(&dir.path().join("train.run"))
        .iter()
        .all(|l| l.get("holdout_loss").is_none()));
    assert!(t.model()["fit"].get("holdout").is_none());
    // The best is no worse than any logged value.
    let best = json_f64(record, &["best_loss"]);
    assert!(lines.iter().all(|l| best <= json_f64(l, &["holdout_loss"])));
}

/// Few rows, many noise features: the holdout loss turns up while the training loss
/// keeps falling.
fn overfitting_data() -> Data {
    Data {
        rows: 300,
        features: 60,
        signal: 3,
        rows_per_key: 1,
        strength: 5.0,
        seed: 3,
    }
}

#[test]
fn patience_stops_an_overfitting_fit_as_holdout_stalled() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = overfitting_data();
    let path = dir.path().join("d.parquet");
    data.write(&path, &|_| true);
    let out = fit_in(
        dir.path(),
        "m",
        &s(&[
            "--data",
            &path.display().to_string(),
            "--target",
            "y",
            "--features",
            &data.features_arg(),
            "--ridge",
            "1e-6",
            "--holdout",
            "0.4",
            "--holdout-patience",
            "3",
        ]),
    );
    eprintln!("{}", out.summary());
    assert_eq!(out.code, 1, "{}", out.stderr);
    assert_eq!(out.stop(), "holdout-stalled", "{}", out.summary());
    let fit = &out.model()["fit"];
    let message = fit["message"].as_str().unwrap_or("");
    eprintln!("{message}\n{}", fit["holdout"]);
    assert!(message.contains("was at"), "{message}");
    let iterations = fit["iterations"].as_u64().expect("iterations");
    let best_iteration = fit["holdout"]["best_iteration"].as_u64().expect("best");
    // The holdout loss first improves, then gets worse for 3 iterations in a row.
    assert!(best_iteration >= 1, "{}", out.summary());
    assert_eq!(iterations - best_iteration, 3, "{}", out.summary());
    let lines = log_lines(&dir.path().join("m.run"));
    let best = json_f64(fit, &["holdout", "best_loss"]);
    for l in &lines {
        let it = l["iteration"].as_u64().unwrap_or(0);
        let h = json_f64(l, &["holdout_loss"]);
        if it == best_iteration {
            assert_eq!(h.to_bits(), best.to_bits());
        }
        if it > best_iteration {
            assert!(h >= best, "iteration {it}: {h} < best {best}");
        }
    }
    // Patience without a holdout is bad usage.
    let bad = fit_in(
        dir.path(),
        "bad",
        &s(&[
            "--data",
            &path.display().to_string(),
            "--target",
            "y",
            "--holdout-patience",
            "3",
        ]),
    );
    assert_eq!(bad.code, 2, "{}", bad.stderr);
}

#[test]
fn resumed_fit_with_holdout_ends_bitwise_identical() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = overfitting_data();
    let path = dir.path().join("d.parquet");
    data.write(&path, &|_| true);
    let args = |max_passes: &str| {
        s(&[
            "--data",
            &path.display().to_string(),
            "--target",
            "y",
            "--features",
            &data.features_arg(),
            "--ridge",
            "1e-6",
            "--holdout",
            "0.4",
            "--split-key",
            "id",
            "--holdout-patience",
            "6",
            "--max-passes",
            max_passes,
            "--shards",
            "2",
        ])
    };
    let whole = fit_in(dir.path(), "whole", &args("500"));
    assert_eq!(whole.stop(), "holdout-stalled", "{}", whole.summary());
    let cut = fit_in(dir.path(), "cut", &args("5"));
    assert_eq!(cut.stop(), "pass-budget", "{}", cut.summary());
    // Cut before the best holdout iterate, so the watch's state crosses the resume.
    let best_iteration = whole.model()["fit"]["holdout"]["best_iteration"]
        .as_u64()
        .unwrap_or(0);
    let cut_iterations = cut.model()["fit"]["iterations"].as_u64().unwrap_or(0);
    assert!(cut_iterations < best_iteration, "{}", cut.summary());
    let run = dir.path().join("cut.run");
    let res = run_outcore(&s(&[
        "resume",
        &run.display().to_string(),
        "--max-passes",
        "500",
        "--threads",
        "1",
        "--quiet",
    ]));
    assert_eq!(
        common::exit_code(&res),
        1,
        "{}",
        String::from_utf8_lossy(&res.stderr)
    );
    let resumed = read_json(&cut.model_path);
    eprintln!(
        "whole: {}\ncut: {}\nresumed: iterations {} passes {}",
        whole.summary(),
        cut.summary(),
        resumed["fit"]["iterations"],
        resumed["fit"]["passes"]
    );
    let a = &whole.model()["fit"];
    let b = &resumed["fit"];
    assert_eq!(whole.model()["internal"], resumed["internal"]);
    for key in ["stop", "iterations", "passes", "message", "holdout"] {
        assert_eq!(a[key], b[key], "{key}");
    }
    assert_eq!(
        json_f64(a, &["objective"]).to_bits(),
        json_f64(b, &["objective"]).to_bits()
    );
    let la: Vec<Value> = log_lines(&dir.path().join("whole.run"));
    let lb: Vec<Value> = log_lines(&run);
    assert_eq!(la.len(), lb.len());
    for (x, y) in la.iter().zip(&lb) {
        assert_eq!(x["iteration"], y["iteration"]);
        assert_eq!(x["objective"], y["objective"]);
        assert_eq!(x["holdout_loss"], y["holdout_loss"]);
    }
}
