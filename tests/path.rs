//! `outcore path` through the binary: the chosen strength against a brute-force grid of
//! independent fits, warm starts against cold starts, the table files, and that a failed
//! or refused path leaves an earlier output directory alone.
//!
//! The brute force is independent of the path's code: one `outcore fit` process per
//! strength (each with its own statistics pass and a start from the null model), scored
//! by `outcore predict`, and the holdout log-loss computed here from the scores and the
//! labels, with the held-out rows given by the published XXH3 split
//! (`outcore::holdout::RowSplit`, itself checked in `tests/holdout.rs`).

mod common;

use std::path::Path;

use common::{column_f64, read_json, read_parquet_batch, run_outcore, test_data};
use outcore::holdout::RowSplit;
use serde_json::Value;

const HOLDOUT: f64 = 0.3;
const GRID: &str = "1:1e-3:7";
/// Tight enough that warm and cold fits agree to far better than strengths differ.
const TOL: &str = "1e-8";

fn breast_cancer() -> std::path::PathBuf {
    // scikit-learn 1.9.1 load_breast_cancer, standardized (provenance in expected.json).
    test_data("reference/breast_cancer_logit_l2_1/data.parquet")
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

fn path_args(data: &Path, out_dir: &Path, extra: &[&str]) -> Vec<String> {
    let mut a: Vec<String> = [
        "path",
        "--data",
        &s(data),
        "--target",
        "y",
        "--holdout",
        &HOLDOUT.to_string(),
        "--tol",
        TOL,
        "--threads",
        "2",
        "--out-dir",
        &s(out_dir),
        "--json",
        "--quiet",
    ]
    .iter()
    .map(|x| x.to_string())
    .collect();
    a.extend(extra.iter().map(|x| x.to_string()));
    a
}

fn run_json(args: &[String]) -> Value {
    let o = run_outcore(args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "outcore {:?} failed: {}",
        args,
        String::from_utf8_lossy(&o.stderr)
    );
    serde_json::from_slice(&o.stdout).expect("one JSON object on stdout")
}

/// Holdout log-loss of a scores file: mean over held-out rows of
/// `−y log p − (1 − y) log(1 − p)` from the `margin` column (stable form).
fn holdout_log_loss(scores: &Path, labels: &[f64], split: &RowSplit) -> f64 {
    let batch = read_parquet_batch(scores);
    let z = column_f64(&batch, "margin");
    assert_eq!(z.len(), labels.len());
    let mut sum = 0.0;
    let mut n = 0.0;
    for (row, (&zi, &y)) in z.iter().zip(labels).enumerate() {
        if !split.holds_out_position(0, row as u64) {
            continue;
        }
        // log(1 + e^z) − y z, computed without overflow.
        let softplus = zi.max(0.0) + (-zi.abs()).exp().ln_1p();
        sum += softplus - y * zi;
        n += 1.0;
    }
    sum / n
}

#[test]
fn chosen_ridge_strength_matches_a_brute_force_grid_on_breast_cancer() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = breast_cancer();
    let out_dir = dir.path().join("path");
    let summary = run_json(&path_args(
        &data,
        &out_dir,
        &["--penalty", "ridge", "--grid", GRID],
    ));
    let table = read_json(&out_dir.join("path.json"));
    let steps = table["steps"].as_array().expect("steps");
    assert_eq!(steps.len(), 7);
    let labels = column_f64(&read_parquet_batch(&data), "y");
    let split = RowSplit::new(HOLDOUT, None).expect("split");
    let mut brute = Vec::new();
    for (i, step) in steps.iter().enumerate() {
        let ridge = step["ridge"].as_f64().expect("ridge");
        // An independent fit of this strength, from the null model.
        let model = dir.path().join(format!("fit{i}.json"));
        let o = run_outcore(&[
            "fit".to_string(),
            "--data".into(),
            s(&data),
            "--target".into(),
            "y".into(),
            "--holdout".into(),
            HOLDOUT.to_string(),
            "--ridge".into(),
            ridge.to_string(),
            "--tol".into(),
            TOL.into(),
            "--threads".into(),
            "2".into(),
            "--quiet".into(),
            "--out".into(),
            s(&model),
        ]);
        assert_eq!(
            o.status.code(),
            Some(0),
            "{}",
            String::from_utf8_lossy(&o.stderr)
        );
        let scores = dir.path().join(format!("scores{i}.parquet"));
        common::predict(&model, &[&data], &scores, &[]);
        let loss = holdout_log_loss(&scores, &labels, &split);
        // The path's saved model of this strength, scored the same way.
        let saved = out_dir.join(step["model"].as_str().expect("model path"));
        let saved_scores = dir.path().join(format!("saved{i}.parquet"));
        common::predict(&saved, &[&data], &saved_scores, &[]);
        let saved_loss = holdout_log_loss(&saved_scores, &labels, &split);
        let table_loss = step["holdout_loss"].as_f64().expect("holdout loss");
        // Warm and cold fits reach the same optimum to the tolerance: losses agree to
        // far better than the differences between strengths.
        assert!(
            (saved_loss - table_loss).abs() <= 1e-10 * table_loss,
            "strength {i}: table {table_loss} vs saved model {saved_loss}"
        );
        assert!(
            (loss - table_loss).abs() <= 1e-5 * table_loss,
            "strength {i}: path {table_loss} vs independent fit {loss}"
        );
        brute.push(loss);
    }
    let best = brute
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, _)| i)
        .expect("a best strength");
    assert_eq!(
        table["best"].as_u64(),
        Some(best as u64),
        "brute force: {brute:?}"
    );
    assert_eq!(table["chosen"].as_u64(), Some(best as u64));
    assert_eq!(summary["chosen"].as_u64(), Some(best as u64));
    // The best is inside the grid, not at an end (otherwise the test shows little).
    assert!(best > 0 && best < 6, "best at the edge: {brute:?}");
    // chosen.json is the chosen strength's model.
    let chosen = read_json(&out_dir.join("chosen.json"));
    let saved = read_json(&out_dir.join(steps[best]["model"].as_str().expect("model")));
    assert_eq!(chosen["coefficients"], saved["coefficients"]);
    // The CSV holds the same table.
    let csv = std::fs::read_to_string(out_dir.join("path.csv")).expect("path.csv");
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines.len(), 8);
    assert!(lines[0].starts_with("index,strength,ridge,lasso,holdout_loss,holdout_se"));
    let best_line: Vec<&str> = lines[1 + best].split(',').collect();
    assert_eq!(best_line[10], "1");
    let csv_loss: f64 = best_line[4].parse().expect("a number");
    assert_eq!(
        csv_loss,
        steps[best]["holdout_loss"].as_f64().expect("loss")
    );
}

#[test]
fn one_standard_error_rule_chooses_a_stronger_penalty_within_reach() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out_dir = dir.path().join("path");
    run_json(&path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "ridge", "--grid", GRID, "--one-se"],
    ));
    let table = read_json(&out_dir.join("path.json"));
    let steps = table["steps"].as_array().expect("steps");
    let loss = |i: usize| steps[i]["holdout_loss"].as_f64().expect("loss");
    let best = table["best"].as_u64().expect("best") as usize;
    let chosen = table["chosen"].as_u64().expect("chosen") as usize;
    let se = steps[best]["holdout_se"].as_f64().expect("se");
    assert!(se > 0.0);
    // The rule, recomputed: the strongest strength within one standard error.
    let expect = (0..steps.len())
        .find(|&i| loss(i) <= loss(best) + se)
        .expect("some");
    assert_eq!(chosen, expect);
    assert!(chosen <= best);
}

#[test]
fn warm_starts_need_fewer_passes_than_cold_starts() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = breast_cancer();
    let warm = run_json(&path_args(
        &data,
        &dir.path().join("warm"),
        &["--penalty", "ridge", "--grid", GRID],
    ));
    let cold = run_json(&path_args(
        &data,
        &dir.path().join("cold"),
        &["--penalty", "ridge", "--grid", GRID, "--cold"],
    ));
    let w = warm["fit_passes"].as_u64().expect("passes");
    let c = cold["fit_passes"].as_u64().expect("passes");
    eprintln!("breast cancer ridge {GRID}: warm {w} passes, cold {c} passes");
    assert!(w < c, "warm {w} vs cold {c}");
    // Both choose the same strength.
    assert_eq!(warm["chosen"], cold["chosen"]);
}

#[test]
fn lasso_path_starts_where_every_coefficient_is_zero() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out_dir = dir.path().join("lasso");
    run_json(&path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "lasso", "--grid", "auto:6", "--span", "0.01"],
    ));
    let table = read_json(&out_dir.join("path.json"));
    let steps = table["steps"].as_array().expect("steps");
    let start = table["auto_start"].as_f64().expect("auto start");
    assert_eq!(steps[0]["strength"].as_f64(), Some(start));
    assert_eq!(steps[0]["nonzero"].as_u64(), Some(0));
    // Just below the start a coefficient leaves zero: the start is the smallest such
    // strength. (Checked with an independent fit at 0.97 × start.)
    let model = dir.path().join("below.json");
    let o = run_outcore(&[
        "fit".to_string(),
        "--data".into(),
        s(&breast_cancer()),
        "--target".into(),
        "y".into(),
        "--holdout".into(),
        HOLDOUT.to_string(),
        "--lasso".into(),
        (0.97 * start).to_string(),
        "--quiet".into(),
        "--out".into(),
        s(&model),
    ]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let m = read_json(&model);
    let nonzero = m["coefficients"]
        .as_object()
        .expect("coefficients")
        .values()
        .filter(|v| v.as_f64() != Some(0.0))
        .count();
    assert!(
        nonzero >= 1,
        "no coefficient left zero just below the start"
    );
    // Weaker strengths keep more coefficients.
    let counts: Vec<u64> = steps
        .iter()
        .map(|s| s["nonzero"].as_u64().expect("n"))
        .collect();
    assert!(counts.last() > counts.first(), "{counts:?}");
    // Every strength has its own run directory with a log.
    for step in steps {
        let run = out_dir.join(step["run"].as_str().expect("run"));
        assert!(run.join("log.jsonl").is_file(), "{}", run.display());
        assert!(run.join("settings.json").is_file());
    }
}

#[test]
fn a_refused_path_leaves_an_earlier_out_dir_alone() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out_dir = dir.path().join("path");
    run_json(&path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "ridge", "--grid", "1:1e-2:3"],
    ));
    let before = std::fs::read(out_dir.join("path.json")).expect("path.json");
    // Bad data: a file that is not Parquet.
    let bad = dir.path().join("bad.parquet");
    std::fs::write(&bad, "not parquet").expect("write");
    let o = run_outcore(&path_args(
        &bad,
        &out_dir,
        &["--penalty", "ridge", "--grid", "1:1e-2:3"],
    ));
    assert_eq!(o.status.code(), Some(2));
    assert_eq!(
        std::fs::read(out_dir.join("path.json")).expect("kept"),
        before
    );
    // No staging directory is left behind.
    let names: Vec<String> = std::fs::read_dir(dir.path())
        .expect("list")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    assert!(
        names.iter().all(|n| !n.contains(".partial-")),
        "left behind: {names:?}"
    );
    // A finished path replaces the earlier one.
    run_json(&path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "ridge", "--grid", "1:1e-2:4"],
    ));
    let table = read_json(&out_dir.join("path.json"));
    assert_eq!(table["steps"].as_array().map(Vec::len), Some(4));
}

#[test]
fn an_interrupted_path_exits_130_and_keeps_the_earlier_out_dir() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out_dir = dir.path().join("path");
    run_json(&path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "ridge", "--grid", "1:1e-2:3"],
    ));
    let before = std::fs::read(out_dir.join("path.json")).expect("path.json");
    // A long path: many strengths at a tight tolerance.
    let args = path_args(
        &breast_cancer(),
        &out_dir,
        &["--penalty", "ridge", "--grid", "1:1e-3:400"],
    );
    let child = std::process::Command::new(common::outcore_bin())
        .args(&args)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("spawn");
    let staging = dir.path().join(format!("path.partial-{}", child.id()));
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(120);
    while !staging.join("models").join("s002.json").exists() && std::time::Instant::now() < deadline
    {
        std::thread::sleep(std::time::Duration::from_millis(5));
    }
    std::process::Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .expect("kill");
    let o = child.wait_with_output().expect("wait");
    let err = String::from_utf8_lossy(&o.stderr).into_owned();
    if o.status.code() == Some(0) {
        // The path finished before the signal arrived.
        return;
    }
    assert_eq!(o.status.code(), Some(130), "{err}");
    assert!(o.stdout.is_empty(), "an interrupted path prints no summary");
    assert_eq!(
        std::fs::read(out_dir.join("path.json")).expect("kept"),
        before,
        "the earlier out-dir changed"
    );
    assert!(staging.join("models").join("s001.json").is_file(), "{err}");
    assert!(err.contains(&staging.display().to_string()), "{err}");
}
