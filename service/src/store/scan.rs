//! What reports and comparisons read from the store in bounded memory: rows streamed one at a time in an order the
//! database sorts (never the whole range at once), and the few aggregates the database computes better than a
//! pass could (ranks by window functions, follow-up times grouped).
//!
//! Both backends implement the same queries ([`Store::scan`](super::Store::scan) and the methods beside it); the
//! SQL differs only in dialect. SQLite streams from its cursor; PostgreSQL from a portal fetched a batch at a time,
//! so neither holds more than one batch of rows.

/// Rows fetched per round trip from a PostgreSQL portal.
pub const FETCH_ROWS: i32 = 10_000;

/// One series (route, model, version, role) in a time window.
#[derive(Debug, Clone, PartialEq)]
pub struct SeriesScan<'a> {
    /// Earliest prediction time included (ms).
    pub from_ms: Option<i64>,
    /// Prediction times strictly before this are included.
    pub to_ms: Option<i64>,
    /// Route.
    pub route: &'a str,
    /// Model.
    pub model: &'a str,
    /// Version.
    pub version: &'a str,
    /// Role.
    pub role: &'a str,
}

/// The order rows are streamed in.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ScanOrder {
    /// As written.
    Written,
    /// Final log-odds ascending; tied rows latest-written first, so that read backwards the order is log-odds
    /// descending with ties in written order (the stable descending sort of the gains table).
    LogOdds,
    /// Probability ascending; tied rows in written order (the stable sort of the Hosmer-Lemeshow groups).
    Probability,
}

/// One prediction streamed for a report, without names or ids.
#[derive(Debug, Clone, PartialEq)]
pub struct ScanRow {
    /// Prediction time (ms).
    pub time_ms: i64,
    /// Final log-odds.
    pub adjusted_log_odds: f64,
    /// Probability returned.
    pub probability: f64,
    /// The latest label, if the outcome is known.
    pub label: Option<bool>,
    /// Whether that label came from the maturity rule.
    pub by_maturity: bool,
    /// Whether the label was corrected at least once.
    pub corrected: bool,
    /// The base rate its probability is calibrated to, when the store kept it.
    pub served_prior: Option<f64>,
    /// When the latest label was received (ms).
    pub outcome_received_ms: Option<i64>,
    /// The decision rule it was served under, in the store's words (empty when none was kept).
    pub served_decision: String,
}

/// Follow-up of a series' predictions for the Kaplan-Meier estimate: per distinct follow-up time (ms), how many
/// predictions end there and how many of those end with a positive outcome. A prediction's follow-up ends at the
/// delay to its positive outcome (receipt minus prediction time, at least 0) when that is within `horizon_ms`,
/// else at its age at `now_ms` capped at `horizon_ms`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FollowUpGroup {
    /// Follow-up time (ms).
    pub time_ms: i64,
    /// Predictions whose follow-up ends there.
    pub count: i64,
    /// Of them, those ending with a positive outcome.
    pub events: i64,
}

/// A champion and a challenger on one route in a time window: pairs are prediction ids logged by both (the
/// champion with role `champion`, the challenger with role `challenger`, both in the window).
#[derive(Debug, Clone, PartialEq)]
pub struct PairScan<'a> {
    /// Earliest prediction time included (ms).
    pub from_ms: Option<i64>,
    /// Prediction times strictly before this are included.
    pub to_ms: Option<i64>,
    /// Route.
    pub route: &'a str,
    /// Champion model name.
    pub champion: &'a str,
    /// Champion version, or any version of the name.
    pub champion_version: Option<&'a str>,
    /// Challenger model name.
    pub challenger: &'a str,
    /// Challenger version, or any version of the name.
    pub challenger_version: Option<&'a str>,
}

/// One pair, streamed in the challenger's written order.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PairRow {
    /// Champion's final log-odds.
    pub champion: f64,
    /// Challenger's final log-odds.
    pub challenger: f64,
    /// The outcome, when known.
    pub label: Option<bool>,
    /// With ranks over all pairs: twice the champion's midrank (`2 * rank + ties - 1`, ranks from 1); with
    /// placements over the pairs with an outcome: twice the number of cases of the other class the champion
    /// ranks this case above (below it for a negative), ties counting one half each, i.e. `2 * below + tied`
    /// (DeLong's structural component times twice the other class's size). 0 when not asked for.
    pub champion_twice: i64,
    /// The same for the challenger.
    pub challenger_twice: i64,
}

/// What [`PairRow`]'s rank columns hold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PairRanks {
    /// Every pair, no ranks.
    None,
    /// Every pair, with midranks over all pairs (Spearman's correlation).
    Midranks,
    /// Only pairs with an outcome, with DeLong's placements.
    Placements,
    /// Every pair, no ranks, in the champion's log-odds order (ascending) instead of the written order.
    ChampionAscending,
}
