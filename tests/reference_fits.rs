//! End-to-end reference fits: `outcore fit` (the binary) on the reference cases stored in
//! `tests/data/reference/<case>/` (copies of the external reference collection; each
//! `expected.json` carries its provenance), compared with the expected values by the
//! per-case rule `|got − expected| ≤ abs + rel·|expected|` from `expected.json`.
//!
//! The reference objective is the SUMMED loss with penalties l2, l1; `outcore` minimizes
//! the mean form, so every fit passes `--ridge l2/W --lasso l1/W`
//! (`objective.mean_form`) and `fit.objective` is compared with `objective_mean_form`.
//!
//! Sources of the expected values, named next to each check: NIST StRD (certified
//! values), statsmodels, scikit-learn, scipy (the reference generator's scipy L-BFGS-B +
//! Newton polish, cross-checked against scikit-learn), as each case's `provenance` says.
//!
//! Stopping: fits run with a tight `--tol` and a generous `--max-passes`. A fit must end
//! `converged` (exit 0), or — when the tolerance asked for is below what float64 rounding
//! of the objective resolves — `flat` / `line-search-failed` (exit 1); it must never run
//! out of passes. The values must then meet the case tolerances either way.
//!
//! Run with `--nocapture` to see every compared value and one `MEASURE` line per fit.

mod common;

use common::*;
use serde_json::Value;
use std::path::{Path, PathBuf};

const MAX_PASSES: &str = "20000";

/// How one fit of a reference case is run.
#[derive(Clone)]
struct Spec {
    case: &'static str,
    file: &'static str,
    loss: &'static str,
    standardize: bool,
    tol: f64,
    extra: Vec<String>,
}

impl Spec {
    fn new(case: &'static str, loss: &'static str) -> Spec {
        Spec {
            case,
            file: "data.parquet",
            loss,
            standardize: true,
            tol: 1e-10,
            extra: Vec::new(),
        }
    }
    fn file(mut self, f: &'static str) -> Spec {
        self.file = f;
        self
    }
    fn raw_scale(mut self) -> Spec {
        self.standardize = false;
        self
    }
    fn tol(mut self, t: f64) -> Spec {
        self.tol = t;
        self
    }
    fn extra(mut self, args: &[&str]) -> Spec {
        self.extra.extend(args.iter().map(|s| s.to_string()));
        self
    }
    fn label(&self) -> String {
        format!(
            "{}/{} {} tol={:e}",
            self.case,
            self.file,
            if self.standardize {
                "standardize"
            } else {
                "no-standardize"
            },
            self.tol
        )
    }
    /// The `outcore fit` arguments (without `--out`/`--run`), data given as `data`.
    fn args(&self, data: &[PathBuf]) -> Vec<String> {
        let e = load_expected(self.case);
        let mut a: Vec<String> = vec!["--data".into()];
        a.extend(data.iter().map(|p| p.display().to_string()));
        a.extend([
            "--target".into(),
            json_at(&e, &["label_column"]).as_str().unwrap().to_string(),
            "--features".into(),
            expected_features(&e).join(","),
            "--loss".into(),
            self.loss.into(),
            "--tol".into(),
            format!("{:e}", self.tol),
            "--max-passes".into(),
            MAX_PASSES.into(),
        ]);
        if let Some(w) = e["weight_column"].as_str() {
            a.extend(["--weight".into(), w.to_string()]);
        }
        let (ridge, lasso) = mean_form_penalties(&e);
        if ridge > 0.0 {
            a.extend(["--ridge".into(), format!("{ridge:e}")]);
        }
        if lasso > 0.0 {
            a.extend(["--lasso".into(), format!("{lasso:e}")]);
        }
        if !self.standardize {
            a.push("--no-standardize".into());
        }
        a.extend(self.extra.iter().cloned());
        a
    }
    fn run(&self, dir: &Path) -> FitOutcome {
        self.run_on(dir, &[reference_file(self.case, self.file)])
    }
    fn run_on(&self, dir: &Path, data: &[PathBuf]) -> FitOutcome {
        let name = format!(
            "{}_{}_{}",
            self.case,
            self.file.trim_end_matches(".parquet"),
            if self.standardize { "std" } else { "raw" }
        );
        let out = fit_in(dir, &name, &self.args(data));
        eprintln!("{}: {}", self.label(), out.summary());
        out
    }
}

/// The fit ended at the optimum as far as float64 resolves it: `converged` (exit 0), or
/// `flat` / `line-search-failed` (exit 1, tolerance below the rounding floor); never a
/// budget stop, and no NaN/inf in the reported values.
fn assert_reached_optimum(out: &FitOutcome, label: &str) {
    let m = out.model();
    let stop = out.stop();
    match (out.code, stop) {
        (0, "converged") => {}
        (1, "flat") | (1, "line-search-failed") => eprintln!(
            "  note: {label} stopped `{stop}` at gradient_max {:.2e} (float64 floor of this case at this --tol)",
            out.gradient_max()
        ),
        _ => panic!(
            "{label}: expected a converged fit, got {}\nstderr: {}",
            out.summary(),
            out.stderr
        ),
    }
    for (name, v) in model_params(m) {
        assert!(v.is_finite(), "{label}: {name} = {v}");
    }
    assert!(out.objective().is_finite(), "{label}: objective not finite");
}

/// Compares the model's coefficients with an expected block and its mean-form objective
/// with `objective_mean_form`; prints one MEASURE line; panics outside tolerance.
fn compare(
    out: &FitOutcome,
    label: &str,
    block: &Value,
    coef_tol: Tol,
    objective_mean_form: f64,
    obj_tol: Tol,
) -> Report {
    let mut got = model_params(out.model());
    let mut exp = expected_params(block);
    // Multinomial: the reference reports intercepts centered to sum 0 ("intercepts
    // centered first"); center both sides.
    center_intercepts(&mut got);
    center_intercepts(&mut exp);
    let mut r = Report::new(label);
    r.check_params(&got, &exp, coef_tol);
    r.check("objective", out.objective(), objective_mean_form, obj_tol);
    let coef_rel = r
        .items
        .iter()
        .filter(|c| c.name != "objective")
        .map(|c| rel_err(c.got, c.expected))
        .fold(0.0, f64::max);
    let coef_abs = r
        .items
        .iter()
        .filter(|c| c.name != "objective")
        .map(|c| (c.got - c.expected).abs())
        .fold(0.0, f64::max);
    eprintln!(
        "MEASURE | {label} | coef max rel {:.2e} | coef max abs {:.2e} | objective rel {:.2e} | worst/bound {:.3} | passes {} | stop {} |",
        coef_rel,
        coef_abs,
        rel_err(out.objective(), objective_mean_form),
        r.worst_ratio(),
        out.passes(),
        out.stop()
    );
    r.assert_ok();
    r
}

/// Fit + optimum check + comparison with the top-level `expected` block.
fn check_plain(spec: &Spec, dir: &Path) -> FitOutcome {
    let e = load_expected(spec.case);
    let out = spec.run(dir);
    assert_reached_optimum(&out, &spec.label());
    compare(
        &out,
        &spec.label(),
        &e["expected"],
        Tol::of_case(&e, "coefficients"),
        json_f64(&e, &["expected", "objective_mean_form"]),
        Tol::of_case(&e, "objective"),
    );
    out
}

/// Fit + optimum check + comparison with `expected_with_standardization.original_scale`,
/// and the model's reported standardization statistics against the case's.
fn check_standardized(spec: &Spec, dir: &Path) -> FitOutcome {
    assert!(spec.standardize);
    let e = load_expected(spec.case);
    let ews = &e["expected_with_standardization"];
    let out = spec.run(dir);
    assert_reached_optimum(&out, &spec.label());
    check_standardization_stats(&out, ews, &format!("{} statistics", spec.label()));
    compare(
        &out,
        &spec.label(),
        &ews["original_scale"],
        Tol::of_case(&e, "coefficients"),
        json_f64(ews, &["objective_mean_form"]),
        Tol::of_case(&e, "objective"),
    );
    out
}

/// The model file's `standardization` block equals the weighted mean and weighted
/// population standard deviation stated by the case (to 1e-12 relative).
fn check_standardization_stats(out: &FitOutcome, block: &Value, label: &str) {
    let st = &out.model()["standardization"];
    let mut r = Report::new(label);
    let tol = Tol::new(1e-15, 1e-12);
    for (f, m) in block["standardization_mean"].as_object().unwrap() {
        r.check(
            format!("mean:{f}"),
            st[f]["mean"].as_f64().unwrap_or(f64::NAN),
            m.as_f64().unwrap(),
            tol,
        );
    }
    for (f, s) in block["standardization_sd_population"].as_object().unwrap() {
        r.check(
            format!("std:{f}"),
            st[f]["std"].as_f64().unwrap_or(f64::NAN),
            s.as_f64().unwrap(),
            tol,
        );
    }
    r.assert_ok();
}

fn tempdir() -> tempfile::TempDir {
    tempfile::tempdir().expect("temp dir")
}

// ---------------------------------------------------------------------------------------
// NIST StRD Longley
// ---------------------------------------------------------------------------------------

/// Source: NIST StRD, Linear Least Squares Regression, dataset Longley (certified values).
/// Standardization ON (the default), so the ill-conditioned problem (cond 4.9e9 as
/// stored) is solved on the centered/scaled columns and reported on the stored scale.
#[test]
fn longley_linear_nist_certified_values() {
    let dir = tempdir();
    let case = "longley_linear_nist";
    let e = load_expected(case);
    let spec = Spec::new(case, "squared").tol(1e-11);
    let out = check_plain(&spec, dir.path());
    // NIST StRD: at least 7 significant digits (LRE >= 7) of every certified parameter
    // (the case's `coefficients_aim`, rel 1e-7).
    let aim = Tol::of_case(&e, "coefficients_aim");
    let got = model_params(out.model());
    let mut r = Report::new("longley NIST aim: LRE >= 7");
    r.check_params(&got, &expected_params(&e["expected"]), aim);
    for c in &r.items {
        eprintln!("  LRE {:<20} {:.2}", c.name, lre(c.got, c.expected));
    }
    r.assert_ok();
    // NIST StRD certified residual sum of squares: F = RSS/2, mean form RSS/(2n).
    let rss = json_f64(&e, &["expected", "other", "residual_sum_of_squares"]);
    let n = json_f64(&e, &["objective", "sum_of_weights_W"]);
    assert!(
        rel_err(out.objective(), rss / (2.0 * n)) <= 1e-9,
        "RSS/(2n): got {}, certified {}",
        out.objective(),
        rss / (2.0 * n)
    );
}

// ---------------------------------------------------------------------------------------
// Breast cancer, 3 raw columns, unpenalized logistic (statsmodels)
// ---------------------------------------------------------------------------------------

/// Source: statsmodels 0.15.0 Logit(y, [1, X]).fit(method='newton', tol=1e-13).
#[test]
fn breast_cancer3_logit_unpenalized_statsmodels() {
    let dir = tempdir();
    let case = "breast_cancer3_logit_unpenalized";
    let e = load_expected(case);
    for spec in [
        Spec::new(case, "logistic").tol(1e-12),
        Spec::new(case, "logistic").tol(1e-12).raw_scale(),
    ] {
        let out = check_plain(&spec, dir.path());
        // statsmodels: coefficients to 1e-6 relative.
        let mut r = Report::new(format!("{} vs statsmodels, rel 1e-6", spec.label()));
        r.check_params(
            &model_params(out.model()),
            &expected_params(&e["expected"]),
            Tol::new(0.0, 1e-6),
        );
        // statsmodels Logit llf = −F at the optimum (summed form: F = W · mean form).
        let w = json_f64(&e, &["objective", "sum_of_weights_W"]);
        r.check(
            "log_likelihood",
            -w * out.objective(),
            json_f64(&e, &["expected", "log_likelihood"]),
            Tol::of_case(&e, "log_likelihood"),
        );
        r.assert_ok();
    }
}

// ---------------------------------------------------------------------------------------
// Breast cancer, 30 standardized columns, L2 logistic (scipy reference generator)
// ---------------------------------------------------------------------------------------

/// Source: scipy L-BFGS-B (gtol 1e-13) + damped Newton polish (reference generator),
/// cross-checked with scikit-learn LogisticRegression. `data.parquet` holds standardized
/// features: fitted as stored (`--no-standardize`) and with standardization ON (a no-op
/// here) against `expected`; `raw.parquet` with standardization ON against
/// `expected.original_scale`.
fn breast_cancer_l2(case: &'static str) {
    let dir = tempdir();
    let e = load_expected(case);
    // Objective to 1e-9 relative (the case's objective tolerance).
    assert!(Tol::of_case(&e, "objective").rel <= 1e-9);
    check_plain(&Spec::new(case, "logistic").raw_scale(), dir.path());
    check_plain(&Spec::new(case, "logistic"), dir.path());
    let spec = Spec::new(case, "logistic").file("raw.parquet");
    let out = spec.run(dir.path());
    assert_reached_optimum(&out, &spec.label());
    check_standardization_stats(
        &out,
        &e["expected"]["other"],
        &format!("{} statistics", spec.label()),
    );
    compare(
        &out,
        &spec.label(),
        &e["expected"]["original_scale"],
        Tol::of_case(&e, "original_scale_coefficients"),
        json_f64(&e, &["expected", "objective_mean_form"]),
        Tol::of_case(&e, "objective"),
    );
}

#[test]
fn breast_cancer_logit_l2_1_scipy() {
    breast_cancer_l2("breast_cancer_logit_l2_1");
}

#[test]
fn breast_cancer_logit_l2_100_scipy() {
    breast_cancer_l2("breast_cancer_logit_l2_100");
}

// ---------------------------------------------------------------------------------------
// Softmax, Poisson, lasso
// ---------------------------------------------------------------------------------------

/// Source: scipy L-BFGS-B + pseudo-inverse Newton polish (reference generator), symmetric
/// softmax parametrization, cross-checked with scikit-learn LogisticRegression(C=1).
#[test]
fn iris_multinomial_l2_scipy() {
    let dir = tempdir();
    let case = "iris_multinomial_l2";
    let plain = check_plain(&Spec::new(case, "softmax").raw_scale(), dir.path());
    let std = check_standardized(&Spec::new(case, "softmax"), dir.path());
    for out in [&plain, &std] {
        // Symmetric parametrization with ridge > 0: every class has coefficients and the
        // reported intercepts sum to 0.
        let m = out.model();
        assert_eq!(m["classes"], serde_json::json!(["0", "1", "2"]));
        let s: f64 = m["intercept"]
            .as_object()
            .unwrap()
            .values()
            .map(|v| v.as_f64().unwrap())
            .sum();
        assert!(s.abs() < 1e-9, "intercepts sum to {s}");
    }
}

/// Source: scipy L-BFGS-B + damped Newton polish (reference generator).
#[test]
fn randhie_poisson_l2_scipy() {
    let dir = tempdir();
    let case = "randhie_poisson_l2";
    check_plain(&Spec::new(case, "poisson").raw_scale(), dir.path());
    check_standardized(&Spec::new(case, "poisson"), dir.path());
}

/// Source: scikit-learn Lasso (coordinate descent) for the support and signs; values
/// solved exactly in rational arithmetic on that support (KKT verified exactly).
/// Features as stored (`--no-standardize`): coefficients that are zero in the reference
/// must be exactly 0.0 (OWL-QN gives exact zeros).
#[test]
fn diabetes_linear_l1_sklearn_exact() {
    let dir = tempdir();
    let case = "diabetes_linear_l1";
    let e = load_expected(case);
    let out = check_plain(&Spec::new(case, "squared").raw_scale(), dir.path());
    let m = out.model();
    let nonzero: Vec<&str> = e["expected"]["nonzero_features"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    for f in expected_features(&e) {
        let got = m["coefficients"][&f].as_f64().unwrap();
        if nonzero.contains(&f.as_str()) {
            assert!(got != 0.0, "{f} should be nonzero");
        } else {
            assert_eq!(got, 0.0, "{f}: reference zero, got {got:e}");
        }
    }
}

/// Source: as above, `expected_with_standardization` (all ten coefficients nonzero).
#[test]
fn diabetes_linear_l1_standardized_sklearn_exact() {
    let dir = tempdir();
    check_standardized(&Spec::new("diabetes_linear_l1", "squared"), dir.path());
}

// ---------------------------------------------------------------------------------------
// Frequency weights == duplicated rows
// ---------------------------------------------------------------------------------------

/// Both fits of a weighted/duplicated pair reach the same optimum: objective to the
/// stricter of 1e-9 and the case's stated property (rel 1e-10), coefficients to the
/// property tolerance (rel 1e-5 / abs 1e-7).
fn assert_same_optimum(a: &FitOutcome, b: &FitOutcome, label: &str) {
    let mut r = Report::new(label);
    let pa = model_params(a.model());
    r.check_params(&pa, &model_params(b.model()), Tol::new(1e-7, 1e-5));
    r.check(
        "objective",
        a.objective(),
        b.objective(),
        Tol::new(0.0, 1e-10),
    );
    eprintln!(
        "MEASURE | {label} | coef max rel {:.2e} | coef max abs {:.2e} | objective rel {:.2e} | passes {} vs {} |",
        r.max_rel("coef").max(r.max_rel("intercept")),
        r.max_abs("coef").max(r.max_abs("intercept")),
        rel_err(a.objective(), b.objective()),
        a.passes(),
        b.passes()
    );
    r.assert_ok();
}

/// Source: statsmodels 0.15.0 GLM(Binomial, freq_weights) IRLS; the same expected values
/// for the weighted file and for its row-duplicated twin. Standardization ON (default).
#[test]
fn freq_weights_equal_duplicated_rows_unpenalized_statsmodels() {
    let dir = tempdir();
    let w = check_plain(
        &Spec::new("breast_cancer3_logit_freq_weights", "logistic").tol(1e-12),
        dir.path(),
    );
    let d = check_plain(
        &Spec::new("breast_cancer3_logit_rows_duplicated", "logistic").tol(1e-12),
        dir.path(),
    );
    assert_same_optimum(&w, &d, "unpenalized: weights vs duplicated rows");
}

/// Source: scipy L-BFGS-B + damped Newton polish on the weighted objective (reference
/// generator), cross-checked with scikit-learn LogisticRegression(sample_weight). With
/// standardization ON the statistics must be the weighted ones (zero-weight rows count
/// for nothing) for the pair to agree: `expected_with_standardization`.
#[test]
fn freq_weights_equal_duplicated_rows_l2_standardized_scipy() {
    let dir = tempdir();
    let w = check_standardized(
        &Spec::new("breast_cancer3_logit_l2_freq_weights", "logistic"),
        dir.path(),
    );
    let d = check_standardized(
        &Spec::new("breast_cancer3_logit_l2_rows_duplicated", "logistic"),
        dir.path(),
    );
    assert_same_optimum(&w, &d, "l2 standardized: weights vs duplicated rows");
    // Raw scale (`--no-standardize`) against the top-level `expected` block.
    let w = check_plain(
        &Spec::new("breast_cancer3_logit_l2_freq_weights", "logistic").raw_scale(),
        dir.path(),
    );
    let d = check_plain(
        &Spec::new("breast_cancer3_logit_l2_rows_duplicated", "logistic").raw_scale(),
        dir.path(),
    );
    assert_same_optimum(&w, &d, "l2 raw scale: weights vs duplicated rows");
}

// ---------------------------------------------------------------------------------------
// Separable data
// ---------------------------------------------------------------------------------------

/// Source: separability proven by the reference generator with scipy.optimize.linprog
/// (HiGHS); the required behaviour is the case's `expected.required_behaviour`.
#[test]
fn iris_separable_logit_unpenalized_reports_separation() {
    let dir = tempdir();
    let case = "iris_separable_logit_unpenalized";
    let e = load_expected(case);
    let data = reference_file(case, "data.parquet");
    let spec = Spec::new(case, "logistic").tol(1e-10);
    let out = spec.run(dir.path());
    // Not converged: exit 1, stop "separable" (there is no finite optimum).
    assert_eq!(out.code, 1, "{}", out.summary());
    assert_eq!(out.stop(), "separable", "{}", out.summary());
    let m = out.model();
    let params = model_params(m);
    for (n, v) in &params {
        assert!(v.is_finite(), "{n} = {v}");
    }
    let n = json_f64(&e, &["objective", "sum_of_weights_W"]);
    let f_summed = n * out.objective();
    assert!(out.objective().is_finite() && out.objective() >= 0.0);
    // Required: summed objective F < 1.0 (F = n·log 2 = 69.3 at zero).
    assert!(f_summed < 1.0, "summed objective {f_summed} >= 1");

    // Every row classified correctly: margins from the model file's coefficients on the
    // data read back, and `outcore predict`'s margin/probability columns.
    let batch = read_parquet_batch(&data);
    let y = column_f64(&batch, "y");
    let b0 = param(&params, "intercept").unwrap();
    let mut eta = vec![b0; y.len()];
    for f in expected_features(&e) {
        let beta = m["coefficients"][&f].as_f64().unwrap();
        for (t, x) in eta.iter_mut().zip(column_f64(&batch, &f)) {
            *t += beta * x;
        }
    }
    let scores = dir.path().join("scores.parquet");
    predict(&out.model_path, &[&data], &scores, &["y"]);
    let sb = read_parquet_batch(&scores);
    let margin = column_f64(&sb, "margin");
    let prob = column_f64(&sb, "probability");
    assert_eq!(column_f64(&sb, "y"), y, "predict keeps rows in order");
    let mut f_check = 0.0;
    for i in 0..y.len() {
        let sign = 2.0 * y[i] - 1.0;
        assert!(sign * eta[i] > 0.0, "row {i}: y={} eta={}", y[i], eta[i]);
        assert!(
            sign * margin[i] > 0.0,
            "row {i}: y={} margin={}",
            y[i],
            margin[i]
        );
        assert!((margin[i] - eta[i]).abs() <= 1e-9 * (1.0 + eta[i].abs()));
        assert!(
            prob[i].is_finite() && (prob[i] > 0.5) == (y[i] == 1.0),
            "row {i}: p={}",
            prob[i]
        );
        // log(1 + e^{-s·eta}), stable.
        let z = -sign * eta[i];
        f_check += if z > 0.0 {
            z + (-z).exp().ln_1p()
        } else {
            z.exp().ln_1p()
        };
    }
    // The reported objective is the mean loss at the reported coefficients.
    assert!(
        rel_err(out.objective(), f_check / n) <= 1e-6,
        "objective {} vs recomputed {}",
        out.objective(),
        f_check / n
    );

    // Required: a tighter tolerance / larger budget must not give a larger objective.
    let loose = Spec::new(case, "logistic")
        .tol(1e-6)
        .run(&dir.path().join("loose").tap_mkdir());
    assert!(
        out.objective() <= loose.objective(),
        "tol 1e-10 objective {} > tol 1e-6 objective {}",
        out.objective(),
        loose.objective()
    );
    eprintln!(
        "MEASURE | {} | summed F {:.3e} | min |margin| {:.3} | passes {} | stop {} |",
        spec.label(),
        f_summed,
        eta.iter().map(|v| v.abs()).fold(f64::INFINITY, f64::min),
        out.passes(),
        out.stop()
    );
}

/// Source: scipy L-BFGS-B + damped Newton polish (reference generator), cross-checked
/// with scikit-learn LogisticRegression(newton-cholesky).
#[test]
fn iris_separable_logit_l2_scipy() {
    let dir = tempdir();
    let case = "iris_separable_logit_l2";
    check_plain(&Spec::new(case, "logistic").raw_scale(), dir.path());
    check_standardized(&Spec::new(case, "logistic"), dir.path());
}

trait TapMkdir {
    fn tap_mkdir(self) -> Self;
}
impl TapMkdir for PathBuf {
    fn tap_mkdir(self) -> Self {
        std::fs::create_dir_all(&self).expect("mkdir");
        self
    }
}

// ---------------------------------------------------------------------------------------
// Same data, one file vs three files
// ---------------------------------------------------------------------------------------

/// The same rows in one file and split over three files (different sizes and row-group
/// sizes, written here with the parquet ArrowWriter) give the same model to 1e-12
/// relative (coefficients, intercept and objective). Source of the values also checked: scipy reference generator
/// (`breast_cancer_logit_l2_100`, raw columns, standardization ON).
#[test]
fn one_file_equals_three_files() {
    let dir = tempdir();
    let case = "breast_cancer_logit_l2_100";
    let e = load_expected(case);
    let src = reference_file(case, "raw.parquet");
    let batch = read_parquet_batch(&src);
    assert_eq!(batch.num_rows(), 569);
    let parts = split_batch(&batch, &[100, 350]);
    let mut files = Vec::new();
    for (i, (part, rg)) in parts.iter().zip([7usize, 64, 1000]).enumerate() {
        let p = dir.path().join(format!("part{i}.parquet"));
        write_parquet(&p, schema_of(part), std::slice::from_ref(part), rg);
        files.push(p);
    }
    assert_eq!(parquet_row_groups(&files[0]), 15);
    assert_eq!(parquet_row_groups(&files[1]), 4);
    assert_eq!(parquet_row_groups(&files[2]), 1);

    // Row groups and files cut the blocks differently, so the sums round differently and
    // the two fits agree to the optimizer's tolerance, not bitwise: at --tol 1e-13 the
    // objectives agree to 1e-12 and the coefficients to a few 1e-12 relative (observed
    // below 1e-12 with one tiling of the kernel, 3.9e-12 with another: the flattest
    // directions of this objective move most; at --tol 1e-10 about 2e-10), hence 1e-10.
    let spec = Spec::new(case, "logistic")
        .file("raw.parquet")
        .tol(1e-13)
        .extra(&["--threads", "2", "--shards", "2"]);
    let one = spec.run_on(
        &dir.path().join("one").tap_mkdir(),
        std::slice::from_ref(&src),
    );
    let three = spec.run_on(&dir.path().join("three").tap_mkdir(), &files);
    assert_reached_optimum(&one, "one file");
    assert_reached_optimum(&three, "three files");
    assert_eq!(one.model()["fit"]["rows"], three.model()["fit"]["rows"]);

    let mut r = Report::new("one file vs three files, coefficients rel 1e-10");
    r.check_params(
        &model_params(three.model()),
        &model_params(one.model()),
        Tol::new(0.0, 1e-10),
    );
    r.check(
        "objective",
        three.objective(),
        one.objective(),
        Tol::new(0.0, 1e-12),
    );
    eprintln!(
        "MEASURE | one vs three files | coef max rel {:.2e} | objective rel {:.2e} | passes {} vs {} |",
        r.max_rel("coef").max(r.max_rel("intercept")),
        rel_err(three.objective(), one.objective()),
        one.passes(),
        three.passes()
    );
    r.assert_ok();
    // And both against the reference values.
    compare(
        &three,
        "three files vs reference",
        &e["expected"]["original_scale"],
        Tol::of_case(&e, "original_scale_coefficients"),
        json_f64(&e, &["expected", "objective_mean_form"]),
        Tol::of_case(&e, "objective"),
    );
}

// ---------------------------------------------------------------------------------------
// Thread independence
// ---------------------------------------------------------------------------------------

/// With a fixed shard count the result does not depend on the thread count: bitwise
/// identical `intercept`, `coefficients` and `fit.objective` (JSON text and f64 bits).
/// Case: `randhie_poisson_l2` (20190 rows), small blocks so each shard has many.
#[test]
fn thread_count_does_not_change_the_fit() {
    let dir = tempdir();
    let case = "randhie_poisson_l2";
    let mut runs = Vec::new();
    for threads in ["1", "2", "3"] {
        let spec = Spec::new(case, "poisson").extra(&[
            "--threads",
            threads,
            "--shards",
            "2",
            "--block-rows",
            "1000",
        ]);
        let out = spec.run_on(
            &dir.path().join(format!("t{threads}")).tap_mkdir(),
            &[reference_file(case, "data.parquet")],
        );
        assert_reached_optimum(&out, &format!("threads {threads}"));
        runs.push((threads, out));
    }
    let text = |o: &FitOutcome, key: &str| -> String {
        let m = o.model();
        match key {
            "objective" => m["fit"]["objective"].to_string(),
            k => m[k].to_string(),
        }
    };
    let (_, first) = &runs[0];
    for (threads, other) in &runs[1..] {
        for key in ["intercept", "coefficients", "objective"] {
            assert_eq!(
                text(first, key),
                text(other, key),
                "{key}: threads 1 vs {threads}"
            );
        }
        let a = model_params(first.model());
        let b = model_params(other.model());
        assert_eq!(a.len(), b.len());
        for ((na, va), (nb, vb)) in a.iter().zip(&b) {
            assert_eq!(na, nb);
            assert_eq!(va.to_bits(), vb.to_bits(), "{na}: threads 1 vs {threads}");
        }
        assert_eq!(first.objective().to_bits(), other.objective().to_bits());
        assert_eq!(first.passes(), other.passes());
    }
    eprintln!(
        "MEASURE | threads 1/2/3, shards 2 | bitwise identical | passes {} |",
        first.passes()
    );
}
