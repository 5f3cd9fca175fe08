//! Benchmarks 1–3 of the throughput issue on one Parquet file, side by side in one run,
//! printed as ratios with their goals (see `benches/throughput.sh`, which makes the data
//! and runs this for float64 and float32 data):
//!
//! 1. a logistic evaluation pass over the block cache (data in page cache, one thread)
//!    vs a plain read-and-sum sweep over the same bytes of the mapped cache file;
//! 2. the same cached pass on two threads vs one (two shards both times);
//! 3. the first pass (Parquet → blocks, with the cache written) vs the parquet crate's
//!    bare decode of the same columns into Arrow arrays, both on one thread.
//!
//! `OUTCORE_THROUGHPUT_DATA=FILE.parquet cargo bench --bench throughput` (target column
//! `y`, every other column a feature). Work files go to `OUTCORE_THROUGHPUT_DIR` (default
//! the system temp directory) and are removed at the end.

use std::fs::File;
use std::hint::black_box;
use std::time::Instant;

use outcore::cache::{CacheKey, CacheSlot};
use outcore::features::{self, Design, FeatureRequest, MissingPolicy};
use outcore::objective::{GlmObjective, Layout, Loss};
use outcore::optim::Objective;
use outcore::pass::PassPlan;
use outcore::source::Source;
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;

/// Fastest of `n` runs of `f`, in seconds: on a shared machine other work only ever
/// adds time, so the minimum is the figure least disturbed by it (common practice for
/// throughput measurements); every measure of the run uses the same statistic.
fn best(n: usize, mut f: impl FnMut()) -> f64 {
    (0..n)
        .map(|_| {
            let s = Instant::now();
            f();
            s.elapsed().as_secs_f64()
        })
        .fold(f64::INFINITY, f64::min)
}

/// CPU time of this process so far (every thread, those already ended included), in
/// seconds, from `/proc/self/stat` in clock ticks (Linux; 0 elsewhere). Unlike wall time,
/// other processes on the machine do not add to it, so it shows what a change to the
/// kernel did while the machine is busy.
fn cpu_seconds() -> f64 {
    let Ok(stat) = std::fs::read_to_string("/proc/self/stat") else {
        return 0.0;
    };
    // Fields after the command name (which is in parentheses): utime is the 12th, stime
    // the 13th; the kernel's USER_HZ is 100 on every common Linux build.
    let Some(rest) = stat.rsplit(')').next() else {
        return 0.0;
    };
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks = |i: usize| f.get(i).and_then(|v| v.parse::<f64>().ok()).unwrap_or(0.0);
    (ticks(11) + ticks(12)) / 100.0
}

fn load() -> String {
    std::fs::read_to_string("/proc/loadavg")
        .map(|s| s.split_whitespace().take(3).collect::<Vec<_>>().join(" "))
        .unwrap_or_else(|_| "?".into())
}

/// Sums the file's bytes as u64 words in eight lanes: a read of every byte at the speed
/// memory gives one core.
fn sweep(bytes: &[u8]) -> u64 {
    let mut lanes = [0u64; 8];
    let words = bytes.chunks_exact(64);
    for chunk in words {
        for k in 0..8 {
            let mut a = [0u8; 8];
            a.copy_from_slice(&chunk[k * 8..k * 8 + 8]);
            lanes[k] = lanes[k].wrapping_add(u64::from_le_bytes(a));
        }
    }
    lanes.iter().fold(0u64, |a, b| a.wrapping_add(*b))
}

fn main() {
    let Ok(data) = std::env::var("OUTCORE_THROUGHPUT_DATA") else {
        eprintln!("set OUTCORE_THROUGHPUT_DATA=FILE.parquet (see benches/throughput.sh); skipped");
        return;
    };
    let work = std::env::var("OUTCORE_THROUGHPUT_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(|_| std::env::temp_dir())
        .join(format!("outcore-throughput-{}", std::process::id()));
    let source = Source::open(std::slice::from_ref(&data)).expect("open the data");
    let request = FeatureRequest {
        target: "y".into(),
        weight: None,
        features: None,
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
    let layout = Layout::new(Loss::Logistic, design.width(), 0, true);
    let x: Vec<f64> = (0..layout.dim())
        .map(|i| 0.01 * ((i % 7) as f64 - 3.0))
        .collect();
    let mut grad = vec![0.0; layout.dim()];
    let one = PassPlan::new(&source, 2, 1);
    let two = PassPlan::new(&source, 2, 2);
    let rows = source.rows();

    // 3. First pass (Parquet → blocks → cache file, kernel included) on one thread, each
    // time into a fresh directory so that every run builds the cache...
    let mut first = f64::INFINITY;
    let mut slot = None;
    for attempt in 0..3 {
        let fresh = CacheSlot::open(
            Some(&work.join(format!("first-{attempt}"))),
            CacheKey::new(&source, &design, None),
        );
        let started = Instant::now();
        GlmObjective::new(&source, &one, &design, layout, 1e-4, summary.weight_sum)
            .with_cache(&fresh)
            .eval(&x, &mut grad)
            .expect("first pass");
        first = first.min(started.elapsed().as_secs_f64());
        slot = Some(fresh);
    }
    let slot = slot.expect("three attempts");
    let status = slot.status();
    assert_eq!(
        status.mode, "cache",
        "the first pass did not write the cache"
    );
    // ... vs the bare decode of the same columns into Arrow arrays on one thread.
    let columns = design.training_columns();
    let bare = best(5, || {
        for f in source.files() {
            let file = File::open(&f.path).expect("open");
            let builder = ParquetRecordBatchReaderBuilder::try_new(file).expect("reader");
            let schema = builder.parquet_schema().clone();
            let roots: Vec<usize> = columns
                .iter()
                .map(|c| f.schema().index_of(c).expect("column"))
                .collect();
            let reader = builder
                .with_projection(parquet::arrow::ProjectionMask::roots(&schema, roots))
                .with_batch_size(source.block_rows())
                .build()
                .expect("build");
            let mut n = 0;
            for b in reader {
                n += black_box(b.expect("decode")).num_rows();
            }
            black_box(n);
        }
    });
    // A Parquet pass without the cache, for the record.
    let mut plain = GlmObjective::new(&source, &one, &design, layout, 1e-4, summary.weight_sum);
    let parquet_pass = best(5, || {
        plain.eval(&x, &mut grad).expect("parquet pass");
    });

    // 1–2. Cached passes (warm: page cache) on one and two threads, and the sweep.
    let mut cached1 = GlmObjective::new(&source, &one, &design, layout, 1e-4, summary.weight_sum)
        .with_cache(&slot);
    let mut cached2 = GlmObjective::new(&source, &two, &design, layout, 1e-4, summary.weight_sum)
        .with_cache(&slot);
    cached1.eval(&x, &mut grad).expect("warm-up");
    let pass1 = best(11, || {
        cached1.eval(&x, &mut grad).expect("pass");
    });
    // CPU time per pass over enough passes for the clock ticks to resolve it.
    let repeat = ((0.5 / pass1).ceil() as usize).clamp(5, 200);
    let cpu0 = cpu_seconds();
    for _ in 0..repeat {
        cached1.eval(&x, &mut grad).expect("pass");
    }
    let pass1_cpu = (cpu_seconds() - cpu0) / repeat as f64;
    let pass2 = best(11, || {
        cached2.eval(&x, &mut grad).expect("pass");
    });
    let path = status.path.clone().expect("cache path");
    let file = File::open(&path).expect("open cache");
    // Safety: the benchmark's own file, not changed while mapped.
    let map = unsafe { memmap2::Mmap::map(&file) }.expect("map cache");
    let bytes = map.len() as f64;
    let sweep1 = best(11, || {
        black_box(sweep(&map));
    });
    drop(map);
    let _ = std::fs::remove_dir_all(&work);

    let gb = |s: f64| bytes / s / 1e9;
    let mrows = |s: f64| rows as f64 / s / 1e6;
    println!(
        "data {data}: {rows} rows, {} features, cache {:.1} MB; load {}",
        design.width(),
        bytes / 1e6,
        load()
    );
    println!(
        "{:<44} {:>9} {:>10} {:>9}",
        "measure", "seconds", "GB/s", "Mrows/s"
    );
    for (name, s) in [
        ("read-and-sum sweep of the cache file, 1 thr", sweep1),
        ("cached pass, 1 thread", pass1),
        ("  the same, mean CPU time per pass", pass1_cpu),
        ("cached pass, 2 threads", pass2),
        ("first pass (Parquet -> blocks + cache), 1 thr", first),
        ("bare parquet decode to Arrow, 1 thread", bare),
        ("Parquet pass without cache, 1 thread", parquet_pass),
    ] {
        println!("{name:<44} {s:>9.4} {:>10.2} {:>9.1}", gb(s), mrows(s));
    }
    println!("{:<52} {:>8} {:>6}", "ratio", "value", "goal");
    println!(
        "{:<52} {:>8.2} {:>6}",
        "1. cached pass / sweep throughput (1 thread)",
        sweep1 / pass1,
        ">=0.6"
    );
    println!(
        "{:<52} {:>8.2} {:>6}",
        "2. cached pass speed-up, 2 threads vs 1",
        pass1 / pass2,
        ">=1.7"
    );
    println!(
        "{:<52} {:>8.2} {:>6}",
        "3. first pass / bare decode throughput (1 thread)",
        bare / first,
        ">=0.8"
    );
    println!(
        "{:<52} {:>8.2} {:>6}",
        "   (cached pass speed-up over a Parquet pass)",
        parquet_pass / pass1,
        "-"
    );
}
