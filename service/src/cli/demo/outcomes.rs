//! The live demo's outcomes: the fraud labels the generator knows, sent back through the `Outcomes` service the way
//! a card issuer learns them, days or weeks after the transaction.
//!
//! The delays are simulated outcome times, not real waiting. Invented for the demo (no single source): a fraud
//! becomes known when the chargeback arrives, 2 days plus an exponential delay with a mean of
//! [`CHARGEBACK_MEAN_DAYS`] after the transaction; a genuine transaction is confirmed when its statement's dispute
//! window closes, 30 to 60 days after. The demo reports as of day [`AS_OF_DAYS`]: the few chargebacks dated later
//! are not sent, so their predictions stay immature in the report, as they would in a real store.
//!
//! Outcomes go in the order they happen: the first half in `RecordOutcomes` batch calls, the rest on one
//! `RecordOutcomeStream`.

use std::time::Duration;

use anyhow::{bail, Context};
use probity::serve::proto as pb;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::transport::Channel;

use super::DemoData;

/// The day after the traffic run at which the demo's report is taken.
pub const AS_OF_DAYS: f64 = 60.0;
/// Mean of the exponential part of a chargeback's delay, in days.
pub const CHARGEBACK_MEAN_DAYS: f64 = 20.0;
/// Outcomes per `RecordOutcomes` call.
const BATCH: usize = 500;
const DAY_MS: f64 = 86_400_000.0;

/// What sending the outcomes did.
#[derive(Debug, Default)]
pub struct Sent {
    /// Transactions with an outcome by the report day (each sent once per route).
    pub transactions: usize,
    /// Outcomes sent (transactions times routes).
    pub outcomes: usize,
    /// Of them, sent in `RecordOutcomes` calls, and how many calls.
    pub batch_outcomes: usize,
    /// `RecordOutcomes` calls made.
    pub batch_calls: usize,
    /// Sent on the `RecordOutcomeStream`.
    pub stream_outcomes: usize,
    /// Frauds whose chargeback comes after the report day (not sent).
    pub not_yet: usize,
    /// Results: matched at once.
    pub matched: usize,
    /// Results: held until their prediction reached the store.
    pub pending: usize,
    /// Results: duplicates or corrections (none expected).
    pub other: usize,
}

/// One outcome per transaction known by the report day, per route, in outcome-time order.
pub fn schedule(
    data: &DemoData,
    routes: &[&str],
    traffic_start_ms: i64,
) -> (Vec<pb::Outcome>, usize) {
    // A stream of its own, so the delays do not disturb the transactions' generator.
    let mut rng = ChaCha8Rng::seed_from_u64(data.seed ^ 0x6f75_7463_6f6d_6573);
    let mut dated = Vec::with_capacity(data.transactions.len());
    let mut not_yet = 0;
    for t in &data.transactions {
        let u: f64 = rng.random();
        let days = if t.fraud {
            2.0 - CHARGEBACK_MEAN_DAYS * (1.0 - u).ln()
        } else {
            30.0 + 30.0 * u
        };
        if days > AS_OF_DAYS {
            not_yet += 1;
            continue;
        }
        dated.push((traffic_start_ms + (days * DAY_MS) as i64, t.id(), t.fraud));
    }
    dated.sort_by_key(|d| d.0);
    let outcomes = dated
        .iter()
        .flat_map(|(time, id, label)| {
            routes.iter().map(move |route| pb::Outcome {
                prediction_id: format!("{route}/{id}"),
                label: *label,
                outcome_time_unix_ms: *time,
            })
        })
        .collect();
    (outcomes, not_yet)
}

/// Sends `outcomes`: the first half in batch calls, the rest on one stream. Any refused outcome is an error.
pub async fn send(
    channel: Channel,
    outcomes: Vec<pb::Outcome>,
    transactions: usize,
    not_yet: usize,
) -> anyhow::Result<Sent> {
    let mut client = pb::outcomes_client::OutcomesClient::new(channel);
    let mut sent = Sent {
        transactions,
        outcomes: outcomes.len(),
        not_yet,
        ..Sent::default()
    };
    let half = outcomes.len() / 2;
    let mut results = Vec::with_capacity(outcomes.len());
    for chunk in outcomes[..half].chunks(BATCH) {
        let response = client
            .record_outcomes(pb::RecordOutcomesRequest {
                outcomes: chunk.to_vec(),
            })
            .await
            .context("RecordOutcomes call failed")?;
        sent.batch_calls += 1;
        sent.batch_outcomes += chunk.len();
        results.extend(response.into_inner().results);
    }
    let rest = outcomes[half..].to_vec();
    sent.stream_outcomes = rest.len();
    let mut stream = client
        .record_outcome_stream(tokio_stream::iter(rest))
        .await
        .context("RecordOutcomeStream call failed")?
        .into_inner();
    while let Some(result) = stream
        .message()
        .await
        .context("RecordOutcomeStream broke off")?
    {
        results.push(result);
    }
    if results.len() != sent.outcomes {
        bail!(
            "sent {} outcomes, got {} results",
            sent.outcomes,
            results.len()
        );
    }
    for r in results {
        match r.status() {
            pb::OutcomeStatus::Matched => sent.matched += 1,
            pb::OutcomeStatus::Pending => sent.pending += 1,
            pb::OutcomeStatus::Invalid | pb::OutcomeStatus::Unspecified => {
                bail!("outcome for {} refused: {}", r.prediction_id, r.message)
            }
            pb::OutcomeStatus::Duplicate | pb::OutcomeStatus::Corrected => sent.other += 1,
        }
    }
    Ok(sent)
}

/// Asks for the report until every expected prediction is in the store and no outcome is held (the store is written
/// from a queue, and silent scoring runs off the answer path), or `patience` runs out; returns the last report.
pub async fn settled_report(
    channel: Channel,
    expected: &[(String, String, u64)],
    patience: Duration,
) -> anyhow::Result<(pb::ReportResponse, bool)> {
    let mut client = pb::outcomes_client::OutcomesClient::new(channel);
    let deadline = tokio::time::Instant::now() + patience;
    loop {
        let report = client
            .report(pb::ReportRequest::default())
            .await
            .context("Report call failed")?
            .into_inner();
        let complete = report.pending_outcomes == 0
            && expected.iter().all(|(route, role, n)| {
                report
                    .series
                    .iter()
                    .find(|s| &s.route == route && &s.role == role)
                    .is_some_and(|s| s.predictions >= *n)
            });
        if complete || tokio::time::Instant::now() >= deadline {
            return Ok((report, complete));
        }
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_known_outcome_is_sent_once_per_route_in_time_order() {
        let data = DemoData::generate(3000, 7).unwrap();
        let (outcomes, not_yet) = schedule(&data, &["a", "b"], 1_000);
        let frauds = data.labels.iter().filter(|&&y| y).count();
        assert!(not_yet <= frauds);
        assert_eq!(outcomes.len(), 2 * (data.labels.len() - not_yet));
        assert!(outcomes
            .windows(2)
            .all(|w| w[0].outcome_time_unix_ms <= w[1].outcome_time_unix_ms));
        // Every outcome is at least two days after the traffic and no later than the report day.
        let (lo, hi) = (1_000 + 2 * 86_400_000, 1_000 + (AS_OF_DAYS * DAY_MS) as i64);
        assert!(outcomes
            .iter()
            .all(|o| (lo..=hi).contains(&o.outcome_time_unix_ms)));
        // The labels are the generator's.
        let label: std::collections::HashMap<String, bool> = data
            .transactions
            .iter()
            .map(|t| (format!("a/{}", t.id()), t.fraud))
            .collect();
        assert!(outcomes
            .iter()
            .filter(|o| o.prediction_id.starts_with("a/"))
            .all(|o| label[&o.prediction_id] == o.label));
    }
}
