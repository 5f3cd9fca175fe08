//! Feature hashing of categorical values, crosses, token lists and pre-encoded sparse
//! vectors into the sparse coordinates of the design (DESIGN §2, §8).
//!
//! Every hashed feature (a `--categorical` column, or a `--cross A*B[*C]`) has a seed:
//! the XXH3-64 hash of its name (`zone`, `zone*hour`), so that equal values of different
//! columns land in different buckets. A value is hashed as its UTF-8 text (integers and
//! booleans as Arrow casts them to text: `18`, `true`) with XXH3-64 under that seed; the
//! low `bits` bits of the hash give the bucket and the top bit the sign (Weinberger et
//! al. 2009, "Feature hashing for large scale multitask learning", ICML). A cross hashes
//! the texts of its parts joined by the byte 0xFE; a null part is the byte 0xFF. Neither
//! byte occurs in UTF-8 text, so the encoding is unambiguous, and nulls get a bucket of
//! their own per feature. A binned numeric part `COL/WIDTH` is the text of
//! `floor(value / WIDTH)`.
//!
//! Sparse coordinates: `[0, 2^bits)` are the hash buckets (when any feature is hashed),
//! followed by the declared dimension of each pre-encoded vector column in order.

use std::io::Write as _;

use arrow::array::{Array, ArrayRef, AsArray, Float64Array, Int64Array, StringArray};
use arrow::compute::cast;
use arrow::datatypes::DataType;
use serde::{Deserialize, Serialize};

use crate::features::sparse::SparseRows;
use crate::features::values::Place;
use crate::source::{ColumnClass, Source};
use crate::{Error, Result};

/// Smallest `--hash-bits`.
pub const MIN_BITS: u32 = 10;
/// Largest `--hash-bits`.
pub const MAX_BITS: u32 = 28;
/// Default `--hash-bits`.
pub const DEFAULT_BITS: u32 = 20;
/// Separator of the parts of a cross in the hashed bytes (never in UTF-8 text).
pub const PART_SEPARATOR: u8 = 0xFE;
/// The hashed bytes of a null part (never in UTF-8 text).
pub const NULL_PART: u8 = 0xFF;

/// One part of a hashed feature: a column, optionally binned (`COL/WIDTH`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Part {
    /// Source column.
    pub column: String,
    /// Bin width of a numeric column: the part's value is `floor(value / width)`.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub bin: Option<f64>,
}

impl Part {
    /// `COL` or `COL/WIDTH`.
    pub fn name(&self) -> String {
        match self.bin {
            Some(w) => format!("{}/{w}", self.column),
            None => self.column.clone(),
        }
    }
}

/// A pre-encoded sparse vector column: `list<struct<index: int, value: float>>` with
/// indices in `0..dim`.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct VectorColumn {
    /// Source column (of the pair form: the `list<integer>` indices).
    pub column: String,
    /// Declared dimension.
    pub dim: u32,
    /// The pair form `IDX,VAL:DIM`: the `list<number>` column of the values, as long
    /// as the index list in every row (none: `column` is a `list<struct<index, value>>`).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub values: Option<String>,
}

/// The sparse part of a feature request: what is hashed, how wide, and which sparse
/// vector columns are read.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct SparseRequest {
    /// Hash bits: `2^bits` buckets.
    pub bits: u32,
    /// `--categorical` columns (strings, integers, booleans, `list<utf8>` token bags,
    /// or binned numerics `COL/WIDTH`).
    pub columns: Vec<Part>,
    /// `--cross` crosses, each of two or more parts.
    pub crosses: Vec<Vec<Part>>,
    /// `--sparse-vector COL:DIM` columns.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub vectors: Vec<VectorColumn>,
}

/// Parses `COL` or `COL/WIDTH`.
pub fn parse_part(text: &str, flag: &str) -> Result<Part> {
    let text = text.trim();
    let (column, bin) = match text.rsplit_once('/') {
        Some((c, w)) => {
            let width: f64 = w.trim().parse().map_err(|_| {
                Error::usage(format!(
                    "the bin width in '{text}' of {flag} is not a number; write COL/WIDTH, e.g. distance/2.5"
                ))
            })?;
            if !(width.is_finite() && width > 0.0) {
                return Err(Error::usage(format!(
                    "the bin width in '{text}' of {flag} must be a positive number"
                )));
            }
            (c.trim(), Some(width))
        }
        None => (text, None),
    };
    if column.is_empty() {
        return Err(Error::usage(format!(
            "{flag} has an empty column name in '{text}'"
        )));
    }
    Ok(Part {
        column: column.to_string(),
        bin,
    })
}

/// Parses a cross `A*B[*C...]`.
pub fn parse_cross(text: &str) -> Result<Vec<Part>> {
    let parts: Vec<Part> = text
        .split('*')
        .map(|p| parse_part(p, "--cross"))
        .collect::<Result<_>>()?;
    if parts.len() < 2 {
        return Err(Error::usage(format!(
            "the cross '{text}' has one column; write two or more joined by '*', e.g. zone*hour"
        )));
    }
    Ok(parts)
}

impl VectorColumn {
    /// The column(s) and dimension as `--sparse-vector` takes them: `COL:DIM` or
    /// `IDX,VAL:DIM` ([`parse_vector`] reads it back).
    pub fn spec(&self) -> String {
        match &self.values {
            Some(v) => format!("{},{v}:{}", self.column, self.dim),
            None => format!("{}:{}", self.column, self.dim),
        }
    }
}

/// Parses `COL:DIM` or `IDX,VAL:DIM` (a pair of list columns) of `--sparse-vector`.
pub fn parse_vector(text: &str) -> Result<VectorColumn> {
    let bad = || {
        Error::usage(format!(
            "--sparse-vector '{text}' is not COL:DIM or IDX,VAL:DIM with DIM a whole number from 1 to 2^31, e.g. tokens:50000 or token_ids,token_counts:50000"
        ))
    };
    let (c, d) = text.rsplit_once(':').ok_or_else(bad)?;
    let dim: u32 = d.trim().parse().map_err(|_| bad())?;
    if dim == 0 || dim > 1 << 31 || c.trim().is_empty() {
        return Err(bad());
    }
    let (column, values) = match c.split_once(',') {
        None => (c.trim(), None),
        Some((i, v)) => {
            let (i, v) = (i.trim(), v.trim());
            if i.is_empty() || v.is_empty() || v.contains(',') || i == v {
                return Err(bad());
            }
            (i, Some(v.to_string()))
        }
    };
    Ok(VectorColumn {
        column: column.to_string(),
        dim,
        values,
    })
}

/// XXH3-64 of `bytes` under `seed` (the published function, from the `twox-hash` crate).
#[inline]
pub fn xxh3(seed: u64, bytes: &[u8]) -> u64 {
    twox_hash::XxHash3_64::oneshot_with_seed(seed, bytes)
}

/// The seed of a hashed feature: XXH3-64 (seed 0) of its name.
pub fn seed_of(name: &str) -> u64 {
    xxh3(0, name.as_bytes())
}

/// Bucket (low `bits` bits) and sign (top bit: set is −1) of a hash.
#[inline]
pub fn bucket_sign(h: u64, bits: u32) -> (u32, f64) {
    let bucket = (h & ((1u64 << bits) - 1)) as u32;
    let sign = if h >> 63 == 1 { -1.0 } else { 1.0 };
    (bucket, sign)
}

/// A hashed feature ready for use: its parts, name and seed.
#[derive(Debug, Clone, PartialEq)]
pub struct HashedFeature {
    /// Parts (one for a `--categorical` column).
    pub parts: Vec<Part>,
    /// `zone` or `zone*hour`.
    pub name: String,
    /// XXH3-64 of the name.
    pub seed: u64,
}

impl HashedFeature {
    /// The feature of `parts`.
    pub fn new(parts: Vec<Part>) -> HashedFeature {
        let name = parts.iter().map(Part::name).collect::<Vec<_>>().join("*");
        let seed = seed_of(&name);
        HashedFeature { parts, name, seed }
    }

    /// Bucket and sign of the encoded bytes of one value.
    #[inline]
    pub fn locate(&self, bytes: &[u8], bits: u32) -> (u32, f64) {
        bucket_sign(xxh3(self.seed, bytes), bits)
    }

    /// A readable label of encoded bytes: `zone=harbor × hour=18`.
    pub fn label(&self, bytes: &[u8]) -> String {
        let texts: Vec<&[u8]> = if self.parts.len() == 1 {
            vec![bytes]
        } else {
            bytes.split(|b| *b == PART_SEPARATOR).collect()
        };
        self.parts
            .iter()
            .zip(texts)
            .map(|(p, t)| {
                let v = if t == [NULL_PART] {
                    "null".to_string()
                } else {
                    String::from_utf8_lossy(t).into_owned()
                };
                format!("{}={v}", p.name())
            })
            .collect::<Vec<_>>()
            .join(" × ")
    }
}

/// The fixed sparse part of a design.
#[derive(Debug, Clone, PartialEq)]
pub struct SparseDesign {
    /// As requested.
    pub request: SparseRequest,
    /// Hashed features: the `--categorical` columns, then the crosses.
    pub hashed: Vec<HashedFeature>,
    /// Hash buckets (0 when nothing is hashed).
    pub buckets: usize,
    /// First sparse coordinate of each vector column.
    pub vector_offsets: Vec<usize>,
    /// Sparse coordinates in all.
    pub dim: usize,
}

impl SparseDesign {
    /// The sparse design of a request (checks the bit count).
    pub fn new(request: &SparseRequest) -> Result<SparseDesign> {
        if !(MIN_BITS..=MAX_BITS).contains(&request.bits) {
            return Err(Error::usage(format!(
                "--hash-bits must be from {MIN_BITS} to {MAX_BITS}, not {}",
                request.bits
            )));
        }
        let mut hashed: Vec<HashedFeature> = request
            .columns
            .iter()
            .map(|p| HashedFeature::new(vec![p.clone()]))
            .collect();
        hashed.extend(
            request
                .crosses
                .iter()
                .map(|c| HashedFeature::new(c.clone())),
        );
        for (i, f) in hashed.iter().enumerate() {
            if hashed[..i].iter().any(|g| g.name == f.name) {
                return Err(Error::usage(format!(
                    "'{}' is hashed twice (in --categorical or --cross); name it once",
                    f.name
                )));
            }
        }
        let buckets = if hashed.is_empty() {
            0
        } else {
            1usize << request.bits
        };
        let mut dim = buckets;
        let mut vector_offsets = Vec::new();
        for v in &request.vectors {
            vector_offsets.push(dim);
            dim += v.dim as usize;
        }
        Ok(SparseDesign {
            request: request.clone(),
            hashed,
            buckets,
            vector_offsets,
            dim,
        })
    }

    /// Source columns read, in order, without repeats.
    pub fn columns(&self) -> Vec<String> {
        let mut out: Vec<String> = Vec::new();
        let all = self
            .hashed
            .iter()
            .flat_map(|f| f.parts.iter().map(|p| p.column.clone()))
            .chain(
                self.request
                    .vectors
                    .iter()
                    .flat_map(|v| std::iter::once(v.column.clone()).chain(v.values.clone())),
            );
        for c in all {
            if !out.contains(&c) {
                out.push(c);
            }
        }
        out
    }

    /// Checks presence and type of every sparse column in every file.
    pub fn check_columns(&self, source: &Source) -> Result<()> {
        let cols = self.columns();
        let names: Vec<&str> = cols.iter().map(String::as_str).collect();
        source.require_columns(&names)?;
        let file = source.files()[0].path.display();
        for f in &self.hashed {
            for p in &f.parts {
                let ty = source.column_type(&p.column).cloned();
                let kind = ty.as_ref().map(part_kind).unwrap_or(PartKind::Other);
                let ok = match (kind, p.bin) {
                    (PartKind::Float | PartKind::Int, Some(_)) => true,
                    (PartKind::Text | PartKind::Int | PartKind::Bool, None) => true,
                    (PartKind::Tokens, None) => f.parts.len() == 1,
                    _ => false,
                };
                if !ok {
                    let what = ty.map(|t| t.to_string()).unwrap_or_default();
                    let hint = match (kind, p.bin) {
                        (PartKind::Float, None) => format!(
                            "bin it as {}/WIDTH (e.g. {}/2.5), or use it as a dense feature",
                            p.column, p.column
                        ),
                        (PartKind::Tokens, None) => {
                            "list columns can be hashed on their own but not crossed".to_string()
                        }
                        (_, Some(_)) => "only numeric columns can be binned".to_string(),
                        _ => {
                            "categorical columns must be strings, integers, booleans or list<utf8>"
                                .to_string()
                        }
                    };
                    return Err(Error::usage(format!(
                        "the categorical column '{}' of {file} is of type {what}, which '{}' cannot hash; {hint}",
                        p.column, f.name
                    )));
                }
            }
        }
        for v in &self.request.vectors {
            let ty = source.column_type(&v.column).cloned();
            if let Some(values) = &v.values {
                let list_of = |t: Option<&DataType>, kinds: &[PartKind]| match t {
                    Some(DataType::List(f) | DataType::LargeList(f)) => {
                        kinds.contains(&part_kind(f.data_type()))
                    }
                    _ => false,
                };
                let vty = source.column_type(values).cloned();
                for (col, t, want, kinds) in [
                    (&v.column, &ty, "list<integer>", &[PartKind::Int][..]),
                    (
                        values,
                        &vty,
                        "list<number>",
                        &[PartKind::Int, PartKind::Float][..],
                    ),
                ] {
                    if !list_of(t.as_ref(), kinds) {
                        return Err(Error::usage(format!(
                            "the sparse vector column '{col}' of {file} is of type {}; --sparse-vector {},{}:DIM needs {want} there",
                            t.as_ref().map(|t| t.to_string()).unwrap_or_default(),
                            v.column,
                            values
                        )));
                    }
                }
                continue;
            }
            if !ty.as_ref().is_some_and(is_vector_type) {
                return Err(Error::usage(format!(
                    "the sparse vector column '{}' of {file} is of type {}; --sparse-vector needs list<struct<index: integer, value: number>>",
                    v.column,
                    ty.map(|t| t.to_string()).unwrap_or_default()
                )));
            }
        }
        Ok(())
    }

    /// The encoded bytes of every value of hashed feature `f` in `batch`, row by row:
    /// calls `each(row, bytes)` once per value (once per token of a token list, never
    /// for an empty list).
    pub fn for_each_value(
        &self,
        f: &HashedFeature,
        batch: &arrow::array::RecordBatch,
        place: Place<'_>,
        mut each: impl FnMut(usize, &[u8]),
    ) -> Result<()> {
        let n = batch.num_rows();
        let parts: Vec<PartValues> = f
            .parts
            .iter()
            .map(|p| PartValues::read(p, batch, place))
            .collect::<Result<_>>()?;
        let mut buf: Vec<u8> = Vec::with_capacity(64);
        if let [PartValues::Tokens(list)] = parts.as_slice() {
            let values = list.values().as_string::<i32>();
            for i in 0..n {
                if list.is_null(i) {
                    each(i, &[NULL_PART]);
                    continue;
                }
                let (a, b) = (list.value_offsets()[i], list.value_offsets()[i + 1]);
                for k in a as usize..b as usize {
                    if values.is_null(k) {
                        each(i, &[NULL_PART]);
                    } else {
                        each(i, values.value(k).as_bytes());
                    }
                }
            }
            return Ok(());
        }
        for i in 0..n {
            buf.clear();
            for (k, p) in parts.iter().enumerate() {
                if k > 0 {
                    buf.push(PART_SEPARATOR);
                }
                p.encode(i, &mut buf);
            }
            each(i, &buf);
        }
        Ok(())
    }

    /// Appends the sparse entries of the rows of `batch` (all of them, or those with
    /// `keep[i]`) to `out`: hashed features in order, then vector columns.
    pub fn build(
        &self,
        batch: &arrow::array::RecordBatch,
        place: Place<'_>,
        keep: Option<&[bool]>,
        out: &mut SparseRows,
    ) -> Result<()> {
        let n = batch.num_rows();
        let bits = self.request.bits;
        let scalar = self.request.vectors.is_empty()
            && self.hashed.iter().all(|f| {
                f.parts.len() > 1
                    || batch
                        .column_by_name(&f.parts[0].column)
                        .is_none_or(|a| part_kind(a.data_type()) != PartKind::Tokens)
            });
        if scalar {
            // One entry per row and feature: a fixed stride, no per-row lists.
            let k = self.hashed.len();
            let mut index = vec![0u32; n * k];
            let mut value = vec![0.0f64; n * k];
            for (fi, f) in self.hashed.iter().enumerate() {
                if let Some(locs) = dictionary_locations(f, batch, bits)? {
                    // A dictionary column: each distinct value was hashed once.
                    for (i, (b, s)) in locs.into_iter().enumerate() {
                        index[i * k + fi] = b;
                        value[i * k + fi] = s;
                    }
                    continue;
                }
                self.for_each_value(f, batch, place, |i, bytes| {
                    let (b, s) = f.locate(bytes, bits);
                    index[i * k + fi] = b;
                    value[i * k + fi] = s;
                })?;
            }
            out.clear();
            for i in 0..n {
                if keep.is_some_and(|kp| !kp[i]) {
                    continue;
                }
                out.push_row(
                    index[i * k..(i + 1) * k]
                        .iter()
                        .copied()
                        .zip(value[i * k..(i + 1) * k].iter().copied()),
                );
            }
            return Ok(());
        }
        // Per row, its entries; filled feature by feature, then laid out row-major.
        let mut per_row: Vec<Vec<(u32, f64)>> = vec![Vec::new(); n];
        for f in &self.hashed {
            self.for_each_value(f, batch, place, |i, bytes| {
                let (b, s) = f.locate(bytes, bits);
                per_row[i].push((b, s));
            })?;
        }
        for (v, offset) in self.request.vectors.iter().zip(&self.vector_offsets) {
            read_vector(v, *offset, batch, place, &mut per_row)?;
        }
        out.clear();
        for (i, entries) in per_row.iter().enumerate() {
            if keep.is_some_and(|k| !k[i]) {
                continue;
            }
            out.push_row(entries.iter().copied());
        }
        Ok(())
    }
}

/// Bucket and sign of every row of a one-part feature whose column is dictionary-encoded
/// text (each distinct value hashed once); `None` for other columns.
fn dictionary_locations(
    f: &HashedFeature,
    batch: &arrow::array::RecordBatch,
    bits: u32,
) -> Result<Option<Vec<(u32, f64)>>> {
    if f.parts.len() != 1 || f.parts[0].bin.is_some() {
        return Ok(None);
    }
    let Some(array) = batch.column_by_name(&f.parts[0].column) else {
        return Ok(None);
    };
    let DataType::Dictionary(_, value_type) = array.data_type() else {
        return Ok(None);
    };
    if ColumnClass::of(value_type) != ColumnClass::Text {
        return Ok(None);
    }
    let dict = array.as_any_dictionary();
    let values = cast(dict.values(), &DataType::Utf8)
        .map_err(|e| Error::internal(format!("cannot read the dictionary of '{}': {e}", f.name)))?;
    let values = values.as_string::<i32>();
    let null = f.locate(&[NULL_PART], bits);
    let locs: Vec<(u32, f64)> = (0..values.len())
        .map(|j| {
            if values.is_null(j) {
                null
            } else {
                f.locate(values.value(j).as_bytes(), bits)
            }
        })
        .collect();
    let keys = dict.normalized_keys();
    Ok(Some(
        (0..array.len())
            .map(|i| {
                if array.is_null(i) {
                    null
                } else {
                    locs[keys[i]]
                }
            })
            .collect(),
    ))
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum PartKind {
    Text,
    Int,
    Bool,
    Float,
    Tokens,
    Other,
}

fn part_kind(t: &DataType) -> PartKind {
    use DataType::*;
    match t {
        Int8 | Int16 | Int32 | Int64 | UInt8 | UInt16 | UInt32 | UInt64 => PartKind::Int,
        Float16 | Float32 | Float64 | Decimal32(..) | Decimal64(..) | Decimal128(..)
        | Decimal256(..) => PartKind::Float,
        Boolean => PartKind::Bool,
        Dictionary(_, v) => match part_kind(v) {
            PartKind::Tokens | PartKind::Other => PartKind::Other,
            k => k,
        },
        List(f) | LargeList(f) if ColumnClass::of(f.data_type()) == ColumnClass::Text => {
            PartKind::Tokens
        }
        _ if ColumnClass::of(t) == ColumnClass::Text => PartKind::Text,
        _ => PartKind::Other,
    }
}

fn is_vector_type(t: &DataType) -> bool {
    let (DataType::List(item) | DataType::LargeList(item)) = t else {
        return false;
    };
    let DataType::Struct(fields) = item.data_type() else {
        return false;
    };
    let ty = |name: &str| {
        fields
            .iter()
            .find(|f| f.name() == name)
            .map(|f| f.data_type())
    };
    matches!(part_kind_opt(ty("index")), Some(PartKind::Int))
        && matches!(
            part_kind_opt(ty("value")),
            Some(PartKind::Int | PartKind::Float)
        )
}

fn part_kind_opt(t: Option<&DataType>) -> Option<PartKind> {
    t.map(part_kind)
}

/// The values of one part in a batch.
enum PartValues {
    Text(StringArray),
    Int(Int64Array),
    Binned(Float64Array, f64),
    Tokens(arrow::array::ListArray),
}

impl PartValues {
    fn read(p: &Part, batch: &arrow::array::RecordBatch, place: Place<'_>) -> Result<PartValues> {
        let array = batch.column_by_name(&p.column).ok_or_else(|| {
            Error::data(format!(
                "{} has no column '{}', which the model hashes",
                place.file.path.display(),
                p.column
            ))
        })?;
        let cannot = |e: arrow::error::ArrowError| {
            Error::data(format!(
                "the categorical column '{}' of {} ({}) cannot be hashed: {e}",
                p.column,
                place.file.path.display(),
                array.data_type()
            ))
        };
        if let Some(w) = p.bin {
            let v = cast(array, &DataType::Float64).map_err(cannot)?;
            let v = v.as_primitive::<arrow::datatypes::Float64Type>().clone();
            crate::features::values::check_finite(&v, &p.column, place)?;
            return Ok(PartValues::Binned(v, w));
        }
        if part_kind(array.data_type()) == PartKind::Tokens {
            let target = DataType::List(std::sync::Arc::new(arrow::datatypes::Field::new(
                "item",
                DataType::Utf8,
                true,
            )));
            let list: ArrayRef = cast(array, &target).map_err(cannot)?;
            return Ok(PartValues::Tokens(list.as_list::<i32>().clone()));
        }
        if part_kind(array.data_type()) == PartKind::Int
            && !matches!(
                array.data_type(),
                DataType::Dictionary(..) | DataType::UInt64
            )
        {
            // Decimal text written straight into the hashed bytes, no string column.
            let v = cast(array, &DataType::Int64).map_err(cannot)?;
            return Ok(PartValues::Int(v.as_primitive().clone()));
        }
        let text = if array.data_type() == &DataType::Utf8 {
            array.clone()
        } else {
            cast(array, &DataType::Utf8).map_err(cannot)?
        };
        Ok(PartValues::Text(text.as_string::<i32>().clone()))
    }

    #[inline]
    fn encode(&self, i: usize, buf: &mut Vec<u8>) {
        match self {
            PartValues::Text(s) => {
                if s.is_null(i) {
                    buf.push(NULL_PART);
                } else {
                    buf.extend_from_slice(s.value(i).as_bytes());
                }
            }
            PartValues::Int(v) => {
                if v.is_null(i) {
                    buf.push(NULL_PART);
                } else {
                    let _ = write!(buf, "{}", v.value(i));
                }
            }
            PartValues::Binned(v, w) => {
                if v.is_null(i) {
                    buf.push(NULL_PART);
                } else {
                    let bin = (v.value(i) / w).floor() as i64;
                    let _ = write!(buf, "{bin}");
                }
            }
            // Token lists are never parts of a cross (checked with the columns).
            PartValues::Tokens(_) => buf.push(NULL_PART),
        }
    }
}

/// Reads a `list<struct<index, value>>` column into `per_row`, shifted by `offset`.
fn read_vector(
    v: &VectorColumn,
    offset: usize,
    batch: &arrow::array::RecordBatch,
    place: Place<'_>,
    per_row: &mut [Vec<(u32, f64)>],
) -> Result<()> {
    let array = batch.column_by_name(&v.column).ok_or_else(|| {
        Error::data(format!(
            "{} has no column '{}', which the model reads as a sparse vector",
            place.file.path.display(),
            v.column
        ))
    })?;
    let bad_type = || {
        Error::data(format!(
            "the sparse vector column '{}' of {} is of type {}; it needs list<struct<index: integer, value: number>>",
            v.column,
            place.file.path.display(),
            array.data_type()
        ))
    };
    let list: ArrayRef = match array.data_type() {
        DataType::List(_) => array.clone(),
        DataType::LargeList(item) => cast(
            array,
            &DataType::List(std::sync::Arc::new(item.as_ref().clone())),
        )
        .map_err(|_| bad_type())?,
        _ => return Err(bad_type()),
    };
    let list = list.as_list::<i32>();
    if let Some(values) = &v.values {
        return read_vector_pair(v, values, list, offset, batch, place, per_row);
    }
    let items = list.values().as_struct_opt().ok_or_else(bad_type)?;
    let field = |name: &str, ty: &DataType| -> Result<ArrayRef> {
        let col = items.column_by_name(name).ok_or_else(bad_type)?;
        cast(col, ty).map_err(|_| bad_type())
    };
    let index = field("index", &DataType::Int64)?;
    let index: &Int64Array = index.as_primitive();
    let value = field("value", &DataType::Float64)?;
    let value: &Float64Array = value.as_primitive();
    for (i, entries) in per_row.iter_mut().enumerate() {
        if list.is_null(i) {
            continue;
        }
        let (a, b) = (list.value_offsets()[i], list.value_offsets()[i + 1]);
        for k in a as usize..b as usize {
            if index.is_null(k) || value.is_null(k) || items.is_null(k) {
                return Err(Error::data(format!(
                    "the sparse vector column '{}' has a null index or value at {}; every entry needs both",
                    v.column,
                    place.row(i)
                )));
            }
            let ix = index.value(k);
            let val = value.value(k);
            if ix < 0 || ix >= i64::from(v.dim) {
                return Err(Error::data(format!(
                    "the sparse vector column '{}' has the index {ix} at {}, outside its declared dimension {} (indices run from 0 to {}); fix the data or declare a larger dimension in --sparse-vector {}:DIM",
                    v.column,
                    place.row(i),
                    v.dim,
                    v.dim - 1,
                    v.column
                )));
            }
            if !val.is_finite() {
                return Err(Error::data(format!(
                    "the sparse vector column '{}' holds the non-finite value {val} at {}",
                    v.column,
                    place.row(i)
                )));
            }
            entries.push(((offset + ix as usize) as u32, val));
        }
    }
    Ok(())
}

/// Reads the pair form `IDX,VAL:DIM` of a sparse vector: the index list `list` (of
/// column `v.column`) and the value list of column `values`, of equal length in every row
/// (a null list has no entries).
fn read_vector_pair(
    v: &VectorColumn,
    values: &str,
    list: &arrow::array::ListArray,
    offset: usize,
    batch: &arrow::array::RecordBatch,
    place: Place<'_>,
    per_row: &mut [Vec<(u32, f64)>],
) -> Result<()> {
    let flag = format!("--sparse-vector {},{values}:{}", v.column, v.dim);
    let array = batch.column_by_name(values).ok_or_else(|| {
        Error::data(format!(
            "{} has no column '{values}', which the model reads as the values of {flag}",
            place.file.path.display()
        ))
    })?;
    let bad_type = |col: &str, ty: &DataType, want: &str| {
        Error::data(format!(
            "the sparse vector column '{col}' of {} is of type {ty}; {flag} needs {want} there",
            place.file.path.display()
        ))
    };
    let vlist: ArrayRef = match array.data_type() {
        DataType::List(_) => array.clone(),
        DataType::LargeList(item) => cast(
            array,
            &DataType::List(std::sync::Arc::new(item.as_ref().clone())),
        )
        .map_err(|_| bad_type(values, array.data_type(), "list<number>"))?,
        ty => return Err(bad_type(values, ty, "list<number>")),
    };
    let vlist = vlist.as_list::<i32>();
    let index = cast(list.values(), &DataType::Int64)
        .map_err(|_| bad_type(&v.column, list.data_type(), "list<integer>"))?;
    let index: &Int64Array = index.as_primitive();
    let value = cast(vlist.values(), &DataType::Float64)
        .map_err(|_| bad_type(values, vlist.data_type(), "list<number>"))?;
    let value: &Float64Array = value.as_primitive();
    let len = |l: &arrow::array::ListArray, i: usize| {
        if l.is_null(i) {
            0
        } else {
            (l.value_offsets()[i + 1] - l.value_offsets()[i]) as usize
        }
    };
    for (i, entries) in per_row.iter_mut().enumerate() {
        let (ni, nv) = (len(list, i), len(vlist, i));
        if ni != nv {
            return Err(Error::data(format!(
                "the sparse vector columns '{}' and '{values}' hold {ni} indices and {nv} values at {}; {flag} needs one value per index in every row",
                v.column,
                place.row(i)
            )));
        }
        if ni == 0 {
            continue;
        }
        let a = list.value_offsets()[i] as usize;
        let b = vlist.value_offsets()[i] as usize;
        for k in 0..ni {
            let (ki, kv) = (a + k, b + k);
            if index.is_null(ki) || value.is_null(kv) {
                return Err(Error::data(format!(
                    "the sparse vector columns '{}' and '{values}' hold a null index or value at {}; every entry needs both",
                    v.column,
                    place.row(i)
                )));
            }
            let ix = index.value(ki);
            let val = value.value(kv);
            if ix < 0 || ix >= i64::from(v.dim) {
                return Err(Error::data(format!(
                    "the sparse vector column '{}' has the index {ix} at {}, outside its declared dimension {} (indices run from 0 to {}); fix the data or declare a larger dimension in {flag}",
                    v.column,
                    place.row(i),
                    v.dim,
                    v.dim - 1,
                )));
            }
            if !val.is_finite() {
                return Err(Error::data(format!(
                    "the sparse vector column '{values}' holds the non-finite value {val} at {}",
                    place.row(i)
                )));
            }
            entries.push(((offset + ix as usize) as u32, val));
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The sanity buffer of the xxHash repository (`XSUM_fillTestBuffer` in
    /// cli/xsum_sanity_check.c of github.com/Cyan4973/xxHash).
    fn sanity_buffer(len: usize) -> Vec<u8> {
        const PRIME32: u64 = 2654435761;
        const PRIME64: u64 = 11400714785074694797;
        let mut gen = PRIME32;
        (0..len)
            .map(|_| {
                let b = (gen >> 56) as u8;
                gen = gen.wrapping_mul(PRIME64);
                b
            })
            .collect()
    }

    /// Published test vectors of XXH3_64bits_withSeed: `XSUM_XXH3_testdata` in
    /// cli/xsum_sanity_check.c of github.com/Cyan4973/xxHash (read from that file, not
    /// recalled), through the same call the hashing uses.
    #[test]
    fn xxh3_matches_the_published_sanity_vectors() {
        const PRIME64: u64 = 11400714785074694797;
        let vectors: [(usize, u64, u64); 16] = [
            (0, 0, 0x2D06800538D394C2),
            (0, PRIME64, 0xA8A6B918B2F0364A),
            (1, 0, 0xC44BDFF4074EECDB),
            (1, PRIME64, 0x032BE332DD766EF8),
            (6, 0, 0x27B56A84CD2D7325),
            (6, PRIME64, 0x84589C116AB59AB9),
            (12, 0, 0xA713DAF0DFBB77E7),
            (12, PRIME64, 0xE7303E1B2336DE0E),
            (24, 0, 0xA3FE70BF9D3510EB),
            (24, PRIME64, 0x850E80FC35BDD690),
            (48, 0, 0x397DA259ECBA1F11),
            (80, 0, 0xBCDEFBBB2C47C90A),
            (195, 0, 0xCD94217EE362EC3A),
            (403, PRIME64, 0x6259F6ECFD6443FD),
            (2048, 0, 0xDD59E2C3A5F038E0),
            (2367, PRIME64, 0xD2DB3415B942B42A),
        ];
        let buf = sanity_buffer(2367);
        for (len, seed, want) in vectors {
            assert_eq!(xxh3(seed, &buf[..len]), want, "len {len} seed {seed}");
        }
    }

    #[test]
    fn bucket_uses_low_bits_and_sign_the_top_bit() {
        assert_eq!(bucket_sign(0x8000_0000_0000_0405, 10), (5, -1.0));
        assert_eq!(bucket_sign(0x0000_0000_0000_0405, 10), (5, 1.0));
        assert_eq!(
            bucket_sign(0xFFFF_FFFF_FFFF_FFFF, 28),
            ((1 << 28) - 1, -1.0)
        );
    }

    #[test]
    fn column_name_changes_the_bucket_of_a_value() {
        let a = HashedFeature::new(vec![Part {
            column: "zone".into(),
            bin: None,
        }]);
        let b = HashedFeature::new(vec![Part {
            column: "store".into(),
            bin: None,
        }]);
        // The seed is the hash of the name, so equal values differ by column.
        assert_ne!(xxh3(a.seed, b"7"), xxh3(b.seed, b"7"));
        assert_eq!(a.seed, xxh3(0, b"zone"));
    }

    #[test]
    fn labels_of_crosses_and_nulls() {
        let f = HashedFeature::new(vec![
            Part {
                column: "zone".into(),
                bin: None,
            },
            Part {
                column: "hour".into(),
                bin: None,
            },
        ]);
        assert_eq!(f.name, "zone*hour");
        assert_eq!(f.label(b"harbor\xFE18"), "zone=harbor × hour=18");
        assert_eq!(f.label(b"\xFF\xFE18"), "zone=null × hour=18");
    }

    #[test]
    fn parsing() {
        assert_eq!(parse_cross("zone*distance/2.5").unwrap()[1].bin, Some(2.5));
        assert!(parse_cross("zone").is_err());
        assert!(parse_part("d/0", "--cross").is_err());
        assert_eq!(parse_vector("tok:100").unwrap().dim, 100);
        assert!(parse_vector("tok:0").is_err());
        assert!(parse_vector("tok").is_err());
    }
}
