//! `outcore report`: the ROC points against scikit-learn, the SVG structure against
//! figures computed here from the model file and `outcore predict` scores, every loss's
//! charts, and the page opened in a real headless browser (Debian `chromium`).
//!
//! The browser test fails when `CI` is set and chromium is missing; elsewhere it prints a
//! note and passes without the browser.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::{column_f64, read_json, read_parquet_batch, run_outcore, test_data};
use outcore::holdout::RowSplit;
use outcore::metrics::ScoreRanking;
use outcore::report::{roc_figure, thin, ROC_POINTS};

fn s(p: &Path) -> String {
    p.display().to_string()
}

fn run_ok(args: &[String]) {
    let o = run_outcore(args);
    assert_eq!(
        o.status.code(),
        Some(0),
        "outcore {args:?} failed: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

fn strings(list: &[&str]) -> Vec<String> {
    list.iter().map(|x| x.to_string()).collect()
}

/// scikit-learn's `roc_curve(drop_intermediate=False)` points (tests/data/metrics/*/roc.json,
/// written by tests/reference/roc_reference.py) against `ScoreRanking::roc` on the same
/// scores and weights.
#[test]
fn roc_points_match_scikit_learn() {
    for (case, weight) in [
        ("logistic_breast_cancer_weighted", "weight"),
        ("logistic_tied_scores", "w"),
    ] {
        let dir = test_data(&format!("metrics/{case}"));
        let expected = read_json(&dir.join("roc.json"));
        let batch = read_parquet_batch(&dir.join("predictions.parquet"));
        let (y, z, w) = (
            column_f64(&batch, "y"),
            column_f64(&batch, "margin"),
            column_f64(&batch, weight),
        );
        let mut exact = ScoreRanking::new(u64::MAX);
        let mut hist = ScoreRanking::new(0);
        for i in 0..y.len() {
            exact.push(z[i], y[i] == 1.0, w[i]);
            hist.push(z[i], y[i] == 1.0, w[i]);
        }
        let roc = exact.roc();
        let fpr = expected["fpr"].as_array().expect("fpr");
        let tpr = expected["tpr"].as_array().expect("tpr");
        assert_eq!(roc.len(), fpr.len(), "{case}: number of points");
        for (k, (p, (f, t))) in roc.iter().zip(fpr.iter().zip(tpr)).enumerate() {
            let (f, t) = (f.as_f64().expect("f"), t.as_f64().expect("t"));
            assert!(
                (p.0 - f).abs() <= 1e-12 && (p.1 - t).abs() <= 1e-12,
                "{case} point {k}: {p:?} vs scikit-learn ({f}, {t})"
            );
        }
        // The histogram curve's trapezoid area is the histogram AUC, within its bound of
        // scikit-learn's roc_auc_score.
        let hroc = hist.roc();
        let area: f64 = hroc
            .windows(2)
            .map(|q| (q[1].0 - q[0].0) * (q[1].1 + q[0].1) / 2.0)
            .sum();
        let (auc, _) = hist.finish();
        let sk = expected["auc"].as_f64().expect("auc");
        assert!((area - auc.value.expect("auc")).abs() < 1e-12, "{case}");
        assert!(
            (area - sk).abs() <= auc.error_bound + 1e-12,
            "{case}: {area} vs {sk}"
        );
    }
}

/// A fitted breast-cancer model with a 30 % holdout, its run directory and report.
struct Fitted {
    _dir: tempfile::TempDir,
    root: PathBuf,
    data: PathBuf,
    model: PathBuf,
    report: PathBuf,
}

fn fitted(loss: &str, data: PathBuf, target: &str, extra: &[&str]) -> Fitted {
    let dir = tempfile::tempdir().expect("tempdir");
    let root = dir.path().to_path_buf();
    let model = root.join("model.json");
    let mut a = strings(&[
        "fit",
        "--data",
        &s(&data),
        "--target",
        target,
        "--loss",
        loss,
        "--holdout",
        "0.3",
        "--quiet",
        "--out",
        &s(&model),
    ]);
    a.extend(strings(extra));
    run_ok(&a);
    let report = root.join("report.html");
    run_ok(&strings(&[
        "report",
        &s(&root.join("model.run")),
        "--out",
        &s(&report),
    ]));
    Fitted {
        _dir: dir,
        root,
        data,
        model,
        report,
    }
}

fn breast_cancer() -> PathBuf {
    // scikit-learn 1.9.1 load_breast_cancer, standardized (provenance in expected.json).
    test_data("reference/breast_cancer_logit_l2_1/data.parquet")
}

/// The `<svg id="ID" ...>...</svg>` element of a page.
fn svg<'a>(html: &'a str, id: &str) -> &'a str {
    let start = html
        .find(&format!("<svg id=\"{id}\""))
        .unwrap_or_else(|| panic!("no svg {id}"));
    let end = html[start..].find("</svg>").expect("closed") + start;
    &html[start..end + 6]
}

/// Values of attribute `attr` of every element that carries `marker`, in order.
fn attrs(fragment: &str, marker: &str, attr: &str) -> Vec<String> {
    fragment
        .match_indices(marker)
        .map(|(i, _)| {
            let rest = &fragment[i..];
            let end = rest.find('>').expect("tag end");
            let tag = &rest[..end];
            let key = format!("{attr}=\"");
            let a = tag
                .find(&key)
                .unwrap_or_else(|| panic!("no {attr} in {tag}"))
                + key.len();
            let b = tag[a..].find('"').expect("quote") + a;
            tag[a..b].to_string()
        })
        .collect()
}

#[test]
fn roc_polyline_is_the_held_out_roc_of_the_predicted_scores() {
    let f = fitted("logistic", breast_cancer(), "y", &["--ridge", "0.01"]);
    let html = std::fs::read_to_string(&f.report).expect("report");
    // The held-out rows' ROC, computed here from `outcore predict` margins and labels.
    let scores = f.root.join("scores.parquet");
    common::predict(&f.model, &[&f.data], &scores, &[]);
    let z = column_f64(&read_parquet_batch(&scores), "margin");
    let y = column_f64(&read_parquet_batch(&f.data), "y");
    let split = RowSplit::new(0.3, None).expect("split");
    let mut rows: Vec<(f64, f64)> = (0..z.len())
        .filter(|&i| split.holds_out_position(0, i as u64))
        .map(|i| (z[i], y[i]))
        .collect();
    rows.sort_by(|a, b| b.0.total_cmp(&a.0));
    let pos = rows.iter().filter(|r| r.1 == 1.0).count() as f64;
    let neg = rows.len() as f64 - pos;
    let mut points = vec![(0.0, 0.0)];
    let (mut tp, mut fp) = (0.0, 0.0);
    let mut i = 0;
    while i < rows.len() {
        let mut j = i;
        while j < rows.len() && rows[j].0 == rows[i].0 {
            if rows[j].1 == 1.0 {
                tp += 1.0;
            } else {
                fp += 1.0;
            }
            j += 1;
        }
        points.push((fp / neg, tp / pos));
        i = j;
    }
    let chart = roc_figure(&points);
    let expected: Vec<String> = thin(&points, ROC_POINTS)
        .iter()
        .map(|p| {
            let (x, y) = chart.to_px(*p);
            format!("{x:.2},{y:.2}")
        })
        .collect();
    let roc_svg = svg(&html, "chart-roc");
    let drawn = attrs(roc_svg, "<polyline class=\"series\"", "points");
    assert_eq!(drawn.len(), 1, "one ROC polyline");
    let drawn: Vec<&str> = drawn[0].split(' ').collect();
    assert_eq!(
        drawn,
        expected.iter().map(String::as_str).collect::<Vec<_>>()
    );
    // The summary's AUC is the area under these points (trapezoids).
    let area: f64 = points
        .windows(2)
        .map(|q| (q[1].0 - q[0].0) * (q[1].1 + q[0].1) / 2.0)
        .sum();
    let auc_text = format!("AUC (held-out)</th><td>{}", &format!("{area:.6}")[..7]);
    assert!(html.contains(&auc_text), "summary lacks {auc_text}");
}

#[test]
fn bar_chart_shows_the_largest_standardized_coefficients_in_order() {
    let f = fitted("logistic", breast_cancer(), "y", &["--ridge", "0.01"]);
    let html = std::fs::read_to_string(&f.report).expect("report");
    let bars = svg(&html, "chart-coefficients");
    let names = attrs(bars, "<rect class=\"bar\"", "data-name");
    let values: Vec<f64> = attrs(bars, "<rect class=\"bar\"", "data-value")
        .iter()
        .map(|v| v.parse().expect("number"))
        .collect();
    // From the model file: original-scale coefficient × the feature's standard deviation.
    let model = read_json(&f.model);
    let mut expected: Vec<(String, f64)> = model["coefficients"]
        .as_object()
        .expect("coefficients")
        .iter()
        .map(|(k, v)| {
            let sd = model["standardization"][k]["std"].as_f64().expect("std");
            (k.clone(), v.as_f64().expect("coef") * sd)
        })
        .collect();
    expected.sort_by(|a, b| b.1.abs().total_cmp(&a.1.abs()));
    expected.truncate(20);
    assert_eq!(names.len(), 20);
    for (k, ((n, v), (en, ev))) in names.iter().zip(&values).zip(&expected).enumerate() {
        assert_eq!(n, en, "bar {k}");
        assert!((v - ev).abs() <= 1e-9 * ev.abs(), "bar {k}: {v} vs {ev}");
    }
    // Bars get shorter from top to bottom.
    let widths: Vec<f64> = attrs(bars, "<rect class=\"bar\"", "width")
        .iter()
        .map(|w| w.parse().expect("number"))
        .collect();
    assert!(
        widths.windows(2).all(|w| w[0] >= w[1] - 0.011),
        "{widths:?}"
    );
}

#[test]
fn every_loss_gets_its_charts() {
    // Squared: diabetes (scikit-learn load_diabetes copy in tests/data/metrics).
    let sq = fitted(
        "squared",
        test_data("metrics/squared_diabetes/data.parquet"),
        "y",
        &[],
    );
    let html = std::fs::read_to_string(&sq.report).expect("report");
    for id in [
        "chart-convergence",
        "chart-holdout",
        "chart-predicted",
        "chart-coefficients",
    ] {
        assert!(
            svg(&html, id).contains("<polyline") || svg(&html, id).contains("<rect class=\"bar\""),
            "{id}"
        );
    }
    assert!(!html.contains("chart-roc"));
    // Softmax: iris; a confusion table instead of ROC.
    let soft = fitted(
        "softmax",
        test_data("metrics/softmax_iris_weighted/data.parquet"),
        "y",
        &["--ridge", "0.01"],
    );
    let html = std::fs::read_to_string(&soft.report).expect("report");
    assert!(html.contains("actual \\ predicted"));
    assert!(html.contains("chart-coefficients"));
    // Poisson: RAND HIE.
    let poi = fitted(
        "poisson",
        test_data("metrics/poisson_randhie_weighted/data.parquet"),
        "y",
        &["--ridge", "0.001"],
    );
    let html = std::fs::read_to_string(&poi.report).expect("report");
    assert!(svg(&html, "chart-predicted").contains("<polyline"));
}

#[test]
fn a_path_report_marks_the_chosen_strength() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out_dir = dir.path().join("path");
    run_ok(&strings(&[
        "path",
        "--data",
        &s(&breast_cancer()),
        "--target",
        "y",
        "--holdout",
        "0.3",
        "--penalty",
        "ridge",
        "--grid",
        "1:1e-4:5",
        "--quiet",
        "--out-dir",
        &s(&out_dir),
    ]));
    let report = dir.path().join("path.html");
    run_ok(&strings(&["report", &s(&out_dir), "--out", &s(&report)]));
    let html = std::fs::read_to_string(&report).expect("report");
    let chart = svg(&html, "chart-path");
    assert!(chart.contains("class=\"callout\""));
    assert!(chart.contains("chosen: "));
    assert_eq!(chart.matches("class=\"error-bar\"").count(), 5);
    // Log axis labelled with powers of ten.
    assert!(chart.contains("10<tspan dy=\"-7\" font-size=\"10\">-4</tspan>"));
    assert!(html.contains("chart-roc") && html.contains("chart-calibration"));
}

/// `chromium`, or `None` (with a note) when it is not installed outside CI.
fn chromium() -> Option<PathBuf> {
    for name in ["chromium", "chromium-browser"] {
        if let Ok(o) = Command::new("sh")
            .arg("-c")
            .arg(format!("command -v {name}"))
            .output()
        {
            let path = String::from_utf8_lossy(&o.stdout).trim().to_string();
            if o.status.success() && !path.is_empty() {
                return Some(PathBuf::from(path));
            }
        }
    }
    if std::env::var_os("CI").is_some() {
        panic!("chromium is not installed; CI installs it in .ci/run (apt-get install chromium)");
    }
    eprintln!(
        "note: chromium is not installed; the headless-browser check of the report was skipped"
    );
    None
}

#[test]
fn the_report_opens_in_a_headless_browser_without_errors() {
    let Some(browser) = chromium() else {
        return;
    };
    let f = fitted("logistic", breast_cancer(), "y", &["--ridge", "0.01"]);
    let profile = f.root.join("profile");
    let url = format!("file://{}", f.report.display());
    let common_flags = [
        "--headless".to_string(),
        "--no-sandbox".into(),
        "--disable-gpu".into(),
        format!("--user-data-dir={}", profile.display()),
    ];
    let dom = Command::new(&browser)
        .args(&common_flags)
        .args(["--enable-logging=stderr", "--v=0", "--dump-dom", &url])
        .output()
        .expect("chromium runs");
    assert!(dom.status.success(), "chromium --dump-dom failed");
    let text = String::from_utf8_lossy(&dom.stdout);
    let log = String::from_utf8_lossy(&dom.stderr);
    for bad in ["Uncaught", "ERROR:CONSOLE", ":CONSOLE"] {
        assert!(!log.contains(bad), "browser console: {log}");
    }
    // Parsed: the DOM the browser built holds every chart, each with drawn content.
    for id in [
        "chart-convergence",
        "chart-holdout",
        "chart-roc",
        "chart-calibration",
        "chart-coefficients",
    ] {
        let chart = svg(&text, id);
        assert!(
            chart.contains("<polyline") || chart.contains("<rect class=\"bar\""),
            "{id} is empty in the browser's DOM"
        );
    }
    assert!(text.contains("</table>"));
    let png = f.root.join("report.png");
    let shot = Command::new(&browser)
        .args(&common_flags)
        .args([
            format!("--screenshot={}", png.display()),
            "--window-size=1200,3000".into(),
            url.clone(),
        ])
        .output()
        .expect("chromium runs");
    assert!(shot.status.success(), "chromium --screenshot failed");
    let bytes = std::fs::read(&png).expect("screenshot written");
    assert!(bytes.len() > 20_000, "screenshot of {} bytes", bytes.len());
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
}

#[test]
fn report_refuses_a_directory_that_is_no_run_and_writes_nothing() {
    let dir = tempfile::tempdir().expect("tempdir");
    let out = dir.path().join("r.html");
    let o = run_outcore(&strings(&["report", &s(dir.path()), "--out", &s(&out)]));
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("settings.json"));
    assert!(!out.exists());
}
