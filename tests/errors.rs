//! The error matrix: hostile inputs run through the binary, one table.
//!
//! Every case must exit with 2, print exactly ONE line on stderr (`error: ...`) that
//! names what is at fault (the file, the column, the row where one applies, the flag or
//! the settings key and line), and leave the world untouched: a pre-existing model file,
//! its run directory (settings, log, checkpoints) and a pre-existing scores file are
//! hashed (content and modification time of every entry of the tree) before and after
//! each case and must be byte-identical, with no new file anywhere.
//!
//! Fit cases run with `--quiet` so that stderr holds only the message (progress lines are
//! not part of it). Flag-syntax errors are clap's: they print usage over several lines
//! (exit 2); that is accepted for them and they are kept in a separate list
//! (`flag_syntax_errors_exit_two_and_write_nothing`).
//!
//! Decisions recorded here:
//! - A single row is an error: with one row every feature is constant, so no model can
//!   be identified; the message says so and asks for more rows.
//! - A softmax class seen in training but absent from a later file is fine (test
//!   `a_class_absent_from_a_later_file_is_fine`); a class the model never saw, in the data
//!   given to `evaluate`, is an error naming the class and its row.
//! - Hashed features (`--categorical`, `--cross`, `--sparse-vector`): bits outside
//!   10..=28, unknown or unhashable columns, list columns of the wrong item type, sparse
//!   vector indices outside the declared dimension (the row is named), gradient buffers
//!   over `--gradient-memory`, and `--inference` with hashed features are refused.

mod common;

use std::collections::BTreeMap;
use std::fs::{self, File};
use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;
use std::time::SystemTime;

use arrow::array::{ArrayRef, Float64Array, Int64Array, StringArray};
use arrow::datatypes::{Field, Schema};
use arrow::record_batch::RecordBatch;
use parquet::arrow::ArrowWriter;

fn outcore(args: &[String]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_outcore"))
        .args(args)
        .output()
        .expect("the outcore binary runs")
}

/// The columns of a test file; each case changes what it needs.
#[derive(Clone)]
struct Cols {
    x1: Vec<Option<f64>>,
    x2: Vec<Option<f64>>,
    y: Vec<Option<i64>>,
    cnt: Vec<Option<i64>>,
    w: Vec<Option<f64>>,
    cls: Vec<Option<String>>,
    /// Extra or replacing columns, written after the others (a column named like one of
    /// the above replaces it).
    extra: Vec<(String, ArrayRef)>,
    /// Columns to leave out.
    drop: Vec<&'static str>,
}

impl Cols {
    /// `n` rows of a non-separable logistic data set with counts, weights and classes.
    fn new(n: usize) -> Cols {
        let mut s = 99u64;
        let mut u = move || {
            s = s.wrapping_add(0x9E3779B97F4A7C15);
            let mut z = s;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
            ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut c = Cols {
            x1: vec![],
            x2: vec![],
            y: vec![],
            cnt: vec![],
            w: vec![],
            cls: vec![],
            extra: vec![],
            drop: vec![],
        };
        for i in 0..n {
            let a = u() * 2.0 - 1.0;
            let b = u() * 3.0;
            let p = 1.0 / (1.0 + (-(0.3 + a - 0.4 * b)).exp());
            c.x1.push(Some(a));
            c.x2.push(Some(b));
            c.y.push(Some(i64::from(u() < p)));
            c.cnt.push(Some((u() * 4.0 * (1.0 + a.abs())) as i64));
            c.w.push(Some(1.0 + (i % 3) as f64));
            c.cls
                .push(Some(["a", "b", "c"][(u() * 3.0) as usize % 3].to_string()));
        }
        c
    }

    fn write(&self, path: &Path) {
        let mut columns: Vec<(String, ArrayRef)> = vec![
            ("x1".into(), Arc::new(Float64Array::from(self.x1.clone()))),
            ("x2".into(), Arc::new(Float64Array::from(self.x2.clone()))),
            ("y".into(), Arc::new(Int64Array::from(self.y.clone()))),
            ("cnt".into(), Arc::new(Int64Array::from(self.cnt.clone()))),
            ("w".into(), Arc::new(Float64Array::from(self.w.clone()))),
            ("cls".into(), Arc::new(StringArray::from(self.cls.clone()))),
        ];
        for (name, array) in &self.extra {
            columns.retain(|(n, _)| n != name);
            columns.push((name.clone(), array.clone()));
        }
        columns.retain(|(n, _)| !self.drop.contains(&n.as_str()));
        let fields: Vec<Field> = columns
            .iter()
            .map(|(n, a)| Field::new(n, a.data_type().clone(), true))
            .collect();
        let schema = Arc::new(Schema::new(fields));
        let batch = RecordBatch::try_new(
            schema.clone(),
            columns.into_iter().map(|(_, a)| a).collect(),
        )
        .expect("valid batch");
        let mut w = ArrowWriter::try_new(File::create(path).expect("create"), schema, None)
            .expect("writer");
        if batch.num_rows() > 0 {
            w.write(&batch).expect("write");
        }
        w.close().expect("close");
    }
}

/// Every entry under `root`: relative path → (bytes, modification time); directories
/// with empty content.
fn snapshot(root: &Path) -> BTreeMap<PathBuf, (Vec<u8>, Option<SystemTime>)> {
    let mut out = BTreeMap::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(dir) = stack.pop() {
        for entry in fs::read_dir(&dir).expect("read_dir") {
            let path = entry.expect("entry").path();
            let meta = fs::symlink_metadata(&path).expect("metadata");
            let rel = path.strip_prefix(root).expect("under root").to_path_buf();
            if meta.is_dir() {
                stack.push(path.clone());
                out.insert(rel, (Vec::new(), None));
            } else {
                out.insert(rel, (fs::read(&path).expect("read"), meta.modified().ok()));
            }
        }
    }
    out
}

fn differences(
    before: &BTreeMap<PathBuf, (Vec<u8>, Option<SystemTime>)>,
    after: &BTreeMap<PathBuf, (Vec<u8>, Option<SystemTime>)>,
) -> Vec<String> {
    let mut d = Vec::new();
    for (p, v) in before {
        match after.get(p) {
            None => d.push(format!("removed {}", p.display())),
            Some(a) if a != v => d.push(format!("changed {}", p.display())),
            _ => {}
        }
    }
    for p in after.keys() {
        if !before.contains_key(p) {
            d.push(format!("created {}", p.display()));
        }
    }
    d
}

/// One hostile input: the arguments and what the one-line message must name.
struct Case {
    name: &'static str,
    args: Vec<String>,
    names: Vec<String>,
}

/// The world every case runs in: inputs under `in/`, pre-existing outputs under `out/`.
struct World {
    _tmp: tempfile::TempDir,
    root: PathBuf,
}

impl World {
    fn input(&self, name: &str) -> PathBuf {
        self.root.join("in").join(name)
    }
    fn out(&self, name: &str) -> PathBuf {
        self.root.join("out").join(name)
    }
    fn s(p: &Path) -> String {
        p.display().to_string()
    }
}

fn args(list: &[&str]) -> Vec<String> {
    list.iter().map(|s| s.to_string()).collect()
}

/// Builds the world: good data, an existing logistic model with its run directory, an
/// existing softmax model and an existing scores file.
fn world() -> World {
    let tmp = tempfile::tempdir().expect("tempdir");
    let root = tmp.path().to_path_buf();
    fs::create_dir_all(root.join("in")).expect("mkdir");
    fs::create_dir_all(root.join("out")).expect("mkdir");
    let w = World { _tmp: tmp, root };
    Cols::new(120).write(&w.input("good.parquet"));
    let good = World::s(&w.input("good.parquet"));
    for (model, extra) in [
        ("model.json", vec!["--target", "y", "--features", "x1,x2"]),
        (
            "soft.json",
            vec![
                "--target",
                "cls",
                "--features",
                "x1,x2",
                "--loss",
                "softmax",
                "--ridge",
                "0.01",
            ],
        ),
    ] {
        let mut a = args(&["fit", "--data", &good, "--quiet", "--threads", "2"]);
        a.extend(args(&extra));
        a.extend(["--out".to_string(), World::s(&w.out(model))]);
        let o = outcore(&a);
        assert_eq!(
            o.status.code(),
            Some(0),
            "setup fit of {model} failed: {}",
            String::from_utf8_lossy(&o.stderr)
        );
    }
    let o = outcore(&args(&[
        "predict",
        "--model",
        &World::s(&w.out("model.json")),
        "--data",
        &good,
        "--out",
        &World::s(&w.out("scores.parquet")),
    ]));
    assert_eq!(o.status.code(), Some(0), "setup predict failed");
    w
}

/// `fit --data <data> <extra> --out out/model.json --quiet`: the default run directory
/// is the existing `out/model.run`.
fn fit(w: &World, data: &[PathBuf], extra: &[&str]) -> Vec<String> {
    let mut a = vec!["fit".to_string(), "--data".into()];
    a.extend(data.iter().map(|d| World::s(d)));
    a.extend(args(extra));
    a.extend(args(&[
        "--out",
        &World::s(&w.out("model.json")),
        "--quiet",
        "--threads",
        "2",
    ]));
    a
}

fn case(name: &'static str, args: Vec<String>, names: &[&str]) -> Case {
    Case {
        name,
        args,
        names: names.iter().map(|s| s.to_string()).collect(),
    }
}

/// Writes a variant of the good data as `in/<file>` after `change`.
fn variant(w: &World, file: &str, change: impl FnOnce(&mut Cols)) -> PathBuf {
    let mut c = Cols::new(120);
    change(&mut c);
    let p = w.input(file);
    c.write(&p);
    p
}

fn cases(w: &World) -> Vec<Case> {
    let good = w.input("good.parquet");
    let mut out = Vec::new();
    let lx = ["--target", "y", "--features", "x1,x2"];

    // --- block cache flags ---
    let mut extra = lx.to_vec();
    extra.extend(["--precision", "half"]);
    out.push(case(
        "unknown --precision",
        fit(w, std::slice::from_ref(&good), &extra),
        &["--precision", "half", "stored or f32"],
    ));
    let cache_dir = w.out("cache-dir");
    let cache_arg = World::s(&cache_dir);
    let mut extra = lx.to_vec();
    extra.extend(["--cache", cache_arg.as_str(), "--no-cache"]);
    out.push(case(
        "--cache with --no-cache",
        fit(w, std::slice::from_ref(&good), &extra),
        &["--cache", "--no-cache"],
    ));

    // --- files that are not (complete) Parquet ---
    let p = w.input("notes.parquet");
    fs::write(&p, "id,x\n1,2\n").expect("write");
    out.push(case(
        "not a Parquet file",
        fit(w, &[p], &lx),
        &["notes.parquet", "Parquet"],
    ));

    let p = w.input("truncated.parquet");
    let bytes = fs::read(&good).expect("read");
    fs::write(&p, &bytes[..bytes.len() / 2]).expect("write");
    out.push(case(
        "truncated Parquet",
        fit(w, &[p], &lx),
        &["truncated.parquet"],
    ));

    let p = w.input("empty.parquet");
    fs::write(&p, b"").expect("write");
    out.push(case(
        "empty file",
        fit(w, &[p], &lx),
        &["empty.parquet", "0 bytes"],
    ));

    let p = variant(w, "zero_rows.parquet", |c| *c = Cols::new(0));
    out.push(case(
        "zero rows",
        fit(w, &[p], &lx),
        &["zero_rows.parquet", "no rows"],
    ));

    let d = w.input("no_parquet_dir");
    fs::create_dir_all(&d).expect("mkdir");
    fs::write(d.join("readme.txt"), "x").expect("write");
    out.push(case(
        "directory with no Parquet files",
        fit(w, &[d], &lx),
        &["no_parquet_dir", ".parquet"],
    ));

    out.push(case(
        "data path that does not exist",
        fit(w, &[w.input("nowhere.parquet")], &lx),
        &["nowhere.parquet", "does not exist"],
    ));

    // --- target ---
    out.push(case(
        "missing target column",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "label", "--features", "x1,x2"],
        ),
        &["good.parquet", "'label'"],
    ));
    out.push(case(
        "target of the wrong type (text for logistic)",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "cls", "--features", "x1,x2"],
        ),
        &["good.parquet", "'cls'", "logistic"],
    ));
    let p = variant(w, "label_two.parquet", |c| c.y[56] = Some(2));
    out.push(case(
        "logistic label outside {0,1}",
        fit(w, &[p], &lx),
        &["label_two.parquet", "'y'", "row 57", " 2 "],
    ));
    let p = variant(w, "negative_count.parquet", |c| c.cnt[9] = Some(-3));
    out.push(case(
        "negative count for Poisson",
        fit(
            w,
            &[p],
            &[
                "--target",
                "cnt",
                "--features",
                "x1,x2",
                "--loss",
                "poisson",
            ],
        ),
        &["negative_count.parquet", "'cnt'", "row 10", "-3"],
    ));
    let p = variant(w, "all_zero.parquet", |c| c.y = vec![Some(0); 120]);
    out.push(case(
        "all rows one class (logistic)",
        fit(w, &[p], &lx),
        &["all_zero.parquet", "'y'", "both"],
    ));
    let p = variant(w, "one_class.parquet", |c| {
        c.cls = vec![Some("a".into()); 120]
    });
    out.push(case(
        "all rows one class (softmax)",
        fit(
            w,
            &[p],
            &[
                "--target",
                "cls",
                "--features",
                "x1,x2",
                "--loss",
                "softmax",
            ],
        ),
        &["one_class.parquet", "'cls'", "one class"],
    ));
    let p = variant(w, "single_row.parquet", |c| *c = Cols::new(1));
    out.push(case(
        "a single row (squared, ridge)",
        fit(
            w,
            &[p],
            &[
                "--target",
                "x2",
                "--features",
                "x1",
                "--loss",
                "squared",
                "--ridge",
                "1",
            ],
        ),
        &["single_row.parquet", "1 row"],
    ));

    // --- non-finite values ---
    let p = variant(w, "nan_feature.parquet", |c| c.x2[40] = Some(f64::NAN));
    out.push(case(
        "NaN in a feature",
        fit(w, &[p], &lx),
        &["nan_feature.parquet", "'x2'", "row 41", "NaN"],
    ));
    let p = variant(w, "inf_target.parquet", |c| {
        let mut v: Vec<f64> = c.x1.iter().map(|x| x.unwrap_or(0.0)).collect();
        v[7] = f64::INFINITY;
        c.extra
            .push(("amount".into(), Arc::new(Float64Array::from(v))));
    });
    out.push(case(
        "+infinity in the target (squared)",
        fit(
            w,
            &[p],
            &[
                "--target",
                "amount",
                "--features",
                "x2",
                "--loss",
                "squared",
            ],
        ),
        &["inf_target.parquet", "'amount'", "row 8", "+infinity"],
    ));
    let p = variant(w, "inf_weight.parquet", |c| {
        c.w[99] = Some(f64::NEG_INFINITY)
    });
    out.push(case(
        "-infinity in the weight",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--weight", "w"],
        ),
        &["inf_weight.parquet", "'w'", "row 100", "-infinity"],
    ));
    let p = variant(w, "negative_weight.parquet", |c| c.w[3] = Some(-1.0));
    out.push(case(
        "negative weight",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--weight", "w"],
        ),
        &["negative_weight.parquet", "'w'", "row 4", "negative"],
    ));
    let p = variant(w, "zero_weights.parquet", |c| c.w = vec![Some(0.0); 120]);
    out.push(case(
        "all weights zero",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--weight", "w"],
        ),
        &["zero_weights.parquet", "'w'", "zero"],
    ));

    // --- nulls under each policy ---
    let p = variant(w, "null_target.parquet", |c| c.y[11] = None);
    out.push(case(
        "null target (default policy)",
        fit(w, &[p], &lx),
        &[
            "null_target.parquet",
            "'y'",
            "row 12",
            "--skip-missing-target",
        ],
    ));
    let p = variant(w, "null_feature.parquet", |c| c.x1[20] = None);
    out.push(case(
        "null feature (default --missing error)",
        fit(w, &[p], &lx),
        &["null_feature.parquet", "'x1'", "row 21", "--missing mean"],
    ));
    let p = variant(w, "null_weight.parquet", |c| c.w[5] = None);
    out.push(case(
        "null weight (no policy skips it)",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--weight", "w"],
        ),
        &["null_weight.parquet", "'w'", "row 6"],
    ));

    // --- schemas across files ---
    let p = variant(w, "no_x2.parquet", |c| c.drop.push("x2"));
    out.push(case(
        "column missing in the second file",
        fit(w, &[good.clone(), p], &lx),
        &["no_x2.parquet", "'x2'"],
    ));
    let p = variant(w, "x2_text.parquet", |c| {
        let v: Vec<String> = c.x2.iter().map(|x| format!("{:?}", x)).collect();
        c.extra.push(("x2".into(), Arc::new(StringArray::from(v))));
    });
    out.push(case(
        "type class differs in the second file",
        fit(w, &[good.clone(), p], &lx),
        &["x2_text.parquet", "'x2'"],
    ));

    // --- settings ---
    out.push(case(
        "unknown column in --features",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--features", "x1,nope"],
        ),
        &["good.parquet", "'nope'"],
    ));
    out.push(case(
        "duplicated column in --features",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--features", "x1,x1"],
        ),
        &["'x1'", "twice"],
    ));
    out.push(case(
        "feature is the target",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--features", "x1,y"],
        ),
        &["'y'", "target"],
    ));
    out.push(case(
        "negative ridge",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--ridge", "-1"],
        ),
        &["--ridge", "-1"],
    ));
    out.push(case(
        "negative lasso",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--lasso", "-0.5"],
        ),
        &["--lasso", "-0.5"],
    ));
    out.push(case(
        "unknown loss",
        fit(
            w,
            std::slice::from_ref(&good),
            &["--target", "y", "--loss", "probit"],
        ),
        &["probit", "logistic"],
    ));
    let cfg = w.input("unknown_key.toml");
    fs::write(&cfg, "target = \"y\"\nridge = 0.1\nrigde = 0.2\n").expect("write");
    out.push(case(
        "settings file with an unknown key",
        args(&[
            "fit",
            "--config",
            &World::s(&cfg),
            "--data",
            &World::s(&good),
            "--out",
            &World::s(&w.out("model.json")),
            "--quiet",
        ]),
        &["unknown_key.toml", "line 3", "rigde"],
    ));
    let cfg = w.input("wrong_type.toml");
    fs::write(&cfg, "target = \"y\"\n\nmax_passes = \"many\"\n").expect("write");
    out.push(case(
        "settings file with a wrong type",
        args(&[
            "fit",
            "--config",
            &World::s(&cfg),
            "--data",
            &World::s(&good),
            "--out",
            &World::s(&w.out("model.json")),
            "--quiet",
        ]),
        &["wrong_type.toml", "line 3", "max_passes"],
    ));

    // --- more non-finite values: every kind of column and value ---
    let p = variant(w, "neg_inf_feature.parquet", |c| {
        c.x1[64] = Some(f64::NEG_INFINITY)
    });
    out.push(case(
        "-infinity in a feature",
        fit(w, &[p], &lx),
        &["neg_inf_feature.parquet", "'x1'", "row 65", "-infinity"],
    ));
    let p = variant(w, "nan_target.parquet", |c| {
        let mut v: Vec<f64> = c.x1.iter().map(|x| x.unwrap_or(0.0)).collect();
        v[2] = f64::NAN;
        c.extra
            .push(("amount".into(), Arc::new(Float64Array::from(v))));
    });
    out.push(case(
        "NaN in the target (squared)",
        fit(
            w,
            &[p],
            &[
                "--target",
                "amount",
                "--features",
                "x2",
                "--loss",
                "squared",
            ],
        ),
        &["nan_target.parquet", "'amount'", "row 3", "NaN"],
    ));
    let p = variant(w, "nan_weight.parquet", |c| c.w[17] = Some(f64::NAN));
    out.push(case(
        "NaN in the weight",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--weight", "w"],
        ),
        &["nan_weight.parquet", "'w'", "row 18", "NaN"],
    ));

    // --- nulls under the other policies ---
    let p = variant(w, "null_target_mean.parquet", |c| c.y[30] = None);
    out.push(case(
        "null target under --missing mean (the policy covers features only)",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--missing", "mean"],
        ),
        &["null_target_mean.parquet", "'y'", "row 31"],
    ));
    let p = variant(w, "null_feature_skip.parquet", |c| c.x2[44] = None);
    out.push(case(
        "null feature under --skip-missing-target (that flag covers the target only)",
        fit(
            w,
            &[p],
            &[
                "--target",
                "y",
                "--features",
                "x1,x2",
                "--skip-missing-target",
            ],
        ),
        &[
            "null_feature_skip.parquet",
            "'x2'",
            "row 45",
            "--missing mean",
        ],
    ));
    let p = variant(w, "all_null_target.parquet", |c| c.y = vec![None; 120]);
    out.push(case(
        "every target null under --skip-missing-target",
        fit(
            w,
            &[p],
            &[
                "--target",
                "y",
                "--features",
                "x1,x2",
                "--skip-missing-target",
            ],
        ),
        &["all_null_target.parquet", "'y'"],
    ));
    let p = variant(w, "unknown_policy.parquet", |_| {});
    out.push(case(
        "unknown missing-value policy",
        fit(
            w,
            &[p],
            &["--target", "y", "--features", "x1,x2", "--missing", "zero"],
        ),
        &["'zero'", "mean"],
    ));

    // --- settings file: column names, penalties, syntax ---
    let settings = |name: &str, text: &str| -> Vec<String> {
        let cfg = w.input(name);
        fs::write(&cfg, text).expect("write");
        args(&[
            "fit",
            "--config",
            &World::s(&cfg),
            "--data",
            &World::s(&good),
            "--out",
            &World::s(&w.out("model.json")),
            "--quiet",
        ])
    };
    out.push(case(
        "settings file naming an unknown column",
        settings(
            "unknown_column.toml",
            "target = \"y\"\nfeatures = [\"x1\", \"x9\"]\n",
        ),
        &["good.parquet", "'x9'"],
    ));
    out.push(case(
        "settings file naming a column twice",
        settings(
            "twice.toml",
            "target = \"y\"\nfeatures = [\"x2\", \"x2\"]\n",
        ),
        &["'x2'", "twice"],
    ));
    out.push(case(
        "settings file with a key given twice",
        settings("dup_key.toml", "target = \"y\"\nridge = 0.1\nridge = 0.2\n"),
        &["dup_key.toml", "line 3", "ridge"],
    ));
    out.push(case(
        "settings file with a negative penalty",
        settings("neg_ridge.toml", "target = \"y\"\nridge = -0.5\n"),
        &["ridge", "-0.5"],
    ));
    out.push(case(
        "settings file that is not TOML",
        settings("broken.toml", "target = \"y\"\n[[[\n"),
        &["broken.toml", "line 2"],
    ));
    out.push(case(
        "settings file that does not exist",
        args(&[
            "fit",
            "--config",
            &World::s(&w.input("absent.toml")),
            "--data",
            &World::s(&good),
            "--out",
            &World::s(&w.out("model.json")),
            "--quiet",
        ]),
        &["absent.toml"],
    ));
    // `--hash-bits` out of range and the other hashed-feature refusals are rows of the
    // "hashed and sparse features" part below. A damaged block cache is not a refusal:
    // it is rebuilt from Parquet with a warning (tests/cache.rs checks torn, flipped,
    // stale and unwritable caches).

    // --- where the output goes ---
    let mut a = fit(w, std::slice::from_ref(&good), &lx);
    let n = a.len();
    a[n - 4] = World::s(&w.root.join("no_such_dir").join("m.json"));
    out.push(case(
        "--out in a directory that does not exist",
        a,
        &["no_such_dir", "does not exist"],
    ));
    let mut a = fit(w, std::slice::from_ref(&good), &lx);
    a[n - 4] = World::s(&good.join("m.json"));
    out.push(case(
        "--out under a regular file (not writable)",
        a,
        &["good.parquet", "m.json"],
    ));
    let mut a = fit(w, std::slice::from_ref(&good), &lx);
    a[n - 4] = World::s(&w.out("model.run"));
    out.push(case(
        "--out pointing at a directory",
        a,
        &["model.run", "directory"],
    ));

    // --- numerics ---
    let p = variant(w, "overflow.parquet", |c| {
        let v: Vec<f64> = (0..120).map(|i| 1e6 * (i as f64 - 60.0)).collect();
        c.extra
            .push(("big".into(), Arc::new(Float64Array::from(v))));
    });
    out.push(case(
        "Poisson margin that overflows",
        fit(
            w,
            &[p],
            &[
                "--target",
                "cnt",
                "--features",
                "big",
                "--loss",
                "poisson",
                "--no-standardize",
            ],
        ),
        &["overflow.parquet", "Poisson", "overflow"],
    ));

    // --- model files (predict / inspect / evaluate) ---
    let model_text = fs::read_to_string(w.out("model.json")).expect("model");
    let corrupt = w.input("corrupt.json");
    fs::write(&corrupt, &model_text[..model_text.len() / 2]).expect("write");
    let predict = |model: &Path, data: &Path| {
        args(&[
            "predict",
            "--model",
            &World::s(model),
            "--data",
            &World::s(data),
            "--out",
            &World::s(&w.out("scores.parquet")),
        ])
    };
    out.push(case(
        "predict with a corrupt model file",
        predict(&corrupt, &good),
        &["corrupt.json"],
    ));
    let other = w.input("other_version.json");
    fs::write(
        &other,
        model_text.replace("outcore-model/1", "outcore-model/7"),
    )
    .expect("write");
    out.push(case(
        "predict with a model of another format version",
        predict(&other, &good),
        &["other_version.json", "outcore-model/7"],
    ));
    let p = variant(w, "lacks_x2.parquet", |c| c.drop.push("x2"));
    out.push(case(
        "predict on data that lack a model column",
        predict(&w.out("model.json"), &p),
        &["lacks_x2.parquet", "'x2'"],
    ));
    out.push(case(
        "inspect a corrupt model file",
        args(&["inspect", &World::s(&corrupt)]),
        &["corrupt.json"],
    ));
    let p = variant(w, "new_class.parquet", |c| c.cls[33] = Some("d".into()));
    out.push(case(
        "evaluate: a class the model never saw",
        args(&[
            "evaluate",
            "--model",
            &World::s(&w.out("soft.json")),
            "--data",
            &World::s(&p),
        ]),
        &["new_class.parquet", "'cls'", "row 34", "'d'"],
    ));

    // --- hashed and sparse features ---
    let zones = |c: &mut Cols| {
        let v: Vec<Option<String>> = (0..120)
            .map(|i| Some(["harbor", "hill", "mill"][i % 3].to_string()))
            .collect();
        c.extra
            .push(("zone".into(), Arc::new(StringArray::from(v))));
    };
    let p = variant(w, "zones.parquet", zones);
    let zx = ["--target", "y", "--features", "x1", "--categorical", "zone"];
    let mut a = zx.to_vec();
    a.extend(["--hash-bits", "9"]);
    out.push(case(
        "hash bits below 10",
        fit(w, std::slice::from_ref(&p), &a),
        &["--hash-bits", "10", "28", "9"],
    ));
    let mut a = zx.to_vec();
    a.extend(["--hash-bits", "29"]);
    out.push(case(
        "hash bits above 28",
        fit(w, std::slice::from_ref(&p), &a),
        &["--hash-bits", "29"],
    ));
    out.push(case(
        "hash bits with nothing to hash",
        fit(
            w,
            std::slice::from_ref(&p),
            &["--target", "y", "--hash-bits", "12"],
        ),
        &["--hash-bits", "--categorical"],
    ));
    out.push(case(
        "unknown categorical column",
        fit(
            w,
            std::slice::from_ref(&p),
            &["--target", "y", "--categorical", "zone,nosuch"],
        ),
        &["zones.parquet", "'nosuch'"],
    ));
    out.push(case(
        "unknown column in a cross",
        fit(
            w,
            std::slice::from_ref(&p),
            &["--target", "y", "--cross", "zone*nosuch"],
        ),
        &["zones.parquet", "'nosuch'"],
    ));
    out.push(case(
        "float column hashed without a bin width",
        fit(
            w,
            std::slice::from_ref(&p),
            &["--target", "y", "--categorical", "x2"],
        ),
        &["zones.parquet", "'x2'", "x2/WIDTH"],
    ));
    let q = variant(w, "int_lists.parquet", |c| {
        let lists = arrow::array::ListArray::from_iter_primitive::<arrow::datatypes::Int64Type, _, _>(
            (0..120).map(|i| Some(vec![Some(i as i64), Some(1)])),
        );
        c.extra.push(("tags".into(), Arc::new(lists)));
    });
    out.push(case(
        "list column of integers as a token bag",
        fit(w, &[q], &["--target", "y", "--categorical", "tags"]),
        &["int_lists.parquet", "'tags'", "list<utf8>"],
    ));
    let q = variant(w, "vectors.parquet", |c| {
        let index: Vec<i64> = (0..240)
            .map(|k| if k == 2 * 77 + 1 { 50 } else { (k % 7) as i64 })
            .collect();
        let value: Vec<f64> = (0..240).map(|k| 1.0 + (k % 3) as f64).collect();
        let fields = arrow::datatypes::Fields::from(vec![
            Field::new("index", arrow::datatypes::DataType::Int64, false),
            Field::new("value", arrow::datatypes::DataType::Float64, false),
        ]);
        let items = arrow::array::StructArray::new(
            fields.clone(),
            vec![
                Arc::new(Int64Array::from(index)) as ArrayRef,
                Arc::new(Float64Array::from(value)) as ArrayRef,
            ],
            None,
        );
        let offsets = arrow::buffer::OffsetBuffer::from_lengths(std::iter::repeat_n(2, 120));
        let list = arrow::array::ListArray::new(
            Arc::new(Field::new(
                "item",
                arrow::datatypes::DataType::Struct(fields),
                false,
            )),
            offsets,
            Arc::new(items),
            None,
        );
        c.extra.push(("vec".into(), Arc::new(list)));
    });
    out.push(case(
        "sparse vector index outside the declared dimension",
        fit(
            w,
            std::slice::from_ref(&q),
            &["--target", "y", "--sparse-vector", "vec:10"],
        ),
        &["'vec'", "row 78", "vectors.parquet", "50", "10"],
    ));
    out.push(case(
        "sparse vector column of the wrong type",
        fit(
            w,
            std::slice::from_ref(&p),
            &["--target", "y", "--sparse-vector", "zone:10"],
        ),
        &["'zone'", "list<struct"],
    ));
    out.push(case(
        "sparse vector without a dimension",
        fit(
            w,
            std::slice::from_ref(&q),
            &["--target", "y", "--sparse-vector", "vec"],
        ),
        &["--sparse-vector", "COL:DIM"],
    ));
    let pair = variant(w, "vector_pair.parquet", |c| {
        let ids = arrow::array::ListArray::from_iter_primitive::<arrow::datatypes::Int64Type, _, _>(
            (0..120).map(|i| {
                Some(if i == 77 {
                    vec![Some(1), Some(2), Some(3)]
                } else {
                    vec![Some(i % 7), Some(8)]
                })
            }),
        );
        let vals =
            arrow::array::ListArray::from_iter_primitive::<arrow::datatypes::Float64Type, _, _>(
                (0..120).map(|i| Some(vec![Some(0.5), Some(i as f64)])),
            );
        c.extra.push(("ids".into(), Arc::new(ids)));
        c.extra.push(("vals".into(), Arc::new(vals)));
    });
    out.push(case(
        "sparse vector index and value lists of unequal length",
        fit(
            w,
            std::slice::from_ref(&pair),
            &["--target", "y", "--sparse-vector", "ids,vals:10"],
        ),
        &[
            "'ids'",
            "'vals'",
            "row 78",
            "vector_pair.parquet",
            "3 indices",
            "2 values",
        ],
    ));
    out.push(case(
        "sparse vector values column that is not a list of numbers",
        fit(
            w,
            std::slice::from_ref(&pair),
            &["--target", "y", "--sparse-vector", "ids,x1:10"],
        ),
        &["'x1'", "list<number>", "ids,x1:DIM"],
    ));
    out.push(case(
        "sparse vector pair without a values column",
        fit(
            w,
            std::slice::from_ref(&pair),
            &["--target", "y", "--sparse-vector", "ids,:10"],
        ),
        &["--sparse-vector", "IDX,VAL:DIM"],
    ));
    let mut a = zx.to_vec();
    a.extend(["--hash-bits", "28", "--shards", "4"]);
    out.push(case(
        "gradient buffers over the memory limit",
        fit(w, std::slice::from_ref(&p), &a),
        &["gradient buffers", "2048 MB", "--hash-bits", "--shards"],
    ));
    let mut a = zx.to_vec();
    a.push("--inference");
    out.push(case(
        "standard errors of a hashed model",
        fit(w, std::slice::from_ref(&p), &a),
        &["--inference", "hashed"],
    ));
    let lacks = variant(w, "lacks_x1.parquet", |c| c.drop.push("x1"));
    out.push(case(
        "evaluate on data that lack a model column",
        args(&[
            "evaluate",
            "--model",
            &World::s(&w.out("model.json")),
            "--data",
            &World::s(&lacks),
        ]),
        &["lacks_x1.parquet", "'x1'"],
    ));
    let p = variant(w, "eval_label_two.parquet", |c| c.y[70] = Some(2));
    out.push(case(
        "evaluate: logistic label outside {0,1}",
        args(&[
            "evaluate",
            "--model",
            &World::s(&w.out("model.json")),
            "--data",
            &World::s(&p),
        ]),
        &["eval_label_two.parquet", "'y'", "row 71"],
    ));
    out.push(case(
        "evaluate with a corrupt model file",
        args(&[
            "evaluate",
            "--model",
            &World::s(&corrupt),
            "--data",
            &World::s(&good),
        ]),
        &["corrupt.json"],
    ));
    out.push(case(
        "inference with a corrupt model file",
        args(&["inference", &World::s(&corrupt), "--data", &World::s(&good)]),
        &["corrupt.json"],
    ));
    let not_model = w.input("not_model.json");
    fs::write(&not_model, "{\"hello\": 1}\n").expect("write");
    out.push(case(
        "predict with a JSON file that is not a model",
        predict(&not_model, &good),
        &["not_model.json", "format"],
    ));
    let wrong_count = w.input("wrong_count.json");
    let mut m: serde_json::Value = serde_json::from_str(&model_text).expect("model json");
    m["internal"]["coefficients"]
        .as_array_mut()
        .expect("array")
        .pop();
    fs::write(&wrong_count, m.to_string()).expect("write");
    out.push(case(
        "predict with a model whose coefficients do not match its features",
        predict(&wrong_count, &good),
        &["wrong_count.json", "damaged"],
    ));
    let mut a = predict(&w.out("model.json"), &good);
    let k = a.len();
    a[k - 1] = World::s(&w.out("model.run"));
    out.push(case(
        "predict --out pointing at a directory",
        a,
        &["model.run", "directory"],
    ));
    let mut a = predict(&w.out("model.json"), &good);
    a[k - 1] = World::s(&w.root.join("no_such_dir").join("s.parquet"));
    out.push(case(
        "predict --out in a directory that does not exist",
        a,
        &["no_such_dir", "does not exist"],
    ));

    // --- resume ---
    let not_run = w.input("not_a_run");
    fs::create_dir_all(&not_run).expect("mkdir");
    out.push(case(
        "resume of a directory that is not a run directory",
        args(&["resume", &World::s(&not_run), "--quiet"]),
        &["not_a_run", "settings.json"],
    ));
    let torn = w.input("torn.run");
    fs::create_dir_all(&torn).expect("mkdir");
    for f in [
        "settings.json",
        "log.jsonl",
        "checkpoint",
        "checkpoint.prev",
    ] {
        let src = w.out("model.run").join(f);
        if src.exists() {
            fs::copy(&src, torn.join(f)).expect("copy");
        }
    }
    for f in ["checkpoint", "checkpoint.prev"] {
        let mut b = fs::read(torn.join(f))
            .unwrap_or_else(|_| fs::read(torn.join("checkpoint")).expect("ckpt"));
        let k = b.len() / 2;
        b[k] ^= 0xff;
        b.truncate(b.len() - 3);
        fs::write(torn.join(f), b).expect("write");
    }
    out.push(case(
        "resume with both checkpoints corrupt",
        args(&["resume", &World::s(&torn), "--quiet"]),
        &["torn.run", "checkpoint"],
    ));

    // --- path ---
    let good_s = World::s(&good);
    let path_dir = World::s(&w.out("path"));
    let path = |extra: &[&str]| {
        let mut a = args(&[
            "path",
            "--data",
            &good_s,
            "--target",
            "y",
            "--features",
            "x1,x2",
            "--quiet",
            "--out-dir",
            &path_dir,
        ]);
        a.extend(args(extra));
        a
    };
    out.push(case(
        "path without a holdout",
        path(&["--grid", "1:1e-3:3"]),
        &["--holdout"],
    ));
    out.push(case(
        "path: ridge without a grid",
        path(&["--holdout", "0.2", "--penalty", "ridge"]),
        &["--grid"],
    ));
    out.push(case(
        "path: automatic ridge grid",
        path(&["--holdout", "0.2", "--penalty", "ridge", "--grid", "auto:5"]),
        &["--grid"],
    ));
    out.push(case(
        "path: grid that is not START:END:COUNT",
        path(&["--holdout", "0.2", "--grid", "1:2"]),
        &["--grid", "'1:2'"],
    ));
    out.push(case(
        "path: a grid strength of zero",
        path(&["--holdout", "0.2", "--grid", "0:1:3"]),
        &["--grid"],
    ));
    out.push(case(
        "path: elastic net without --mix",
        path(&["--holdout", "0.2", "--penalty", "elastic"]),
        &["--mix"],
    ));
    out.push(case(
        "path: --mix out of range",
        path(&["--holdout", "0.2", "--penalty", "elastic", "--mix", "1.5"]),
        &["--mix"],
    ));
    out.push(case(
        "path: unknown penalty",
        path(&["--holdout", "0.2", "--penalty", "bridge"]),
        &["'bridge'"],
    ));
    out.push(case(
        "path with --ridge",
        path(&["--holdout", "0.2", "--ridge", "1"]),
        &["--ridge"],
    ));
    out.push(case(
        "path: --out-dir is a file",
        args(&[
            "path",
            "--data",
            &good_s,
            "--target",
            "y",
            "--holdout",
            "0.2",
            "--quiet",
            "--out-dir",
            &World::s(&w.out("model.json")),
        ]),
        &["model.json", "--out-dir"],
    ));
    out.push(case(
        "path on a missing target column",
        args(&[
            "path",
            "--data",
            &good_s,
            "--target",
            "nope",
            "--holdout",
            "0.2",
            "--quiet",
            "--out-dir",
            &path_dir,
        ]),
        &["'nope'"],
    ));

    // --- report ---
    out.push(case(
        "report of a directory that is not a run",
        args(&[
            "report",
            &World::s(&not_run),
            "--out",
            &World::s(&w.out("report.html")),
        ]),
        &["not_a_run", "settings.json"],
    ));
    out.push(case(
        "report into a missing directory",
        args(&[
            "report",
            &World::s(&w.out("model.run")),
            "--out",
            &World::s(&w.out("nowhere/report.html")),
        ]),
        &["nowhere"],
    ));
    out
}

#[test]
fn every_hostile_input_exits_two_with_one_line_and_writes_nothing() {
    let w = world();
    let list = cases(&w);
    assert!(list.len() >= 30, "the matrix has {} cases", list.len());
    let mut failures = Vec::new();
    let mut table = Vec::new();
    for c in &list {
        let before = snapshot(&w.root);
        let o = outcore(&c.args);
        let err = String::from_utf8_lossy(&o.stderr).into_owned();
        let lines: Vec<&str> = err.lines().collect();
        let mut problems = Vec::new();
        if o.status.code() != Some(2) {
            problems.push(format!("exit {:?}", o.status.code()));
        }
        if lines.len() != 1 || !lines[0].starts_with("error: ") {
            problems.push(format!("{} stderr lines", lines.len()));
        }
        if !o.stdout.is_empty() {
            problems.push("wrote to stdout".into());
        }
        if err.contains("panicked") {
            problems.push("panicked".into());
        }
        for n in &c.names {
            if !err.contains(n.as_str()) {
                problems.push(format!("does not name {n:?}"));
            }
        }
        let after = snapshot(&w.root);
        let diff = differences(&before, &after);
        if !diff.is_empty() {
            problems.push(format!("touched files: {}", diff.join(", ")));
        }
        table.push(format!(
            "| {} | `{}` |",
            c.name,
            err.trim_end().replace('|', "\\|")
        ));
        if !problems.is_empty() {
            failures.push(format!(
                "{}: {}\n    stderr: {}",
                c.name,
                problems.join("; "),
                err.trim_end()
            ));
        }
    }
    eprintln!("{}", table.join("\n"));
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        list.len(),
        failures.join("\n")
    );
}

/// Flag-syntax errors are clap's usage messages (several lines, exit 2); they too write
/// nothing.
#[test]
fn flag_syntax_errors_exit_two_and_write_nothing() {
    let w = world();
    let good = World::s(&w.input("good.parquet"));
    let model = World::s(&w.out("model.json"));
    let list = [
        args(&[
            "fit",
            "--data",
            &good,
            "--target",
            "y",
            "--out",
            &model,
            "--max-passes",
            "lots",
        ]),
        args(&[
            "fit", "--data", &good, "--target", "y", "--out", &model, "--ridge",
        ]),
        args(&["frobnicate"]),
    ];
    for a in &list {
        let before = snapshot(&w.root);
        let o = outcore(a);
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(2), "{a:?}: {err}");
        assert!(err.starts_with("error: "), "{a:?}: {err}");
        assert!(!err.contains("panicked"), "{a:?}: {err}");
        assert!(
            differences(&before, &snapshot(&w.root)).is_empty(),
            "{a:?} wrote"
        );
    }
}

/// What is not an error: a class absent from a later file, a null target with
/// `--skip-missing-target`, a null feature with `--missing mean`.
#[test]
fn a_class_absent_from_a_later_file_is_fine() {
    let w = world();
    let first = w.input("good.parquet");
    let later = variant(&w, "no_c.parquet", |c| {
        for v in c.cls.iter_mut() {
            if v.as_deref() == Some("c") {
                *v = Some("a".into());
            }
        }
    });
    let o = outcore(&fit(
        &w,
        &[first.clone(), later],
        &[
            "--target",
            "cls",
            "--features",
            "x1,x2",
            "--loss",
            "softmax",
            "--ridge",
            "0.01",
        ],
    ));
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let p = variant(&w, "null_y.parquet", |c| c.y[11] = None);
    let o = outcore(&fit(
        &w,
        &[p],
        &[
            "--target",
            "y",
            "--features",
            "x1,x2",
            "--skip-missing-target",
        ],
    ));
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let p = variant(&w, "null_x.parquet", |c| c.x1[20] = None);
    let o = outcore(&fit(
        &w,
        &[p],
        &["--target", "y", "--features", "x1,x2", "--missing", "mean"],
    ));
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let m = common::read_json(&w.out("model.json"));
    assert!(m["coefficients"].get("x1.missing").is_some(), "{m}");
}

/// A fit that fails after its statistics pass (here: the Poisson margin overflows in
/// the first line search) leaves no run directory behind where there was none.
#[test]
fn a_failed_fit_in_a_fresh_place_leaves_nothing() {
    let w = world();
    let p = variant(&w, "overflow.parquet", |c| {
        let v: Vec<f64> = (0..120).map(|i| 1e6 * (i as f64 - 60.0)).collect();
        c.extra
            .push(("big".into(), Arc::new(Float64Array::from(v))));
    });
    let fresh = w.root.join("fresh");
    fs::create_dir_all(&fresh).expect("mkdir");
    let o = outcore(&args(&[
        "fit",
        "--data",
        &World::s(&p),
        "--target",
        "cnt",
        "--features",
        "big",
        "--loss",
        "poisson",
        "--no-standardize",
        "--out",
        &World::s(&fresh.join("m.json")),
    ]));
    assert_eq!(
        o.status.code(),
        Some(2),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let left: Vec<_> = fs::read_dir(&fresh).expect("read_dir").collect();
    assert!(left.is_empty(), "left behind: {left:?}");
}

/// Stdout closed early (`outcore inspect M.json | head -1`, `outcore fit ... --json |
/// head -c 10`): the command ends cleanly, without a panic or a message.
#[test]
fn a_closed_stdout_ends_cleanly() {
    use std::process::Stdio;
    let w = world();
    let good = World::s(&w.input("good.parquet"));
    let runs = [
        (args(&["inspect", &World::s(&w.out("model.json"))]), 0),
        (
            args(&[
                "fit",
                "--data",
                &good,
                "--target",
                "y",
                "--features",
                "x1,x2",
                "--json",
                "--out",
                &World::s(&w.out("piped.json")),
            ]),
            0,
        ),
    ];
    for (a, code) in runs {
        let mut child = Command::new(env!("CARGO_BIN_EXE_outcore"))
            .args(&a)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("spawn");
        // Close the reading end at once: every write to stdout meets a broken pipe.
        drop(child.stdout.take());
        let o = child.wait_with_output().expect("wait");
        let err = String::from_utf8_lossy(&o.stderr);
        assert_eq!(o.status.code(), Some(code), "{a:?}: {err}");
        assert!(
            !err.contains("panicked") && !err.contains("error"),
            "{a:?}: {err}"
        );
    }
    // And through a real shell pipe into head.
    let sh = format!(
        "'{}' inspect '{}' | head -1 >/dev/null; exit ${{PIPESTATUS[0]}}",
        env!("CARGO_BIN_EXE_outcore"),
        w.out("model.json").display()
    );
    let o = Command::new("bash")
        .args(["-c", &sh])
        .output()
        .expect("bash");
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert!(
        o.stderr.is_empty(),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}
