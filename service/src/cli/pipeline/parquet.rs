//! Parquet input: a file is read one row group at a time, in record batches of [`super::BLOCK_ROWS`] rows, and only
//! the columns a command uses ([`ParquetRows::select`]). Each row becomes the same [`super::Row`] a CSV record does:
//! a text form of every cell (for the id, the label, `--keep-columns` and categorical features) and, for numeric
//! columns, the number itself, which a numeric feature takes as is (no text round trip).
//!
//! Cell rules: a null is an empty cell (missing); integers of any width give their decimal text and their value
//! (rounded to the nearest float64 beyond 2^53, as reading the text would); float32 is widened exactly (its text is
//! float32's shortest form); float64 is used as is (text: its shortest round-trip form); booleans are 1 and 0 to a
//! numeric feature and `true`/`false` as text; strings (plain, large, view) are text; a dictionary is read as its
//! values; decimal128 is its decimal text. Any other type (lists, structs, maps, dates, binary ...) is refused,
//! naming the column and its type, when the column is used.

use std::fmt::Write as _;
use std::fs::File;

use anyhow::{anyhow, bail, Context};
use arrow_array::cast::AsArray;
use arrow_array::types::{
    Decimal128Type, Float32Type, Float64Type, Int16Type, Int32Type, Int64Type, Int8Type,
    UInt16Type, UInt32Type, UInt64Type, UInt8Type,
};
use arrow_array::{Array, ArrayRef, RecordBatch};
use arrow_schema::DataType;
use csv::StringRecord;
use indicatif::ProgressBar;
use parquet::arrow::arrow_reader::{
    ArrowReaderMetadata, ArrowReaderOptions, ParquetRecordBatchReader,
    ParquetRecordBatchReaderBuilder,
};
use parquet::arrow::ProjectionMask;

use super::{Row, BLOCK_ROWS};

/// The first (and last) four bytes of every Parquet file.
pub const MAGIC: &[u8; 4] = b"PAR1";

/// How a column's cells are read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    I8,
    I16,
    I32,
    I64,
    U8,
    U16,
    U32,
    U64,
    F32,
    F64,
    Bool,
    Utf8,
    LargeUtf8,
    Utf8View,
    Decimal,
}

/// How cells of `data_type` are read, or `None` for a type probity does not read. A dictionary is read as its
/// values' type.
fn kind_of(data_type: &DataType) -> Option<Kind> {
    Some(match data_type {
        DataType::Int8 => Kind::I8,
        DataType::Int16 => Kind::I16,
        DataType::Int32 => Kind::I32,
        DataType::Int64 => Kind::I64,
        DataType::UInt8 => Kind::U8,
        DataType::UInt16 => Kind::U16,
        DataType::UInt32 => Kind::U32,
        DataType::UInt64 => Kind::U64,
        DataType::Float32 => Kind::F32,
        DataType::Float64 => Kind::F64,
        DataType::Boolean => Kind::Bool,
        DataType::Utf8 => Kind::Utf8,
        DataType::LargeUtf8 => Kind::LargeUtf8,
        DataType::Utf8View => Kind::Utf8View,
        DataType::Decimal128(_, _) => Kind::Decimal,
        // One level: a dictionary is flattened once per batch.
        DataType::Dictionary(_, values) if !matches!(values.as_ref(), DataType::Dictionary(..)) => {
            return kind_of(values)
        }
        _ => return None,
    })
}

/// A Parquet file read as rows.
pub struct ParquetRows {
    file: File,
    meta: ArrowReaderMetadata,
    names: Vec<String>,
    /// Per column: how it is read, when it is read at all.
    kinds: Vec<Option<Kind>>,
    /// The next row group to open.
    next_group: usize,
    /// Compressed bytes of the row group being read, added to the progress bar when it is done.
    group_bytes: u64,
    reader: Option<ParquetRecordBatchReader>,
    /// The batch being read (dictionaries already read as their values), its columns in file order of the selected
    /// ones, and the next row in it.
    batch: Vec<(usize, Kind, ArrayRef)>,
    batch_rows: usize,
    at: usize,
    progress: ProgressBar,
}

impl ParquetRows {
    /// Reads the footer of `file` (a Parquet file); every column is selected until [`ParquetRows::select`].
    pub fn open(file: File, progress: ProgressBar) -> anyhow::Result<Self> {
        let meta = ArrowReaderMetadata::load(&file, ArrowReaderOptions::new())
            .context("cannot read the Parquet footer")?;
        let names: Vec<String> = meta
            .schema()
            .fields()
            .iter()
            .map(|f| f.name().clone())
            .collect();
        let total: i64 = meta
            .metadata()
            .row_groups()
            .iter()
            .map(|g| g.compressed_size())
            .sum();
        progress.set_length(u64::try_from(total).unwrap_or(0));
        let mut rows = Self {
            file,
            meta,
            names,
            kinds: Vec::new(),
            next_group: 0,
            group_bytes: 0,
            reader: None,
            batch: Vec::new(),
            batch_rows: 0,
            at: 0,
            progress,
        };
        let all: Vec<usize> = (0..rows.names.len()).collect();
        // Until a command says which columns it uses ([`ParquetRows::select`]), every column of a type probity
        // reads is read.
        rows.select_unchecked(&all);
        Ok(rows)
    }

    /// The column names, as a header record.
    pub fn header(&self) -> StringRecord {
        StringRecord::from(self.names.clone())
    }

    /// Reads only `columns` (indices into the header), said before the first row is read; the others are empty
    /// cells. A used column of a type probity cannot read is an error naming it and its type.
    pub fn select(&mut self, columns: &[usize]) -> anyhow::Result<()> {
        let schema = self.meta.schema().clone();
        for &c in columns {
            let Some(field) = schema.fields().get(c) else {
                continue;
            };
            if kind_of(field.data_type()).is_none() {
                bail!(
                    "column `{}` has Parquet/Arrow type {}, which probity cannot read: a column it uses must be an \
                     integer, floating-point, boolean, decimal or string column (or a dictionary of one)",
                    field.name(),
                    field.data_type()
                );
            }
        }
        self.select_unchecked(columns);
        Ok(())
    }

    fn select_unchecked(&mut self, columns: &[usize]) {
        let schema = self.meta.schema().clone();
        self.kinds = schema
            .fields()
            .iter()
            .enumerate()
            .map(|(i, f)| {
                if columns.contains(&i) {
                    kind_of(f.data_type())
                } else {
                    None
                }
            })
            .collect();
    }

    /// Fills `row` with the next row; `false` at the end of the file.
    pub fn read(&mut self, row: &mut Row) -> anyhow::Result<bool> {
        while self.at >= self.batch_rows {
            if !self.next_batch()? {
                return Ok(false);
            }
        }
        let i = self.at;
        self.at += 1;
        row.record.clear();
        row.numbers.clear();
        row.numbers.resize(self.names.len(), None);
        let mut text = String::new();
        let mut next = self.batch.iter().peekable();
        for (c, number) in row.numbers.iter_mut().enumerate() {
            match next.next_if(|(col, _, _)| *col == c) {
                None => row.record.push_field(""),
                Some((_, kind, array)) => {
                    text.clear();
                    *number = cell(array, *kind, i, &mut text);
                    row.record.push_field(&text);
                }
            }
        }
        Ok(true)
    }

    /// Moves to the next record batch, opening the next row group when this one is done; `false` at the end.
    fn next_batch(&mut self) -> anyhow::Result<bool> {
        loop {
            if let Some(reader) = self.reader.as_mut() {
                if let Some(batch) = reader.next() {
                    let batch = batch.map_err(|e| {
                        anyhow!(
                            "cannot read Parquet row group {}: {e}",
                            self.next_group.saturating_sub(1)
                        )
                    })?;
                    self.take(&batch)?;
                    return Ok(true);
                }
                self.reader = None;
                self.progress.inc(self.group_bytes);
            }
            let groups = self.meta.metadata().row_groups();
            let Some(group) = groups.get(self.next_group) else {
                return Ok(false);
            };
            self.group_bytes = u64::try_from(group.compressed_size()).unwrap_or(0);
            let used: Vec<usize> = self
                .kinds
                .iter()
                .enumerate()
                .filter(|(_, k)| k.is_some())
                .map(|(i, _)| i)
                .collect();
            let mask =
                ProjectionMask::roots(self.meta.metadata().file_metadata().schema_descr(), used);
            let file = self
                .file
                .try_clone()
                .context("cannot read the file again")?;
            self.reader = Some(
                ParquetRecordBatchReaderBuilder::new_with_metadata(file, self.meta.clone())
                    .with_projection(mask)
                    .with_row_groups(vec![self.next_group])
                    .with_batch_size(BLOCK_ROWS)
                    .build()
                    .map_err(|e| {
                        codec_hint(format!(
                            "cannot read Parquet row group {}: {e}",
                            self.next_group
                        ))
                    })?,
            );
            self.next_group += 1;
        }
    }

    /// Keeps `batch`'s columns (the selected ones, in file order), dictionaries read as their values.
    fn take(&mut self, batch: &RecordBatch) -> anyhow::Result<()> {
        let used = self
            .kinds
            .iter()
            .enumerate()
            .filter_map(|(i, k)| k.map(|k| (i, k)));
        self.batch.clear();
        for ((c, kind), array) in used.zip(batch.columns()) {
            let array = match array.data_type() {
                DataType::Dictionary(_, _) => {
                    let dict = array.as_any_dictionary();
                    arrow_select::take::take(dict.values().as_ref(), dict.keys(), None)
                        .with_context(|| {
                            format!("cannot read the dictionary of column `{}`", self.names[c])
                        })?
                }
                _ => array.clone(),
            };
            self.batch.push((c, kind, array));
        }
        self.batch_rows = batch.num_rows();
        self.at = 0;
        Ok(())
    }
}

/// Adds which codecs this build reads to an error about a compression codec.
fn codec_hint(message: String) -> anyhow::Error {
    if message.contains("Disabled feature") || message.contains("codec") {
        anyhow!("{message} (probity reads Parquet pages that are uncompressed, snappy or gzip)")
    } else {
        anyhow!(message)
    }
}

/// Writes cell `i` of `array` as text into `text` and returns its number, for a numeric column; a null is empty
/// text and no number.
fn cell(array: &ArrayRef, kind: Kind, i: usize, text: &mut String) -> Option<f64> {
    if array.is_null(i) {
        return None;
    }
    macro_rules! integer {
        ($t:ty) => {{
            let v = array.as_primitive::<$t>().value(i);
            let _ = write!(text, "{v}");
            Some(v as f64)
        }};
    }
    match kind {
        Kind::I8 => integer!(Int8Type),
        Kind::I16 => integer!(Int16Type),
        Kind::I32 => integer!(Int32Type),
        Kind::I64 => integer!(Int64Type),
        Kind::U8 => integer!(UInt8Type),
        Kind::U16 => integer!(UInt16Type),
        Kind::U32 => integer!(UInt32Type),
        Kind::U64 => integer!(UInt64Type),
        Kind::F32 => {
            let v = array.as_primitive::<Float32Type>().value(i);
            let _ = write!(text, "{v:?}");
            Some(f64::from(v))
        }
        Kind::F64 => {
            let v = array.as_primitive::<Float64Type>().value(i);
            let _ = write!(text, "{v:?}");
            Some(v)
        }
        Kind::Bool => {
            let v = array.as_boolean().value(i);
            text.push_str(if v { "true" } else { "false" });
            Some(if v { 1.0 } else { 0.0 })
        }
        Kind::Utf8 => {
            text.push_str(array.as_string::<i32>().value(i));
            None
        }
        Kind::LargeUtf8 => {
            text.push_str(array.as_string::<i64>().value(i));
            None
        }
        Kind::Utf8View => {
            text.push_str(array.as_string_view().value(i));
            None
        }
        Kind::Decimal => {
            text.push_str(&array.as_primitive::<Decimal128Type>().value_as_string(i));
            None
        }
    }
}
