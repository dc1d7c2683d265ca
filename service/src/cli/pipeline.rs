//! The CSV scoring pipeline shared by `probity score`, `probity explain` and `probity demo`.
//!
//! A header is mapped once to the model's features ([`ColumnMap`]); records are then read into blocks of
//! [`BLOCK_ROWS`] rows, each cell encoded with [`Schema::encode_text`], the block's margins computed in one call to
//! [`Model::margins`], and each row finished with [`Model::finish`] and handed to a sink with its record. The batch
//! path gives the same bits as [`Model::score`] on each row alone.

use std::io::Read;

use anyhow::{anyhow, bail, Context};
use csv::StringRecord;
use probity_models::{CellError, EvalError, Model, OutputSpec, Schema, Scored};

/// Rows evaluated together: large enough to amortise the call, small enough to stay in cache.
pub const BLOCK_ROWS: usize = 1024;

/// Where each of a model's features is found in a CSV record.
#[derive(Debug, Clone)]
pub struct ColumnMap {
    /// For each feature in schema order, its column, or `None` when the file lacks it (read as missing).
    features: Vec<Option<usize>>,
    /// The feature names, for error messages.
    names: Vec<String>,
    /// The id column, if any.
    pub id: Option<usize>,
}

impl ColumnMap {
    /// Maps `header` to the features of `schema`. A feature without a column is an error naming it, unless
    /// `allow_missing` (then it is missing on every row). Columns that are not features are ignored. The id column
    /// is `id_column` when given (an error if absent) and otherwise a column called `id`, if there is one.
    pub fn new(
        schema: &Schema,
        header: &StringRecord,
        id_column: Option<&str>,
        allow_missing: bool,
    ) -> anyhow::Result<Self> {
        let mut features = vec![None; schema.len()];
        for (col, name) in header.iter().enumerate() {
            if let Some(f) = schema.index_of(name) {
                if features[f].is_some() {
                    bail!("column `{name}` appears more than once in the header");
                }
                features[f] = Some(col);
            }
        }
        let names: Vec<String> = schema.features().iter().map(|f| f.name.clone()).collect();
        if !allow_missing {
            let absent: Vec<&str> = names
                .iter()
                .zip(&features)
                .filter(|(_, c)| c.is_none())
                .map(|(n, _)| n.as_str())
                .collect();
            if !absent.is_empty() {
                bail!(
                    "the input has no column for feature{} `{}` (use --allow-missing-columns to read {} as missing)",
                    if absent.len() > 1 { "s" } else { "" },
                    absent.join("`, `"),
                    if absent.len() > 1 { "them" } else { "it" },
                );
            }
        }
        let position = |name: &str| header.iter().position(|h| h == name);
        let id = match id_column {
            Some(name) => {
                Some(position(name).ok_or_else(|| anyhow!("the input has no id column `{name}`"))?)
            }
            None => position("id"),
        };
        Ok(Self {
            features,
            names,
            id,
        })
    }

    /// Features the file has no column for.
    pub fn absent_features(&self) -> impl Iterator<Item = &str> {
        self.names
            .iter()
            .zip(&self.features)
            .filter(|(_, c)| c.is_none())
            .map(|(n, _)| n.as_str())
    }

    /// Encodes `record` into `row` (one value per feature). `number` is the 1-based data row, for errors.
    fn encode(
        &self,
        schema: &Schema,
        record: &StringRecord,
        number: u64,
        row: &mut [f64],
    ) -> anyhow::Result<()> {
        for (f, (slot, col)) in row.iter_mut().zip(&self.features).enumerate() {
            *slot = match col {
                None => f64::NAN,
                Some(c) => {
                    let text = record.get(*c).unwrap_or("");
                    schema.encode_text(f, text).map_err(|e| {
                        let why = match e {
                            CellError::NotANumber { text, .. } => {
                                format!("`{text}` is not a number")
                            }
                            other => other.to_string(),
                        };
                        anyhow!(
                            "{}, column `{}`: {why}",
                            where_(number, record),
                            self.names[f]
                        )
                    })?
                }
            };
        }
        Ok(())
    }
}

/// `row N (line L)` for a 1-based data row and its record.
fn where_(number: u64, record: &StringRecord) -> String {
    match record.position() {
        Some(p) => format!("row {number} (line {})", p.line()),
        None => format!("row {number}"),
    }
}

/// Scores every remaining record of `reader` and calls `sink` with each record and its result, in file order.
/// Returns the number of rows scored. Errors name the data row (1-based), its line and, for a bad cell, the column.
pub fn score_records<R: Read>(
    model: &Model,
    columns: &ColumnMap,
    spec: &OutputSpec,
    reader: &mut csv::Reader<R>,
    mut sink: impl FnMut(&StringRecord, &Scored) -> anyhow::Result<()>,
) -> anyhow::Result<u64> {
    score_rows(model, columns, spec, reader, |record, _, scored| {
        sink(record, scored)
    })
}

/// [`score_records`], also handing the sink each row as the model scored it (its dense values).
pub fn score_rows<R: Read>(
    model: &Model,
    columns: &ColumnMap,
    spec: &OutputSpec,
    reader: &mut csv::Reader<R>,
    mut sink: impl FnMut(&StringRecord, &[f64], &Scored) -> anyhow::Result<()>,
) -> anyhow::Result<u64> {
    let schema = model.schema();
    let n = schema.len();
    let mut records = vec![StringRecord::new(); BLOCK_ROWS];
    let mut rows = vec![0.0; BLOCK_ROWS * n];
    let mut margins = vec![0.0; BLOCK_ROWS];
    let mut done: u64 = 0;
    loop {
        let mut filled = 0;
        while filled < BLOCK_ROWS {
            let number = done + filled as u64 + 1;
            let more = reader
                .read_record(&mut records[filled])
                .with_context(|| format!("cannot read data row {number}"))?;
            if !more {
                break;
            }
            columns.encode(
                schema,
                &records[filled],
                number,
                &mut rows[filled * n..(filled + 1) * n],
            )?;
            filled += 1;
        }
        if filled == 0 {
            return Ok(done);
        }
        model
            .margins(&rows[..filled * n], &mut margins[..filled])
            .map_err(|e| match e {
                EvalError::InRow { row, error } => {
                    anyhow!("{}: {error}", where_(done + row as u64 + 1, &records[row]))
                }
                other => anyhow!(other),
            })?;
        for (k, (record, &margin)) in records.iter().zip(&margins[..filled]).enumerate() {
            sink(
                record,
                &rows[k * n..(k + 1) * n],
                &model.finish(margin, spec),
            )?;
        }
        done += filled as u64;
        if filled < BLOCK_ROWS {
            return Ok(done);
        }
    }
}

/// A CSV reader with the settings every command uses: a header row, header names trimmed.
pub fn csv_reader<R: Read>(input: R) -> csv::Reader<R> {
    csv::ReaderBuilder::new()
        .trim(csv::Trim::Headers)
        .from_reader(input)
}
