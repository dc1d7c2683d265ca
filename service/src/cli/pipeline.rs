//! The scoring pipeline shared by `probity score`, `explain`, `evaluate`, `calibrate` and `demo`.
//!
//! An input file is opened in one place, [`Input::open`]: a Parquet file (found by its first four bytes, `PAR1`,
//! not by its name; [`parquet`]) or a CSV file, gzip-compressed or not, with any one-character separator. Either
//! gives [`Row`]s: a text record plus, for Parquet's numeric columns, the numbers themselves.
//!
//! A header is mapped once to the model's features ([`ColumnMap`]); records are then read into blocks of
//! [`BLOCK_ROWS`] rows, each cell encoded with [`Schema::encode_text`], the block's margins computed in one call to
//! [`Model::margins`], and each row finished with [`Model::finish`] and handed to a sink with its record. The batch
//! path gives the same bits as [`Model::score`] on each row alone.

use std::fs::File;
use std::io::Read;
use std::path::Path;

use anyhow::{anyhow, bail, Context};
use csv::StringRecord;
use std::collections::BTreeMap;

use indicatif::ProgressBar;
use probity_models::{CellError, CellNote, EvalError, Model, OutputSpec, Schema, Scored};

pub mod parquet;

/// Rows evaluated together: large enough to amortise the call, small enough to stay in cache.
pub const BLOCK_ROWS: usize = 1024;

/// One row of the input: its cells as text (what a CSV file holds; the id, label and `--keep-columns` columns are
/// copied from here) and, by column, the number of a numeric Parquet cell, which a numeric feature reads as is.
#[derive(Debug, Clone, Default)]
pub struct Row {
    /// Every cell as text, in header order (a column a command does not use is empty in Parquet input).
    pub record: StringRecord,
    /// By column: `Some` for a non-null numeric Parquet cell; empty for CSV input.
    pub numbers: Vec<Option<f64>>,
}

/// An input file opened for reading rows: CSV (plain or gzip) or Parquet.
pub enum Input {
    /// A CSV file, decompressed when it is gzip.
    Csv(csv::Reader<Box<dyn Read>>),
    /// A Parquet file.
    Parquet(Box<parquet::ParquetRows>),
}

impl Input {
    /// Opens `path`: Parquet when the file starts with `PAR1`, otherwise CSV separated by `delimiter` (gzip
    /// when it starts with `1f 8b`). `progress` follows the bytes read (CSV) or the row groups done (Parquet).
    pub fn open(path: &Path, delimiter: u8, progress: &ProgressBar) -> anyhow::Result<Input> {
        let mut file =
            File::open(path).with_context(|| format!("cannot open {}", path.display()))?;
        let mut start = [0u8; 4];
        let mut got = 0;
        while got < start.len() {
            match file.read(&mut start[got..]) {
                Ok(0) => break,
                Ok(n) => got += n,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(e) => return Err(e).with_context(|| format!("cannot read {}", path.display())),
            }
        }
        if &start[..got] == parquet::MAGIC {
            let rows = parquet::ParquetRows::open(file, progress.clone())
                .with_context(|| format!("cannot read {} as Parquet", path.display()))?;
            return Ok(Input::Parquet(Box::new(rows)));
        }
        let raw = std::io::Cursor::new(start[..got].to_vec()).chain(progress.wrap_read(file));
        progress.inc(got as u64);
        let read = decompressed(raw).with_context(|| format!("cannot read {}", path.display()))?;
        Ok(Input::Csv(csv_reader_with(read, delimiter)))
    }

    /// Comma-separated CSV text held in memory.
    pub fn csv_bytes(bytes: Vec<u8>) -> Input {
        Input::Csv(csv_reader(Box::new(std::io::Cursor::new(bytes))))
    }

    /// The header: the CSV file's first row, or the Parquet file's column names.
    pub fn header(&mut self) -> anyhow::Result<StringRecord> {
        match self {
            Input::Csv(reader) => Ok(reader
                .headers()
                .context("cannot read the header row")?
                .clone()),
            Input::Parquet(rows) => Ok(rows.header()),
        }
    }

    /// Says which columns (header indices) the command uses; Parquet input reads only those and refuses a used
    /// column of a type it cannot read. `None`: every column (`--keep-columns`).
    pub fn select(&mut self, columns: Option<&[usize]>) -> anyhow::Result<()> {
        match self {
            Input::Csv(_) => Ok(()),
            Input::Parquet(rows) => match columns {
                Some(c) => rows.select(c),
                None => {
                    let all: Vec<usize> = (0..rows.header().len()).collect();
                    rows.select(&all)
                }
            },
        }
    }

    /// Reads the next row into `row`; `false` at the end.
    pub fn read(&mut self, row: &mut Row) -> anyhow::Result<bool> {
        match self {
            Input::Csv(reader) => {
                row.numbers.clear();
                Ok(reader.read_record(&mut row.record)?)
            }
            Input::Parquet(rows) => rows.read(row),
        }
    }
}

/// Reads a label cell: `0` or `1` (also `true`/`false`, as a Parquet boolean column reads), surrounding spaces
/// ignored.
pub fn read_label(text: &str) -> Option<bool> {
    match text.trim() {
        "0" | "false" => Some(false),
        "1" | "true" => Some(true),
        _ => None,
    }
}

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
        if header.iter().all(str::is_empty) {
            bail!(
                "the input is empty: a CSV file with a header row naming its columns is expected"
            );
        }
        if header.len() == 1 && features.iter().all(Option::is_none) {
            if let Some(d) = [';', '\t', '|']
                .into_iter()
                .find(|d| header[0].contains(*d))
            {
                bail!(
                    "the header is one column `{}`: the file looks separated by {}; probity reads comma-separated \
                     files unless told otherwise (--delimiter)",
                    header[0].chars().take(80).collect::<String>(),
                    if d == '\t' { "tabs".to_string() } else { format!("`{d}`") }
                );
            }
        }
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

    /// Encodes `record` into `row` (one value per feature) under [`Schema::read_text`]'s rule, and lists in `notes`
    /// what was noticed (feature index and note; an absent column is a missing cell). `number` is the 1-based data
    /// row, for errors.
    pub fn encode(
        &self,
        schema: &Schema,
        input: &Row,
        number: u64,
        row: &mut [f64],
        notes: &mut RowNotes,
    ) -> Result<(), BadCell> {
        let record = &input.record;
        notes.cells.clear();
        for (f, (slot, col)) in row.iter_mut().zip(&self.features).enumerate() {
            let cell = match col {
                None => probity_models::Cell {
                    value: f64::NAN,
                    note: Some(CellNote::Missing),
                },
                Some(c) => {
                    if let Some(Some(x)) = input.numbers.get(*c) {
                        if !schema.features()[f].is_categorical() {
                            *slot = read_number(*x);
                            let note = if x.is_nan() {
                                Some(CellNote::Missing)
                            } else if x.is_infinite() {
                                Some(CellNote::NonFinite)
                            } else {
                                None
                            };
                            if let Some(note) = note {
                                notes.cells.push((f, note));
                            }
                            continue;
                        }
                    }
                    let text = record.get(*c).unwrap_or("");
                    schema.read_text(f, text).map_err(|e| {
                        let why = match e {
                            CellError::NotANumber { text, .. } => {
                                format!("`{text}` is not a number")
                            }
                            other => other.to_string(),
                        };
                        BadCell {
                            place: where_(number, record),
                            reason: format!("column `{}`: {why}", self.names[f]),
                        }
                    })?
                }
            };
            *slot = cell.value;
            if let Some(note) = cell.note {
                notes.cells.push((f, note));
            }
        }
        notes.every_feature_missing = !row.is_empty() && row.iter().all(|x| x.is_nan());
        Ok(())
    }

    /// The columns this map reads: every feature's and the id's.
    pub fn used(&self) -> Vec<usize> {
        self.features
            .iter()
            .flatten()
            .copied()
            .chain(self.id)
            .collect()
    }

    /// The feature names, in schema order.
    pub fn names(&self) -> &[String] {
        &self.names
    }
}

/// A numeric feature's value from a Parquet number, under the rule [`Schema::read_text`] applies to its text: NaN is
/// missing (as the text `NaN` is), an infinity is not finite (read as missing), any other number is itself, bit for
/// bit.
fn read_number(x: f64) -> f64 {
    if x.is_finite() {
        x
    } else {
        f64::NAN
    }
}

/// What reading one row noticed: (feature index, note) per cell, and whether no feature had a value.
#[derive(Debug, Clone, Default)]
pub struct RowNotes {
    /// Cells with a note, in feature order.
    pub cells: Vec<(usize, CellNote)>,
    /// Every feature was missing: the row scores as the model's all-missing path.
    pub every_feature_missing: bool,
}

impl RowNotes {
    /// `channel: unknown category; amount: not finite, read as missing`, for an output column; empty when nothing
    /// was noticed.
    pub fn describe(&self, names: &[String]) -> String {
        let mut parts: Vec<String> = self
            .cells
            .iter()
            .map(|&(f, note)| {
                format!(
                    "{}: {}",
                    names.get(f).map_or("?", String::as_str),
                    note_words(note)
                )
            })
            .collect();
        if self.every_feature_missing {
            parts.push("every feature missing".into());
        }
        parts.join("; ")
    }
}

fn note_words(note: CellNote) -> &'static str {
    match note {
        CellNote::Missing => "missing",
        CellNote::NonFinite => "not finite, read as missing",
        CellNote::UnknownCategory => "unknown category",
    }
}

/// Counts of what a run noticed, by kind and column, for the summary at its end.
#[derive(Debug, Clone, Default)]
pub struct RunNotes {
    by_cell: BTreeMap<(CellNote, usize), u64>,
    every_feature_missing: u64,
}

impl RunNotes {
    /// Adds one row's notes.
    pub fn add(&mut self, row: &RowNotes) {
        for &(f, note) in &row.cells {
            *self.by_cell.entry((note, f)).or_default() += 1;
        }
        self.every_feature_missing += u64::from(row.every_feature_missing);
    }

    /// One line per kind and column (`12 rows: column `channel`: unknown category`), rows with every feature
    /// missing last; no lines when nothing was noticed.
    pub fn summary(&self, names: &[String]) -> Vec<String> {
        let mut lines: Vec<String> = self
            .by_cell
            .iter()
            .map(|(&(note, f), n)| {
                format!(
                    "{n} row{}: column `{}`: {}",
                    if *n == 1 { "" } else { "s" },
                    names.get(f).map_or("?", String::as_str),
                    note_words(note)
                )
            })
            .collect();
        if self.every_feature_missing > 0 {
            lines.push(format!(
                "{} row{} with every feature missing (scored on the model's all-missing path)",
                self.every_feature_missing,
                if self.every_feature_missing == 1 {
                    ""
                } else {
                    "s"
                }
            ));
        }
        lines
    }
}

/// A cell that could not be read: where (`row N (line L)`) and why (naming the column).
#[derive(Debug)]
pub struct BadCell {
    /// `row N (line L)`.
    pub place: String,
    /// Why, naming the column.
    pub reason: String,
}

impl std::fmt::Display for BadCell {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}, {}", self.place, self.reason)
    }
}

impl std::error::Error for BadCell {}

/// `row N (line L)` for a 1-based data row and its record.
fn where_(number: u64, record: &StringRecord) -> String {
    match record.position() {
        Some(p) => format!("row {number} (line {})", p.line()),
        None => format!("row {number}"),
    }
}

/// Reads the header of `reader` and maps it to `schema`'s features ([`ColumnMap::new`]); unless `quiet`, says which
/// features have no column (read as missing on every row). The header and the map, for every command that reads
/// rows for a model.
pub fn map_header(
    reader: &mut Input,
    schema: &Schema,
    id_column: Option<&str>,
    allow_missing: bool,
    quiet: bool,
) -> anyhow::Result<(StringRecord, ColumnMap)> {
    let header = reader.header()?;
    let columns = ColumnMap::new(schema, &header, id_column, allow_missing)?;
    let absent: Vec<&str> = columns.absent_features().collect();
    if !absent.is_empty() && !quiet {
        eprintln!(
            "no column for `{}`: read as missing on every row",
            absent.join("`, `")
        );
    }
    Ok((header, columns))
}

/// A row that could not be scored: its 1-based data row number, its record and why.
pub struct Rejected<'a> {
    /// 1-based data row.
    pub number: u64,
    /// The record as read.
    pub record: &'a StringRecord,
    /// Why it was not scored (names the column for a bad cell).
    pub reason: String,
}

/// What to do with a row that cannot be scored: stop with its error (`None`), or hand it to this sink and go on.
pub type OnReject<'s> = Option<&'s mut dyn FnMut(Rejected<'_>) -> anyhow::Result<()>>;

/// Scores every remaining record of `reader` and calls `sink` with each record and its result, in file order.
/// Returns the number of rows scored. A row that cannot be scored stops the run with an error naming the data row
/// (1-based), its line and, for a bad cell, the column, unless `on_reject` takes it (then it is skipped).
pub fn score_records(
    model: &Model,
    columns: &ColumnMap,
    spec: &OutputSpec,
    reader: &mut Input,
    on_reject: OnReject<'_>,
    mut sink: impl FnMut(&StringRecord, &Scored, &RowNotes) -> anyhow::Result<()>,
) -> anyhow::Result<u64> {
    score_rows(
        model,
        columns,
        spec,
        reader,
        on_reject,
        |record, _, scored, notes| sink(record, scored, notes),
    )
}

/// [`score_records`], also handing the sink each row as the model scored it (its dense values).
pub fn score_rows(
    model: &Model,
    columns: &ColumnMap,
    spec: &OutputSpec,
    reader: &mut Input,
    mut on_reject: OnReject<'_>,
    mut sink: impl FnMut(&StringRecord, &[f64], &Scored, &RowNotes) -> anyhow::Result<()>,
) -> anyhow::Result<u64> {
    let schema = model.schema();
    let n = schema.len();
    let mut records = vec![Row::default(); BLOCK_ROWS];
    let mut notes = vec![RowNotes::default(); BLOCK_ROWS];
    let mut numbers = vec![0u64; BLOCK_ROWS];
    let mut rows = vec![0.0; BLOCK_ROWS * n];
    let mut margins = vec![0.0; BLOCK_ROWS];
    let mut read: u64 = 0;
    let mut scored: u64 = 0;
    loop {
        let mut filled = 0;
        let mut exhausted = false;
        while filled < BLOCK_ROWS {
            let number = read + 1;
            let more = reader
                .read(&mut records[filled])
                .with_context(|| format!("cannot read data row {number}"))?;
            if !more {
                exhausted = true;
                break;
            }
            read += 1;
            let encoded = columns.encode(
                schema,
                &records[filled],
                number,
                &mut rows[filled * n..(filled + 1) * n],
                &mut notes[filled],
            );
            match (encoded, on_reject.as_deref_mut()) {
                (Ok(()), _) => {
                    numbers[filled] = number;
                    filled += 1;
                }
                (Err(e), None) => return Err(e.into()),
                (Err(e), Some(reject)) => reject(Rejected {
                    number,
                    record: &records[filled].record,
                    reason: e.reason,
                })?,
            }
        }
        if filled > 0 {
            let block = model.margins(&rows[..filled * n], &mut margins[..filled]);
            match (block, on_reject.as_deref_mut()) {
                (Ok(()), _) => {
                    for (k, ((record, &margin), row_notes)) in records
                        .iter()
                        .zip(&margins[..filled])
                        .zip(&notes)
                        .enumerate()
                    {
                        sink(
                            &record.record,
                            &rows[k * n..(k + 1) * n],
                            &model.finish(margin, spec),
                            row_notes,
                        )?;
                    }
                    scored += filled as u64;
                }
                (Err(e), None) => {
                    return Err(match e {
                        EvalError::InRow { row, error } => {
                            anyhow!("{}: {error}", where_(numbers[row], &records[row].record))
                        }
                        other => anyhow!(other),
                    })
                }
                // Some row of the block failed: score each alone, so only the bad ones are skipped.
                (Err(_), Some(reject)) => {
                    for i in 0..filled {
                        let mut one = [0.0];
                        match model.margins(&rows[i * n..(i + 1) * n], &mut one) {
                            Ok(()) => {
                                sink(
                                    &records[i].record,
                                    &rows[i * n..(i + 1) * n],
                                    &model.finish(one[0], spec),
                                    &notes[i],
                                )?;
                                scored += 1;
                            }
                            Err(e) => reject(Rejected {
                                number: numbers[i],
                                record: &records[i].record,
                                reason: match e {
                                    EvalError::InRow { error, .. } => error.to_string(),
                                    other => other.to_string(),
                                },
                            })?,
                        }
                    }
                }
            }
        }
        if exhausted {
            return Ok(scored);
        }
    }
}

/// A CSV reader with the settings every command uses: a header row, header names trimmed.
pub fn csv_reader<R: Read>(input: R) -> csv::Reader<R> {
    csv_reader_with(input, b',')
}

/// [`csv_reader`] with another field separator (`--delimiter`).
pub fn csv_reader_with<R: Read>(input: R, delimiter: u8) -> csv::Reader<R> {
    csv::ReaderBuilder::new()
        .delimiter(delimiter)
        .trim(csv::Trim::Headers)
        .from_reader(input)
}

/// The bytes of an input file, decompressed when the file is gzip (found by its first two bytes, `1f 8b`, not by its
/// name); members of a multi-member gzip file are read one after another.
pub fn decompressed<R: Read + 'static>(raw: R) -> std::io::Result<Box<dyn Read>> {
    use std::io::BufRead as _;
    let mut buffered = std::io::BufReader::with_capacity(1 << 16, raw);
    let gzip = buffered.fill_buf()?.starts_with(&[0x1f, 0x8b]);
    Ok(if gzip {
        Box::new(flate2::bufread::MultiGzDecoder::new(buffered))
    } else {
        Box::new(buffered)
    })
}

/// Reads `--delimiter`: one ASCII character, or `tab` (also `\t`).
pub fn parse_delimiter(text: &str) -> Result<u8, String> {
    match text {
        "tab" | "\\t" | "\t" => Ok(b'\t'),
        _ if text.len() == 1 && text.is_ascii() && text != "\"" && text != "\n" && text != "\r" => {
            Ok(text.as_bytes()[0])
        }
        _ => Err(format!(
            "`{text}` is not a field separator: give one ASCII character such as `;` or `|`, or `tab`"
        )),
    }
}
