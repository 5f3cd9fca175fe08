//! Throughput of one evaluation pass (cost and gradient) over Parquet data, with one
//! and with two threads, on seeded demo data written under the system temp directory.
//!
//! Run with `cargo bench --bench pass`. The data (200 000 rows by default, or
//! `OUTCORE_BENCH_ROWS`) are generated once per run; nothing is committed.

use std::path::PathBuf;

use criterion::{criterion_group, criterion_main, Criterion, Throughput};

use outcore::demo::{write_demo, DemoOptions, FEATURE_COLUMNS};
use outcore::features::{self, Design, FeatureRequest, MissingPolicy};
use outcore::objective::{GlmObjective, Layout, Loss};
use outcore::optim::Objective;
use outcore::pass::PassPlan;
use outcore::source::Source;

fn bench_data() -> PathBuf {
    let rows: u64 = std::env::var("OUTCORE_BENCH_ROWS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(200_000);
    let dir = std::env::temp_dir().join(format!("outcore-bench-{rows}"));
    if !dir.join("orders-00000.parquet").exists() {
        let options = DemoOptions {
            rows,
            ..DemoOptions::default()
        };
        write_demo(&dir, &options).expect("demo data for the benchmark");
    }
    dir
}

fn pass_throughput(c: &mut Criterion) {
    let dir = bench_data();
    let source = Source::open(&[dir.to_string_lossy().into_owned()]).expect("open");
    let request = FeatureRequest {
        target: "late".into(),
        weight: None,
        features: Some(FEATURE_COLUMNS.iter().map(|s| s.to_string()).collect()),
        loss: Loss::Logistic,
        missing: MissingPolicy::Error,
        skip_missing_target: false,
        standardize: true,
        sparse: None,
    };
    let candidates = features::resolve_columns(&source, &request).expect("columns");
    let stats_plan = PassPlan::new(&source, 2, 2);
    let summary =
        features::collect_stats(&source, &stats_plan, &request, &candidates).expect("stats");
    let (design, _) = Design::new(&request, &summary).expect("design");
    let layout = Layout::new(Loss::Logistic, design.width(), 0, false);
    let x = vec![0.01; layout.dim()];
    let mut grad = vec![0.0; layout.dim()];
    let mut group = c.benchmark_group("logistic_pass");
    group.throughput(Throughput::Elements(source.rows()));
    group.sample_size(10);
    for threads in [1usize, 2] {
        // Two shards in both cases: the same sums, only the thread count differs.
        let plan = PassPlan::new(&source, 2, threads);
        let mut objective =
            GlmObjective::new(&source, &plan, &design, layout, 0.0, summary.weight_sum);
        group.bench_function(format!("threads_{threads}"), |b| {
            b.iter(|| objective.eval(&x, &mut grad).expect("pass"))
        });
    }
    group.finish();
}

criterion_group!(benches, pass_throughput);
criterion_main!(benches);
