//! Byte-level entry points of the readers, shared by the fuzz targets (`fuzz/`) and the
//! corpus replay test (`tests/fuzz_corpus.rs`), so that both exercise exactly the same
//! calls. Each takes arbitrary bytes and must return without panicking; an error is a
//! correct outcome. Not part of the stable interface.

use std::path::Path;

use crate::{cache, checkpoint, model::Model, settings_file};

/// The model-file reader ([`Model::from_json_slice`]) and what `inspect`, `predict` and
/// a refit do with a model that loaded: original-scale coefficients, the scoring
/// design, the file record and writing it out again, which must read back.
pub fn model(bytes: &[u8]) {
    let Ok(model) = Model::from_json_slice(bytes, Path::new("fuzz-model.json")) else {
        return;
    };
    let _ = model.coefficients();
    let _ = model.internal_rows();
    let _ = model.design();
    let _ = model.design_for_training();
    if let Some(table) = &model.inference {
        let _ = table.table_lines();
    }
    let text = serde_json::to_string(&model.to_file()).expect("a model file record encodes");
    if let Err(e) = Model::from_json_slice(text.as_bytes(), Path::new("rewritten.json")) {
        panic!("a model that loaded does not read back after writing: {e}");
    }
}

/// The checkpoint reader ([`checkpoint::decode`]), on the bytes as given and again with
/// the trailing checksum made right (so that mutations reach the header and vector
/// parsing behind the checksum test). A checkpoint that decodes must encode and decode
/// again.
pub fn checkpoint(bytes: &[u8]) {
    let _ = checkpoint::decode(bytes);
    if bytes.len() >= 4 {
        let mut fixed = bytes.to_vec();
        let n = fixed.len() - 4;
        let crc = crc32c::crc32c(&fixed[..n]);
        fixed[n..].copy_from_slice(&crc.to_le_bytes());
        if let Ok(cp) = checkpoint::decode(&fixed) {
            let again = checkpoint::encode(&cp);
            if let Err(e) = checkpoint::decode(&again) {
                panic!("a checkpoint that decoded does not decode after encoding: {e}");
            }
        }
    }
}

/// The settings-file reader ([`settings_file::parse`]) on any UTF-8 text (a file that
/// is not UTF-8 is refused by `read` before parsing).
pub fn settings(bytes: &[u8]) {
    let text = String::from_utf8_lossy(bytes);
    let _ = settings_file::parse(&text, Path::new("fuzz.toml"));
}

/// The block-cache reader ([`cache::read_in_memory`]: header, key, index, every block's
/// sections and CSR part), on the bytes as given and again with the checksums made right
/// (so that mutations reach the section tables and decoders behind them).
pub fn cache(bytes: &[u8]) {
    let _ = cache::read_in_memory(bytes);
    let _ = cache::read_in_memory(&cache::with_checksums_made_right(bytes));
}
