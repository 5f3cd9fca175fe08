//! The checkpoint file of a fit: who the run is, how far it got, and the complete
//! optimizer state, so that a resumed fit ends bitwise identical to one never stopped.
//!
//! A checkpoint is a versioned record of its own. Its layout is written out here field by
//! field (nothing is dumped wholesale from an in-memory struct), so that changing a
//! struct elsewhere in the crate can never silently change the file.
//!
//! # Byte layout (format version 1)
//!
//! All integers and floats are little-endian.
//!
//! | offset      | size     | content                                                   |
//! |-------------|----------|-----------------------------------------------------------|
//! | 0           | 13       | signature `OUTCORE-CKPT\0` ([`MAGIC`])                     |
//! | 13          | 4        | `u32` format version, `1` ([`FORMAT_VERSION`])             |
//! | 17          | 4        | `u32` length `H` of the JSON header                        |
//! | 21          | `H`      | JSON header, UTF-8 (see below)                             |
//! | 21 + `H`    | …        | body: `f64` vectors, each a `u64` count `n` then `8n` bytes |
//! | end − 4     | 4        | `u32` CRC-32C (Castagnoli) of every byte before it         |
//!
//! The JSON header is an object with the keys
//!
//! - `identity`: `data` (array of strings), `fingerprint` (string), `shards` (integer),
//!   `objective_settings` (object), `design` (any JSON);
//! - `progress`: `passes` (integer), `seconds` (number);
//! - `optimizer`: `dim` and `history_pairs` (integers: the length of `x` and the number
//!   of `(s, y)` pairs in the body), `f`, `last_step`, `seconds` (numbers),
//!   `iterations`, `evaluations`, `pairs_skipped` (integers), `stopped` (a stop name or
//!   `null`), `message` (string or `null`), and `settings` (every field of
//!   [`Settings`] except `l1`, which is in the body);
//! - `partial`: `null`, or `{"shards": [...]}` with one entry per shard, each
//!   `{"state": "not-started"}`, `{"state": "partial", "blocks": n}` or
//!   `{"state": "done"}`.
//!
//! Floating-point numbers in the header are written with the shortest text that reads
//! back to the same bits (`-0.0` included); the non-finite values, which JSON lacks, are
//! the strings `"inf"`, `"-inf"` and `"nan"` (a NaN reads back as the canonical NaN).
//!
//! The body holds, in this order: `x`, `g`, `recent_f`, `settings.l1` (count 0 when
//! there is no L1 term), then `s[0]`, `y[0]`, `s[1]`, `y[1]`, … (oldest first), then, when
//! `partial` is not `null`, the pass point and the sums of every shard that is not
//! `not-started`, in shard order. Nothing follows the last vector but the checksum.
//!
//! # Files
//!
//! [`save`] writes `checkpoint.tmp`, syncs it, renames the existing `checkpoint` to
//! `checkpoint.prev`, renames the new file to `checkpoint` and syncs the directory.
//! [`load`] reads `checkpoint` and falls back to `checkpoint.prev`, with a warning, when
//! the newer file is missing, torn or corrupt.
//!
//! # When
//!
//! A fit writes a checkpoint when it starts and after accepted iterations, paced by a
//! [`Pacer`]: after an iteration the checkpoint is written only when at least
//! [`PACE`] times the duration of the last write has passed since that write ended (so
//! writing costs at most about 1/[`PACE`] of the fit's time), or when it is smaller
//! than [`SMALL_CHECKPOINT`] (written every time). A skipped
//! one is written when the fit is interrupted (Ctrl-C); a crash loses at most the
//! iterations since the last write. A resumed fit from an older checkpoint redoes those
//! iterations and ends where the uninterrupted fit ends.

use std::fs::{self, File};
use std::io::{self, BufWriter, Write};
use std::path::Path;
use std::time::{Duration, Instant};

use serde::de::{self, Visitor};
use serde::{Deserialize, Deserializer, Serialize, Serializer};
use serde_json::Value;

use crate::optim::{Settings, State, Stop};
use crate::{atomic, Error, Result};

/// The first bytes of every checkpoint file.
pub const MAGIC: &[u8; 13] = b"OUTCORE-CKPT\0";
/// The format version this build writes and reads.
pub const FORMAT_VERSION: u32 = 1;
/// Name of the newest checkpoint inside a run directory.
pub const CHECKPOINT_FILE: &str = "checkpoint";
/// Name of the checkpoint before the newest one.
pub const PREVIOUS_FILE: &str = "checkpoint.prev";

/// Bytes before the header: signature, version, header length.
const PREAMBLE: usize = MAGIC.len() + 4 + 4;
/// Bytes of the trailing checksum.
const CHECKSUM: usize = 4;

/// Who the run is: a resume is refused when its data or objective settings differ
/// (see [`compare_identity`]).
#[derive(Debug, Clone, PartialEq)]
pub struct RunIdentity {
    /// The data paths as the user gave them.
    pub data: Vec<String>,
    /// Fingerprint of the data (hex).
    pub fingerprint: String,
    /// Number of shards the passes are summed over; fixed for the life of a fit.
    pub shards: usize,
    /// The settings that define the objective, as a JSON object; compared key by key.
    pub objective_settings: Value,
    /// The fixed feature design (statistics); opaque to this module.
    pub design: Value,
}

/// Work done so far.
#[derive(Debug, Clone, PartialEq)]
pub struct Progress {
    /// Passes over the data so far.
    pub passes: u64,
    /// Seconds of fitting so far.
    pub seconds: f64,
}

/// Where one shard stands in a pass interrupted at a block boundary.
#[derive(Debug, Clone, PartialEq)]
pub enum ShardProgress {
    /// No block of the shard has been summed.
    NotStarted,
    /// The first `blocks` blocks of the shard have been summed into `sums`.
    Partial {
        /// Blocks of the shard already summed, in data order.
        blocks: u64,
        /// The shard's accumulator so far (`[loss, extras…, gradient…]`).
        sums: Vec<f64>,
    },
    /// The whole shard has been summed.
    Done {
        /// The shard's accumulator (`[loss, extras…, gradient…]`).
        sums: Vec<f64>,
    },
}

/// A pass interrupted at a block boundary: the point it evaluates and each shard's sums.
///
/// Every accumulator (of `Partial` and `Done` shards) must have the same length.
#[derive(Debug, Clone, PartialEq)]
pub struct PartialPass {
    /// The point the pass evaluates (of the optimizer's dimension).
    pub point: Vec<f64>,
    /// One entry per shard, in shard order (as many as [`RunIdentity::shards`]).
    pub shards: Vec<ShardProgress>,
}

/// Everything a fit needs to continue where it stopped.
#[derive(Debug, Clone, PartialEq)]
pub struct Checkpoint {
    /// Who the run is.
    pub identity: RunIdentity,
    /// Passes and time used.
    pub progress: Progress,
    /// The optimizer state after the last accepted iteration.
    pub state: State,
    /// A pass in progress, if the checkpoint was taken inside one.
    pub partial: Option<PartialPass>,
}

/// What [`load`] found.
#[derive(Debug, Clone)]
pub struct Loaded {
    /// The checkpoint read.
    pub checkpoint: Checkpoint,
    /// True when the newest file was unusable and `checkpoint.prev` was read instead.
    pub from_previous: bool,
    /// For the user, when `from_previous`: what was wrong with the newest file.
    pub warning: Option<String>,
}

// ---------------------------------------------------------------------------------------
// Header records (format version 1). Private: they are the file layout, not the API.

/// An `f64` in the JSON header: a number when finite, else `"inf"`, `"-inf"` or `"nan"`.
#[derive(Clone, Copy)]
struct F64(f64);

impl Serialize for F64 {
    fn serialize<S: Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        let v = self.0;
        if v.is_finite() {
            s.serialize_f64(v)
        } else if v.is_nan() {
            s.serialize_str("nan")
        } else if v > 0.0 {
            s.serialize_str("inf")
        } else {
            s.serialize_str("-inf")
        }
    }
}

impl<'de> Deserialize<'de> for F64 {
    fn deserialize<D: Deserializer<'de>>(d: D) -> std::result::Result<F64, D::Error> {
        struct F64Visitor;
        impl Visitor<'_> for F64Visitor {
            type Value = F64;
            fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
                f.write_str("a number, \"inf\", \"-inf\" or \"nan\"")
            }
            fn visit_f64<E: de::Error>(self, v: f64) -> std::result::Result<F64, E> {
                Ok(F64(v))
            }
            fn visit_u64<E: de::Error>(self, v: u64) -> std::result::Result<F64, E> {
                Ok(F64(v as f64))
            }
            fn visit_i64<E: de::Error>(self, v: i64) -> std::result::Result<F64, E> {
                Ok(F64(v as f64))
            }
            fn visit_str<E: de::Error>(self, v: &str) -> std::result::Result<F64, E> {
                match v {
                    "inf" => Ok(F64(f64::INFINITY)),
                    "-inf" => Ok(F64(f64::NEG_INFINITY)),
                    "nan" => Ok(F64(f64::NAN)),
                    _ => Err(E::invalid_value(de::Unexpected::Str(v), &self)),
                }
            }
        }
        d.deserialize_any(F64Visitor)
    }
}

#[derive(Serialize, Deserialize)]
struct HeaderV1 {
    identity: IdentityV1,
    progress: ProgressV1,
    optimizer: OptimizerV1,
    partial: Option<PartialV1>,
}

#[derive(Serialize, Deserialize)]
struct IdentityV1 {
    data: Vec<String>,
    fingerprint: String,
    shards: u64,
    objective_settings: Value,
    design: Value,
}

#[derive(Serialize, Deserialize)]
struct ProgressV1 {
    passes: u64,
    seconds: F64,
}

#[derive(Serialize, Deserialize)]
struct OptimizerV1 {
    dim: u64,
    history_pairs: u64,
    f: F64,
    last_step: F64,
    seconds: F64,
    iterations: u64,
    evaluations: u64,
    pairs_skipped: u64,
    stopped: Option<Stop>,
    message: Option<String>,
    settings: SettingsV1,
}

#[derive(Serialize, Deserialize)]
struct SettingsV1 {
    history: u64,
    tol: F64,
    c1: F64,
    c2: F64,
    max_line_search_trials: u64,
    curvature_eps: F64,
    flat_window: u64,
    flat_tol: F64,
    max_evals: Option<u64>,
    max_iterations: Option<u64>,
    max_seconds: Option<F64>,
}

#[derive(Serialize, Deserialize)]
struct PartialV1 {
    shards: Vec<ShardV1>,
}

#[derive(Serialize, Deserialize)]
#[serde(tag = "state", rename_all = "kebab-case")]
enum ShardV1 {
    NotStarted,
    Partial { blocks: u64 },
    Done,
}

fn header_of(cp: &Checkpoint) -> HeaderV1 {
    let st = &cp.state;
    let se = &st.settings;
    HeaderV1 {
        identity: IdentityV1 {
            data: cp.identity.data.clone(),
            fingerprint: cp.identity.fingerprint.clone(),
            shards: cp.identity.shards as u64,
            objective_settings: cp.identity.objective_settings.clone(),
            design: cp.identity.design.clone(),
        },
        progress: ProgressV1 {
            passes: cp.progress.passes,
            seconds: F64(cp.progress.seconds),
        },
        optimizer: OptimizerV1 {
            dim: st.x.len() as u64,
            history_pairs: st.s.len() as u64,
            f: F64(st.f),
            last_step: F64(st.last_step),
            seconds: F64(st.seconds),
            iterations: st.iterations,
            evaluations: st.evaluations,
            pairs_skipped: st.pairs_skipped,
            stopped: st.stopped,
            message: st.message.clone(),
            settings: SettingsV1 {
                history: se.history as u64,
                tol: F64(se.tol),
                c1: F64(se.c1),
                c2: F64(se.c2),
                max_line_search_trials: se.max_line_search_trials as u64,
                curvature_eps: F64(se.curvature_eps),
                flat_window: se.flat_window as u64,
                flat_tol: F64(se.flat_tol),
                max_evals: se.max_evals,
                max_iterations: se.max_iterations,
                max_seconds: se.max_seconds.map(F64),
            },
        },
        partial: cp.partial.as_ref().map(|p| PartialV1 {
            shards: p
                .shards
                .iter()
                .map(|s| match s {
                    ShardProgress::NotStarted => ShardV1::NotStarted,
                    ShardProgress::Partial { blocks, .. } => ShardV1::Partial { blocks: *blocks },
                    ShardProgress::Done { .. } => ShardV1::Done,
                })
                .collect(),
        }),
    }
}

/// The body vectors in file order.
fn body_of(cp: &Checkpoint) -> Vec<&[f64]> {
    let st = &cp.state;
    let mut v: Vec<&[f64]> = vec![&st.x, &st.g, &st.recent_f, &st.settings.l1];
    for (s, y) in st.s.iter().zip(&st.y) {
        v.push(s);
        v.push(y);
    }
    if let Some(p) = &cp.partial {
        v.push(&p.point);
        for shard in &p.shards {
            match shard {
                ShardProgress::NotStarted => {}
                ShardProgress::Partial { sums, .. } | ShardProgress::Done { sums } => v.push(sums),
            }
        }
    }
    v
}

// ---------------------------------------------------------------------------------------
// Consistency (checked before saving and after decoding).

/// Checks that the parts of `cp` agree with each other; the error is one sentence part.
fn check_consistent(cp: &Checkpoint) -> std::result::Result<(), String> {
    let st = &cp.state;
    let dim = st.x.len();
    if st.g.len() != dim {
        return Err(format!(
            "the gradient has {} entries for {dim} coefficients",
            st.g.len()
        ));
    }
    if st.s.len() != st.y.len() {
        return Err(format!(
            "the history has {} steps but {} gradient changes",
            st.s.len(),
            st.y.len()
        ));
    }
    for (i, (s, y)) in st.s.iter().zip(&st.y).enumerate() {
        if s.len() != dim || y.len() != dim {
            return Err(format!(
                "history pair {i} has {} and {} entries for {dim} coefficients",
                s.len(),
                y.len()
            ));
        }
    }
    if !st.settings.l1.is_empty() && st.settings.l1.len() != dim {
        return Err(format!(
            "the L1 penalty has {} entries for {dim} coefficients",
            st.settings.l1.len()
        ));
    }
    if !cp.identity.objective_settings.is_object() {
        return Err("the objective settings are not a JSON object".to_string());
    }
    if let Some(p) = &cp.partial {
        if p.point.len() != dim {
            return Err(format!(
                "the interrupted pass evaluates a point of {} entries for {dim} coefficients",
                p.point.len()
            ));
        }
        if p.shards.len() != cp.identity.shards {
            return Err(format!(
                "the interrupted pass has {} shards but the run has {}",
                p.shards.len(),
                cp.identity.shards
            ));
        }
        let mut width = None;
        for (i, shard) in p.shards.iter().enumerate() {
            let sums = match shard {
                ShardProgress::NotStarted => continue,
                ShardProgress::Partial { sums, .. } | ShardProgress::Done { sums } => sums,
            };
            match width {
                None => width = Some(sums.len()),
                Some(w) if w != sums.len() => {
                    return Err(format!(
                        "shard {i} of the interrupted pass has {} sums where other shards have {w}",
                        sums.len()
                    ))
                }
                Some(_) => {}
            }
        }
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------
// Encoding.

/// A writer that keeps the CRC-32C of everything written through it.
struct CrcWriter<'a, W: Write> {
    inner: &'a mut W,
    crc: u32,
}

impl<W: Write> CrcWriter<'_, W> {
    fn put(&mut self, bytes: &[u8]) -> io::Result<()> {
        self.crc = crc32c::crc32c_append(self.crc, bytes);
        self.inner.write_all(bytes)
    }

    fn put_vec(&mut self, v: &[f64]) -> io::Result<()> {
        const CHUNK: usize = 8192;
        self.put(&(v.len() as u64).to_le_bytes())?;
        let mut buf = vec![0u8; 8 * CHUNK.min(v.len())];
        for chunk in v.chunks(CHUNK) {
            for (out, x) in buf.chunks_exact_mut(8).zip(chunk) {
                out.copy_from_slice(&x.to_le_bytes());
            }
            self.put(&buf[..8 * chunk.len()])?;
        }
        Ok(())
    }
}

/// Writes the whole file to `w`, streaming the vectors (no second copy in memory).
fn write_to<W: Write>(cp: &Checkpoint, w: &mut W) -> io::Result<()> {
    let header = serde_json::to_vec(&header_of(cp)).map_err(io::Error::other)?;
    let header_len = u32::try_from(header.len()).map_err(|_| {
        io::Error::other(format!(
            "the checkpoint header would take {} bytes, more than the 4 GiB the format allows",
            header.len()
        ))
    })?;
    let mut out = CrcWriter { inner: w, crc: 0 };
    out.put(MAGIC)?;
    out.put(&FORMAT_VERSION.to_le_bytes())?;
    out.put(&header_len.to_le_bytes())?;
    out.put(&header)?;
    for v in body_of(cp) {
        out.put_vec(v)?;
    }
    let crc = out.crc;
    out.inner.write_all(&crc.to_le_bytes())
}

/// Encodes `cp` as the bytes of a checkpoint file (layout in the [module docs](self)).
///
/// # Panics
///
/// If the JSON header (mostly [`RunIdentity::design`]) exceeds 4 GiB, which the format
/// cannot hold. [`save`] reports that case as an error instead.
pub fn encode(cp: &Checkpoint) -> Vec<u8> {
    let st = &cp.state;
    let floats = 2 * st.x.len() * (1 + st.s.len()) + st.recent_f.len() + st.settings.l1.len();
    let mut bytes = Vec::with_capacity(8 * floats + 4096);
    if let Err(e) = write_to(cp, &mut bytes) {
        // Writing into a Vec cannot fail; only an oversized header can.
        panic!("cannot encode the checkpoint: {e}");
    }
    bytes
}

// ---------------------------------------------------------------------------------------
// Decoding.

/// Reads the framed parts of a checkpoint, checking every length against what is left.
struct Reader<'a> {
    bytes: &'a [u8],
    pos: usize,
}

impl<'a> Reader<'a> {
    fn take(&mut self, n: usize, what: &str) -> Result<&'a [u8]> {
        let left = self.bytes.len() - self.pos;
        if n > left {
            return Err(Error::format(format!(
                "the checkpoint is corrupt: {what} needs {n} bytes at offset {} but only {left} remain",
                self.pos
            )));
        }
        let part = &self.bytes[self.pos..self.pos + n];
        self.pos += n;
        Ok(part)
    }

    fn u32(&mut self, what: &str) -> Result<u32> {
        let mut b = [0u8; 4];
        b.copy_from_slice(self.take(4, what)?);
        Ok(u32::from_le_bytes(b))
    }

    fn u64(&mut self, what: &str) -> Result<u64> {
        let mut b = [0u8; 8];
        b.copy_from_slice(self.take(8, what)?);
        Ok(u64::from_le_bytes(b))
    }

    /// A `u64` count then that many `f64`; the count is checked before allocating.
    fn vector(&mut self, what: &str) -> Result<Vec<f64>> {
        let n = self.u64(&format!("the length of {what}"))?;
        let left = (self.bytes.len() - self.pos) as u64;
        let fits = n.checked_mul(8).is_some_and(|b| b <= left);
        if !fits {
            return Err(Error::format(format!(
                "the checkpoint is corrupt: {what} claims {n} values but only {left} bytes remain"
            )));
        }
        // `n * 8 <= left <= usize::MAX`, so these conversions are exact.
        let raw = self.take(n as usize * 8, what)?;
        let mut v = Vec::with_capacity(n as usize);
        v.extend(raw.chunks_exact(8).map(|c| {
            let mut b = [0u8; 8];
            b.copy_from_slice(c);
            f64::from_le_bytes(b)
        }));
        Ok(v)
    }

    /// A vector that must have exactly `len` values.
    fn vector_of(&mut self, len: u64, what: &str) -> Result<Vec<f64>> {
        let v = self.vector(what)?;
        if v.len() as u64 != len {
            return Err(Error::format(format!(
                "the checkpoint is inconsistent: {what} has {} values where the header says {len}",
                v.len()
            )));
        }
        Ok(v)
    }
}

fn to_usize(v: u64, what: &str) -> Result<usize> {
    usize::try_from(v).map_err(|_| {
        Error::format(format!(
            "the checkpoint is corrupt: {what} ({v}) is too large for this machine"
        ))
    })
}

/// Decodes the bytes of a checkpoint file.
///
/// Checks, in order: the signature, the format version, the checksum, every length
/// against the bytes that remain (before allocating), the JSON header, and that the
/// vectors agree with each other. Any failure is an [`Error`] of kind
/// [`Format`](crate::ErrorKind::Format) with one sentence; no input makes it panic.
pub fn decode(bytes: &[u8]) -> Result<Checkpoint> {
    if bytes.is_empty() {
        return Err(Error::format("the checkpoint file is empty"));
    }
    if bytes.len() < MAGIC.len() {
        if MAGIC.starts_with(bytes) {
            return Err(Error::format(format!(
                "the checkpoint is truncated: it has {} bytes, fewer than its {}-byte signature",
                bytes.len(),
                MAGIC.len()
            )));
        }
        return Err(Error::format("the file is not an outcore checkpoint"));
    }
    if &bytes[..MAGIC.len()] != MAGIC {
        return Err(Error::format(
            "the file is not an outcore checkpoint (its first bytes are not the checkpoint signature)",
        ));
    }
    if bytes.len() < PREAMBLE + CHECKSUM {
        return Err(Error::format(format!(
            "the checkpoint is truncated: it has {} bytes, fewer than the {} of an empty checkpoint",
            bytes.len(),
            PREAMBLE + CHECKSUM
        )));
    }
    let (content, stored) = bytes.split_at(bytes.len() - CHECKSUM);
    let mut stored_crc = [0u8; 4];
    stored_crc.copy_from_slice(stored);
    let checksum_ok = crc32c::crc32c(content) == u32::from_le_bytes(stored_crc);

    let mut r = Reader {
        bytes: content,
        pos: MAGIC.len(),
    };
    let version = r.u32("the format version")?;
    if version != FORMAT_VERSION {
        let hint = if checksum_ok {
            ""
        } else {
            " (its checksum does not match either, so the file is probably corrupt)"
        };
        return Err(Error::format(format!(
            "the checkpoint has format version {version} but this build of outcore reads version {FORMAT_VERSION} only{hint}"
        )));
    }
    if !checksum_ok {
        return Err(Error::format(format!(
            "the checkpoint is torn or corrupt: its checksum does not match its {} bytes",
            bytes.len()
        )));
    }

    let header_len = r.u32("the header length")?;
    let header_bytes = r.take(header_len as usize, "the header")?;
    let h: HeaderV1 = serde_json::from_slice(header_bytes).map_err(|e| {
        Error::format(format!(
            "the checkpoint header is not a valid version-{FORMAT_VERSION} header: {e}"
        ))
    })?;

    let o = &h.optimizer;
    let x = r.vector_of(o.dim, "the coefficients x")?;
    let g = r.vector_of(o.dim, "the gradient g")?;
    let recent_f = r.vector("the recent objective values")?;
    let l1 = r.vector("the L1 penalty")?;
    // Pushed one by one: a corrupt pair count cannot cause a large allocation, since
    // every pair read is checked against the bytes that remain.
    let mut s = Vec::new();
    let mut y = Vec::new();
    for i in 0..o.history_pairs {
        s.push(r.vector_of(o.dim, &format!("history step s[{i}]"))?);
        y.push(r.vector_of(o.dim, &format!("history gradient change y[{i}]"))?);
    }
    let partial = match &h.partial {
        None => None,
        Some(p) => {
            let point = r.vector_of(o.dim, "the point of the interrupted pass")?;
            let mut shards = Vec::with_capacity(p.shards.len());
            for (i, shard) in p.shards.iter().enumerate() {
                let what = format!("the sums of shard {i} of the interrupted pass");
                shards.push(match shard {
                    ShardV1::NotStarted => ShardProgress::NotStarted,
                    ShardV1::Partial { blocks } => ShardProgress::Partial {
                        blocks: *blocks,
                        sums: r.vector(&what)?,
                    },
                    ShardV1::Done => ShardProgress::Done {
                        sums: r.vector(&what)?,
                    },
                });
            }
            Some(PartialPass { point, shards })
        }
    };
    if r.pos != content.len() {
        return Err(Error::format(format!(
            "the checkpoint is corrupt: {} unexpected bytes follow its last vector",
            content.len() - r.pos
        )));
    }

    let se = &o.settings;
    let settings = Settings {
        history: to_usize(se.history, "the history size")?,
        tol: se.tol.0,
        c1: se.c1.0,
        c2: se.c2.0,
        max_line_search_trials: to_usize(se.max_line_search_trials, "the line-search trials")?,
        curvature_eps: se.curvature_eps.0,
        flat_window: to_usize(se.flat_window, "the flat window")?,
        flat_tol: se.flat_tol.0,
        max_evals: se.max_evals,
        max_iterations: se.max_iterations,
        max_seconds: se.max_seconds.map(|v| v.0),
        l1,
    };
    let state = State {
        settings,
        x,
        f: o.f.0,
        g,
        s,
        y,
        iterations: o.iterations,
        evaluations: o.evaluations,
        pairs_skipped: o.pairs_skipped,
        recent_f,
        last_step: o.last_step.0,
        seconds: o.seconds.0,
        stopped: o.stopped,
        message: o.message.clone(),
    };
    let id = h.identity;
    let cp = Checkpoint {
        identity: RunIdentity {
            data: id.data,
            fingerprint: id.fingerprint,
            shards: to_usize(id.shards, "the shard count")?,
            objective_settings: id.objective_settings,
            design: id.design,
        },
        progress: Progress {
            passes: h.progress.passes,
            seconds: h.progress.seconds.0,
        },
        state,
        partial,
    };
    check_consistent(&cp)
        .map_err(|m| Error::format(format!("the checkpoint is inconsistent: {m}")))?;
    Ok(cp)
}

// ---------------------------------------------------------------------------------------
// Files.

/// Saves `cp` in the run directory `dir` (which must exist), keeping the checkpoint it
/// replaces as `checkpoint.prev`.
///
/// Steps: write `checkpoint.tmp` → fsync → rename `checkpoint` to `checkpoint.prev` →
/// rename `checkpoint.tmp` to `checkpoint` → fsync the directory. At every moment at
/// least one complete checkpoint is on disk. The file is streamed, so saving needs no
/// second copy of the vectors in memory. A checkpoint whose parts disagree (see
/// [`decode`]) is refused with an internal error rather than written.
pub fn save(dir: &Path, cp: &Checkpoint) -> Result<()> {
    check_consistent(cp).map_err(|m| {
        Error::internal(format!("refusing to save an inconsistent checkpoint: {m}"))
    })?;
    let path = dir.join(CHECKPOINT_FILE);
    let tmp = atomic::temp_path(&path);
    let written = (|| -> io::Result<()> {
        let file = File::create(&tmp)?;
        let mut w = BufWriter::with_capacity(1 << 20, file);
        write_to(cp, &mut w)?;
        let file = w.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()
    })();
    if let Err(e) = written {
        let _ = fs::remove_file(&tmp);
        return Err(Error::io(&tmp, e));
    }
    let prev = dir.join(PREVIOUS_FILE);
    match fs::rename(&path, &prev) {
        Ok(()) => {}
        Err(e) if e.kind() == io::ErrorKind::NotFound => {}
        Err(e) => {
            let _ = fs::remove_file(&tmp);
            return Err(Error::io(&prev, e));
        }
    }
    atomic::finish(&tmp, &path)
}

/// Why one checkpoint file could not be used.
enum Problem {
    Missing,
    Unreadable(String),
    Unusable(String),
}

impl Problem {
    /// Completes "the checkpoint FILE …".
    fn describe(&self) -> String {
        match self {
            Problem::Missing => "is missing".to_string(),
            Problem::Unreadable(e) => format!("cannot be read ({e})"),
            Problem::Unusable(m) => format!("is unusable ({m})"),
        }
    }
}

fn read_one(path: &Path) -> std::result::Result<Checkpoint, Problem> {
    let bytes = match fs::read(path) {
        Ok(b) => b,
        Err(e) if e.kind() == io::ErrorKind::NotFound => return Err(Problem::Missing),
        Err(e) => return Err(Problem::Unreadable(e.to_string())),
    };
    decode(&bytes).map_err(|e| Problem::Unusable(e.message().to_string()))
}

/// Loads the newest usable checkpoint of the run directory `dir`.
///
/// Reads `checkpoint`; when it is missing, unreadable, torn or corrupt, reads
/// `checkpoint.prev` instead and says in [`Loaded::warning`] what was wrong with the
/// newer file. When neither is usable the error names both problems and says the fit
/// must be started again: of kind [`Usage`](crate::ErrorKind::Usage) when there is no
/// checkpoint at all, else [`Format`](crate::ErrorKind::Format).
pub fn load(dir: &Path) -> Result<Loaded> {
    let newest = dir.join(CHECKPOINT_FILE);
    let problem = match read_one(&newest) {
        Ok(checkpoint) => {
            return Ok(Loaded {
                checkpoint,
                from_previous: false,
                warning: None,
            })
        }
        Err(p) => p,
    };
    let previous = dir.join(PREVIOUS_FILE);
    match read_one(&previous) {
        Ok(checkpoint) => Ok(Loaded {
            checkpoint,
            from_previous: true,
            warning: Some(format!(
                "the newest checkpoint {} {}; resuming from the previous checkpoint {}, which is one checkpoint older",
                newest.display(),
                problem.describe(),
                previous.display()
            )),
        }),
        Err(Problem::Missing) if matches!(problem, Problem::Missing) => Err(Error::usage(format!(
            "there is no checkpoint in {} (neither {CHECKPOINT_FILE} nor {PREVIOUS_FILE} exists), so there is nothing to resume; the fit must be started again",
            dir.display()
        ))),
        Err(older) => Err(Error::format(format!(
            "no usable checkpoint in {}: the checkpoint {} {}, and the previous checkpoint {} {}; the fit must be started again",
            dir.display(),
            newest.display(),
            problem.describe(),
            previous.display(),
            older.describe()
        ))),
    }
}

// ---------------------------------------------------------------------------------------
// Identity.

/// Compares the identity saved in a checkpoint with the identity of the run asked for
/// now. `Err` names every difference, joined with "; ", for example
/// "the setting 'ridge' changed from 0.1 to 0.2".
///
/// Compared: the data fingerprint (the paths only decide nothing on their own: the same
/// data may be given by another path), the shard count, the objective settings key by
/// key (nested objects by dotted key; numbers by value, so `1` equals `1.0`), and the
/// feature design when both sides carry one (a `null` design on either side is not
/// compared, since a resumed run normally takes the saved design).
pub fn compare_identity(saved: &RunIdentity, now: &RunIdentity) -> std::result::Result<(), String> {
    let mut changes = Vec::new();
    if saved.fingerprint != now.fingerprint {
        let paths = if saved.data != now.data {
            format!(
                "; the data were {} and are {} now",
                list(&saved.data),
                list(&now.data)
            )
        } else {
            String::new()
        };
        changes.push(format!(
            "the data changed (fingerprint {} when the fit started, {} now{paths})",
            short(&saved.fingerprint),
            short(&now.fingerprint)
        ));
    }
    if saved.shards != now.shards {
        changes.push(format!(
            "the shard count changed from {} to {} (a fit must be resumed with the shard count it started with)",
            saved.shards, now.shards
        ));
    }
    match (&saved.objective_settings, &now.objective_settings) {
        (Value::Object(_), Value::Object(_)) => compare_settings(
            "",
            &saved.objective_settings,
            &now.objective_settings,
            &mut changes,
        ),
        (a, b) if !same_value(a, b) => changes.push(format!(
            "the objective settings changed from {} to {}",
            show(a),
            show(b)
        )),
        _ => {}
    }
    if !saved.design.is_null() && !now.design.is_null() && !same_value(&saved.design, &now.design) {
        changes.push("the feature design changed".to_string());
    }
    if changes.is_empty() {
        Ok(())
    } else {
        Err(changes.join("; "))
    }
}

/// [`compare_identity`] as a library error of kind
/// [`Mismatch`](crate::ErrorKind::Mismatch), worded for a refused resume.
pub fn check_resume(saved: &RunIdentity, now: &RunIdentity) -> Result<()> {
    compare_identity(saved, now).map_err(|changes| {
        Error::mismatch(format!(
            "cannot resume this fit: {changes}; resume with the data and settings it started with, or start the fit again"
        ))
    })
}

fn compare_settings(prefix: &str, saved: &Value, now: &Value, out: &mut Vec<String>) {
    let (Value::Object(a), Value::Object(b)) = (saved, now) else {
        return;
    };
    for (key, old) in a {
        let name = format!("{prefix}{key}");
        match b.get(key) {
            None => out.push(format!(
                "the setting '{name}' was {} when the fit started and is not set now",
                show(old)
            )),
            Some(new) if old.is_object() && new.is_object() => {
                compare_settings(&format!("{name}."), old, new, out)
            }
            Some(new) if !same_value(old, new) => out.push(format!(
                "the setting '{name}' changed from {} to {}",
                show(old),
                show(new)
            )),
            Some(_) => {}
        }
    }
    for (key, new) in b {
        if !a.contains_key(key) {
            out.push(format!(
                "the setting '{prefix}{key}' is {} now and was not set when the fit started",
                show(new)
            ));
        }
    }
}

/// JSON equality with numbers compared by value (`1` equals `1.0`).
fn same_value(a: &Value, b: &Value) -> bool {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => {
            if x.is_f64() || y.is_f64() {
                x.as_f64() == y.as_f64()
            } else {
                x == y
            }
        }
        (Value::Array(x), Value::Array(y)) => {
            x.len() == y.len() && x.iter().zip(y).all(|(p, q)| same_value(p, q))
        }
        (Value::Object(x), Value::Object(y)) => {
            x.len() == y.len()
                && x.iter()
                    .all(|(k, v)| y.get(k).is_some_and(|w| same_value(v, w)))
        }
        _ => a == b,
    }
}

/// A setting value for a message: strings bare, `null` as "none", others as JSON.
fn show(v: &Value) -> String {
    match v {
        Value::String(s) => s.clone(),
        Value::Null => "none".to_string(),
        other => other.to_string(),
    }
}

fn short(fingerprint: &str) -> String {
    let mut chars = fingerprint.chars();
    let head: String = chars.by_ref().take(16).collect();
    if chars.next().is_some() {
        format!("{head}…")
    } else if head.is_empty() {
        "(none)".to_string()
    } else {
        head
    }
}

fn list(paths: &[String]) -> String {
    if paths.is_empty() {
        "(none)".to_string()
    } else {
        paths.join(", ")
    }
}

/// After an iteration, a checkpoint is written when at least `PACE ×` the duration of
/// the last write has passed since it ended: writes cost at most about 5 % of the fit.
pub const PACE: u32 = 20;
/// A checkpoint smaller than this (in bytes) is written after every iteration.
pub const SMALL_CHECKPOINT: u64 = 4 << 20;

/// Decides which accepted iterations get a checkpoint (see the module's "When").
#[derive(Debug, Clone, Default)]
pub struct Pacer {
    /// End and duration of the last write.
    last: Option<(Instant, Duration)>,
    /// A skipped checkpoint: the passes and seconds of its iteration.
    pending: Option<(u64, f64)>,
    /// Checkpoints skipped so far.
    skipped: u64,
}

impl Pacer {
    /// True when a checkpoint of about `bytes` after an iteration ending `now` is to be
    /// written.
    pub fn due(&self, now: Instant, bytes: u64) -> bool {
        match self.last {
            None => true,
            Some((end, took)) => {
                bytes < SMALL_CHECKPOINT || now.saturating_duration_since(end) >= took * PACE
            }
        }
    }

    /// A write ran from `started` to `ended`; nothing is pending any more.
    pub fn wrote(&mut self, started: Instant, ended: Instant) {
        self.last = Some((ended, ended.saturating_duration_since(started)));
        self.pending = None;
    }

    /// The checkpoint of an iteration at `passes` and `seconds` was skipped. Returns
    /// true for the first skip of the fit (to tell the user once).
    pub fn skip(&mut self, passes: u64, seconds: f64) -> bool {
        self.pending = Some((passes, seconds));
        self.skipped += 1;
        self.skipped == 1
    }

    /// The skipped checkpoint not written since, if any: its passes and seconds.
    pub fn pending(&self) -> Option<(u64, f64)> {
        self.pending
    }

    /// The pending state was saved some other way (with a pass in progress).
    pub fn saved_elsewhere(&mut self) {
        self.pending = None;
    }

    /// Duration of the last write.
    pub fn last_write(&self) -> Option<Duration> {
        self.last.map(|(_, took)| took)
    }
}

#[cfg(test)]
mod pace_tests {
    use super::*;

    #[test]
    fn slow_writes_are_spaced_to_a_twentieth_of_the_time() {
        let t0 = Instant::now();
        let at = |ms: u64| t0 + Duration::from_millis(ms);
        let big = 100 << 20;
        let mut p = Pacer::default();
        assert!(p.due(t0, big), "the first checkpoint is always written");
        // A write of 400 ms: the next is due 8 s after it ended.
        p.wrote(at(0), at(400));
        assert!(!p.due(at(400 + 7_999), big));
        assert!(p.skip(3, 8.0), "the first skip is reported");
        assert!(!p.skip(4, 8.2));
        assert_eq!(p.pending(), Some((4, 8.2)));
        assert!(p.due(at(400 + 8_000), big));
        p.wrote(at(8_400), at(8_500));
        assert_eq!(p.pending(), None);
        assert_eq!(p.last_write(), Some(Duration::from_millis(100)));
        // A 100 ms write: due 2 s later.
        assert!(!p.due(at(8_500 + 1_999), big));
        assert!(p.due(at(8_500 + 2_000), big));
        // Small checkpoints never wait, however slow the disk.
        p.wrote(at(9_000), at(9_500));
        assert!(p.due(at(9_500), SMALL_CHECKPOINT - 1));
        assert!(!p.due(at(9_500), SMALL_CHECKPOINT));
        p.skip(9, 1.0);
        p.saved_elsewhere();
        assert_eq!(p.pending(), None);
    }
}
