//! Parquet copies of CSV fixtures for the tests, written with the parquet crate's Arrow writer (snappy pages, 64 rows
//! to a row group, so a file has several).

#![allow(clippy::unwrap_used, clippy::expect_used, dead_code)]

use std::path::Path;
use std::sync::Arc;

use arrow_array::types::{Int32Type, Int64Type};
use arrow_array::{
    ArrayRef, BooleanArray, DictionaryArray, Float32Array, Float64Array, Int64Array, ListArray,
    RecordBatch, StringArray,
};
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::properties::WriterProperties;

/// How a CSV column is typed in the Parquet copy.
#[derive(Clone, Copy)]
pub enum As {
    Int,
    Float,
    Dictionary,
    Bool,
    /// A list of the cell's number (a type probity does not read).
    List,
    /// A string column holding the cell's text.
    Text,
    /// Float32: the cell's number rounded to the nearest binary32 value.
    Float32,
    /// Float64 holding that binary32 value widened.
    Float32Widened,
}

/// The CSV file at `csv` as a Parquet file at `out`: each column typed by `kind_of(name)`; an empty cell is a null.
/// Rows of 64 to a row group, so a file has several.
pub fn to_parquet(csv: &Path, out: &Path, kind_of: impl Fn(&str) -> As) {
    to_parquet_grouped(csv, out, kind_of, 64);
}

/// [`to_parquet`] with `group_rows` rows to a row group.
pub fn to_parquet_grouped(csv: &Path, out: &Path, kind_of: impl Fn(&str) -> As, group_rows: usize) {
    let mut reader = csv::Reader::from_path(csv).unwrap();
    let header = reader.headers().unwrap().clone();
    let records: Vec<csv::StringRecord> = reader.records().map(Result::unwrap).collect();
    let mut fields = Vec::new();
    for (c, name) in header.iter().enumerate() {
        let cells = records.iter().map(|r| {
            let t = r.get(c).unwrap();
            (!t.is_empty()).then_some(t)
        });
        let array: ArrayRef = match kind_of(name) {
            As::Int => Arc::new(
                cells
                    .map(|t| t.map(|t| t.parse::<i64>().unwrap()))
                    .collect::<Int64Array>(),
            ),
            As::Float => Arc::new(
                cells
                    .map(|t| t.map(|t| t.parse::<f64>().unwrap()))
                    .collect::<Float64Array>(),
            ),
            As::Dictionary => Arc::new(cells.collect::<DictionaryArray<Int32Type>>()),
            As::Bool => Arc::new(cells.map(|t| t.map(|t| t == "1")).collect::<BooleanArray>()),
            As::Text => Arc::new(cells.collect::<StringArray>()),
            As::Float32 => Arc::new(
                cells
                    .map(|t| t.map(|t| t.parse::<f32>().unwrap()))
                    .collect::<Float32Array>(),
            ),
            As::Float32Widened => Arc::new(
                cells
                    .map(|t| t.map(|t| f64::from(t.parse::<f32>().unwrap())))
                    .collect::<Float64Array>(),
            ),
            As::List => Arc::new(ListArray::from_iter_primitive::<Int64Type, _, _>(
                cells.map(|t| t.map(|t| vec![Some(t.parse::<f64>().unwrap() as i64)])),
            )),
        };
        fields.push((name.to_string(), array));
    }
    let batch = RecordBatch::try_from_iter(fields).unwrap();
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .set_max_row_group_row_count(Some(group_rows))
        .build();
    let mut writer = ArrowWriter::try_new(
        std::fs::File::create(out).unwrap(),
        batch.schema(),
        Some(props),
    )
    .unwrap();
    writer.write(&batch).unwrap();
    writer.close().unwrap();
}
