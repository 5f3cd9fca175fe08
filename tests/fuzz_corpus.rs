//! Replays the saved fuzz corpora (`fuzz/corpus/<target>/`) through the same library
//! entry points the fuzz targets call (`outcore::fuzzing`), on stable Rust: every file
//! must be read without a panic (errors are the expected outcome for most of them).
//! Crash inputs found by fuzzing are added to the corpus, so this is their regression
//! test.

use std::path::PathBuf;

fn corpus(target: &str) -> Vec<PathBuf> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz/corpus")
        .join(target);
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", dir.display()))
        .map(|e| e.expect("entry").path())
        .filter(|p| p.is_file())
        .collect();
    files.sort();
    files
}

fn replay(target: &str, entry: fn(&[u8])) {
    let files = corpus(target);
    assert!(
        files.len() >= 3,
        "the corpus of {target} has {} files",
        files.len()
    );
    let mut panicked = Vec::new();
    for path in &files {
        let bytes = std::fs::read(path).expect("read corpus file");
        if std::panic::catch_unwind(|| entry(&bytes)).is_err() {
            panicked.push(path.display().to_string());
        }
    }
    assert!(
        panicked.is_empty(),
        "{target}: {} of {} corpus files panicked: {panicked:?}",
        panicked.len(),
        files.len()
    );
}

#[test]
fn model_corpus_reads_without_panic() {
    replay("model", outcore::fuzzing::model);
}

#[test]
fn checkpoint_corpus_reads_without_panic() {
    replay("checkpoint", outcore::fuzzing::checkpoint);
}

#[test]
fn settings_corpus_reads_without_panic() {
    replay("settings", outcore::fuzzing::settings);
}

#[test]
fn cache_corpus_reads_without_panic() {
    replay("cache", outcore::fuzzing::cache);
}

/// The seeds that are valid files must also be accepted: the entry points are not
/// rejecting everything.
#[test]
fn valid_seeds_are_accepted() {
    use std::path::Path;
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("fuzz/corpus");
    let read = |t: &str, f: &str| std::fs::read(root.join(t).join(f)).expect("seed");
    for f in ["valid-logistic.json", "valid-softmax.json"] {
        outcore::model::Model::from_json_slice(&read("model", f), Path::new(f))
            .unwrap_or_else(|e| panic!("{f}: {e}"));
    }
    outcore::checkpoint::decode(&read("checkpoint", "valid-checkpoint"))
        .unwrap_or_else(|e| panic!("checkpoint: {e}"));
    for f in ["valid-dense-holdout", "valid-hashed-csr", "valid-softmax"] {
        let blocks = outcore::cache::read_in_memory(&read("cache", f))
            .unwrap_or_else(|e| panic!("cache {f}: {e}"));
        assert!(blocks >= 3, "cache {f}: {blocks} blocks");
    }
    for f in [
        "mangled-truncated",
        "mangled-flipped",
        "mangled-signature-only",
    ] {
        assert!(
            outcore::cache::read_in_memory(&read("cache", f)).is_err(),
            "cache {f} was accepted"
        );
    }
    let text = String::from_utf8(read("settings", "valid-run.toml")).expect("utf-8");
    outcore::settings_file::parse(&text, Path::new("valid-run.toml"))
        .unwrap_or_else(|e| panic!("settings: {e}"));
}

/// A deterministic sweep in place of a fuzzer run: every single-byte change of two cache
/// seeds (each byte XOR 0xA5), read as given and with the checksums made right, must
/// return without a panic.
#[test]
fn every_single_byte_change_of_cache_seeds_reads_without_panic() {
    let root = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("fuzz/corpus/cache");
    for seed in ["valid-hashed-csr", "valid-dense-holdout"] {
        let bytes = std::fs::read(root.join(seed)).expect("seed");
        let mut panicked = Vec::new();
        for at in 0..bytes.len() {
            let mut changed = bytes.clone();
            changed[at] ^= 0xA5;
            if std::panic::catch_unwind(|| outcore::fuzzing::cache(&changed)).is_err() {
                panicked.push(at);
            }
        }
        assert!(
            panicked.is_empty(),
            "{seed}: changes at {panicked:?} panicked"
        );
    }
}
