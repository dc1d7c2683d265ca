//! `probity score --server URL --route NAME`: the same CSV in, the same CSV out as offline scoring, with the rows
//! scored by a running server. The route's model schema is fetched once (`ModelFacts`), every cell is read here
//! by the same rule as offline ([`ColumnMap::encode`]), so a bad cell stops the run (or goes to the rejects file with
//! `--on-error skip`) naming its row and column before anything is sent for it; rows go to the server in batches
//! as dense vectors, with the id column's value as the prediction id (so outcomes can be sent for it later).

use std::io::{BufWriter, Write};
use std::time::Instant;

use anyhow::{anyhow, bail, Context};
use csv::StringRecord;
use probity::client::{status_text, ConnectArgs};
use probity::serve::proto as pb;
use probity_models::{Feature, FeatureKind, Schema};

use super::{refuse_same_file, OnError, ScoreArgs, Staged};
use crate::cli::pipeline::{ColumnMap, Input, Row, RowNotes, RunNotes};

/// One row read and encoded, waiting for its batch.
struct Pending {
    number: u64,
    record: Row,
    values: Vec<f64>,
    notes: RowNotes,
}

fn connect_args(args: &ScoreArgs, server: &str) -> ConnectArgs {
    ConnectArgs {
        server: server.to_string(),
        ca_file: args.ca_file.clone(),
        client_cert: args.client_cert.clone(),
        client_key: args.client_key.clone(),
        token_file: args.token_file.clone(),
        tls_server_name: args.tls_server_name.clone(),
    }
}

/// The route's model schema, from the server.
async fn schema_of(connection: probity::client::Connection, route: &str) -> anyhow::Result<Schema> {
    let mut models = pb::models_client::ModelsClient::new(connection);
    let described = models
        .model_facts(pb::ModelFactsRequest {
            target: Some(pb::model_facts_request::Target::Route(route.to_string())),
        })
        .await
        .map_err(|s| anyhow!("cannot describe route `{route}`: {}", status_text(&s)))?
        .into_inner();
    let mut features = described.features;
    features.sort_by_key(|f| f.index);
    let features = features
        .into_iter()
        .map(|f| Feature {
            name: f.name,
            kind: if f.r#type == pb::FeatureType::Categorical as i32 {
                FeatureKind::Categorical {
                    categories: f.categories,
                }
            } else {
                FeatureKind::Numeric
            },
        })
        .collect();
    Schema::new(features).with_context(|| format!("the server's schema of route `{route}`"))
}

/// Runs `probity score` against a server.
pub(super) fn run(args: &ScoreArgs) -> anyhow::Result<()> {
    let (Some(server), Some(route)) = (&args.server, &args.route) else {
        bail!("give --model, or --server with --route");
    };
    if args.batch_size == 0 {
        bail!("--batch-size must be at least 1");
    }
    if args.rejects.is_some() && args.on_error != OnError::Skip {
        bail!("--rejects is written only with --on-error skip");
    }
    let rejects_path = (args.on_error == OnError::Skip).then(|| {
        args.rejects
            .clone()
            .unwrap_or_else(|| args.output.with_extension("rejects.csv"))
    });
    refuse_same_file(&args.input, "--input", &args.output, "--output")?;
    if let Some(r) = &rejects_path {
        refuse_same_file(&args.input, "--input", r, "--rejects")?;
    }
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .context("starting the async runtime")?;
    let output = Staged::beside(&args.output)?;
    let rejects = rejects_path.as_deref().map(Staged::beside).transpose()?;
    let start = Instant::now();
    let result = rt.block_on(score_remote(
        args,
        connect_args(args, server),
        route,
        BufWriter::new(output.file()),
        rejects.as_ref().map(|r| BufWriter::new(r.file())),
    ));
    let (rows, rejected, notes, names) =
        result.with_context(|| format!("cannot score {}", args.input.display()))?;
    output.commit()?;
    if let Some(r) = rejects {
        r.commit()?;
    }
    if !args.quiet {
        let seconds = start.elapsed().as_secs_f64();
        eprintln!(
            "scored {rows} rows through {server} route {route} in {seconds:.2} s ({:.0} rows/s) to {}",
            rows as f64 / seconds.max(1e-9),
            args.output.display()
        );
        let summary = notes.summary(&names);
        if !summary.is_empty() {
            eprintln!("noticed while reading (same rule as the gRPC warnings):");
            for line in summary {
                eprintln!("  {line}");
            }
        }
        if let Some(path) = &rejects_path {
            eprintln!(
                "left out {rejected} rows that could not be scored: listed in {}",
                path.display()
            );
        }
    }
    Ok(())
}

type Done = (u64, u64, RunNotes, Vec<String>);

async fn score_remote<W: Write>(
    args: &ScoreArgs,
    connect: ConnectArgs,
    route: &str,
    output: W,
    rejects: Option<W>,
) -> anyhow::Result<Done> {
    let connection = connect.connect().await?;
    let schema = schema_of(connection.clone(), route).await?;
    let mut scoring = pb::scoring_client::ScoringClient::new(connection);
    let mut reader = Input::open(
        &args.input,
        args.delimiter,
        &indicatif::ProgressBar::hidden(),
    )?;
    let (header, columns) = super::super::pipeline::map_header(
        &mut reader,
        &schema,
        args.id_column.as_deref(),
        args.allow_missing_columns,
        args.quiet,
    )?;
    reader.select((!args.keep_columns).then(|| columns.used()).as_deref())?;
    let mut writer = csv::Writer::from_writer(output);
    let mut rejects = rejects.map(csv::Writer::from_writer);
    if let Some(r) = rejects.as_mut() {
        r.write_record(["row", "line", "reason"])
            .context("cannot write the rejects file")?;
    }
    let mut header_written = false;
    let mut run_notes = RunNotes::default();
    let (mut scored, mut rejected, mut read) = (0u64, 0u64, 0u64);
    let mut batch: Vec<Pending> = Vec::with_capacity(args.batch_size);
    let mut buf = String::new();
    let mut line = StringRecord::new();
    let n = schema.len();
    let mut exhausted = false;
    while !exhausted {
        // Fill a batch.
        while batch.len() < args.batch_size {
            let mut record = Row::default();
            let number = read + 1;
            let more = reader
                .read(&mut record)
                .with_context(|| format!("cannot read data row {number}"))?;
            if !more {
                exhausted = true;
                break;
            }
            read += 1;
            let mut values = vec![0.0; n];
            let mut notes = RowNotes::default();
            match columns.encode(&schema, &record, number, &mut values, &mut notes) {
                Ok(()) => batch.push(Pending {
                    number,
                    record,
                    values,
                    notes,
                }),
                Err(bad) => match rejects.as_mut() {
                    None => return Err(anyhow!("{}, {}", bad.place, bad.reason)),
                    Some(r) => {
                        rejected += 1;
                        let line = record
                            .record
                            .position()
                            .map(|p| p.line().to_string())
                            .unwrap_or_default();
                        r.write_record([number.to_string(), line, bad.reason])
                            .context("cannot write the rejects file")?;
                    }
                },
            }
        }
        if batch.is_empty() {
            continue;
        }
        let rows = batch
            .iter()
            .map(|p| pb::Row {
                prediction_id: columns
                    .id
                    .and_then(|c| p.record.record.get(c))
                    .unwrap_or("")
                    .to_string(),
                features: Some(pb::row::Features::Dense(pb::DenseFeatures {
                    values: p.values.clone(),
                })),
                ..Default::default()
            })
            .collect();
        let answer = scoring
            .score_batch(pb::ScoreBatchRequest {
                explain: 0,
                route: route.to_string(),
                rows,
            })
            .await
            .map_err(|s| {
                anyhow!(
                    "the server refused the batch of rows {} to {}: {}",
                    batch[0].number,
                    batch[batch.len() - 1].number,
                    status_text(&s)
                )
            })?
            .into_inner();
        if answer.results.len() != batch.len() {
            bail!(
                "the server answered {} results for {} rows",
                answer.results.len(),
                batch.len()
            );
        }
        if !header_written {
            let first = &answer.results[0];
            write_header(&mut writer, args, &header, &columns, first)?;
            header_written = true;
        }
        for (p, r) in batch.iter().zip(&answer.results) {
            run_notes.add(&p.notes);
            line.clear();
            if args.keep_columns {
                line.extend(p.record.record.iter());
            } else if let Some(id) = columns.id {
                line.push_field(p.record.record.get(id).unwrap_or(""));
            }
            let precision = super::Precision::of(args);
            for v in [
                r.margin,
                r.log_odds,
                r.calibrated_log_odds,
                r.adjusted_log_odds,
                r.probability,
            ] {
                precision.push(&mut line, v, &mut buf);
            }
            if let Some(points) = r.score {
                precision.push_points(&mut line, points, &mut buf);
            }
            if let Some(d) = &r.decision {
                line.push_field(d);
            }
            if args.warnings_column {
                line.push_field(&p.notes.describe(columns.names()));
            }
            writer
                .write_record(&line)
                .context("cannot write the output")?;
        }
        scored += batch.len() as u64;
        batch.clear();
    }
    if !header_written {
        let empty = pb::ScoreResponse::default();
        write_header(&mut writer, args, &header, &columns, &empty)?;
    }
    writer.flush().context("cannot write the output")?;
    if let Some(r) = rejects.as_mut() {
        r.flush().context("cannot write the rejects file")?;
    }
    let names = columns.names().to_vec();
    Ok((scored, rejected, run_notes, names))
}

/// The offline header: kept columns or the id, the score columns (with `score` and `decision` when the route gives
/// them), and `warnings` when asked.
fn write_header<W: Write>(
    writer: &mut csv::Writer<W>,
    args: &ScoreArgs,
    header: &StringRecord,
    columns: &ColumnMap,
    first: &pb::ScoreResponse,
) -> anyhow::Result<()> {
    let mut scores = vec![
        "margin",
        "log_odds",
        "calibrated_log_odds",
        "adjusted_log_odds",
        "probability",
    ];
    if first.score.is_some() {
        scores.push("score");
    }
    if first.decision.is_some() {
        scores.push("decision");
    }
    let mut out = StringRecord::new();
    if args.keep_columns {
        if let Some(clash) = header.iter().find(|h| scores.contains(h)) {
            bail!("input column `{clash}` has the name of an output column; rename it or drop --keep-columns");
        }
        out.extend(header.iter());
    } else if let Some(id) = columns.id {
        out.push_field(&header[id]);
    }
    out.extend(scores.iter());
    if args.warnings_column {
        out.push_field("warnings");
    }
    writer
        .write_record(&out)
        .context("cannot write the output")?;
    Ok(())
}
