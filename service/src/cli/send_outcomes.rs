//! `probity send-outcomes`: outcomes from a CSV file to a running server, in batches through `RecordOutcomes`.
//!
//! The whole file is read and checked before anything is sent: a bad row (an empty prediction id, a label that is
//! not 0/1/true/false, a time that is neither RFC 3339 nor milliseconds since the Unix epoch) stops the run with
//! every bad row named by row, line and column, and nothing is recorded. The summary counts the server's answers:
//! matched, duplicate, corrected, pending, and refused outcomes with the server's reason.

use std::collections::BTreeMap;
use std::fs::File;
use std::path::PathBuf;

use anyhow::{anyhow, bail, Context};
use probity::client::{status_text, ConnectArgs};
use probity::serve::proto as pb;

use super::pipeline::csv_reader;

/// Bad rows listed before the rest are only counted.
const SHOWN_BAD_ROWS: usize = 20;

/// Arguments of `probity send-outcomes`.
#[derive(Debug, clap::Args)]
pub struct SendOutcomesArgs {
    /// The server and the credentials of a caller allowed to record outcomes.
    #[command(flatten)]
    pub connect: ConnectArgs,
    /// CSV file with a prediction id and a label per row, and optionally when the outcome happened.
    #[arg(long)]
    pub input: PathBuf,
    /// The column holding the prediction id.
    #[arg(long, default_value = "prediction_id")]
    pub id_column: String,
    /// The column holding the label: 1 or true for the positive class, 0 or false otherwise.
    #[arg(long, default_value = "label")]
    pub label_column: String,
    /// The column holding when the outcome happened (RFC 3339 or milliseconds since the Unix epoch); read when the
    /// file has it, and an empty cell means when the server receives it.
    #[arg(long, default_value = "outcome_time")]
    pub time_column: String,
    /// Outcomes per call.
    #[arg(long, default_value_t = 500, value_name = "N")]
    pub batch_size: usize,
}

/// One checked row: its 1-based data row and the outcome.
struct Row {
    number: u64,
    outcome: pb::Outcome,
}

fn read_rows(args: &SendOutcomesArgs) -> anyhow::Result<Vec<Row>> {
    let file =
        File::open(&args.input).with_context(|| format!("cannot open {}", args.input.display()))?;
    let mut reader = csv_reader(file);
    let header = reader
        .headers()
        .with_context(|| format!("cannot read the header row of {}", args.input.display()))?
        .clone();
    let column = |name: &str| header.iter().position(|c| c == name);
    let id_col = column(&args.id_column).ok_or_else(|| {
        anyhow!(
            "{} has no prediction id column `{}` (--id-column)",
            args.input.display(),
            args.id_column
        )
    })?;
    let label_col = column(&args.label_column).ok_or_else(|| {
        anyhow!(
            "{} has no label column `{}` (--label-column)",
            args.input.display(),
            args.label_column
        )
    })?;
    let time_col = column(&args.time_column);
    let mut rows = Vec::new();
    let mut bad = Vec::new();
    let mut bad_count = 0usize;
    for (i, record) in reader.records().enumerate() {
        let number = i as u64 + 1;
        let record = record.with_context(|| format!("cannot read data row {number}"))?;
        let place = match record.position() {
            Some(p) => format!("row {number} (line {})", p.line()),
            None => format!("row {number}"),
        };
        let mut problems = Vec::new();
        let id = record.get(id_col).unwrap_or("").trim();
        if id.is_empty() {
            problems.push(format!(
                "column `{}`: the prediction id is empty",
                args.id_column
            ));
        }
        let text = record.get(label_col).unwrap_or("").trim();
        let label = match text.to_ascii_lowercase().as_str() {
            "1" | "true" => Some(true),
            "0" | "false" => Some(false),
            _ => {
                problems.push(format!(
                    "column `{}`: label `{text}` is not 0, 1, true or false",
                    args.label_column
                ));
                None
            }
        };
        let time = match time_col.map(|c| record.get(c).unwrap_or("").trim()) {
            None | Some("") => Some(0),
            Some(t) => match super::when::instant(t) {
                Ok(ms) => Some(ms),
                Err(e) => {
                    problems.push(format!("column `{}`: {e}", args.time_column));
                    None
                }
            },
        };
        match (problems.is_empty(), label, time) {
            (true, Some(label), Some(outcome_time_unix_ms)) => rows.push(Row {
                number,
                outcome: pb::Outcome {
                    prediction_id: id.to_string(),
                    label,
                    outcome_time_unix_ms,
                },
            }),
            _ => {
                bad_count += 1;
                if bad.len() < SHOWN_BAD_ROWS {
                    bad.push(format!("{place}, {}", problems.join("; ")));
                }
            }
        }
    }
    if bad_count > 0 {
        let more = if bad_count > bad.len() {
            format!("\n  ... and {} more", bad_count - bad.len())
        } else {
            String::new()
        };
        bail!(
            "{} has {bad_count} bad row{}; nothing was sent:\n  {}{more}",
            args.input.display(),
            if bad_count == 1 { "" } else { "s" },
            bad.join("\n  ")
        );
    }
    if rows.is_empty() {
        bail!("{} has no data rows", args.input.display());
    }
    Ok(rows)
}

/// Runs `probity send-outcomes`.
pub fn run(args: &SendOutcomesArgs) -> anyhow::Result<()> {
    if args.batch_size == 0 {
        bail!("--batch-size must be at least 1");
    }
    let rows = read_rows(args)?;
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    let mut counts: BTreeMap<&'static str, u64> = BTreeMap::new();
    let mut refused = Vec::new();
    let mut sent = 0usize;
    let result: anyhow::Result<()> = rt.block_on(async {
        let mut client = pb::outcomes_client::OutcomesClient::new(args.connect.connect().await?);
        for chunk in rows.chunks(args.batch_size) {
            let answer = client
                .record_outcomes(pb::RecordOutcomesRequest {
                    outcomes: chunk.iter().map(|r| r.outcome.clone()).collect(),
                })
                .await
                .map_err(|s| {
                    anyhow!(
                        "the server refused the batch starting at data row {}: {}",
                        chunk[0].number,
                        status_text(&s)
                    )
                })?
                .into_inner();
            for r in answer.results {
                let name = match pb::OutcomeStatus::try_from(r.status) {
                    Ok(pb::OutcomeStatus::Matched) => "matched",
                    Ok(pb::OutcomeStatus::Duplicate) => "duplicate",
                    Ok(pb::OutcomeStatus::Corrected) => "corrected",
                    Ok(pb::OutcomeStatus::Pending) => "pending",
                    Ok(pb::OutcomeStatus::Invalid) => {
                        let number = usize::try_from(r.index)
                            .ok()
                            .and_then(|i| chunk.get(i))
                            .map_or(0, |row| row.number);
                        refused.push(format!(
                            "row {number}, prediction id `{}`: {}",
                            r.prediction_id, r.message
                        ));
                        "refused"
                    }
                    _ => "unknown",
                };
                *counts.entry(name).or_default() += 1;
            }
            sent += chunk.len();
        }
        Ok(())
    });
    let summary = |sent: usize| {
        let parts: Vec<String> = [
            "matched",
            "duplicate",
            "corrected",
            "pending",
            "refused",
            "unknown",
        ]
        .iter()
        .filter_map(|k| counts.get(k).map(|n| format!("{k} {n}")))
        .collect();
        format!(
            "sent {sent} of {} outcomes: {}\n",
            rows.len(),
            if parts.is_empty() {
                "no answers".to_string()
            } else {
                parts.join(", ")
            }
        )
    };
    let mut text = summary(sent);
    for line in &refused {
        text.push_str(&format!("refused: {line}\n"));
    }
    super::emit(&text)?;
    result?;
    if !refused.is_empty() {
        bail!(
            "the server refused {} outcome(s), listed above",
            refused.len()
        );
    }
    Ok(())
}
