//! Crash-proof fits: a fit killed at random moments (SIGKILL) and resumed until done ends
//! bit for bit where the uninterrupted fit ends; SIGINT saves and exits 130; a resume
//! whose data or objective settings changed is refused with the reason.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Output, Stdio};
use std::sync::Arc;
use std::time::{Duration, Instant};

use arrow::array::{ArrayRef, Float64Array, Int64Array, RecordBatch};
use arrow::datatypes::{Field, Schema};
use parquet::arrow::ArrowWriter;
use parquet::file::properties::WriterProperties;
use serde_json::Value;

const BIN: &str = env!("CARGO_BIN_EXE_outcore");

/// SplitMix64, a published 64-bit generator, for data and kill times.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

/// A logistic data set with correlated features, slow enough to kill mid-fit.
fn write_data(path: &Path, rows: usize, features: usize) {
    let mut rng = Rng(99);
    let mut cols: Vec<Vec<f64>> = vec![Vec::with_capacity(rows); features];
    let mut y = Vec::with_capacity(rows);
    for _ in 0..rows {
        let common = rng.next() * 2.0 - 1.0;
        let mut z = 0.3;
        for (j, c) in cols.iter_mut().enumerate() {
            let v = 0.7 * common + rng.next() - 0.5 + j as f64;
            z += (if j % 2 == 0 { 0.4 } else { -0.3 }) * (v - j as f64);
            c.push(v);
        }
        y.push(i64::from(rng.next() < 1.0 / (1.0 + (-z).exp())));
    }
    let mut fields = Vec::new();
    let mut arrays: Vec<ArrayRef> = Vec::new();
    for (j, c) in cols.into_iter().enumerate() {
        fields.push(Field::new(
            format!("f{j}"),
            arrow::datatypes::DataType::Float64,
            false,
        ));
        arrays.push(Arc::new(Float64Array::from(c)));
    }
    fields.push(Field::new("y", arrow::datatypes::DataType::Int64, false));
    arrays.push(Arc::new(Int64Array::from(y)));
    let schema = Arc::new(Schema::new(fields));
    let batch = RecordBatch::try_new(schema.clone(), arrays).unwrap();
    let props = WriterProperties::builder()
        .set_max_row_group_row_count(Some(4096))
        .build();
    let mut w =
        ArrowWriter::try_new(std::fs::File::create(path).unwrap(), schema, Some(props)).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

fn fit_args(data: &Path, out: &Path, threads: &str) -> Vec<String> {
    [
        "fit",
        "--data",
        data.to_str().unwrap(),
        "--target",
        "y",
        "--out",
        out.to_str().unwrap(),
        "--tol",
        "1e-12",
        "--threads",
        threads,
        "--shards",
        "3",
        "--block-rows",
        "512",
        "--quiet",
    ]
    .iter()
    .map(|s| s.to_string())
    .collect()
}

fn spawn(args: &[String]) -> Child {
    Command::new(BIN)
        .args(args)
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap()
}

fn run(args: &[String]) -> Output {
    Command::new(BIN).args(args).output().unwrap()
}

/// The parts of a model that must match bit for bit.
fn fingerprint(model: &Path) -> (Vec<u64>, u64, u64, u64) {
    let m: Value = serde_json::from_slice(&std::fs::read(model).unwrap()).unwrap();
    let bits = m["internal"]["coefficients"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_f64().unwrap().to_bits())
        .collect();
    (
        bits,
        m["fit"]["objective"].as_f64().unwrap().to_bits(),
        m["fit"]["iterations"].as_u64().unwrap(),
        m["fit"]["passes"].as_u64().unwrap(),
    )
}

struct Setup {
    _dir: tempfile::TempDir,
    data: PathBuf,
    root: PathBuf,
}

fn setup() -> Setup {
    let dir = tempfile::tempdir().unwrap();
    let data = dir.path().join("train.parquet");
    write_data(&data, 30_000, 12);
    let root = dir.path().to_path_buf();
    Setup {
        _dir: dir,
        data,
        root,
    }
}

#[test]
fn killed_at_random_moments_and_resumed_ends_bitwise_identical() {
    let s = setup();
    let reference = s.root.join("ref.json");
    let started = Instant::now();
    let o = run(&fit_args(&s.data, &reference, "2"));
    let full = started.elapsed();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let expected = fingerprint(&reference);
    assert!(expected.2 > 10, "the fit should take several iterations");

    let mut rng = Rng(2026);
    for attempt in 0..3 {
        let out = s.root.join(format!("killed{attempt}.json"));
        let run_dir = s.root.join(format!("killed{attempt}.run"));
        let mut kills = 0;
        let mut threads_flip = 0;
        loop {
            let has_checkpoint =
                run_dir.join("checkpoint").exists() || run_dir.join("checkpoint.prev").exists();
            threads_flip += 1;
            let threads = if threads_flip % 2 == 0 { "1" } else { "2" };
            let args: Vec<String> = if has_checkpoint {
                [
                    "resume",
                    run_dir.to_str().unwrap(),
                    "--threads",
                    threads,
                    "--quiet",
                ]
                .iter()
                .map(|s| s.to_string())
                .collect()
            } else {
                fit_args(&s.data, &out, threads)
            };
            let mut child = spawn(&args);
            if kills < 4 {
                // Kill somewhere inside the remaining work (seeded).
                let delay = full.mul_f64(0.05 + 0.5 * rng.next());
                std::thread::sleep(delay);
                if child.try_wait().unwrap().is_none() {
                    child.kill().unwrap(); // SIGKILL
                    child.wait().unwrap();
                    kills += 1;
                    continue;
                }
            }
            let o = child.wait_with_output().unwrap();
            assert_eq!(
                o.status.code(),
                Some(0),
                "{args:?}: {}",
                String::from_utf8_lossy(&o.stderr)
            );
            break;
        }
        eprintln!("attempt {attempt}: {kills} kills, {threads_flip} runs; fit of {} iterations took {full:?}", expected.2);
        assert!(kills > 0, "the fit finished before any kill");
        assert_eq!(
            fingerprint(&out),
            expected,
            "attempt {attempt} after {kills} kills"
        );
    }
}

#[test]
fn sigint_saves_exits_130_and_resume_finishes_identically() {
    let s = setup();
    let reference = s.root.join("ref.json");
    let started = Instant::now();
    let o = run(&fit_args(&s.data, &reference, "2"));
    let full = started.elapsed();
    assert_eq!(o.status.code(), Some(0));
    let out = s.root.join("int.json");
    let run_dir = s.root.join("int.run");
    let child = spawn(&fit_args(&s.data, &out, "2"));
    // Wait for the first checkpoint, then interrupt.
    let deadline = Instant::now() + Duration::from_secs(60);
    while !run_dir.join("checkpoint").exists() && Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(2));
    }
    std::thread::sleep(full / 4);
    let pid = child.id() as i32;
    // SIGINT through the kill command, as a terminal's Ctrl-C would send it.
    Command::new("kill")
        .args(["-INT", &pid.to_string()])
        .status()
        .unwrap();
    let o = child.wait_with_output().unwrap();
    let code = o.status.code();
    let err = String::from_utf8_lossy(&o.stderr).into_owned();
    if code == Some(0) {
        // The fit ended before the signal arrived; nothing to resume.
        return;
    }
    assert_eq!(code, Some(130), "{err}");
    assert!(err.contains("outcore resume"), "{err}");
    assert!(!out.exists(), "an interrupted fit writes no model");
    let o = run(&[
        "resume".into(),
        run_dir.to_string_lossy().into_owned(),
        "--quiet".into(),
    ]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    assert_eq!(fingerprint(&out), fingerprint(&reference));
}

#[test]
fn resume_refuses_changed_data_or_settings_and_falls_back_to_the_older_checkpoint() {
    let s = setup();
    let out = s.root.join("m.json");
    let run_dir = s.root.join("m.run");
    let mut args = fit_args(&s.data, &out, "2");
    args.extend(["--max-passes".into(), "6".into()]);
    let o = run(&args);
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let r = run_dir.to_string_lossy().into_owned();

    // A torn newest checkpoint: the previous one is used, with a warning.
    let cp = run_dir.join("checkpoint");
    let bytes = std::fs::read(&cp).unwrap();
    let saved = bytes.clone();
    std::fs::write(&cp, &bytes[..bytes.len() / 2]).unwrap();
    let o = run(&[
        "resume".into(),
        r.clone(),
        "--max-passes".into(),
        "7".into(),
    ]);
    let err = String::from_utf8_lossy(&o.stderr).into_owned();
    assert!(matches!(o.status.code(), Some(0 | 1)), "{err}");
    assert!(
        err.contains("checkpoint.prev") || err.contains("previous"),
        "{err}"
    );
    std::fs::write(&cp, &saved).unwrap();

    // Changed objective settings in the run directory: refused, naming the setting.
    let settings_path = run_dir.join("settings.json");
    let original = std::fs::read_to_string(&settings_path).unwrap();
    let mut v: Value = serde_json::from_str(&original).unwrap();
    v["settings"]["ridge"] = serde_json::json!(0.5);
    std::fs::write(&settings_path, v.to_string()).unwrap();
    let o = run(&["resume".into(), r.clone()]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("ridge"), "{err}");
    std::fs::write(&settings_path, original).unwrap();

    // Changed data: refused, saying the data changed.
    write_data(&s.data, 30_001, 12);
    let o = run(&["resume".into(), r]);
    assert_eq!(o.status.code(), Some(2));
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(err.contains("data changed"), "{err}");
}

#[test]
fn checkpoints_inside_long_passes_are_continued_and_end_bitwise_identical() {
    let s = setup();
    let reference = s.root.join("ref.json");
    let small_blocks = |mut a: Vec<String>| {
        for x in a.iter_mut() {
            if x == "512" {
                *x = "64".into();
            }
        }
        a
    };
    let args = small_blocks(fit_args(&s.data, &reference, "2"));
    let started = Instant::now();
    let o = run(&args);
    let full = started.elapsed();
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let expected = fingerprint(&reference);

    let out = s.root.join("mid.json");
    let run_dir = s.root.join("mid.run");
    let mut rng = Rng(7);
    let mut continued_a_pass = false;
    let mut kills = 0;
    loop {
        let has_checkpoint = run_dir.join("checkpoint").exists();
        let mut args: Vec<String> = if has_checkpoint {
            ["resume", run_dir.to_str().unwrap(), "--threads", "1"]
                .iter()
                .map(|s| s.to_string())
                .collect()
        } else {
            let mut a = small_blocks(fit_args(&s.data, &out, "2"));
            a.retain(|x| x != "--quiet");
            a
        };
        args.extend(["--checkpoint-every".into(), "3ms".into()]);
        let mut child = spawn(&args);
        // Keep killing until a resume has continued a pass in progress (bounded).
        if kills < 20 && !(continued_a_pass && kills >= 3) {
            std::thread::sleep(full.mul_f64(0.02 + 0.12 * rng.next()));
            if child.try_wait().unwrap().is_none() {
                child.kill().unwrap();
                let o = child.wait_with_output().unwrap();
                continued_a_pass |=
                    String::from_utf8_lossy(&o.stderr).contains("continuing the pass in progress");
                kills += 1;
                continue;
            }
        }
        let o = child.wait_with_output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr).into_owned();
        continued_a_pass |= err.contains("continuing the pass in progress");
        assert_eq!(o.status.code(), Some(0), "{args:?}: {err}");
        break;
    }
    eprintln!("{kills} kills; a resume continued a pass in progress: {continued_a_pass}");
    assert!(continued_a_pass, "no resume continued a partial pass");
    assert_eq!(fingerprint(&out), expected);
}
