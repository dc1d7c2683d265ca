//! `probity demo --offline`: the demo scored in process, through the same CSV pipeline as `probity score`; and the
//! scored-rows file both variants write.

use std::path::Path;
use std::time::Instant;

use anyhow::Context;
use csv::StringRecord;
use probity_models::Model;

use super::{summary, DemoData, DemoModel, DemoRun, CAUTIONS};
use crate::cli::pipeline::{score_records, ColumnMap, Input};
use crate::cli::score::{push_scores, score_columns, Precision};

/// Scores the demo data with every model in process and prints the report.
pub fn run(args: &super::DemoArgs, data: &DemoData, models: &[DemoModel]) -> anyhow::Result<()> {
    let runs = models
        .iter()
        .map(|m| score_demo(&m.model, data))
        .collect::<anyhow::Result<Vec<_>>>()?;
    let models: Vec<&Model> = models.iter().map(|m| &m.model).collect();
    print!("{}", summary::report(data, &models, &runs));
    if let Some(path) = &args.write_scored {
        write_scored(path, data, &models, &runs)?;
        println!("scored transactions written to {}", path.display());
    }
    println!("\n{CAUTIONS}");
    Ok(())
}

/// Scores the demo CSV with `model`, shifting its base rate to the data's live one.
pub fn score_demo(model: &Model, data: &DemoData) -> anyhow::Result<DemoRun> {
    let spec = data.spec();
    let start = Instant::now();
    // A copy of the demo's CSV text: an input owns what it reads.
    let mut reader = Input::csv_bytes(data.csv.clone());
    let header = reader.header()?;
    let columns = ColumnMap::new(model.schema(), &header, None, false)
        .with_context(|| format!("model {} does not fit the demo data", model.name()))?;
    let n = data.transactions.len();
    let (mut probabilities, mut log_odds) = (Vec::with_capacity(n), Vec::with_capacity(n));
    let mut fields = Vec::with_capacity(n);
    let mut buf = String::new();
    score_records(model, &columns, &spec, &mut reader, None, |_, s, _| {
        probabilities.push(s.probability);
        log_odds.push(s.adjusted_log_odds);
        let mut record = StringRecord::new();
        push_scores(&mut record, s, &spec, Precision::Full, &mut buf);
        fields.push(record);
        Ok(())
    })
    .with_context(|| format!("scoring with model {}", model.name()))?;
    let seconds = start.elapsed().as_secs_f64();
    Ok(DemoRun {
        spec,
        fields,
        probabilities,
        log_odds,
        seconds: Some(seconds),
    })
}

/// Writes id, label and each model's score columns, prefixed with the model's name.
pub fn write_scored(
    path: &Path,
    data: &DemoData,
    models: &[&Model],
    runs: &[DemoRun],
) -> anyhow::Result<()> {
    let write = || -> anyhow::Result<()> {
        let mut w = csv::Writer::from_path(path)?;
        let mut header = StringRecord::from(vec!["id", "label"]);
        for (model, run) in models.iter().zip(runs) {
            for col in score_columns(model, &run.spec) {
                header.push_field(&format!("{}.{col}", model.name()));
            }
        }
        w.write_record(&header)?;
        for (i, t) in data.transactions.iter().enumerate() {
            let mut record = StringRecord::from(vec![t.id(), u8::from(t.fraud).to_string()]);
            for run in runs {
                if let Some(fields) = run.fields.get(i) {
                    record.extend(fields.iter());
                }
            }
            w.write_record(&record)?;
        }
        w.flush()?;
        Ok(())
    };
    write().with_context(|| format!("cannot write {}", path.display()))
}
