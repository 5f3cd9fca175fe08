//! The first evaluation of a fit from the statistics pass (`objective::start`) against
//! a real pass over the data at the same point: the same objective, gradient, held-out
//! loss and share of wrong answers to rounding, for every one-output loss, with
//! weights, nulls (imputed, with indicator features), a holdout, a column far from 0
//! and with and without standardization — and no pass read.
//!
//! The pass it is compared with is checked against outside references elsewhere
//! (`tests/reference_fits.rs`: NIST StRD, statsmodels, scikit-learn).

mod common;

use std::sync::Arc;

use arrow::array::{ArrayRef, BooleanArray, Float64Array, Int32Array};
use arrow::datatypes::{DataType, Field, Schema};
use arrow::record_batch::RecordBatch;

use outcore::features::{self, Design, FeatureRequest, MissingPolicy};
use outcore::holdout::RowSplit;
use outcore::objective::start::start_totals;
use outcore::objective::{GlmObjective, Layout, Loss};
use outcore::optim::Objective;
use outcore::pass::PassPlan;
use outcore::source::Source;

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

fn write_data(path: &std::path::Path, rows: usize) {
    let mut s = Stream(41);
    let mut cols: [Vec<Option<f64>>; 3] = [vec![], vec![], vec![]];
    let (mut small, mut flag, mut w, mut yl, mut ys, mut yp) =
        (vec![], vec![], vec![], vec![], vec![], vec![]);
    for _ in 0..rows {
        let far = 1.0e6 + 3.0 * s.next();
        let gappy = (s.next() >= 0.15).then(|| 2.0 * s.next() - 1.0);
        let other = (s.next() >= 0.05).then(|| 10.0 * s.next());
        let k = (s.next() * 7.0) as i32;
        let b = s.next() < 0.4;
        let z = 0.8 * (far - 1.0e6 - 1.5) + 0.6 * gappy.unwrap_or(0.0) - 0.1 * k as f64
            + if b { 0.4 } else { -0.2 };
        cols[0].push(Some(far));
        cols[1].push(gappy);
        cols[2].push(other);
        small.push(k);
        flag.push(b);
        w.push(0.25 + 1.5 * s.next());
        yl.push((s.next() < 1.0 / (1.0 + (-z).exp())) as i32 as f64);
        ys.push(3.0 + 2.0 * z + s.next());
        yp.push((3.0 * s.next() * (0.3 * z).exp()).floor());
    }
    let schema = Arc::new(Schema::new(vec![
        Field::new("far", DataType::Float64, true),
        Field::new("gappy", DataType::Float64, true),
        Field::new("other", DataType::Float64, true),
        Field::new("small", DataType::Int32, false),
        Field::new("flag", DataType::Boolean, false),
        Field::new("w", DataType::Float64, false),
        Field::new("yl", DataType::Float64, false),
        Field::new("ys", DataType::Float64, false),
        Field::new("yp", DataType::Float64, false),
    ]));
    let f = |v: &Vec<Option<f64>>| Arc::new(Float64Array::from(v.clone())) as ArrayRef;
    let g = |v: Vec<f64>| Arc::new(Float64Array::from(v)) as ArrayRef;
    let batch = RecordBatch::try_new(
        schema.clone(),
        vec![
            f(&cols[0]),
            f(&cols[1]),
            f(&cols[2]),
            Arc::new(Int32Array::from(small)),
            Arc::new(BooleanArray::from(flag)),
            g(w),
            g(yl),
            g(ys),
            g(yp),
        ],
    )
    .expect("batch");
    common::write_parquet(path, schema, &[batch], 1500);
}

#[test]
fn start_evaluation_equals_a_pass_at_the_starting_point() {
    let dir = tempfile::tempdir().expect("temp dir");
    let path = dir.path().join("data.parquet");
    write_data(&path, 6000);
    let source = Source::open_with_block_rows(&[path.display().to_string()], 1024).expect("open");
    let mut checked = 0;
    for (loss, target) in [
        (Loss::Logistic, "yl"),
        (Loss::Squared, "ys"),
        (Loss::Poisson, "yp"),
    ] {
        for standardize in [true, false] {
            for holdout in [false, true] {
                let request = FeatureRequest {
                    target: target.into(),
                    weight: Some("w".into()),
                    features: Some(
                        ["far", "gappy", "other", "small", "flag"]
                            .map(String::from)
                            .to_vec(),
                    ),
                    loss,
                    missing: MissingPolicy::Mean,
                    skip_missing_target: false,
                    standardize,
                    sparse: None,
                };
                let split = holdout.then(|| RowSplit::new(0.25, None).expect("split"));
                let plan = PassPlan::new(&source, 3, 2);
                let candidates = features::resolve_columns(&source, &request).expect("columns");
                let summary = features::collect_stats_split(
                    &source,
                    &plan,
                    &request,
                    &candidates,
                    split.as_ref(),
                )
                .expect("stats");
                let (design, _) = Design::new(&request, &summary).expect("design");
                let design = design.with_holdout(split);
                // Two indicator features (gappy, other) besides the five columns.
                assert_eq!(design.width(), 7);
                let layout = Layout::new(loss, design.width(), 0, true);
                for b0 in [0.3, -1.2, 2.0] {
                    let mut x = vec![0.0; layout.dim()];
                    x[0] = b0;
                    let totals = start_totals(&design, &summary, layout, &x)
                        .expect("a start with every coefficient 0 is known");
                    let ridge = 1e-3;
                    let mut pass = GlmObjective::new(
                        &source,
                        &plan,
                        &design,
                        layout,
                        ridge,
                        summary.weight_sum,
                    );
                    let mut known = GlmObjective::new(
                        &source,
                        &plan,
                        &design,
                        layout,
                        ridge,
                        summary.weight_sum,
                    )
                    .with_start_totals(&x, totals);
                    let (mut g1, mut g2) = (vec![0.0; layout.dim()], vec![0.0; layout.dim()]);
                    let f1 = pass.eval(&x, &mut g1).expect("pass");
                    let f2 = known.eval(&x, &mut g2).expect("known");
                    let what =
                        format!("{loss:?} standardize {standardize} holdout {holdout} b0 {b0}");
                    assert_eq!(pass.passes(), 1, "{what}");
                    assert_eq!(known.passes(), 0, "{what}: the known start read the data");
                    assert!((f1 - f2).abs() <= 1e-12 * f1.abs(), "{what}: {f1} vs {f2}");
                    let scale = g1.iter().fold(1.0f64, |m, v| m.max(v.abs()));
                    for (i, (a, b)) in g1.iter().zip(&g2).enumerate() {
                        assert!(
                            (a - b).abs() <= 1e-11 * scale,
                            "{what}: gradient {i}: {a} vs {b}"
                        );
                    }
                    let (e1, e2) = (
                        pass.last_extras().expect("extras"),
                        known.last_extras().expect("extras"),
                    );
                    assert!((e1.wrong_share - e2.wrong_share).abs() <= 1e-12, "{what}");
                    assert_eq!(e1.holdout_loss.is_some(), holdout, "{what}");
                    assert_eq!(
                        e1.holdout_loss.is_some(),
                        e2.holdout_loss.is_some(),
                        "{what}"
                    );
                    if let (Some(h1), Some(h2)) = (e1.holdout_loss, e2.holdout_loss) {
                        assert!((h1 - h2).abs() <= 1e-12 * h1.abs(), "{what}: {h1} vs {h2}");
                        assert!(
                            (e1.holdout_weight - e2.holdout_weight).abs() <= 1e-9,
                            "{what}"
                        );
                    }
                    // A point with a nonzero coefficient is not a known start.
                    let mut y = x.clone();
                    y[2] = 0.1;
                    assert!(start_totals(&design, &summary, layout, &y).is_none());
                    checked += 1;
                }
            }
        }
    }
    assert_eq!(checked, 36);
}
