//! The progress display through the binary: plain periodic lines when stderr is not a
//! terminal, a bar with pass number, rows/s, MB/s, ETA and objective on a terminal (a
//! pseudo-terminal from `script`), nothing with `--quiet`, and a closed stdout that
//! ends every command cleanly.

use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};

const FEATURES: &str = "distance_km,basket_items,courier_load,peak_hour,rain_mm";

fn bin() -> &'static str {
    env!("CARGO_BIN_EXE_outcore")
}

/// Demo data large enough that a single-threaded pass in blocks of 4 rows takes well
/// over the 0.1 s tick of the display (about 0.3 s on the development machine).
fn demo(dir: &Path) -> PathBuf {
    let data = dir.join("orders");
    let o = Command::new(bin())
        .args(["demo", "--rows", "200000", "--out"])
        .arg(&data)
        .output()
        .expect("demo runs");
    assert_eq!(
        o.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    data
}

fn fit_args(data: &Path, out: &Path) -> Vec<String> {
    [
        "fit",
        "--data",
        &data.display().to_string(),
        "--target",
        "late",
        "--features",
        FEATURES,
        "--threads",
        "1",
        "--block-rows",
        "4",
        "--max-passes",
        "4",
        "--out",
        &out.display().to_string(),
    ]
    .iter()
    .map(|s| s.to_string())
    .collect()
}

fn run(args: &[String], every: &str) -> Output {
    Command::new(bin())
        .args(args)
        .env("OUTCORE_PROGRESS_SECONDS", every)
        .stdin(Stdio::null())
        .output()
        .expect("outcore runs")
}

#[test]
fn progress_without_a_terminal_is_plain_lines_and_quiet_is_silent() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = demo(dir.path());
    let o = run(&fit_args(&data, &dir.path().join("a.json")), "0.05");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{err}");
    // No bar: no carriage returns or escape sequences on a pipe.
    assert!(!err.contains('\r') && !err.contains('\x1b'), "{err:?}");
    let lines: Vec<&str> = err
        .lines()
        .filter(|l| l.starts_with("pass ") && l.contains(" rows ("))
        .collect();
    assert!(!lines.is_empty(), "no periodic progress line in:\n{err}");
    for l in &lines {
        for part in ["rows/s", "MB/s", "ETA"] {
            assert!(l.contains(part), "{l}");
        }
    }
    // After the first iteration the lines carry the current objective.
    assert!(err.contains("iter "), "{err}");
    // --quiet: not a single progress or iteration line.
    let mut quiet = fit_args(&data, &dir.path().join("b.json"));
    quiet.push("--quiet".into());
    let o = run(&quiet, "0.05");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{err}");
    assert!(err.trim().is_empty(), "--quiet printed:\n{err}");
    // The default interval is 10 s: a short fit prints no periodic line.
    let o = Command::new(bin())
        .args(fit_args(&data, &dir.path().join("c.json")))
        .env_remove("OUTCORE_PROGRESS_SECONDS")
        .output()
        .expect("runs");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !err.lines()
            .any(|l| l.starts_with("pass ") && l.contains(" rows (")),
        "{err}"
    );
}

/// On a terminal (a pseudo-terminal made by util-linux `script`) the pass is a bar.
#[test]
fn progress_on_a_terminal_is_a_bar_per_pass() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = demo(dir.path());
    let args = fit_args(&data, &dir.path().join("t.json"));
    let quoted: Vec<String> = std::iter::once(bin().to_string())
        .chain(args)
        .map(|a| format!("'{a}'"))
        .collect();
    let o = Command::new("script")
        .args(["-qec", &quoted.join(" "), "/dev/null"])
        .env("TERM", "xterm")
        .stdin(Stdio::null())
        .output()
        .expect("script (util-linux) runs");
    let screen = String::from_utf8_lossy(&o.stdout);
    assert!(matches!(o.status.code(), Some(0 | 1)), "{screen}");
    for part in ["pass ", "rows/s", "MB/s", "ETA", "%", "objective "] {
        assert!(
            screen.contains(part),
            "no {part:?} on the terminal:\n{screen}"
        );
    }
    // The bar is redrawn in place.
    assert!(
        screen.contains('\r') || screen.contains('\x1b'),
        "{screen:?}"
    );
}

/// `predict`, `inspect`, `evaluate` (table and --json) and `fit --json` with stdout
/// closed at once, and through a real pipe into `head -1`: exit as usual, no panic, no
/// error message.
#[test]
fn a_closed_stdout_ends_every_command_cleanly() {
    let dir = tempfile::tempdir().expect("tempdir");
    let data = demo(dir.path());
    let d = data.display().to_string();
    let model = dir.path().join("m.json");
    let m = model.display().to_string();
    let o = run(&fit_args(&data, &model), "10");
    assert!(matches!(o.status.code(), Some(0 | 1)));
    let scores = dir.path().join("s.parquet").display().to_string();
    let fitted = dir.path().join("j.json").display().to_string();
    let mut fit_json = fit_args(&data, Path::new(&fitted));
    fit_json.push("--json".into());
    let commands: Vec<Vec<String>> = vec![
        vec!["inspect".into(), m.clone()],
        vec![
            "evaluate".into(),
            "--model".into(),
            m.clone(),
            "--data".into(),
            d.clone(),
        ],
        vec![
            "evaluate".into(),
            "--model".into(),
            m.clone(),
            "--data".into(),
            d.clone(),
            "--json".into(),
        ],
        vec![
            "predict".into(),
            "--model".into(),
            m.clone(),
            "--data".into(),
            d.clone(),
            "--out".into(),
            scores,
        ],
        fit_json,
    ];
    for a in &commands {
        let mut child = Command::new(bin())
            .args(a)
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .expect("spawn");
        drop(child.stdout.take());
        let o = child.wait_with_output().expect("wait");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(matches!(o.status.code(), Some(0 | 1)), "{a:?}: {err}");
        assert!(
            !err.contains("panicked") && !err.contains("error") && !err.contains("Broken pipe"),
            "{a:?}: {err}"
        );
        let quoted: Vec<String> = std::iter::once(bin().to_string())
            .chain(a.iter().cloned())
            .map(|x| format!("'{x}'"))
            .collect();
        let sh = format!(
            "{} | head -1 >/dev/null; exit ${{PIPESTATUS[0]}}",
            quoted.join(" ")
        );
        let o = Command::new("bash")
            .args(["-c", &sh])
            .output()
            .expect("bash");
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            matches!(o.status.code(), Some(0 | 1)),
            "{a:?} | head: {err}"
        );
        assert!(
            !err.contains("panicked") && !err.contains("error"),
            "{a:?} | head: {err}"
        );
    }
}
