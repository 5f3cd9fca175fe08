//! The sparse part of a model file: the `hashed` record (DESIGN §6) and the binary
//! sidecar that holds the hashed weights when they are many.
//!
//! Sidecar layout (all little-endian): the 8 bytes `OCHWGT01`, the count of values
//! (u64), the values (f64 each, every output's sparse weights in order), and the CRC-32C
//! of everything before it (u32). The model file names the sidecar (a file name in the
//! model's directory) and records the same CRC, so a sidecar of another fit is refused.
//! Up to [`INLINE_MAX`] weights are written inline in the model file instead.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use serde_json::Value;

use crate::features::hashing::{self, SparseRequest, NULL_PART, PART_SEPARATOR};
use crate::features::heavy_hitters::Sketch;
use crate::model::SparseModel;
use crate::{atomic, Error, Result};

/// Magic bytes of the sidecar.
pub const MAGIC: &[u8; 8] = b"OCHWGT01";
/// Most sparse weights written inline in the model file.
pub const INLINE_MAX: usize = 1024;

/// One frequent value of a hashed feature: its parts (null parts as `None`) and its
/// count in the training rows (a lower bound, see [`crate::features::heavy_hitters`]).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct FrequentValue {
    /// Value of each part of the feature.
    pub value: Vec<Option<String>>,
    /// Occurrences counted.
    pub count: u64,
}

/// The most frequent values of one hashed feature.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Frequent {
    /// `zone` or `zone*hour`.
    pub feature: String,
    /// Values offered to the sketch (rows, or tokens of a token list).
    pub total: u64,
    /// Most frequent first.
    pub values: Vec<FrequentValue>,
}

impl Frequent {
    /// The summary of a sketch.
    pub fn of_sketch(feature: &str, sketch: &Sketch) -> Frequent {
        Frequent {
            feature: feature.to_string(),
            total: sketch.total,
            values: sketch
                .top()
                .into_iter()
                .map(|(bytes, count)| FrequentValue {
                    value: decode_parts(&bytes),
                    count,
                })
                .collect(),
        }
    }
}

/// Parts of hashed bytes (see [`crate::features::hashing`]): split at 0xFE, 0xFF a null.
pub fn decode_parts(bytes: &[u8]) -> Vec<Option<String>> {
    bytes
        .split(|b| *b == PART_SEPARATOR)
        .map(|p| {
            if p == [NULL_PART] {
                None
            } else {
                Some(String::from_utf8_lossy(p).into_owned())
            }
        })
        .collect()
}

/// The hashed bytes of parts (the inverse of [`decode_parts`]).
pub fn encode_parts(parts: &[Option<String>]) -> Vec<u8> {
    let mut out = Vec::new();
    for (k, p) in parts.iter().enumerate() {
        if k > 0 {
            out.push(PART_SEPARATOR);
        }
        match p {
            Some(s) => out.extend_from_slice(s.as_bytes()),
            None => out.push(NULL_PART),
        }
    }
    out
}

/// The `hashed` key of the model file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct HashedRecord {
    /// Hash bits (2^bits buckets).
    pub bits: u32,
    /// `--categorical` columns as given (`zone`, `distance/2.5`).
    pub columns: Vec<String>,
    /// `--cross` crosses as given (`zone*hour`).
    pub crosses: Vec<String>,
    /// `--sparse-vector` columns (`tokens:50000`, or `token_ids,token_counts:50000`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub vectors: Vec<String>,
    /// The sidecar file name (in the model's directory), or the weights inline.
    pub weights: Value,
    /// CRC-32C of the sidecar (as stored at its end).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub weights_crc32c: Option<u32>,
    /// Sparse weights in all (every output).
    pub count: u64,
    /// Sparse weights that are not zero.
    pub nonzero: u64,
    /// Most frequent values of each hashed feature, for reading the weights.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub frequent: Vec<Frequent>,
}

/// The record of a sparse model whose sparse weights are `weights` (inline for now;
/// [`write_beside`] moves large ones to the sidecar).
pub fn record(s: &SparseModel, weights: &[f64]) -> HashedRecord {
    let r = &s.request;
    HashedRecord {
        bits: r.bits,
        columns: r.columns.iter().map(hashing::Part::name).collect(),
        crosses: r
            .crosses
            .iter()
            .map(|c| {
                c.iter()
                    .map(hashing::Part::name)
                    .collect::<Vec<_>>()
                    .join("*")
            })
            .collect(),
        vectors: r.vectors.iter().map(hashing::VectorColumn::spec).collect(),
        weights: if weights.len() <= INLINE_MAX {
            Value::Array(
                weights
                    .iter()
                    .map(|v| serde_json::Number::from_f64(*v).map_or(Value::Null, Value::Number))
                    .collect(),
            )
        } else {
            Value::Null
        },
        weights_crc32c: None,
        count: weights.len() as u64,
        nonzero: weights.iter().filter(|v| **v != 0.0).count() as u64,
        frequent: s.frequent.clone(),
    }
}

/// The sparse model of a record (the weights are read apart).
pub fn sparse_model(h: &HashedRecord) -> Result<SparseModel> {
    let request = SparseRequest {
        bits: h.bits,
        columns: h
            .columns
            .iter()
            .map(|c| hashing::parse_part(c, "hashed.columns"))
            .collect::<Result<_>>()?,
        crosses: h
            .crosses
            .iter()
            .map(|c| hashing::parse_cross(c))
            .collect::<Result<_>>()?,
        vectors: h
            .vectors
            .iter()
            .map(|v| hashing::parse_vector(v))
            .collect::<Result<_>>()?,
    };
    Ok(SparseModel {
        request,
        frequent: h.frequent.clone(),
    })
}

/// Path of the sidecar of the model at `model`: `NAME.weights.bin` beside `NAME.json`.
pub fn sidecar_path(model: &Path) -> PathBuf {
    let stem = model
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "model".to_string());
    model.with_file_name(format!("{stem}.weights.bin"))
}

/// Writes `weights` to the sidecar of `model` (atomically, streamed) when there are more
/// than [`INLINE_MAX`], and points `h` at it.
pub fn write_beside(model: &Path, h: &mut HashedRecord, weights: &[f64]) -> Result<()> {
    if weights.len() <= INLINE_MAX {
        return Ok(());
    }
    let path = sidecar_path(model);
    let tmp = atomic::temp_path(&path);
    let written = (|| -> std::io::Result<u32> {
        let file = File::create(&tmp)?;
        let mut w = BufWriter::with_capacity(1 << 20, file);
        let mut crc = 0u32;
        let mut put = |w: &mut BufWriter<File>, bytes: &[u8]| -> std::io::Result<()> {
            crc = crc32c::crc32c_append(crc, bytes);
            w.write_all(bytes)
        };
        put(&mut w, MAGIC)?;
        put(&mut w, &(weights.len() as u64).to_le_bytes())?;
        let mut buf = Vec::with_capacity(8 * 4096);
        for chunk in weights.chunks(4096) {
            buf.clear();
            for v in chunk {
                buf.extend_from_slice(&v.to_le_bytes());
            }
            put(&mut w, &buf)?;
        }
        w.write_all(&crc.to_le_bytes())?;
        let file = w.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        Ok(crc)
    })();
    let crc = match written {
        Ok(c) => c,
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            return Err(Error::io(&tmp, e));
        }
    };
    atomic::finish(&tmp, &path)?;
    h.weights = Value::String(
        path.file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default(),
    );
    h.weights_crc32c = Some(crc);
    Ok(())
}

/// Reads the sparse weights of the model at `model`: inline, or from its sidecar
/// (checking magic, length and checksum).
pub fn read_beside(model: &Path, h: &HashedRecord) -> Result<Vec<f64>> {
    let damaged = |what: String| {
        Error::format(format!(
            "the hashed weights of the model {} are damaged: {what}",
            model.display()
        ))
    };
    let name = match &h.weights {
        Value::Array(values) => {
            return values
                .iter()
                .map(|v| v.as_f64())
                .collect::<Option<Vec<f64>>>()
                .ok_or_else(|| damaged("an inline weight is not a number".into()));
        }
        Value::String(name) => name,
        _ => {
            return Err(damaged(
                "\"weights\" is neither a file name nor a list".into(),
            ))
        }
    };
    if name.contains('/') || name.contains('\\') || name.is_empty() {
        return Err(damaged(format!(
            "the weights file name '{name}' must be a plain file name"
        )));
    }
    let path = model.with_file_name(name);
    let bytes = std::fs::read(&path).map_err(|e| {
        Error::format(format!(
            "the model {} keeps its hashed weights in {}, which cannot be read ({e}); keep the two files together",
            model.display(),
            path.display()
        ))
    })?;
    let n = h.count as usize;
    let want = 8 + 8 + 8 * n + 4;
    if bytes.len() != want || &bytes[..8] != MAGIC {
        return Err(damaged(format!(
            "{} is not a weights file of {} values ({} bytes where {want} were expected)",
            path.display(),
            n,
            bytes.len()
        )));
    }
    let body = &bytes[..want - 4];
    let stored = u32::from_le_bytes(bytes[want - 4..].try_into().unwrap_or([0; 4]));
    let crc = crc32c::crc32c(body);
    if crc != stored || Some(crc) != h.weights_crc32c {
        return Err(damaged(format!(
            "the checksum of {} does not match (the file is corrupt or belongs to another model)",
            path.display()
        )));
    }
    let count = u64::from_le_bytes(bytes[8..16].try_into().unwrap_or([0; 8])) as usize;
    if count != n {
        return Err(damaged(format!(
            "{} holds {count} values, not {n}",
            path.display()
        )));
    }
    Ok(body[16..]
        .chunks_exact(8)
        .map(|c| f64::from_le_bytes(c.try_into().unwrap_or([0; 8])))
        .collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn parts_round_trip() {
        let parts = vec![Some("harbor".to_string()), None, Some("18".to_string())];
        assert_eq!(decode_parts(&encode_parts(&parts)), parts);
    }

    #[test]
    fn sidecar_round_trip_and_corruption() {
        let dir = tempfile::tempdir().unwrap();
        let model = dir.path().join("m.json");
        let weights: Vec<f64> = (0..3000).map(|i| (i as f64).sin()).collect();
        let s = SparseModel {
            request: SparseRequest {
                bits: 12,
                columns: vec![hashing::parse_part("zone", "t").unwrap()],
                crosses: vec![],
                vectors: vec![],
            },
            frequent: vec![],
        };
        let mut h = record(&s, &weights);
        write_beside(&model, &mut h, &weights).unwrap();
        assert_eq!(h.weights, Value::String("m.weights.bin".into()));
        assert_eq!(read_beside(&model, &h).unwrap(), weights);
        let path = sidecar_path(&model);
        let mut bytes = std::fs::read(&path).unwrap();
        bytes[100] ^= 1;
        std::fs::write(&path, &bytes).unwrap();
        assert!(read_beside(&model, &h).is_err());
    }
}
