//! Finding Parquet files, reading their footers once, checking that they agree on the
//! columns a job needs, fingerprinting them, and streaming record batches of fixed
//! blocks with only the needed columns decoded.
//!
//! The unit of reading is a [`Segment`]: a run of whole blocks inside one row group.
//! Blocks are cut on a grid fixed by the data alone (every row group is cut into blocks
//! of [`Source::block_rows`] rows from its first row), so the same data always gives the
//! same blocks, whatever the thread count.
//!
//! **Invariant:** footers are read once, in [`Source::open`]; readers per segment reuse
//! that metadata.

use std::fs::File;
use std::path::{Path, PathBuf};

use arrow::array::RecordBatch;
use arrow::datatypes::{DataType, SchemaRef};
use parquet::arrow::arrow_reader::{
    ArrowReaderMetadata, ArrowReaderOptions, ParquetRecordBatchReaderBuilder, RowSelection,
    RowSelector,
};
use parquet::arrow::ProjectionMask;
use sha2::{Digest, Sha256};

use crate::{Error, Result};

/// Rows per block unless a caller asks otherwise.
pub const DEFAULT_BLOCK_ROWS: usize = 8192;

/// One Parquet file with its footer.
#[derive(Debug, Clone)]
pub struct SourceFile {
    /// Path as given (after glob and directory expansion).
    pub path: PathBuf,
    /// Size in bytes at open time.
    pub size: u64,
    /// Modification time at open time, nanoseconds since the Unix epoch (0 if unknown).
    pub modified_ns: i128,
    /// Rows per row group, from the footer.
    pub row_group_rows: Vec<u64>,
    metadata: ArrowReaderMetadata,
}

impl SourceFile {
    /// Rows in the file.
    pub fn rows(&self) -> u64 {
        self.row_group_rows.iter().sum()
    }

    /// The Arrow schema of the file.
    pub fn schema(&self) -> &SchemaRef {
        self.metadata.schema()
    }
}

/// The broad class of a column's type: what it can be used for.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnClass {
    /// Integers, floats and decimals.
    Numeric,
    /// Booleans.
    Bool,
    /// Strings (plain, large, view, or dictionary-encoded).
    Text,
    /// Anything else (lists, structs, dates, binary).
    Other,
}

impl ColumnClass {
    /// The class of an Arrow type.
    pub fn of(data_type: &DataType) -> ColumnClass {
        use DataType::*;
        match data_type {
            Int8 | Int16 | Int32 | Int64 | UInt8 | UInt16 | UInt32 | UInt64 | Float16 | Float32
            | Float64 | Decimal32(..) | Decimal64(..) | Decimal128(..) | Decimal256(..) => {
                ColumnClass::Numeric
            }
            Boolean => ColumnClass::Bool,
            Utf8 | LargeUtf8 | Utf8View => ColumnClass::Text,
            Dictionary(_, value) => match ColumnClass::of(value) {
                ColumnClass::Text => ColumnClass::Text,
                ColumnClass::Numeric => ColumnClass::Numeric,
                _ => ColumnClass::Other,
            },
            _ => ColumnClass::Other,
        }
    }

    /// A word for messages.
    pub fn describe(self) -> &'static str {
        match self {
            ColumnClass::Numeric => "numeric",
            ColumnClass::Bool => "boolean",
            ColumnClass::Text => "string",
            ColumnClass::Other => "non-tabular",
        }
    }
}

/// Where a segment lies: file, row group, and the rows it covers.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Segment {
    /// Index of the file in [`Source::files`].
    pub file: usize,
    /// Row group within the file.
    pub row_group: usize,
    /// First row of the segment within the row group (a multiple of the block size).
    pub first_row: u64,
    /// Rows in the segment.
    pub rows: u64,
    /// Row number of the row group's first row within the file.
    pub row_group_start: u64,
}

/// A block as read: its record batch and where its first row lies.
#[derive(Debug)]
pub struct BatchAt {
    /// The decoded columns (only those asked for).
    pub batch: RecordBatch,
    /// Index of the file.
    pub file: usize,
    /// Row number, within the file, of the batch's first row.
    pub first_row: u64,
}

/// A set of Parquet files read as one table.
#[derive(Debug, Clone)]
pub struct Source {
    files: Vec<SourceFile>,
    block_rows: usize,
}

impl Source {
    /// Finds the files named by `inputs` (paths, directories of `.parquet` files, or glob
    /// patterns), reads every footer, and checks that all files share one schema of the
    /// columns by name (the first file's order).
    pub fn open(inputs: &[String]) -> Result<Source> {
        Self::open_with_block_rows(inputs, DEFAULT_BLOCK_ROWS)
    }

    /// As [`Source::open`] with a chosen block size.
    pub fn open_with_block_rows(inputs: &[String], block_rows: usize) -> Result<Source> {
        if block_rows == 0 {
            return Err(Error::usage("the block size must be at least one row"));
        }
        let paths = expand_inputs(inputs)?;
        let mut files = Vec::with_capacity(paths.len());
        for path in paths {
            files.push(read_footer(&path)?);
        }
        Ok(Source { files, block_rows })
    }

    /// The files, in the order they are read.
    pub fn files(&self) -> &[SourceFile] {
        &self.files
    }

    /// Rows per block.
    pub fn block_rows(&self) -> usize {
        self.block_rows
    }

    /// Rows in all files.
    pub fn rows(&self) -> u64 {
        self.files.iter().map(SourceFile::rows).sum()
    }

    /// Bytes in all files.
    pub fn bytes(&self) -> u64 {
        self.files.iter().map(|f| f.size).sum()
    }

    /// The Arrow schema of the first file.
    pub fn schema(&self) -> &SchemaRef {
        self.files[0].schema()
    }

    /// The type of `column` in the first file, if it has it.
    pub fn column_type(&self, column: &str) -> Option<&DataType> {
        self.schema()
            .field_with_name(column)
            .ok()
            .map(|f| f.data_type())
    }

    /// Checks that every file has each of `columns`, of the same [`ColumnClass`] as in
    /// the first file. The error names the first file and column that differ.
    pub fn require_columns(&self, columns: &[&str]) -> Result<()> {
        let first = &self.files[0];
        for column in columns {
            let Ok(field) = first.schema().field_with_name(column) else {
                return Err(Error::usage(format!(
                    "{} has no column '{column}'; its columns are: {}",
                    first.path.display(),
                    column_list(first.schema())
                )));
            };
            let class = ColumnClass::of(field.data_type());
            for file in &self.files[1..] {
                match file.schema().field_with_name(column) {
                    Err(_) => {
                        return Err(Error::data(format!(
                            "{} has no column '{column}', which {} has; all files must share the columns used",
                            file.path.display(),
                            first.path.display()
                        )))
                    }
                    Ok(other) if ColumnClass::of(other.data_type()) != class => {
                        return Err(Error::data(format!(
                            "column '{column}' is {} ({}) in {} but {} ({}) in {}; all files must agree on its type",
                            class.describe(),
                            field.data_type(),
                            first.path.display(),
                            ColumnClass::of(other.data_type()).describe(),
                            other.data_type(),
                            file.path.display()
                        )))
                    }
                    Ok(_) => {}
                }
            }
        }
        Ok(())
    }

    /// A fingerprint of the data: paths, sizes, modification times, footer row counts
    /// and schema of every file, hashed (SHA-256, first 16 bytes in hex).
    pub fn fingerprint(&self) -> String {
        let mut hasher = Sha256::new();
        for file in &self.files {
            hasher.update(file.path.to_string_lossy().as_bytes());
            hasher.update([0]);
            hasher.update(file.size.to_le_bytes());
            hasher.update(file.modified_ns.to_le_bytes());
            for rows in &file.row_group_rows {
                hasher.update(rows.to_le_bytes());
            }
            for field in file.schema().fields() {
                hasher.update(field.name().as_bytes());
                hasher.update(field.data_type().to_string().as_bytes());
                hasher.update([field.is_nullable() as u8]);
            }
            hasher.update([0xff]);
        }
        let digest = hasher.finalize();
        digest[..16].iter().map(|b| format!("{b:02x}")).collect()
    }

    /// The block grid cut into `shards` contiguous shards of nearly equal row counts.
    /// Each shard is a list of segments in data order; some shards may be empty when
    /// there are fewer blocks than shards.
    pub fn shards(&self, shards: usize) -> Vec<Vec<Segment>> {
        let shards = shards.max(1);
        let block = self.block_rows as u64;
        // Every block, in data order: (file, row group, first row, rows, row-group start).
        let mut blocks = Vec::new();
        for (file_index, file) in self.files.iter().enumerate() {
            let mut start = 0u64;
            for (rg, &rows) in file.row_group_rows.iter().enumerate() {
                let mut first = 0;
                while first < rows {
                    let n = block.min(rows - first);
                    blocks.push(Segment {
                        file: file_index,
                        row_group: rg,
                        first_row: first,
                        rows: n,
                        row_group_start: start,
                    });
                    first += n;
                }
                start += rows;
            }
        }
        let total: u64 = blocks.iter().map(|b| b.rows).sum();
        let mut out: Vec<Vec<Segment>> = vec![Vec::new(); shards];
        let mut done = 0u64;
        for b in blocks {
            // The shard whose share of rows this block's first row falls in.
            let shard = if total == 0 {
                0
            } else {
                ((done as u128 * shards as u128) / total as u128) as usize
            };
            done += b.rows;
            let list = &mut out[shard.min(shards - 1)];
            match list.last_mut() {
                Some(last)
                    if last.file == b.file
                        && last.row_group == b.row_group
                        && last.first_row + last.rows == b.first_row =>
                {
                    last.rows += b.rows
                }
                _ => list.push(b),
            }
        }
        out
    }

    /// Reads one segment, decoding only `columns` (names), and calls `each` with every
    /// block of it in order.
    pub fn read_segment(
        &self,
        segment: &Segment,
        columns: &[&str],
        mut each: impl FnMut(BatchAt) -> Result<()>,
    ) -> Result<()> {
        let file = &self.files[segment.file];
        let handle = File::open(&file.path).map_err(|e| Error::io(&file.path, e))?;
        let schema = file.metadata.parquet_schema();
        let mut roots = Vec::with_capacity(columns.len());
        for column in columns {
            let index = file.schema().index_of(column).map_err(|_| {
                Error::data(format!("{} has no column '{column}'", file.path.display()))
            })?;
            roots.push(index);
        }
        let mask = ProjectionMask::roots(schema, roots);
        let selection = RowSelection::from(vec![
            RowSelector::skip(segment.first_row as usize),
            RowSelector::select(segment.rows as usize),
        ]);
        let reader =
            ParquetRecordBatchReaderBuilder::new_with_metadata(handle, file.metadata.clone())
                .with_row_groups(vec![segment.row_group])
                .with_projection(mask)
                .with_batch_size(self.block_rows)
                .with_row_selection(selection)
                .build()
                .map_err(|e| parquet_error(&file.path, e))?;
        let mut row = segment.row_group_start + segment.first_row;
        for batch in reader {
            let batch = batch.map_err(|e| {
                Error::data(format!(
                    "cannot decode {} (row group {}): {e}; the file may be corrupt or truncated",
                    file.path.display(),
                    segment.row_group
                ))
            })?;
            let n = batch.num_rows() as u64;
            each(BatchAt {
                batch,
                file: segment.file,
                first_row: row,
            })?;
            row += n;
        }
        Ok(())
    }

    /// Reads every file in order, whole row groups at a time (for scoring), decoding
    /// only `columns`.
    pub fn read_all(
        &self,
        columns: &[&str],
        mut each: impl FnMut(BatchAt) -> Result<()>,
    ) -> Result<()> {
        for (file_index, file) in self.files.iter().enumerate() {
            let mut start = 0;
            for (rg, &rows) in file.row_group_rows.iter().enumerate() {
                let segment = Segment {
                    file: file_index,
                    row_group: rg,
                    first_row: 0,
                    rows,
                    row_group_start: start,
                };
                self.read_segment(&segment, columns, &mut each)?;
                start += rows;
            }
        }
        Ok(())
    }
}

fn column_list(schema: &SchemaRef) -> String {
    let names: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
    names.join(", ")
}

fn parquet_error(path: &Path, err: parquet::errors::ParquetError) -> Error {
    Error::data(format!(
        "{} is not a readable Parquet file ({err}); check that it is complete and really Parquet",
        path.display()
    ))
}

/// Expands paths, directories and glob patterns into a sorted, de-duplicated list of
/// files (each input's matches sorted; inputs kept in the order given).
fn expand_inputs(inputs: &[String]) -> Result<Vec<PathBuf>> {
    if inputs.is_empty() {
        return Err(Error::usage(
            "no data given: name Parquet files, directories or globs with --data",
        ));
    }
    let mut out: Vec<PathBuf> = Vec::new();
    for input in inputs {
        let path = Path::new(input);
        let mut found = Vec::new();
        if path.is_dir() {
            let entries = std::fs::read_dir(path).map_err(|e| Error::io(path, e))?;
            for entry in entries {
                let entry = entry.map_err(|e| Error::io(path, e))?;
                let p = entry.path();
                if p.is_file() && p.extension().is_some_and(|e| e == "parquet") {
                    found.push(p);
                }
            }
            if found.is_empty() {
                return Err(Error::usage(format!(
                    "the directory {} holds no .parquet files; point --data at Parquet files or a directory of them",
                    path.display()
                )));
            }
        } else if path.exists() {
            found.push(path.to_path_buf());
        } else if input.contains(['*', '?', '[']) {
            let pattern = glob::glob(input).map_err(|e| {
                Error::usage(format!("the pattern '{input}' is not a valid glob: {e}"))
            })?;
            for entry in pattern {
                match entry {
                    Ok(p) if p.is_file() => found.push(p),
                    Ok(_) => {}
                    Err(e) => {
                        return Err(Error::io(e.path(), std::io::Error::other(e.to_string())))
                    }
                }
            }
            if found.is_empty() {
                return Err(Error::usage(format!(
                    "no file matches the pattern '{input}'"
                )));
            }
        } else {
            return Err(Error::usage(format!(
                "the data file {} does not exist; check the path given to --data",
                path.display()
            )));
        }
        found.sort();
        for p in found {
            if !out.contains(&p) {
                out.push(p);
            }
        }
    }
    Ok(out)
}

fn read_footer(path: &Path) -> Result<SourceFile> {
    let handle = File::open(path).map_err(|e| Error::io(path, e))?;
    let meta = handle.metadata().map_err(|e| Error::io(path, e))?;
    if meta.len() == 0 {
        return Err(Error::data(format!(
            "{} is empty (0 bytes); it is not a Parquet file",
            path.display()
        )));
    }
    let modified_ns = meta
        .modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map(|d| d.as_nanos() as i128)
        .unwrap_or(0);
    let metadata = ArrowReaderMetadata::load(&handle, ArrowReaderOptions::new())
        .map_err(|e| parquet_error(path, e))?;
    let row_group_rows = metadata
        .metadata()
        .row_groups()
        .iter()
        .map(|rg| rg.num_rows().max(0) as u64)
        .collect();
    Ok(SourceFile {
        path: path.to_path_buf(),
        size: meta.len(),
        modified_ns,
        row_group_rows,
        metadata,
    })
}
