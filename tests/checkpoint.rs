//! Tests of the checkpoint file: bit-exact round trips, the file rotation, refusal of
//! truncated, corrupt and foreign files without panics, the fallback to the previous
//! checkpoint, and the identity comparison that guards a resume.

use std::fs;
use std::path::Path;

use outcore::checkpoint::{
    check_resume, compare_identity, decode, encode, load, save, Checkpoint, PartialPass, Progress,
    RunIdentity, ShardProgress, CHECKPOINT_FILE, FORMAT_VERSION, MAGIC, PREVIOUS_FILE,
};
use outcore::optim::{Objective, Optimizer, Settings, State, StepOutcome, Stop};
use outcore::ErrorKind;
use serde_json::json;

// ---------------------------------------------------------------------------------------
// Fixtures.

/// Awkward values: signed zero, subnormal, extremes, a value with a long decimal form.
fn awkward(i: usize) -> f64 {
    const V: [f64; 8] = [
        -0.0,
        0.1 + 0.2,
        f64::MIN_POSITIVE / 3.0,
        f64::MAX,
        -1.0e-300,
        std::f64::consts::PI,
        1.0 / 3.0,
        -123456.789,
    ];
    V[i % V.len()] * (1.0 + i as f64 * 1e-9)
}

fn vector(dim: usize, seed: usize) -> Vec<f64> {
    (0..dim).map(|i| awkward(i * 7 + seed)).collect()
}

fn identity(shards: usize) -> RunIdentity {
    RunIdentity {
        data: vec![
            "data/train-*.parquet".to_string(),
            "extra.parquet".to_string(),
        ],
        fingerprint: "9f86d081884c7d659a2feaa0c55ad015a3bf4f1b2b0b822cd15d6c15b0f00a08".to_string(),
        shards,
        objective_settings: json!({
            "loss": "logistic",
            "ridge": 0.1,
            "l1": 0.0,
            "intercept": true,
            "features": {"hash_bits": 18, "standardize": true},
        }),
        design: json!({"columns": [{"name": "age", "mean": 41.25, "sd": 12.5}]}),
    }
}

/// A checkpoint of `dim` coefficients with `pairs` history pairs; `l1` makes it an
/// OWL-QN state, `partial` adds an interrupted pass over three shards.
fn sample(dim: usize, pairs: usize, l1: bool, partial: bool) -> Checkpoint {
    let settings = Settings {
        history: pairs.max(1),
        tol: 1e-7,
        max_evals: Some(500),
        max_iterations: None,
        max_seconds: Some(3600.5),
        l1: if l1 { vector(dim, 3) } else { Vec::new() },
        ..Settings::default()
    };
    let state = State {
        settings,
        x: vector(dim, 0),
        f: 0.7125897338915262,
        g: vector(dim, 1),
        s: (0..pairs).map(|k| vector(dim, 10 + k)).collect(),
        y: (0..pairs).map(|k| vector(dim, 20 + k)).collect(),
        iterations: 17,
        evaluations: 23,
        pairs_skipped: 2,
        recent_f: vec![0.9, 0.8, 0.7000000000000001, -0.0],
        last_step: 0.5,
        seconds: 12.25,
        stopped: None,
        message: None,
    };
    let shards = 3;
    let partial = partial.then(|| PartialPass {
        point: vector(dim, 5),
        shards: vec![
            ShardProgress::Done {
                sums: vector(dim + 2, 30),
            },
            ShardProgress::Partial {
                blocks: 4,
                sums: vector(dim + 2, 31),
            },
            ShardProgress::NotStarted,
        ],
    });
    Checkpoint {
        identity: identity(shards),
        progress: Progress {
            passes: 23,
            seconds: 98.765,
        },
        state,
        partial,
    }
}

fn bits(v: &[f64]) -> Vec<u64> {
    v.iter().map(|x| x.to_bits()).collect()
}

/// Every field of two checkpoints, floats by their bits.
fn assert_bit_equal(a: &Checkpoint, b: &Checkpoint) {
    assert_eq!(a.identity, b.identity);
    assert_eq!(a.progress.passes, b.progress.passes);
    assert_eq!(a.progress.seconds.to_bits(), b.progress.seconds.to_bits());
    let (p, q) = (&a.state, &b.state);
    let (ps, qs) = (&p.settings, &q.settings);
    assert_eq!(ps.history, qs.history);
    for (u, v) in [
        (ps.tol, qs.tol),
        (ps.c1, qs.c1),
        (ps.c2, qs.c2),
        (ps.curvature_eps, qs.curvature_eps),
        (ps.flat_tol, qs.flat_tol),
        (p.f, q.f),
        (p.last_step, q.last_step),
        (p.seconds, q.seconds),
    ] {
        assert_eq!(u.to_bits(), v.to_bits(), "{u} vs {v}");
    }
    assert_eq!(ps.max_line_search_trials, qs.max_line_search_trials);
    assert_eq!(ps.flat_window, qs.flat_window);
    assert_eq!(ps.max_evals, qs.max_evals);
    assert_eq!(ps.max_iterations, qs.max_iterations);
    assert_eq!(
        ps.max_seconds.map(f64::to_bits),
        qs.max_seconds.map(f64::to_bits)
    );
    assert_eq!(bits(&ps.l1), bits(&qs.l1));
    assert_eq!(bits(&p.x), bits(&q.x));
    assert_eq!(bits(&p.g), bits(&q.g));
    assert_eq!(p.s.len(), q.s.len());
    for (u, v) in p.s.iter().zip(&q.s).chain(p.y.iter().zip(&q.y)) {
        assert_eq!(bits(u), bits(v));
    }
    assert_eq!(p.y.len(), q.y.len());
    assert_eq!(bits(&p.recent_f), bits(&q.recent_f));
    assert_eq!(p.iterations, q.iterations);
    assert_eq!(p.evaluations, q.evaluations);
    assert_eq!(p.pairs_skipped, q.pairs_skipped);
    assert_eq!(p.stopped, q.stopped);
    assert_eq!(p.message, q.message);
    match (&a.partial, &b.partial) {
        (None, None) => {}
        (Some(u), Some(v)) => {
            assert_eq!(bits(&u.point), bits(&v.point));
            assert_eq!(u.shards.len(), v.shards.len());
            for (s, t) in u.shards.iter().zip(&v.shards) {
                match (s, t) {
                    (ShardProgress::NotStarted, ShardProgress::NotStarted) => {}
                    (
                        ShardProgress::Partial { blocks: i, sums: x },
                        ShardProgress::Partial { blocks: j, sums: y },
                    ) => {
                        assert_eq!(i, j);
                        assert_eq!(bits(x), bits(y));
                    }
                    (ShardProgress::Done { sums: x }, ShardProgress::Done { sums: y }) => {
                        assert_eq!(bits(x), bits(y))
                    }
                    _ => panic!("shard states differ: {s:?} vs {t:?}"),
                }
            }
        }
        _ => panic!("one checkpoint has a partial pass, the other not"),
    }
}

/// Replaces the trailing checksum so that a deliberately altered file passes it.
fn reseal(bytes: &mut [u8]) {
    let n = bytes.len() - 4;
    let crc = crc32c::crc32c(&bytes[..n]);
    bytes[n..].copy_from_slice(&crc.to_le_bytes());
}

fn header_len(bytes: &[u8]) -> usize {
    u32::from_le_bytes([bytes[17], bytes[18], bytes[19], bytes[20]]) as usize
}

/// Tiny deterministic generator for the mutation tests.
struct XorShift(u64);
impl XorShift {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        self.0
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

// ---------------------------------------------------------------------------------------
// Round trips and layout.

#[test]
fn round_trip_is_bit_exact_for_an_lbfgs_state() {
    let cp = sample(37, 5, false, false);
    let back = decode(&encode(&cp)).unwrap();
    assert_bit_equal(&cp, &back);
}

#[test]
fn round_trip_is_bit_exact_for_an_owlqn_state_with_a_partial_pass() {
    let mut cp = sample(29, 3, true, true);
    cp.state.stopped = Some(Stop::LineSearchFailed);
    cp.state.message = Some("no step \"found\"; try ‖g‖ ✓".to_string());
    // A NaN with a payload in the body keeps its bits.
    cp.state.g[3] = f64::from_bits(0x7ff8_0000_dead_beef);
    let back = decode(&encode(&cp)).unwrap();
    assert_bit_equal(&cp, &back);
    assert!(back.partial.is_some());
    assert!(!back.state.settings.l1.is_empty());
}

#[test]
fn round_trip_keeps_awkward_header_scalars() {
    for (i, v) in [
        -0.0,
        f64::MIN_POSITIVE / 7.0,
        f64::MAX,
        0.1 + 0.2,
        f64::INFINITY,
        f64::NEG_INFINITY,
        1e-320,
    ]
    .into_iter()
    .enumerate()
    {
        let mut cp = sample(2, 0, false, false);
        cp.state.f = v;
        cp.state.last_step = -v;
        cp.state.settings.tol = v;
        cp.state.settings.max_seconds = Some(v);
        cp.progress.seconds = v;
        cp.state.stopped = [Some(Stop::Converged), Some(Stop::Interrupted), None][i % 3];
        let back = decode(&encode(&cp)).unwrap();
        assert_bit_equal(&cp, &back);
    }
    let mut cp = sample(2, 0, false, false);
    cp.state.f = f64::NAN;
    assert!(decode(&encode(&cp)).unwrap().state.f.is_nan());
}

#[test]
fn round_trip_of_empty_and_minimal_checkpoints() {
    let mut cp = sample(0, 0, false, false);
    cp.state.recent_f.clear();
    cp.identity.design = serde_json::Value::Null;
    cp.identity.data.clear();
    assert_bit_equal(&cp, &decode(&encode(&cp)).unwrap());
    let mut cp = sample(4, 0, false, true);
    cp.partial.as_mut().unwrap().shards = vec![ShardProgress::NotStarted; 3];
    assert_bit_equal(&cp, &decode(&encode(&cp)).unwrap());
}

#[test]
fn layout_is_magic_version_json_header_vectors_and_checksum() {
    let cp = sample(3, 1, true, false);
    let bytes = encode(&cp);
    assert_eq!(&bytes[..13], MAGIC);
    assert_eq!(&bytes[..13], b"OUTCORE-CKPT\0");
    assert_eq!(u32::from_le_bytes(bytes[13..17].try_into().unwrap()), 1);
    assert_eq!(FORMAT_VERSION, 1);
    let h = header_len(&bytes);
    let header: serde_json::Value = serde_json::from_slice(&bytes[21..21 + h]).unwrap();
    assert_eq!(header["identity"]["shards"], 3);
    assert_eq!(header["optimizer"]["dim"], 3);
    assert_eq!(header["optimizer"]["history_pairs"], 1);
    assert_eq!(header["progress"]["passes"], 23);
    assert!(header["partial"].is_null());
    assert!(header["optimizer"]["settings"].get("l1").is_none());
    // Body: x, g, recent_f, l1, s0, y0 (3 + 3 + 4 + 3 + 3 + 3 values) with u64 counts.
    let body = bytes.len() - 4 - (21 + h);
    assert_eq!(body, 6 * 8 + (3 + 3 + 4 + 3 + 3 + 3) * 8);
    let first = &bytes[21 + h..21 + h + 16];
    assert_eq!(u64::from_le_bytes(first[..8].try_into().unwrap()), 3);
    assert_eq!(
        f64::from_le_bytes(first[8..].try_into().unwrap()).to_bits(),
        cp.state.x[0].to_bits()
    );
    let n = bytes.len() - 4;
    assert_eq!(
        u32::from_le_bytes(bytes[n..].try_into().unwrap()),
        crc32c::crc32c(&bytes[..n])
    );
}

// ---------------------------------------------------------------------------------------
// Refusals.

#[test]
fn decode_refuses_every_truncation() {
    let bytes = encode(&sample(3, 2, true, true));
    for len in 0..bytes.len() {
        let err = decode(&bytes[..len]).expect_err(&format!("truncated to {len} bytes"));
        assert_eq!(err.kind(), ErrorKind::Format, "{len}: {err}");
        assert!(!err.message().is_empty());
    }
    let err = decode(&bytes[..bytes.len() - 1]).unwrap_err();
    assert!(err.message().contains("torn or corrupt"), "{err}");
    let err = decode(&bytes[..5]).unwrap_err();
    assert!(err.message().contains("truncated"), "{err}");
}

#[test]
fn decode_refuses_every_single_flipped_byte() {
    let bytes = encode(&sample(3, 2, true, true));
    for at in 0..bytes.len() {
        for mask in [0x01u8, 0x80, 0xff] {
            let mut bad = bytes.clone();
            bad[at] ^= mask;
            let err = decode(&bad).expect_err(&format!("byte {at} ^ {mask:#x}"));
            assert_eq!(err.kind(), ErrorKind::Format);
        }
    }
}

#[test]
fn decode_refuses_trailing_bytes() {
    let mut bytes = encode(&sample(2, 1, false, false));
    bytes.extend_from_slice(&[0; 8]);
    assert!(decode(&bytes).is_err());
    // Even when resealed, the extra bytes after the last vector are refused.
    let mut bytes = encode(&sample(2, 1, false, false));
    let n = bytes.len() - 4;
    bytes.splice(n..n, [0u8; 8]);
    reseal(&mut bytes);
    let err = decode(&bytes).unwrap_err();
    assert!(err.message().contains("unexpected bytes"), "{err}");
}

#[test]
fn decode_refuses_foreign_files_and_other_versions() {
    let err = decode(b"").unwrap_err();
    assert!(err.message().contains("empty"), "{err}");
    let err = decode(b"PAR1 this is some other file entirely").unwrap_err();
    assert!(err.message().contains("not an outcore checkpoint"), "{err}");
    let mut bytes = encode(&sample(2, 1, false, false));
    bytes[13..17].copy_from_slice(&2u32.to_le_bytes());
    reseal(&mut bytes);
    let err = decode(&bytes).unwrap_err();
    assert_eq!(err.kind(), ErrorKind::Format);
    assert!(
        err.message().contains("format version 2") && err.message().contains("version 1"),
        "{err}"
    );
    assert!(!err.message().contains("corrupt"), "{err}");
}

#[test]
fn decode_refuses_huge_lengths_without_allocating() {
    let bytes = encode(&sample(2, 1, false, false));
    let h = header_len(&bytes);
    let at = 21 + h; // the count of x
    for huge in [u64::MAX, u64::MAX / 8 + 1, 1 << 40, 3] {
        let mut bad = bytes.clone();
        bad[at..at + 8].copy_from_slice(&huge.to_le_bytes());
        reseal(&mut bad);
        let err = decode(&bad).unwrap_err();
        assert_eq!(err.kind(), ErrorKind::Format, "{err}");
    }
    // A header length beyond the file.
    let mut bad = bytes.clone();
    bad[17..21].copy_from_slice(&u32::MAX.to_le_bytes());
    reseal(&mut bad);
    assert!(decode(&bad).is_err());
    // A history pair count far beyond the file: refused at the first missing pair.
    let text = String::from_utf8(bytes[21..21 + h].to_vec()).unwrap();
    let text = text.replace(
        "\"history_pairs\":1",
        "\"history_pairs\":18446744073709551615",
    );
    let mut bad = bytes[..17].to_vec();
    bad.extend_from_slice(&(text.len() as u32).to_le_bytes());
    bad.extend_from_slice(text.as_bytes());
    bad.extend_from_slice(&bytes[21 + h..]);
    reseal(&mut bad);
    let err = decode(&bad).unwrap_err();
    assert!(
        err.message().contains("y[1]") || err.message().contains("s[1]"),
        "{err}"
    );
}

#[test]
fn decode_refuses_inconsistent_vectors_even_with_a_valid_checksum() {
    type Spoil = Box<dyn Fn(&mut Checkpoint)>;
    let cases: Vec<(&str, Spoil)> = vec![
        ("gradient", Box::new(|c| c.state.g.push(1.0))),
        (
            "history",
            Box::new(|c| c.state.y.pop().map(drop).unwrap_or(())),
        ),
        ("history pair", Box::new(|c| c.state.s[0].push(1.0))),
        ("L1", Box::new(|c| c.state.settings.l1.push(1.0))),
        (
            "point",
            Box::new(|c| c.partial.as_mut().unwrap().point.pop().map(drop).unwrap()),
        ),
        ("shards", Box::new(|c| c.identity.shards = 4)),
        (
            "sums",
            Box::new(|c| {
                if let ShardProgress::Partial { sums, .. } =
                    &mut c.partial.as_mut().unwrap().shards[1]
                {
                    sums.push(0.0);
                }
            }),
        ),
        (
            "JSON object",
            Box::new(|c| c.identity.objective_settings = json!([1, 2])),
        ),
    ];
    for (what, spoil) in cases {
        let mut cp = sample(3, 2, true, true);
        spoil(&mut cp);
        let err = decode(&encode(&cp)).expect_err(what);
        assert_eq!(err.kind(), ErrorKind::Format, "{what}: {err}");
        let dir = tempfile::tempdir().unwrap();
        let err = save(dir.path(), &cp).expect_err(what);
        assert_eq!(err.kind(), ErrorKind::Internal, "{what}: {err}");
        assert!(!dir.path().join(CHECKPOINT_FILE).exists());
    }
}

#[test]
fn decode_refuses_a_broken_json_header() {
    let bytes = encode(&sample(2, 1, false, false));
    let h = header_len(&bytes);
    let mut bad = bytes.clone();
    bad[21] = b'[';
    reseal(&mut bad);
    let err = decode(&bad).unwrap_err();
    assert!(err.message().contains("header"), "{err}");
    let mut bad = bytes.clone();
    let text = String::from_utf8(bytes[21..21 + h].to_vec()).unwrap();
    let at = text.find("\"tol\":").unwrap() + 6;
    bad[21 + at] = b'"';
    reseal(&mut bad);
    assert!(decode(&bad).is_err());
}

#[test]
fn decode_never_panics_on_mutated_resealed_or_random_input() {
    let base = encode(&sample(3, 2, true, true));
    let mut rng = XorShift(0x9e37_79b9_7f4a_7c15);
    for round in 0..20_000 {
        let mut bytes = base.clone();
        match round % 4 {
            0 => {
                let n = 1 + rng.below(4);
                for _ in 0..n {
                    let at = rng.below(bytes.len());
                    bytes[at] = rng.next() as u8;
                }
            }
            1 => bytes.truncate(rng.below(bytes.len())),
            2 => {
                let at = rng.below(bytes.len());
                let extra: Vec<u8> = (0..rng.below(16)).map(|_| rng.next() as u8).collect();
                bytes.splice(at..at, extra);
            }
            _ => {
                let len = rng.below(200);
                bytes = MAGIC.to_vec();
                bytes.extend_from_slice(&1u32.to_le_bytes());
                bytes.extend((0..len).map(|_| rng.next() as u8));
            }
        }
        if bytes.len() >= 4 && round % 2 == 0 {
            reseal(&mut bytes);
        }
        // Either outcome is fine; a panic or an abort is not.
        let _ = decode(&bytes);
    }
}

// ---------------------------------------------------------------------------------------
// Files.

#[test]
fn save_twice_keeps_the_first_as_previous() {
    let dir = tempfile::tempdir().unwrap();
    let first = sample(5, 2, false, false);
    let mut second = sample(5, 2, true, true);
    second.state.iterations = 18;
    save(dir.path(), &first).unwrap();
    assert!(!dir.path().join(PREVIOUS_FILE).exists());
    save(dir.path(), &second).unwrap();
    let newest = decode(&fs::read(dir.path().join(CHECKPOINT_FILE)).unwrap()).unwrap();
    let prev = decode(&fs::read(dir.path().join(PREVIOUS_FILE)).unwrap()).unwrap();
    assert_bit_equal(&newest, &second);
    assert_bit_equal(&prev, &first);
    assert!(!dir.path().join("checkpoint.tmp").exists());
    let loaded = load(dir.path()).unwrap();
    assert!(!loaded.from_previous);
    assert!(loaded.warning.is_none());
    assert_bit_equal(&loaded.checkpoint, &second);
}

fn two_saved(dir: &Path) -> (Checkpoint, Checkpoint) {
    let first = sample(4, 1, false, false);
    let mut second = sample(4, 2, false, false);
    second.state.iterations = 99;
    save(dir, &first).unwrap();
    save(dir, &second).unwrap();
    (first, second)
}

#[test]
fn load_falls_back_to_previous_when_the_newest_is_truncated() {
    let dir = tempfile::tempdir().unwrap();
    let (first, _) = two_saved(dir.path());
    let path = dir.path().join(CHECKPOINT_FILE);
    let bytes = fs::read(&path).unwrap();
    fs::write(&path, &bytes[..bytes.len() / 2]).unwrap();
    let loaded = load(dir.path()).unwrap();
    assert!(loaded.from_previous);
    assert_bit_equal(&loaded.checkpoint, &first);
    let warning = loaded.warning.unwrap();
    assert!(warning.contains("torn or corrupt"), "{warning}");
    assert!(warning.contains(PREVIOUS_FILE), "{warning}");
}

#[test]
fn load_falls_back_to_previous_when_the_newest_is_missing_or_foreign() {
    let dir = tempfile::tempdir().unwrap();
    let (first, _) = two_saved(dir.path());
    let path = dir.path().join(CHECKPOINT_FILE);
    fs::remove_file(&path).unwrap();
    let loaded = load(dir.path()).unwrap();
    assert!(loaded.from_previous);
    assert!(loaded.warning.unwrap().contains("missing"));
    assert_bit_equal(&loaded.checkpoint, &first);
    fs::write(&path, "not a checkpoint").unwrap();
    let loaded = load(dir.path()).unwrap();
    assert!(loaded
        .warning
        .unwrap()
        .contains("not an outcore checkpoint"));
}

#[test]
fn load_fails_naming_both_problems_when_neither_is_usable() {
    let dir = tempfile::tempdir().unwrap();
    two_saved(dir.path());
    let newest = dir.path().join(CHECKPOINT_FILE);
    let prev = dir.path().join(PREVIOUS_FILE);
    let bytes = fs::read(&newest).unwrap();
    fs::write(&newest, &bytes[..40]).unwrap();
    let mut other = fs::read(&prev).unwrap();
    other[13..17].copy_from_slice(&7u32.to_le_bytes());
    reseal(&mut other);
    fs::write(&prev, &other).unwrap();
    let err = load(dir.path()).unwrap_err();
    assert_eq!(err.kind(), ErrorKind::Format);
    let m = err.message();
    assert!(m.contains("torn or corrupt"), "{m}");
    assert!(m.contains("format version 7"), "{m}");
    assert!(m.contains(&newest.display().to_string()), "{m}");
    assert!(m.contains(&prev.display().to_string()), "{m}");
    assert!(m.contains("started again"), "{m}");
    // Only a previous one, and broken.
    fs::remove_file(&newest).unwrap();
    let err = load(dir.path()).unwrap_err();
    assert!(err.message().contains("missing"), "{err}");
}

#[test]
fn load_without_any_checkpoint_says_there_is_nothing_to_resume() {
    let dir = tempfile::tempdir().unwrap();
    let err = load(dir.path()).unwrap_err();
    assert_eq!(err.kind(), ErrorKind::Usage);
    assert!(err.message().contains("no checkpoint"), "{err}");
    assert!(err.message().contains("started again"), "{err}");
}

#[test]
fn save_into_a_missing_directory_is_an_io_error() {
    let dir = tempfile::tempdir().unwrap();
    let err = save(&dir.path().join("nope"), &sample(2, 0, false, false)).unwrap_err();
    assert_eq!(err.kind(), ErrorKind::Io);
}

// ---------------------------------------------------------------------------------------
// Identity.

#[test]
fn compare_identity_accepts_the_same_run() {
    let a = identity(8);
    let mut b = identity(8);
    assert_eq!(compare_identity(&a, &b), Ok(()));
    // Another path to the same data, an integer written as a float, a design not given.
    b.data = vec!["/abs/data/train-*.parquet".to_string()];
    b.objective_settings["features"]["hash_bits"] = json!(18.0);
    b.design = serde_json::Value::Null;
    assert_eq!(compare_identity(&a, &b), Ok(()));
    assert!(check_resume(&a, &b).is_ok());
}

#[test]
fn compare_identity_names_a_changed_setting() {
    let a = identity(8);
    let mut b = identity(8);
    b.objective_settings["ridge"] = json!(0.2);
    assert_eq!(
        compare_identity(&a, &b),
        Err("the setting 'ridge' changed from 0.1 to 0.2".to_string())
    );
    b.objective_settings["loss"] = json!("poisson");
    b.objective_settings["features"]["hash_bits"] = json!(20);
    b.objective_settings.as_object_mut().unwrap().remove("l1");
    b.objective_settings["offset"] = json!("exposure");
    let e = compare_identity(&a, &b).unwrap_err();
    assert!(
        e.contains("the setting 'loss' changed from logistic to poisson"),
        "{e}"
    );
    assert!(
        e.contains("the setting 'features.hash_bits' changed from 18 to 20"),
        "{e}"
    );
    assert!(
        e.contains("the setting 'l1' was 0.0 when the fit started and is not set now"),
        "{e}"
    );
    assert!(
        e.contains("the setting 'offset' is exposure now and was not set"),
        "{e}"
    );
    let err = check_resume(&a, &b).unwrap_err();
    assert_eq!(err.kind(), ErrorKind::Mismatch);
    assert!(
        err.message()
            .starts_with("cannot resume this fit: the setting"),
        "{err}"
    );
}

#[test]
fn compare_identity_names_a_changed_fingerprint() {
    let a = identity(8);
    let mut b = identity(8);
    b.fingerprint = "0123456789abcdef0123456789abcdef".to_string();
    let e = compare_identity(&a, &b).unwrap_err();
    assert!(
        e.starts_with("the data changed (fingerprint 9f86d081884c7d65"),
        "{e}"
    );
    assert!(e.contains("0123456789abcdef…"), "{e}");
    b.data = vec!["other.parquet".to_string()];
    let e = compare_identity(&a, &b).unwrap_err();
    assert!(e.contains("other.parquet"), "{e}");
}

#[test]
fn compare_identity_names_a_changed_shard_count() {
    let a = identity(8);
    let b = identity(4);
    let e = compare_identity(&a, &b).unwrap_err();
    assert!(e.starts_with("the shard count changed from 8 to 4"), "{e}");
}

#[test]
fn compare_identity_names_a_changed_design_and_reports_everything() {
    let a = identity(8);
    let mut b = identity(2);
    b.design = json!({"columns": []});
    b.fingerprint = "ff".to_string();
    b.objective_settings["ridge"] = json!(1);
    let e = compare_identity(&a, &b).unwrap_err();
    assert_eq!(e.matches("; ").count(), 3, "{e}");
    assert!(e.contains("the feature design changed"), "{e}");
}

// ---------------------------------------------------------------------------------------
// Resume through a checkpoint continues bitwise identically.

/// A smooth ill-conditioned problem: Σ w_j (x_j − j)² + log-sum-exp coupling.
struct Bowl;
impl Objective for Bowl {
    fn dim(&self) -> usize {
        6
    }
    fn eval(&mut self, x: &[f64], grad: &mut [f64]) -> outcore::Result<f64> {
        let mut f = 0.0;
        let mut z = 0.0;
        for (j, (&xj, gj)) in x.iter().zip(grad.iter_mut()).enumerate() {
            let w = 10f64.powi(j as i32 - 2);
            let d = xj - j as f64;
            f += w * d * d;
            *gj = 2.0 * w * d;
            z += (0.3 * xj).exp();
        }
        f += z.ln();
        for (&xj, gj) in x.iter().zip(grad.iter_mut()) {
            *gj += 0.3 * (0.3 * xj).exp() / z;
        }
        Ok(f)
    }
}

fn run_to_end(opt: &mut Optimizer) -> State {
    loop {
        if let StepOutcome::Stopped { .. } = opt.step(&mut Bowl).unwrap() {
            return opt.state().clone();
        }
    }
}

#[test]
fn a_resumed_optimizer_ends_bitwise_identical() {
    for l1 in [false, true] {
        let settings = Settings {
            history: 3,
            tol: 1e-10,
            l1: if l1 { vec![0.05; 6] } else { Vec::new() },
            ..Settings::default()
        };
        let x0 = [0.5, -1.0, 2.0, 0.0, 1.0, -3.0];
        let mut straight = Optimizer::new(&mut Bowl, &x0, settings.clone()).unwrap();
        let expected = run_to_end(&mut straight);

        let mut first = Optimizer::new(&mut Bowl, &x0, settings).unwrap();
        for _ in 0..5 {
            first.step(&mut Bowl).unwrap();
        }
        let dir = tempfile::tempdir().unwrap();
        let mut cp = sample(6, 0, false, false);
        cp.state = first.state().clone();
        save(dir.path(), &cp).unwrap();
        let loaded = load(dir.path()).unwrap().checkpoint;
        let mut resumed = Optimizer::from_state(loaded.state).unwrap();
        let got = run_to_end(&mut resumed);
        assert_eq!(bits(&got.x), bits(&expected.x), "l1 = {l1}");
        assert_eq!(got.f.to_bits(), expected.f.to_bits());
        assert_eq!(got.evaluations, expected.evaluations);
        assert_eq!(got.iterations, expected.iterations);
    }
}

// ---------------------------------------------------------------------------------------
// Timing (not a unit test): `cargo test --release --test checkpoint -- --ignored --nocapture`.

fn big(dim: usize, m: usize) -> Checkpoint {
    let mut cp = sample(1, 0, false, false);
    let fill = |seed: u64| -> Vec<f64> {
        let mut r = XorShift(seed | 1);
        (0..dim).map(|_| (r.next() >> 11) as f64 * 1e-10).collect()
    };
    cp.state.settings.history = m;
    cp.state.x = fill(1);
    cp.state.g = fill(2);
    cp.state.s = (0..m as u64).map(|k| fill(10 + k)).collect();
    cp.state.y = (0..m as u64).map(|k| fill(100 + k)).collect();
    cp
}

#[test]
#[ignore = "timing: run with --release --ignored --nocapture"]
fn save_timing() {
    use std::time::Instant;
    let root = std::env::var_os("OUTCORE_CKPT_BENCH_DIR")
        .map(std::path::PathBuf::from)
        .unwrap_or_else(std::env::temp_dir);
    for (dim, m) in [(1_000_000usize, 10usize), (10_000_000, 2), (10_000_000, 10)] {
        let cp = big(dim, m);
        let dir = tempfile::tempdir_in(&root).unwrap();
        let t = Instant::now();
        let bytes = encode(&cp);
        let t_encode = t.elapsed().as_secs_f64();
        let size = bytes.len();
        let t = Instant::now();
        let back = decode(&bytes).unwrap();
        let t_decode = t.elapsed().as_secs_f64();
        drop(bytes);
        assert_eq!(bits(&back.state.x), bits(&cp.state.x));
        drop(back);
        let mut t_save = Vec::new();
        for _ in 0..3 {
            let t = Instant::now();
            save(dir.path(), &cp).unwrap();
            t_save.push(t.elapsed().as_secs_f64());
        }
        let t = Instant::now();
        let loaded = load(dir.path()).unwrap();
        let t_load = t.elapsed().as_secs_f64();
        assert!(!loaded.from_previous);
        println!(
            "dim {dim:>9} m {m:>2}: {:>7.1} MB  encode {t_encode:.3}s  decode {t_decode:.3}s  save (streamed, fsync) {:.3}s {:.3}s {:.3}s  load {t_load:.3}s",
            size as f64 / 1e6,
            t_save[0],
            t_save[1],
            t_save[2]
        );
    }
}
