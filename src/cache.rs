//! The block cache: blocks encoded once into a binary file and read back through
//! `memmap2` on every later pass, so that a pass costs a sweep over memory (or the disk)
//! instead of a Parquet decode.
//!
//! # File layout (`outcore-blocks/2`, little-endian)
//!
//! ```text
//! 0    header (64 bytes): magic "OUTCORE-BLOCKS\0\0", version u32, 0 u32,
//!      key offset u64, key length u64, index offset u64, block count u64,
//!      CRC-32C of key and index u32, 0 u32
//! 64   blocks, each starting at a multiple of 64 (see below), in any order
//! ...  key: JSON of [`CacheKey`] (what the blocks were built from)
//! ...  index: one 40-byte entry per block of the grid, in data order: offset u64,
//!      length u64, rows u32, CRC-32C of the block's bytes u32, file u32, 0 u32,
//!      first row in the file u64
//! ```
//!
//! A block is a table of typed sections followed by their data, each section starting
//! at a multiple of 64 bytes from the block's start (so `f64` data are aligned in the
//! map):
//!
//! ```text
//! sections u32, rows u32, then per section 24 bytes:
//!     kind u16, encoding u16, column u32, offset u64 (from the block's start), length u64
//! ```
//!
//! Section kinds ([`Kind`]): labels, weights, holdout flags, one dense column per
//! dense source column (`column` = its index in [`CacheKey::columns`]), and the block's
//! sparse (CSR) part as three sections: row offsets (`rows + 1` values), coordinate
//! indices and values (one per entry). A reader that meets a kind it does not know
//! treats the block as damaged. Encodings ([`Encoding`]): `f64`, `f32` (chosen per block
//! and column when every value is exactly an `f32`: float32 columns, small integers,
//! booleans, 0/1 labels, most sparse values), `u8` (flags), `u32` and `u64` (offsets,
//! `u32` when the block's last offset fits; indices), `signs` (sparse values that are
//! all ±1, the hashed case: one bit per entry, set for −1) and `ones` (sparse values
//! that are all 1: no bytes at all). Dense values are the feature values as read (before
//! imputation and scaling; NaN where null), and sparse values are stored exactly, so a
//! block decoded from the cache and standardized is bitwise the block built from
//! Parquet: `float64` data stay `f64` (DESIGN §3) unless `--precision f32` rounded them
//! knowingly.
//!
//! A block's CSR part is checked when it is decoded ([`decode_sparse`]): offsets start
//! at 0, never decrease and end at the number of entries, and every index is below the
//! sparse width of the fit's layout. The key holds the sparse request (hash bits,
//! hashed columns, crosses, sparse vector columns and their dimensions), so a cache
//! built with other hashing is stale, never misread.
//!
//! **Invariant:** a cache is only used when its key equals the key of the fit (data
//! fingerprint, block grid, columns, target reading, holdout, precision); anything
//! else, or a damaged header, is rebuilt with a warning. Every block's checksum is
//! checked the first time this process reads it.
//!
//! **Invariant:** the file is written as `NAME.tmp-PID` and renamed into place only when
//! every block of the grid is in it; the file mapped by a reader is never written again
//! (a rebuild writes a new file and renames it over the old name). It is not fsynced
//! (a copy torn by a crash fails its checks and is rebuilt).

use std::fs::{self, File, OpenOptions};
use std::io::{Seek, SeekFrom, Write};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Mutex;

use memmap2::Mmap;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::features::hashing::SparseRequest;
use crate::features::sparse::SparseRows;
use crate::features::{Block, Design};
use crate::objective::Loss;
use crate::source::Source;
use crate::{Error, Result};

/// Format name in the key.
pub const FORMAT: &str = "outcore-blocks/2";
/// Binary version in the header (2: CSR sections and their encodings).
pub const VERSION: u32 = 2;
const MAGIC: &[u8; 16] = b"OUTCORE-BLOCKS\0\0";
const HEADER: u64 = 64;
const ALIGN: u64 = 64;
const ENTRY: usize = 40;
const SECTION: usize = 24;
/// File name extension of cache files.
pub const EXTENSION: &str = "ocache";

/// Kinds of sections in a block.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u16)]
pub enum Kind {
    /// Labels (0/1, the value, the count or the class index).
    Label = 1,
    /// Frequency weights (absent: every weight is 1).
    Weight = 2,
    /// Holdout flags, 1 for a held-out row (absent: every row trains).
    Holdout = 3,
    /// One dense source column, values as read (NaN where null).
    Dense = 4,
    /// CSR row offsets: `rows + 1` values, from 0 to the number of entries.
    SparseOffsets = 5,
    /// CSR coordinate index of each entry (below the layout's sparse width).
    SparseIndex = 6,
    /// CSR value of each entry.
    SparseValues = 7,
}

impl Kind {
    fn from_u16(v: u16) -> Option<Kind> {
        Some(match v {
            1 => Kind::Label,
            2 => Kind::Weight,
            3 => Kind::Holdout,
            4 => Kind::Dense,
            5 => Kind::SparseOffsets,
            6 => Kind::SparseIndex,
            7 => Kind::SparseValues,
            _ => return None,
        })
    }
}

/// How a section's values are stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[repr(u16)]
pub enum Encoding {
    /// Little-endian `f64`.
    F64 = 1,
    /// Little-endian `f32`, exact for every value of the section.
    F32 = 2,
    /// One byte per row.
    U8 = 3,
    /// Little-endian `u32`.
    U32 = 4,
    /// Little-endian `u64`.
    U64 = 5,
    /// Values that are all ±1: one bit per value (bit `i % 8` of byte `i / 8`), set for −1.
    Signs = 6,
    /// Values that are all 1: no bytes.
    Ones = 7,
}

impl Encoding {
    fn from_u16(v: u16) -> Option<Encoding> {
        match v {
            1 => Some(Encoding::F64),
            2 => Some(Encoding::F32),
            3 => Some(Encoding::U8),
            4 => Some(Encoding::U32),
            5 => Some(Encoding::U64),
            6 => Some(Encoding::Signs),
            7 => Some(Encoding::Ones),
            _ => None,
        }
    }

    /// Bytes of `count` values.
    fn bytes(self, count: usize) -> usize {
        match self {
            Encoding::F64 | Encoding::U64 => count * 8,
            Encoding::F32 | Encoding::U32 => count * 4,
            Encoding::U8 => count,
            Encoding::Signs => count.div_ceil(8),
            Encoding::Ones => 0,
        }
    }
}

/// What a cache was built from; a cache is used only for a fit with the same key.
/// The penalty, tolerance and standardization are not in it: a cache serves every fit
/// on the same data and feature settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct CacheKey {
    /// [`FORMAT`].
    pub format: String,
    /// The data files, in order.
    pub data: Vec<String>,
    /// The data fingerprint ([`Source::fingerprint`]).
    pub fingerprint: String,
    /// Rows per block of the grid.
    pub block_rows: usize,
    /// Blocks of the grid.
    pub blocks: u64,
    /// Rows of the data.
    pub rows: u64,
    /// Target column.
    pub target: String,
    /// How the target is read.
    pub loss: Loss,
    /// Softmax classes (their order gives the label values).
    pub classes: Vec<String>,
    /// Weight column.
    pub weight: Option<String>,
    /// Source columns of the features: the dense ones in section order, then those
    /// read by the sparse part.
    pub columns: Vec<String>,
    /// Hashed and sparse vector features (hash bits, columns, crosses, vector columns
    /// and dimensions); none for a dense design.
    #[serde(default)]
    pub sparse: Option<SparseRequest>,
    /// Rows with a null target are left out.
    pub skip_missing_target: bool,
    /// The holdout split (fraction and key), when rows are held out.
    pub holdout: Option<serde_json::Value>,
    /// `stored` or `f32` (`--precision f32`).
    pub precision: String,
}

impl CacheKey {
    /// The key of a fit's passes over `source` with `design`.
    pub fn new(source: &Source, design: &Design, holdout: Option<serde_json::Value>) -> CacheKey {
        let block_rows = source.block_rows() as u64;
        let blocks = source
            .files()
            .iter()
            .flat_map(|f| f.row_group_rows.iter())
            .map(|r| r.div_ceil(block_rows))
            .sum();
        CacheKey {
            format: FORMAT.to_string(),
            data: source
                .files()
                .iter()
                .map(|f| f.path.to_string_lossy().into_owned())
                .collect(),
            fingerprint: source.fingerprint(),
            block_rows: source.block_rows(),
            blocks,
            rows: source.rows(),
            target: design.target.clone(),
            loss: design.loss,
            classes: design.classes.clone(),
            weight: design.weight.clone(),
            columns: design.feature_columns().to_vec(),
            sparse: design.sparse.as_ref().map(|s| s.request.clone()),
            skip_missing_target: design.skip_missing_target,
            holdout,
            precision: if design.rounds_to_f32() {
                "f32"
            } else {
                "stored"
            }
            .to_string(),
        }
    }

    /// The cache file for this key in `dir`. The name hashes everything but what the
    /// data's content decides (fingerprint, row and block counts), so changed data at
    /// the same paths meet their old (stale) cache and replace it instead of leaving it
    /// behind.
    pub fn path_in(&self, dir: &Path) -> PathBuf {
        let mut named = self.clone();
        named.fingerprint.clear();
        named.rows = 0;
        named.blocks = 0;
        let text = serde_json::to_string(&named).unwrap_or_default();
        let digest = Sha256::digest(text.as_bytes());
        let hex: String = digest[..8].iter().map(|b| format!("{b:02x}")).collect();
        dir.join(format!("blocks-{hex}.{EXTENSION}"))
    }

    /// Names the first field that differs from `other`, for the warning.
    fn difference(&self, other: &CacheKey) -> &'static str {
        if self.format != other.format {
            "another format"
        } else if self.fingerprint != other.fingerprint || self.data != other.data {
            "other data (the files changed since it was written)"
        } else if self.block_rows != other.block_rows || self.blocks != other.blocks {
            "another block grid"
        } else if self.columns != other.columns || self.weight != other.weight {
            "other columns"
        } else if self.sparse != other.sparse {
            "other hashing or sparse vector settings"
        } else {
            "other target, holdout or precision settings"
        }
    }
}

/// One block's entry in the index.
#[derive(Debug, Clone, Copy, Default)]
struct Entry {
    offset: u64,
    len: u64,
    rows: u32,
    crc: u32,
    file: u32,
    first_row: u64,
}

impl Entry {
    /// The block `index` this entry places in `map` (bounds checked by
    /// [`BlockCache::check`]), its checksum tested when `check_crc`, its section table
    /// validated.
    fn view<'a>(
        &self,
        map: &'a [u8],
        index: usize,
        check_crc: bool,
    ) -> std::result::Result<BlockView<'a>, String> {
        let bytes = &map[self.offset as usize..(self.offset + self.len) as usize];
        if check_crc && crc32c::crc32c(bytes) != self.crc {
            return Err(format!("block {index} fails its checksum"));
        }
        let view = BlockView {
            bytes,
            rows: self.rows as usize,
            file: self.file as usize,
            first_row: self.first_row,
        };
        view.validate()
            .map_err(|why| format!("block {index} {why}"))?;
        Ok(view)
    }

    fn encode(&self, out: &mut Vec<u8>) {
        out.extend_from_slice(&self.offset.to_le_bytes());
        out.extend_from_slice(&self.len.to_le_bytes());
        out.extend_from_slice(&self.rows.to_le_bytes());
        out.extend_from_slice(&self.crc.to_le_bytes());
        out.extend_from_slice(&self.file.to_le_bytes());
        out.extend_from_slice(&0u32.to_le_bytes());
        out.extend_from_slice(&self.first_row.to_le_bytes());
    }

    fn decode(b: &[u8]) -> Entry {
        Entry {
            offset: u64_at(b, 0),
            len: u64_at(b, 8),
            rows: u32_at(b, 16),
            crc: u32_at(b, 20),
            file: u32_at(b, 24),
            first_row: u64_at(b, 32),
        }
    }
}

fn u64_at(b: &[u8], at: usize) -> u64 {
    let mut a = [0u8; 8];
    a.copy_from_slice(&b[at..at + 8]);
    u64::from_le_bytes(a)
}

fn u32_at(b: &[u8], at: usize) -> u32 {
    let mut a = [0u8; 4];
    a.copy_from_slice(&b[at..at + 4]);
    u32::from_le_bytes(a)
}

fn u16_at(b: &[u8], at: usize) -> u16 {
    u16::from_le_bytes([b[at], b[at + 1]])
}

fn pad_to(v: u64, align: u64) -> u64 {
    v.div_ceil(align) * align
}

/// Encodes a block into `out` (cleared first): labels, weights, holdout flags, the
/// dense columns of `raw` (as filled by [`Design::build_block_raw`], `columns` runs of
/// `block.rows` values, one per dense source column) and the block's CSR part.
pub fn encode_block(block: &Block, raw: &[f64], columns: usize, out: &mut Vec<u8>) {
    let n = block.rows;
    debug_assert!(
        raw.len() >= columns * n,
        "fewer raw values than dense columns"
    );
    out.clear();
    // (kind, encoding, column, bytes)
    let mut sections: Vec<(Kind, Encoding, u32, usize)> = Vec::with_capacity(columns + 6);
    let plain = |kind, enc: Encoding, col| (kind, enc, col, enc.bytes(n));
    sections.push(plain(Kind::Label, narrowest(&block.y), 0));
    if !block.w.is_empty() {
        sections.push(plain(Kind::Weight, narrowest(&block.w), 0));
    }
    if !block.holdout.is_empty() {
        sections.push(plain(Kind::Holdout, Encoding::U8, 0));
    }
    for c in 0..columns {
        sections.push(plain(
            Kind::Dense,
            narrowest(&raw[c * n..(c + 1) * n]),
            c as u32,
        ));
    }
    if !block.sparse.is_empty() {
        sections.extend(sparse_sections(&block.sparse));
    }
    let table = pad_to((8 + SECTION * sections.len()) as u64, ALIGN);
    out.extend_from_slice(&(sections.len() as u32).to_le_bytes());
    out.extend_from_slice(&(n as u32).to_le_bytes());
    let mut at = table;
    for (kind, enc, col, len) in &sections {
        let len = *len as u64;
        out.extend_from_slice(&(*kind as u16).to_le_bytes());
        out.extend_from_slice(&(*enc as u16).to_le_bytes());
        out.extend_from_slice(&col.to_le_bytes());
        out.extend_from_slice(&at.to_le_bytes());
        out.extend_from_slice(&len.to_le_bytes());
        at = pad_to(at + len, ALIGN);
    }
    for (kind, enc, col, _) in &sections {
        out.resize(pad_to(out.len() as u64, ALIGN) as usize, 0);
        let values: &[f64] = match kind {
            Kind::Label => &block.y,
            Kind::Weight => &block.w,
            Kind::Holdout => {
                out.extend(block.holdout.iter().map(|h| *h as u8));
                continue;
            }
            Kind::Dense => &raw[*col as usize * n..(*col as usize + 1) * n],
            Kind::SparseOffsets | Kind::SparseIndex | Kind::SparseValues => {
                encode_sparse(&block.sparse, *kind, *enc, out);
                continue;
            }
        };
        put_floats(values, *enc, out);
    }
}

/// Appends `values` as `f64` or `f32` (exact: chosen by [`narrowest`]).
fn put_floats(values: &[f64], enc: Encoding, out: &mut Vec<u8>) {
    match enc {
        Encoding::F64 => values
            .iter()
            .for_each(|v| out.extend_from_slice(&v.to_le_bytes())),
        Encoding::F32 => values
            .iter()
            .for_each(|v| out.extend_from_slice(&(*v as f32).to_le_bytes())),
        _ => {}
    }
}

/// The three CSR sections of `rows` with their encodings and sizes: offsets as `u32`
/// when the last fits (else `u64`), indices as `u32`, values as `ones`, `signs`, `f32`
/// or `f64`, the narrowest that holds every value exactly.
fn sparse_sections(rows: &SparseRows) -> [(Kind, Encoding, u32, usize); 3] {
    let entries = rows.index.len();
    let last = rows.offsets.last().copied().unwrap_or(0);
    let offsets = if last <= u32::MAX as u64 {
        Encoding::U32
    } else {
        Encoding::U64
    };
    let one = 1.0f64.to_bits();
    let minus_one = (-1.0f64).to_bits();
    let values = if rows.value.iter().all(|v| v.to_bits() == one) {
        Encoding::Ones
    } else if rows
        .value
        .iter()
        .all(|v| v.to_bits() == one || v.to_bits() == minus_one)
    {
        Encoding::Signs
    } else {
        narrowest(&rows.value)
    };
    [
        (
            Kind::SparseOffsets,
            offsets,
            0,
            offsets.bytes(rows.offsets.len()),
        ),
        (Kind::SparseIndex, Encoding::U32, 0, entries * 4),
        (Kind::SparseValues, values, 0, values.bytes(entries)),
    ]
}

/// Appends the data of one CSR section of `rows` (`kind` and `enc` as chosen by
/// [`sparse_sections`]).
fn encode_sparse(rows: &SparseRows, kind: Kind, enc: Encoding, out: &mut Vec<u8>) {
    match (kind, enc) {
        (Kind::SparseOffsets, Encoding::U32) => rows
            .offsets
            .iter()
            .for_each(|o| out.extend_from_slice(&(*o as u32).to_le_bytes())),
        (Kind::SparseOffsets, _) => rows
            .offsets
            .iter()
            .for_each(|o| out.extend_from_slice(&o.to_le_bytes())),
        (Kind::SparseIndex, _) => rows
            .index
            .iter()
            .for_each(|i| out.extend_from_slice(&i.to_le_bytes())),
        (_, Encoding::Signs) => {
            for chunk in rows.value.chunks(8) {
                let mut byte = 0u8;
                for (b, v) in chunk.iter().enumerate() {
                    if v.is_sign_negative() {
                        byte |= 1 << b;
                    }
                }
                out.push(byte);
            }
        }
        (_, Encoding::Ones) => {}
        (_, enc) => put_floats(&rows.value, enc, out),
    }
}

/// Decodes the CSR part of a cached block into `out` (cleared first, its capacity
/// reused), checking it: offsets start at 0, never decrease and end at the number of
/// entries, and every index is below `width` (the sparse width of the fit's layout).
/// Returns false when the block has no CSR part (a dense design, or no rows), and why
/// the part is damaged otherwise.
pub fn decode_sparse(
    view: &BlockView<'_>,
    width: usize,
    out: &mut SparseRows,
) -> std::result::Result<bool, String> {
    out.clear();
    let find = |kind| view.raw_section(kind);
    let (offsets, index, values) = match (
        find(Kind::SparseOffsets),
        find(Kind::SparseIndex),
        find(Kind::SparseValues),
    ) {
        (None, None, None) => return Ok(false),
        (Some(o), Some(i), Some(v)) => (o, i, v),
        _ => return Err("lacks one of its sparse sections".to_string()),
    };
    let rows = view.rows;
    let entries = index.1.len() / 4;
    if index.0 != Encoding::U32
        || index.1.len() % 4 != 0
        || offsets.1.len() != offsets.0.bytes(rows + 1)
        || !matches!(offsets.0, Encoding::U32 | Encoding::U64)
        || values.1.len() != values.0.bytes(entries)
        || matches!(values.0, Encoding::U8 | Encoding::U32 | Encoding::U64)
    {
        return Err("is damaged (a sparse section has the wrong size or encoding)".to_string());
    }
    out.offsets.reserve(rows + 1);
    match offsets.0 {
        Encoding::U32 => out.offsets.extend(
            offsets
                .1
                .chunks_exact(4)
                .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]]) as u64),
        ),
        _ => out
            .offsets
            .extend(offsets.1.chunks_exact(8).map(|c| u64_at(c, 0))),
    }
    let monotone = out.offsets.windows(2).all(|w| w[0] <= w[1]);
    if out.offsets.first() != Some(&0) || !monotone || out.offsets.last() != Some(&(entries as u64))
    {
        out.clear();
        return Err("is damaged (its sparse row offsets are out of order)".to_string());
    }
    out.index.reserve(entries);
    out.index.extend(
        index
            .1
            .chunks_exact(4)
            .map(|c| u32::from_le_bytes([c[0], c[1], c[2], c[3]])),
    );
    if out.index.iter().any(|i| *i as usize >= width) {
        out.clear();
        return Err(format!(
            "is damaged (a sparse index is not below the sparse width {width})"
        ));
    }
    out.value.reserve(entries);
    match values.0 {
        Encoding::Ones => out.value.resize(entries, 1.0),
        Encoding::Signs => out.value.extend((0..entries).map(|k| {
            if values.1[k / 8] >> (k % 8) & 1 == 1 {
                -1.0
            } else {
                1.0
            }
        })),
        Encoding::F32 => out.value.extend(
            values
                .1
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]) as f64),
        ),
        _ => out.value.extend(
            values
                .1
                .chunks_exact(8)
                .map(|c| f64::from_bits(u64_at(c, 0))),
        ),
    }
    Ok(true)
}

/// `f32` when every value is exactly an `f32` (NaN, a null, included), else `f64`.
fn narrowest(values: &[f64]) -> Encoding {
    let exact = values
        .iter()
        .all(|v| v.is_nan() || ((*v as f32) as f64).to_bits() == v.to_bits());
    if exact {
        Encoding::F32
    } else {
        Encoding::F64
    }
}

/// A cache file being written during a pass: blocks arrive from several threads in any
/// order and are appended under a lock; the index keeps their places.
pub struct CacheWriter {
    path: PathBuf,
    tmp: PathBuf,
    key: CacheKey,
    file: Mutex<(File, u64)>,
    entries: Mutex<Vec<Option<Entry>>>,
    failed: Mutex<Option<String>>,
}

impl CacheWriter {
    /// Starts the cache for `key` in `dir` (created if missing).
    pub fn create(dir: &Path, key: &CacheKey) -> Result<CacheWriter> {
        fs::create_dir_all(dir).map_err(|e| Error::io(dir, e))?;
        let path = key.path_in(dir);
        let mut name = path.file_name().unwrap_or_default().to_os_string();
        name.push(format!(".tmp-{}", std::process::id()));
        let tmp = path.with_file_name(name);
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&tmp)
            .map_err(|e| Error::io(&tmp, e))?;
        file.write_all(&[0u8; HEADER as usize])
            .map_err(|e| Error::io(&tmp, e))?;
        Ok(CacheWriter {
            path,
            tmp,
            key: key.clone(),
            file: Mutex::new((file, HEADER)),
            entries: Mutex::new(vec![None; key.blocks as usize]),
            failed: Mutex::new(None),
        })
    }

    /// The file the cache will have once finished.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Adds block `index` of the grid, encoded in `bytes` (by [`encode_block`]). A write
    /// failure (a full disk) is remembered, not returned: the pass goes on without the
    /// cache and [`CacheWriter::finish`] reports it.
    pub fn put(&self, index: usize, block: &Block, bytes: &[u8]) {
        if self.failed.lock().map(|f| f.is_some()).unwrap_or(true) {
            return;
        }
        let crc = crc32c::crc32c(bytes);
        let written = (|| -> std::io::Result<u64> {
            let mut guard = self
                .file
                .lock()
                .map_err(|_| std::io::Error::other("a writer thread panicked"))?;
            let (file, pos) = &mut *guard;
            let at = *pos;
            file.write_all(bytes)?;
            let end = pad_to(at + bytes.len() as u64, ALIGN);
            let pad = (end - at - bytes.len() as u64) as usize;
            file.write_all(&[0u8; ALIGN as usize][..pad])?;
            *pos = end;
            Ok(at)
        })();
        match written {
            Ok(offset) => {
                if let Ok(mut entries) = self.entries.lock() {
                    if let Some(slot) = entries.get_mut(index) {
                        *slot = Some(Entry {
                            offset,
                            len: bytes.len() as u64,
                            rows: block.rows as u32,
                            crc,
                            file: block.file as u32,
                            first_row: block.first_row,
                        });
                    }
                }
            }
            Err(e) => {
                if let Ok(mut f) = self.failed.lock() {
                    f.get_or_insert(format!("cannot write {}: {e}", self.tmp.display()));
                }
            }
        }
    }

    /// Writes key and index, then the header, syncs and renames the file into place.
    /// Returns the cache's size in bytes. Fails (removing the temporary file) when a
    /// block is missing (a pass that skipped blocks) or a write failed.
    pub fn finish(self) -> Result<u64> {
        let outcome = self.finish_inner();
        if outcome.is_err() {
            let _ = fs::remove_file(&self.tmp);
        }
        outcome
    }

    fn finish_inner(&self) -> Result<u64> {
        if let Some(e) = self.failed.lock().ok().and_then(|f| f.clone()) {
            return Err(Error::io(&self.tmp, std::io::Error::other(e)));
        }
        let entries = self
            .entries
            .lock()
            .map_err(|_| Error::internal("a cache writer thread panicked"))?;
        let mut index = Vec::with_capacity(entries.len() * ENTRY);
        for e in entries.iter() {
            match e {
                Some(e) => e.encode(&mut index),
                None => return Err(Error::internal("the pass did not read every block")),
            }
        }
        let key = serde_json::to_vec(&self.key)
            .map_err(|e| Error::internal(format!("cache key: {e}")))?;
        let mut guard = self
            .file
            .lock()
            .map_err(|_| Error::internal("a cache writer thread panicked"))?;
        let (file, pos) = &mut *guard;
        let io = |e| Error::io(&self.tmp, e);
        let key_offset = *pos;
        file.seek(SeekFrom::Start(key_offset)).map_err(io)?;
        file.write_all(&key).map_err(io)?;
        let index_offset = key_offset + key.len() as u64;
        file.write_all(&index).map_err(io)?;
        let mut crc = crc32c::crc32c(&key);
        crc = crc32c::crc32c_append(crc, &index);
        let mut header = Vec::with_capacity(HEADER as usize);
        header.extend_from_slice(MAGIC);
        header.extend_from_slice(&VERSION.to_le_bytes());
        header.extend_from_slice(&0u32.to_le_bytes());
        header.extend_from_slice(&key_offset.to_le_bytes());
        header.extend_from_slice(&(key.len() as u64).to_le_bytes());
        header.extend_from_slice(&index_offset.to_le_bytes());
        header.extend_from_slice(&(entries.len() as u64).to_le_bytes());
        header.extend_from_slice(&crc.to_le_bytes());
        header.resize(HEADER as usize, 0);
        file.write_all_at(&header, 0).map_err(io)?;
        // Not synced: a cache is a copy, and one torn by a crash fails its checks and is
        // rebuilt. Syncing a file the size of the data would cost the first pass several
        // seconds per GB; the rename still makes the file appear whole or not at all to
        // other processes.
        let size = index_offset + index.len() as u64;
        fs::rename(&self.tmp, &self.path).map_err(|e| Error::io(&self.path, e))?;
        Ok(size)
    }

    /// Gives up the cache (a failed or interrupted pass): removes the temporary file.
    pub fn abandon(self) {
        let _ = fs::remove_file(&self.tmp);
    }
}

/// What opening a cache found.
pub enum Opened {
    /// A cache for this key, ready to read.
    Ready(BlockCache),
    /// No cache file for this key.
    Missing,
    /// A file that cannot be used, with the reason (for the warning).
    Unusable(String),
}

/// A cache file mapped for reading.
pub struct BlockCache {
    path: PathBuf,
    map: Mmap,
    entries: Vec<Entry>,
    checked: Vec<AtomicBool>,
    corrupt: Mutex<Option<String>>,
}

impl std::fmt::Debug for BlockCache {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("BlockCache")
            .field("path", &self.path)
            .field("bytes", &self.map.len())
            .finish()
    }
}

impl BlockCache {
    /// Opens the cache of `key` in `dir`, checking header, key and index (block
    /// checksums are checked on first use, by [`BlockCache::block`]).
    pub fn open(dir: &Path, key: &CacheKey) -> Opened {
        let path = key.path_in(dir);
        let file = match File::open(&path) {
            Ok(f) => f,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => return Opened::Missing,
            Err(e) => return Opened::Unusable(format!("it cannot be opened ({e})")),
        };
        // Safety: the file is ours and never written after it was renamed into place
        // (a rebuild renames a new file over the name); another program truncating it
        // while it is mapped would be caught by the block checksums or end the process
        // with SIGBUS, as for any mapped file.
        let map = match unsafe { Mmap::map(&file) } {
            Ok(m) => m,
            Err(e) => return Opened::Unusable(format!("it cannot be mapped ({e})")),
        };
        match Self::check(&map, key) {
            Ok(entries) => {
                let checked = entries.iter().map(|_| AtomicBool::new(false)).collect();
                Opened::Ready(BlockCache {
                    path,
                    map,
                    entries,
                    checked,
                    corrupt: Mutex::new(None),
                })
            }
            Err(reason) => Opened::Unusable(reason),
        }
    }

    fn check(map: &[u8], key: &CacheKey) -> std::result::Result<Vec<Entry>, String> {
        let len = map.len() as u64;
        if len < HEADER || &map[..16] != MAGIC {
            return Err("it is not a block cache (or its header is damaged)".to_string());
        }
        let version = u32_at(map, 16);
        if version != VERSION {
            return Err(format!("it is of version {version}, not {VERSION}"));
        }
        let key_offset = u64_at(map, 24);
        let key_len = u64_at(map, 32);
        let index_offset = u64_at(map, 40);
        let blocks = u64_at(map, 48);
        let crc = u32_at(map, 56);
        let index_len = blocks.checked_mul(ENTRY as u64);
        let fits = key_offset
            .checked_add(key_len)
            .is_some_and(|e| e <= len && e == index_offset)
            && index_len
                .and_then(|l| index_offset.checked_add(l))
                .is_some_and(|e| e == len);
        if !fits {
            return Err("it is truncated or its header is damaged".to_string());
        }
        let key_bytes = &map[key_offset as usize..index_offset as usize];
        let index = &map[index_offset as usize..];
        if crc32c::crc32c_append(crc32c::crc32c(key_bytes), index) != crc {
            return Err("its index fails its checksum".to_string());
        }
        let stored: CacheKey =
            serde_json::from_slice(key_bytes).map_err(|_| "its key cannot be read".to_string())?;
        if &stored != key {
            return Err(format!("it was built for {}", stored.difference(key)));
        }
        let entries: Vec<Entry> = index.chunks_exact(ENTRY).map(Entry::decode).collect();
        if entries.len() as u64 != key.blocks
            || entries.iter().any(|e| {
                e.offset < HEADER
                    || e.offset % ALIGN != 0
                    || e.offset
                        .checked_add(e.len)
                        .is_none_or(|end| end > key_offset)
            })
        {
            return Err("its index does not match the block grid".to_string());
        }
        Ok(entries)
    }

    /// The file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Size of the file in bytes.
    pub fn bytes(&self) -> u64 {
        self.map.len() as u64
    }

    /// Why a block failed its checksum or could not be read, if one did.
    pub fn corruption(&self) -> Option<String> {
        self.corrupt.lock().ok().and_then(|c| c.clone())
    }

    /// Marks the cache damaged (it is rebuilt) and returns the error that says why.
    pub fn damaged(&self, why: String) -> Error {
        if let Ok(mut c) = self.corrupt.lock() {
            c.get_or_insert(why.clone());
        }
        Error::format(format!("the block cache {} {why}", self.path.display()))
    }

    /// Block `index` of the grid; its checksum is verified the first time.
    pub fn block(&self, index: usize) -> Result<BlockView<'_>> {
        let fail = |why: String| self.damaged(why);
        let e = self
            .entries
            .get(index)
            .ok_or_else(|| fail(format!("has no block {index}")))?;
        let first_use = !self.checked[index].load(Ordering::Relaxed);
        let view = e.view(&self.map, index, first_use).map_err(fail)?;
        self.checked[index].store(true, Ordering::Relaxed);
        Ok(view)
    }
}

/// Reads a whole cache file held in memory the way passes read it: the header, the key
/// (taken as the expected one), the index, and every block's checksum, section table,
/// per-row sections (decoded in full) and CSR part. Returns the number of blocks, or
/// why the file would be rebuilt. For the fuzz target (`fuzzing::cache`) and its corpus.
pub fn read_in_memory(map: &[u8]) -> std::result::Result<usize, String> {
    let key = stored_key(map)?;
    let entries = BlockCache::check(map, &key)?;
    let mut values = Vec::new();
    let mut sparse = SparseRows::default();
    for (i, e) in entries.iter().enumerate() {
        let view = e.view(map, i, true)?;
        values.clear();
        values.resize(view.rows, 0.0);
        for kind in [Kind::Label, Kind::Weight, Kind::Holdout] {
            if let Some(v) = view.section(kind, 0) {
                v.decode_into(0, &mut values, |x| x);
            }
        }
        for column in 0..key.columns.len() as u32 {
            if let Some(v) = view.section(Kind::Dense, column) {
                v.decode_ahead(0, &mut values, view.rows, |x| x);
            }
        }
        decode_sparse(&view, u32::MAX as usize, &mut sparse)
            .map_err(|why| format!("block {i} {why}"))?;
    }
    Ok(entries.len())
}

/// The key a cache file says it was built for (after the header checks).
fn stored_key(map: &[u8]) -> std::result::Result<CacheKey, String> {
    if (map.len() as u64) < HEADER || &map[..16] != MAGIC {
        return Err("it is not a block cache (or its header is damaged)".to_string());
    }
    let (at, len) = (u64_at(map, 24), u64_at(map, 32));
    let key = at
        .checked_add(len)
        .filter(|end| *end <= map.len() as u64)
        .map(|end| &map[at as usize..end as usize])
        .ok_or_else(|| "it is truncated or its header is damaged".to_string())?;
    serde_json::from_slice(key).map_err(|_| "its key cannot be read".to_string())
}

/// `map` with its index checksum and every block checksum that lies inside the file made
/// right, so that a fuzzer's changes reach the parsing behind the checksums.
pub fn with_checksums_made_right(map: &[u8]) -> Vec<u8> {
    let mut out = map.to_vec();
    if (out.len() as u64) < HEADER || &out[..16] != MAGIC {
        return out;
    }
    let (key_at, index_at) = (u64_at(&out, 24), u64_at(&out, 40));
    if key_at > index_at || index_at > out.len() as u64 {
        return out;
    }
    let (key_at, index_at) = (key_at as usize, index_at as usize);
    let entries = (out.len() - index_at) / ENTRY;
    for k in 0..entries {
        let at = index_at + k * ENTRY;
        let e = Entry::decode(&out[at..at + ENTRY]);
        let end = e
            .offset
            .checked_add(e.len)
            .filter(|end| *end <= out.len() as u64);
        if let Some(end) = end {
            let crc = crc32c::crc32c(&out[e.offset as usize..end as usize]);
            let fixed = Entry { crc, ..e };
            let mut bytes = Vec::with_capacity(ENTRY);
            fixed.encode(&mut bytes);
            out[at..at + ENTRY].copy_from_slice(&bytes);
        }
    }
    let crc = crc32c::crc32c_append(crc32c::crc32c(&out[key_at..index_at]), &out[index_at..]);
    out[56..60].copy_from_slice(&crc.to_le_bytes());
    out
}

/// One block of the cache, read in place.
#[derive(Debug, Clone, Copy)]
pub struct BlockView<'a> {
    bytes: &'a [u8],
    /// Rows.
    pub rows: usize,
    /// File of the block.
    pub file: usize,
    /// Row number within the file of its first row.
    pub first_row: u64,
}

/// A section's values in place.
#[derive(Debug, Clone, Copy)]
pub enum Values<'a> {
    /// `f64` values (little-endian bytes).
    F64(&'a [u8]),
    /// `f32` values (little-endian bytes).
    F32(&'a [u8]),
    /// Bytes.
    U8(&'a [u8]),
}

impl Values<'_> {
    /// Value `i` as `f64` (a byte as 0 or 1 and so on).
    #[inline]
    pub fn get(&self, i: usize) -> f64 {
        match self {
            Values::F64(b) => f64::from_le_bytes(b[i * 8..i * 8 + 8].try_into().unwrap_or([0; 8])),
            Values::F32(b) => {
                f32::from_le_bytes(b[i * 4..i * 4 + 4].try_into().unwrap_or([0; 4])) as f64
            }
            Values::U8(b) => b[i] as f64,
        }
    }

    /// Values `start..start + out.len()` into `out` as `f64`, then `op` applied.
    #[inline(always)]
    pub fn decode_into(&self, start: usize, out: &mut [f64], op: impl Fn(f64) -> f64) {
        self.decode_ahead(start, out, 0, op);
    }

    /// [`Values::decode_into`], asking the processor to fetch the values `ahead` rows
    /// further on while it decodes these (0: no hint). A pass decodes a block tile by
    /// tile and column by column, so the next tile's stretch of a column starts on
    /// another page, where the hardware's own prefetcher would stall first.
    #[inline(always)]
    pub fn decode_ahead(
        &self,
        start: usize,
        out: &mut [f64],
        ahead: usize,
        op: impl Fn(f64) -> f64,
    ) {
        // Bytes of one cache line, the unit of a fetch hint.
        const LINE: usize = 64;
        let (bytes, width) = match self {
            Values::F64(b) => (*b, 8),
            Values::F32(b) => (*b, 4),
            Values::U8(b) => (*b, 1),
        };
        if ahead > 0 {
            let from = (start + ahead) * width;
            for at in (from..from + out.len() * width).step_by(LINE) {
                crate::simd::prefetch(bytes.as_ptr(), at);
            }
        }
        let b = &bytes[start * width..(start + out.len()) * width];
        match self {
            Values::F64(_) => {
                for (o, c) in out.iter_mut().zip(b.chunks_exact(8)) {
                    let mut a = [0u8; 8];
                    a.copy_from_slice(c);
                    *o = op(f64::from_le_bytes(a));
                }
            }
            Values::F32(_) => {
                for (o, c) in out.iter_mut().zip(b.chunks_exact(4)) {
                    let mut a = [0u8; 4];
                    a.copy_from_slice(c);
                    *o = op(f32::from_le_bytes(a) as f64);
                }
            }
            Values::U8(_) => {
                for (o, v) in out.iter_mut().zip(b) {
                    *o = op(*v as f64);
                }
            }
        }
    }
}

impl<'a> BlockView<'a> {
    fn sections(&self) -> usize {
        u32_at(self.bytes, 0) as usize
    }

    fn validate(&self) -> std::result::Result<(), String> {
        if self.bytes.len() < 8 || u32_at(self.bytes, 4) as usize != self.rows {
            return Err("is damaged (its row count differs from the index)".to_string());
        }
        let count = self.sections();
        if 8 + count * SECTION > self.bytes.len() {
            return Err("is damaged (its section table is cut off)".to_string());
        }
        for s in 0..count {
            let at = 8 + s * SECTION;
            let Some(kind) = Kind::from_u16(u16_at(self.bytes, at)) else {
                return Err("has a section of an unknown kind".to_string());
            };
            let Some(enc) = Encoding::from_u16(u16_at(self.bytes, at + 2)) else {
                return Err("has a section of an unknown encoding".to_string());
            };
            let offset = u64_at(self.bytes, at + 8);
            let len = u64_at(self.bytes, at + 16);
            let per_row = matches!(
                kind,
                Kind::Label | Kind::Weight | Kind::Holdout | Kind::Dense
            );
            if per_row && !matches!(enc, Encoding::F64 | Encoding::F32 | Encoding::U8) {
                return Err("has a section of an unknown encoding".to_string());
            }
            // The CSR sections' sizes are checked by `decode_sparse`.
            if (per_row && len != enc.bytes(self.rows) as u64)
                || offset
                    .checked_add(len)
                    .is_none_or(|e| e > self.bytes.len() as u64)
            {
                return Err("is damaged (a section lies outside it)".to_string());
            }
        }
        Ok(())
    }

    /// Encoding and bytes of the first section of `kind`.
    fn raw_section(&self, kind: Kind) -> Option<(Encoding, &'a [u8])> {
        for s in 0..self.sections() {
            let at = 8 + s * SECTION;
            if u16_at(self.bytes, at) != kind as u16 {
                continue;
            }
            let offset = u64_at(self.bytes, at + 8) as usize;
            let len = u64_at(self.bytes, at + 16) as usize;
            let enc = Encoding::from_u16(u16_at(self.bytes, at + 2))?;
            return Some((enc, &self.bytes[offset..offset + len]));
        }
        None
    }

    /// The section of `kind` (and `column`, for dense columns), if the block has it.
    pub fn section(&self, kind: Kind, column: u32) -> Option<Values<'a>> {
        for s in 0..self.sections() {
            let at = 8 + s * SECTION;
            if u16_at(self.bytes, at) != kind as u16 || u32_at(self.bytes, at + 4) != column {
                continue;
            }
            let offset = u64_at(self.bytes, at + 8) as usize;
            let len = u64_at(self.bytes, at + 16) as usize;
            let data = &self.bytes[offset..offset + len];
            return match Encoding::from_u16(u16_at(self.bytes, at + 2)) {
                Some(Encoding::F64) => Some(Values::F64(data)),
                Some(Encoding::F32) => Some(Values::F32(data)),
                Some(Encoding::U8) => Some(Values::U8(data)),
                _ => None,
            };
        }
        None
    }

    /// Bytes of the block in the file.
    pub fn len(&self) -> usize {
        self.bytes.len()
    }

    /// True for a block of no bytes (never: a block has at least its table).
    pub fn is_empty(&self) -> bool {
        self.bytes.is_empty()
    }
}

/// Removes the cache files in `dir` of another binary version (`blocks-*.ocache` with
/// our magic and another version in the header: a format change names caches anew, so
/// the old file would stay behind, as large as the data). Best effort; returns the files
/// removed.
pub fn remove_other_versions(dir: &Path) -> Vec<PathBuf> {
    let Ok(entries) = fs::read_dir(dir) else {
        return Vec::new();
    };
    let mut removed = Vec::new();
    for e in entries.flatten() {
        let path = e.path();
        let named = path
            .file_name()
            .and_then(|n| n.to_str())
            .is_some_and(|n| n.starts_with("blocks-") && n.ends_with(&format!(".{EXTENSION}")));
        if !named {
            continue;
        }
        let mut head = [0u8; 20];
        let read = File::open(&path).and_then(|f| f.read_exact_at(&mut head, 0));
        if read.is_ok()
            && &head[..16] == MAGIC
            && u32_at(&head, 16) != VERSION
            && fs::remove_file(&path).is_ok()
        {
            removed.push(path);
        }
    }
    removed
}

/// Removes a cache file that cannot be used (best effort).
pub fn remove(path: &Path) {
    let _ = fs::remove_file(path);
}

/// Where the passes of a fit take their blocks from.
pub enum CacheState {
    /// Parquet on every pass (`--no-cache`, or the cache cannot be written).
    Off,
    /// The next full pass reads Parquet and writes the cache into this directory.
    Build(PathBuf),
    /// Passes read the mapped cache.
    Ready(BlockCache),
}

/// A line for the user about the cache.
#[derive(Debug, Clone, PartialEq)]
pub struct CacheNote {
    /// A warning (the fit goes on) rather than information.
    pub warning: bool,
    /// The sentence.
    pub text: String,
}

/// How the passes of a fit ended up reading their blocks, for the summary.
#[derive(Debug, Clone, PartialEq, Default, Serialize)]
pub struct CacheStatus {
    /// `cache` (mapped block cache), `parquet` (every pass decodes Parquet).
    pub mode: String,
    /// The cache file.
    pub path: Option<PathBuf>,
    /// Its size in bytes.
    pub bytes: u64,
}

/// The cache of one fit: its key, where it stands, and notes for the user. Shared by
/// the objectives of a fit (the first evaluation and the iteration loop).
pub struct CacheSlot {
    key: CacheKey,
    state: Mutex<Option<CacheState>>,
    notes: Mutex<Vec<CacheNote>>,
}

impl CacheSlot {
    /// The cache of `key` in `dir` (none: `--no-cache`): opened when a valid one is
    /// there, else to be built by the next pass (a damaged or stale one with a warning).
    pub fn open(dir: Option<&Path>, key: CacheKey) -> CacheSlot {
        let slot = CacheSlot {
            key,
            state: Mutex::new(None),
            notes: Mutex::new(Vec::new()),
        };
        let state = match dir {
            None => {
                slot.note(
                    false,
                    "reading Parquet on every pass (--no-cache)".to_string(),
                );
                CacheState::Off
            }
            Some(dir) => match BlockCache::open(dir, &slot.key) {
                Opened::Ready(cache) => {
                    slot.note(
                        false,
                        format!(
                            "passes read the block cache {} ({})",
                            cache.path().display(),
                            megabytes(cache.bytes())
                        ),
                    );
                    CacheState::Ready(cache)
                }
                Opened::Missing => {
                    for old in remove_other_versions(dir) {
                        slot.note(
                            false,
                            format!(
                                "removed the block cache {} of an older format",
                                old.display()
                            ),
                        );
                    }
                    slot.note(
                        false,
                        format!(
                            "the first pass writes the block cache into {}",
                            dir.display()
                        ),
                    );
                    CacheState::Build(dir.to_path_buf())
                }
                Opened::Unusable(reason) => {
                    let path = slot.key.path_in(dir);
                    slot.note(
                        true,
                        format!(
                            "the block cache {} cannot be used: {reason}; the next pass rebuilds it from Parquet",
                            path.display()
                        ),
                    );
                    remove(&path);
                    CacheState::Build(dir.to_path_buf())
                }
            },
        };
        slot.put(state);
        slot
    }

    /// A slot that reads Parquet on every pass for `reason` (told to the user).
    pub fn off(key: CacheKey, reason: String) -> CacheSlot {
        let slot = CacheSlot {
            key,
            state: Mutex::new(None),
            notes: Mutex::new(Vec::new()),
        };
        slot.note(false, reason);
        slot.put(CacheState::Off);
        slot
    }

    /// The key.
    pub fn key(&self) -> &CacheKey {
        &self.key
    }

    /// Adds a note for the user.
    pub fn note(&self, warning: bool, text: String) {
        if let Ok(mut n) = self.notes.lock() {
            n.push(CacheNote { warning, text });
        }
    }

    /// The notes since the last call.
    pub fn take_notes(&self) -> Vec<CacheNote> {
        self.notes
            .lock()
            .map(|mut n| std::mem::take(&mut *n))
            .unwrap_or_default()
    }

    /// Takes the state for a pass (put it back with [`CacheSlot::put`]).
    pub fn take(&self) -> CacheState {
        self.state
            .lock()
            .ok()
            .and_then(|mut s| s.take())
            .unwrap_or(CacheState::Off)
    }

    /// Puts the state back after a pass.
    pub fn put(&self, state: CacheState) {
        if let Ok(mut s) = self.state.lock() {
            *s = Some(state);
        }
    }

    /// How passes read their blocks now.
    pub fn status(&self) -> CacheStatus {
        let guard = self.state.lock().ok();
        match guard.as_ref().and_then(|s| s.as_ref()) {
            Some(CacheState::Ready(c)) => CacheStatus {
                mode: "cache".to_string(),
                path: Some(c.path().to_path_buf()),
                bytes: c.bytes(),
            },
            _ => CacheStatus {
                mode: "parquet".to_string(),
                path: None,
                bytes: 0,
            },
        }
    }
}

/// Bytes as "12.3 MB".
pub fn megabytes(bytes: u64) -> String {
    format!("{:.1} MB", bytes as f64 / 1e6)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn block() -> (Block, Vec<f64>) {
        let b = Block {
            sparse: Default::default(),
            rows: 3,
            x: vec![],
            y: vec![0.0, 1.0, 1.0],
            w: vec![1.5, 0.1, 2.0],
            file: 2,
            first_row: 16,
            holdout: vec![false, true, false],
        };
        // Column 0 fits f32 (with a null), column 1 needs f64.
        let raw = vec![1.0, f64::NAN, -2.5, 0.1, 1e300, 3.0];
        (b, raw)
    }

    #[test]
    fn encodes_sections_at_their_precision_and_reads_them_back() {
        let (b, raw) = block();
        let mut out = Vec::new();
        encode_block(&b, &raw, 2, &mut out);
        let view = BlockView {
            bytes: &out,
            rows: 3,
            file: 2,
            first_row: 16,
        };
        view.validate().unwrap();
        let y = view.section(Kind::Label, 0).unwrap();
        assert!(matches!(y, Values::F32(_)));
        let w = view.section(Kind::Weight, 0).unwrap();
        assert!(matches!(w, Values::F64(_)), "0.1 is not an f32");
        assert_eq!(w.get(1).to_bits(), 0.1f64.to_bits());
        let h = view.section(Kind::Holdout, 0).unwrap();
        assert_eq!((h.get(0), h.get(1)), (0.0, 1.0));
        let c0 = view.section(Kind::Dense, 0).unwrap();
        assert!(matches!(c0, Values::F32(_)));
        assert!(c0.get(1).is_nan());
        assert_eq!(c0.get(2), -2.5);
        let c1 = view.section(Kind::Dense, 1).unwrap();
        assert!(matches!(c1, Values::F64(_)));
        let mut back = [0.0; 3];
        c1.decode_into(0, &mut back, |v| v);
        assert_eq!(
            back.map(f64::to_bits),
            [0.1f64, 1e300, 3.0].map(f64::to_bits)
        );
        assert!(view.section(Kind::Dense, 2).is_none());
    }

    fn sparse_block(values: &[f64]) -> Block {
        let mut rows = SparseRows::default();
        // Three rows: two entries, none, the rest.
        let index = [3u32, 0, 7, 7, 1, 6, 2, 5, 4, 0];
        let k = values.len().min(index.len());
        rows.push_row(index[..2].iter().copied().zip(values[..2].iter().copied()));
        rows.push_row(std::iter::empty());
        rows.push_row(
            index[2..k]
                .iter()
                .copied()
                .zip(values[2..k].iter().copied()),
        );
        Block {
            sparse: rows,
            rows: 3,
            x: vec![],
            y: vec![0.0, 1.0, 1.0],
            w: vec![],
            file: 0,
            first_row: 0,
            holdout: vec![],
        }
    }

    fn view_of(out: &[u8]) -> BlockView<'_> {
        BlockView {
            bytes: out,
            rows: 3,
            file: 0,
            first_row: 0,
        }
    }

    #[test]
    fn csr_sections_round_trip_bitwise_in_the_narrowest_encoding() {
        let cases: [(Vec<f64>, Encoding, usize); 4] = [
            (vec![1.0; 10], Encoding::Ones, 0),
            (
                vec![1.0, -1.0, -1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, -1.0],
                Encoding::Signs,
                2,
            ),
            (
                vec![0.5, -2.0, 3.25, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0],
                Encoding::F32,
                40,
            ),
            (
                vec![0.1, -2.0, 3.25, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0],
                Encoding::F64,
                80,
            ),
        ];
        let mut back = SparseRows::default();
        for (values, enc, bytes) in cases {
            let b = sparse_block(&values);
            let mut out = Vec::new();
            encode_block(&b, &[], 0, &mut out);
            let view = view_of(&out);
            view.validate().unwrap();
            let (e, data) = view.raw_section(Kind::SparseValues).unwrap();
            assert_eq!((e, data.len()), (enc, bytes), "{values:?}");
            assert_eq!(
                view.raw_section(Kind::SparseOffsets).unwrap().0,
                Encoding::U32
            );
            assert!(decode_sparse(&view, 8, &mut back).unwrap());
            assert_eq!(back.offsets, b.sparse.offsets);
            assert_eq!(back.index, b.sparse.index);
            assert_eq!(
                back.value.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
                b.sparse
                    .value
                    .iter()
                    .map(|v| v.to_bits())
                    .collect::<Vec<_>>()
            );
        }
        // A dense block has no CSR part.
        let (dense, raw) = block();
        let mut out = Vec::new();
        encode_block(&dense, &raw, 2, &mut out);
        let view = BlockView {
            bytes: &out,
            rows: 3,
            file: 2,
            first_row: 16,
        };
        assert!(!decode_sparse(&view, 8, &mut back).unwrap());
        assert!(back.is_empty());
    }

    /// Overwrites `u32` number `at` of the section of `kind` in an encoded block.
    fn poke(out: &mut [u8], kind: Kind, at: usize, value: u32) {
        let count = u32_at(out, 0) as usize;
        for s in 0..count {
            let t = 8 + s * SECTION;
            if u16_at(out, t) == kind as u16 {
                let offset = u64_at(out, t + 8) as usize + at * 4;
                out[offset..offset + 4].copy_from_slice(&value.to_le_bytes());
                return;
            }
        }
        panic!("no section {kind:?}");
    }

    #[test]
    fn damaged_csr_sections_are_refused_with_the_reason() {
        let b = sparse_block(&[1.0; 10]);
        let mut good = Vec::new();
        encode_block(&b, &[], 0, &mut good);
        let mut rows = SparseRows::default();
        // The width of the layout: index 7 is not below 7.
        let why = decode_sparse(&view_of(&good), 7, &mut rows).unwrap_err();
        assert!(why.contains("sparse index"), "{why}");
        assert!(rows.is_empty());
        // Offsets out of order: row 1 ends before it starts.
        let mut bad = good.clone();
        poke(&mut bad, Kind::SparseOffsets, 2, 1);
        let why = decode_sparse(&view_of(&bad), 8, &mut rows).unwrap_err();
        assert!(why.contains("offsets"), "{why}");
        // A last offset that is not the number of entries.
        let mut bad = good.clone();
        poke(&mut bad, Kind::SparseOffsets, 3, 9);
        assert!(decode_sparse(&view_of(&bad), 8, &mut rows).is_err());
        // A first offset other than 0.
        let mut bad = good.clone();
        poke(&mut bad, Kind::SparseOffsets, 0, 1);
        assert!(decode_sparse(&view_of(&bad), 8, &mut rows).is_err());
        // An index far out of range.
        let mut bad = good.clone();
        poke(&mut bad, Kind::SparseIndex, 4, u32::MAX);
        assert!(decode_sparse(&view_of(&bad), 8, &mut rows).is_err());
        // A section kind this reader does not know.
        let mut bad = good.clone();
        let last = 8 + (u32_at(&bad, 0) as usize - 1) * SECTION;
        bad[last..last + 2].copy_from_slice(&99u16.to_le_bytes());
        assert!(view_of(&bad).validate().is_err());
        // The good block still decodes.
        assert!(decode_sparse(&view_of(&good), 8, &mut rows).unwrap());
    }

    /// Whatever a damaged block holds (its checksum recomputed), reading it never panics:
    /// every single-byte change of every byte is either refused or decodes to a CSR part
    /// that passes the checks.
    #[test]
    fn no_single_byte_change_makes_the_reader_panic() {
        for values in [vec![1.0; 10], vec![0.5; 10], vec![0.1; 10]] {
            let b = sparse_block(&values);
            let mut good = Vec::new();
            encode_block(&b, &[], 0, &mut good);
            let mut rows = SparseRows::default();
            for at in 0..good.len() {
                for flip in [0x01u8, 0x80, 0xff] {
                    let mut bad = good.clone();
                    bad[at] ^= flip;
                    let view = view_of(&bad);
                    if view.validate().is_err() {
                        continue;
                    }
                    let _ = view.section(Kind::Label, 0).map(|v| v.get(2));
                    if let Ok(true) = decode_sparse(&view, 8, &mut rows) {
                        assert_eq!(rows.rows(), 3);
                        assert!(rows.index.iter().all(|i| *i < 8));
                        assert_eq!(rows.index.len(), rows.value.len());
                    }
                }
            }
        }
    }
}
