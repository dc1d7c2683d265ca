//! The prediction store: every prediction kept until its outcome arrives or its retention ends, outcomes matched to
//! it by prediction id, and the sweeps that settle matured predictions and remove old ones.
//!
//! - [`Store`]: the storage interface. [`sqlite::SqliteStore`] is the embedded implementation (one file under the
//!   data directory); a shared SQL database server for several replicas implements the same trait with the same
//!   tables (see DEVELOPERS.md, "Prediction store").
//! - [`writer::PredictionStore`]: the bounded queue that takes predictions off the request path and commits them in
//!   batches on a writer thread, the outcome calls, and the background sweeps.
//! - [`running`]: the running figures exported through the `metrics` facade (sums and counts).
//! - [`config`]: the `[store]` section of the server configuration.
//!
//! Matching rules, shared by every implementation of [`Store`]:
//! - an outcome is kept once per prediction id; every prediction storeged under that id (a champion and its
//!   challengers) gets its label;
//! - the same outcome sent twice changes nothing ([`OutcomeStatus::Duplicate`]);
//! - a different label for an id that already has one replaces it, the old one is kept in the history, and
//!   reports use the latest ([`OutcomeStatus::Corrected`]);
//! - an outcome whose prediction is not in the log yet is held ([`OutcomeStatus::Pending`]) and matched when the
//!   prediction is written; after the hold period it is marked unmatched and counted;
//! - a prediction still without an outcome when its route's maturity period has passed is settled as a negative.

pub mod clock;
pub mod config;
pub mod faults;
pub mod features;
pub mod matching;
pub mod postgres;
pub mod running;
pub mod scan;
pub mod sqlite;
pub mod writer;

use std::collections::BTreeMap;

pub use clock::Clock;
pub use config::StoreConfig;
pub use scan::{FollowUpGroup, PairRanks, PairRow, PairScan, ScanOrder, ScanRow, SeriesScan};
pub use sqlite::SqliteStore;
pub use writer::PredictionStore;

/// One logged prediction.
#[derive(Debug, Clone, PartialEq)]
pub struct PredictionRecord {
    /// The caller's id, or the server-made one.
    pub prediction_id: String,
    /// The route asked.
    pub route: String,
    /// Model name and version that scored it.
    pub model: String,
    /// The model version.
    pub version: String,
    /// `champion` for the answer given; challengers (later issue) log theirs under the same id.
    pub role: String,
    /// When it was scored, milliseconds since the Unix epoch.
    pub time_ms: i64,
    /// The model body's raw output.
    pub margin: f64,
    /// The margin on the log-odds scale.
    pub log_odds: f64,
    /// The final (calibrated, base-rate-corrected) log-odds; `probability = sigmoid(adjusted_log_odds)`.
    pub adjusted_log_odds: f64,
    /// The probability returned.
    pub probability: f64,
    /// The subject key (the card, account or customer the row is about), empty when none.
    pub subject_key: String,
    /// Free-form tags.
    pub tags: BTreeMap<String, String>,
    /// What it was served under.
    pub served: Served,
}

/// What a prediction was served under, kept with it so that a report over a range in which the route's settings
/// moved uses each prediction's own. The model and calibration are named by the record's model and version (the
/// calibration map is part of the model file) and the champion or challenger by its role.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Served {
    /// The base rate its probability is calibrated to: the route's target base rate when one was applied, else the
    /// model's. `None` in rows logged before the log kept it.
    pub prior: Option<f64>,
    /// The route's decision rule (threshold, costs or bands) in the words of [`decision_words`]; empty when none.
    pub decision: String,
}

/// A decision rule in the log's words: `threshold 0.5`, `costs false_positive=1 false_negative=5`,
/// `bands 0.2,0.6 low,medium,high`.
pub fn decision_words(rule: &probity_models::DecisionRule) -> String {
    use probity_models::DecisionRule;
    match rule {
        DecisionRule::Threshold { threshold } => format!("threshold {threshold}"),
        DecisionRule::Costs {
            false_positive,
            false_negative,
        } => format!("costs false_positive={false_positive} false_negative={false_negative}"),
        DecisionRule::Bands { edges, labels } => {
            let edges: Vec<String> = edges.iter().map(f64::to_string).collect();
            format!("bands {} {}", edges.join(","), labels.join(","))
        }
    }
}

/// The decision rule of [`decision_words`]'s words, or `None` when they are empty or not in its form (a band label
/// holding a comma splits into two labels; a rule whose label count then disagrees with its edges is not read).
pub fn parse_decision_words(words: &str) -> Option<probity_models::DecisionRule> {
    use probity_models::DecisionRule;
    let (kind, rest) = words.split_once(' ')?;
    let rule = match kind {
        "threshold" => DecisionRule::Threshold {
            threshold: rest.parse().ok()?,
        },
        "costs" => {
            let (a, b) = rest.split_once(' ')?;
            DecisionRule::Costs {
                false_positive: a.strip_prefix("false_positive=")?.parse().ok()?,
                false_negative: b.strip_prefix("false_negative=")?.parse().ok()?,
            }
        }
        "bands" => {
            let (edges, labels) = rest.split_once(' ')?;
            let edges = if edges.is_empty() {
                Vec::new()
            } else {
                edges
                    .split(',')
                    .map(|e| e.parse().ok())
                    .collect::<Option<Vec<f64>>>()?
            };
            DecisionRule::Bands {
                edges,
                labels: labels.split(',').map(str::to_string).collect(),
            }
        }
        _ => return None,
    };
    rule.validate().is_ok().then_some(rule)
}

/// What the log keeps about a model version, so that a report needs nothing but the log file.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct ModelVersionInfo {
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// The base rate the model (or its calibration) was fitted on.
    pub base_rate: f64,
    /// The reference score distribution of the model file, if it has one.
    pub reference: Option<Reference>,
    /// The training distributions of the monitored features, in monitored order ([`features`]); empty when the
    /// file states none (and in the facts of a version first registered by a build before they were kept).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub features: Vec<features::FeatureDistribution>,
}

/// A model file's reference distribution (`docs/model-format.md`).
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Reference {
    /// `probability` or `log_odds` (the adjusted log-odds).
    pub on: String,
    /// Interior edges; bin `i` is `(edges[i-1], edges[i]]`.
    pub edges: Vec<f64>,
    /// Expected share per bin.
    pub fractions: Vec<f64>,
}

impl Reference {
    /// From the model crate's type.
    pub fn of(reference: &probity_models::ReferenceDistribution) -> Reference {
        Reference {
            on: match reference.on {
                probity_models::model::DistributionScale::Probability => "probability".into(),
                probity_models::model::DistributionScale::LogOdds => "log_odds".into(),
            },
            edges: reference.edges.clone(),
            fractions: reference.fractions.clone(),
        }
    }

    /// The value of a prediction on this reference's scale.
    pub fn value_of(&self, probability: f64, adjusted_log_odds: f64) -> f64 {
        if self.on == "log_odds" {
            adjusted_log_odds
        } else {
            probability
        }
    }

    /// The bin of `value`: the number of edges strictly below it.
    pub fn bin_of(&self, value: f64) -> usize {
        probity_models::metrics::bin_index(value, &self.edges)
    }
}

/// One outcome as sent by a client.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeInput {
    /// The prediction id it belongs to.
    pub prediction_id: String,
    /// True for the positive class.
    pub label: bool,
    /// When the outcome happened (ms since the epoch); `None` means when it was received.
    pub time_ms: Option<i64>,
}

/// What happened to one outcome.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutcomeStatus {
    /// Matched to the predictions with its id, first time.
    Matched,
    /// The same label was already recorded; nothing changed.
    Duplicate,
    /// A different label replaced the recorded one (kept in the history).
    Corrected,
    /// No prediction with this id yet; held for the hold period.
    Pending,
    /// Refused: the message says why.
    Invalid,
}

impl OutcomeStatus {
    /// Lower-case name, used as a metric label.
    pub fn as_str(self) -> &'static str {
        match self {
            OutcomeStatus::Matched => "matched",
            OutcomeStatus::Duplicate => "duplicate",
            OutcomeStatus::Corrected => "corrected",
            OutcomeStatus::Pending => "pending",
            OutcomeStatus::Invalid => "invalid",
        }
    }
}

/// The result for one outcome of a call.
#[derive(Debug, Clone, PartialEq)]
pub struct OutcomeResult {
    /// What happened.
    pub status: OutcomeStatus,
    /// How many predictions got (or changed) their label.
    pub predictions_matched: usize,
    /// Why an outcome was refused; empty otherwise.
    pub message: String,
}

/// A (prediction, label) pair that was just settled or re-labelled: what the running figures add.
#[derive(Debug, Clone, PartialEq)]
pub struct Settled {
    /// Route, model, version of the prediction.
    pub route: String,
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// The probability returned.
    pub probability: f64,
    /// Its adjusted log-odds.
    pub adjusted_log_odds: f64,
    /// The label now recorded.
    pub label: bool,
    /// The label it replaces, for a correction (its contribution is retracted).
    pub previous: Option<bool>,
    /// Outcome time minus prediction time, in seconds (negative when the client's clocks disagree).
    pub delay_seconds: f64,
}

/// Which predictions a report covers.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ReportFilter {
    /// Earliest prediction time included (ms since the epoch).
    pub from_ms: Option<i64>,
    /// Prediction times strictly before this are included.
    pub to_ms: Option<i64>,
    /// Only this route.
    pub route: Option<String>,
    /// Only this model.
    pub model: Option<String>,
    /// Only this version.
    pub version: Option<String>,
}

/// One prediction read back for a report, with its outcome if it has one.
#[derive(Debug, Clone, PartialEq)]
pub struct LoggedPrediction {
    /// The prediction id (a champion and its challengers share it).
    pub prediction_id: String,
    /// Route, model, version and role.
    pub route: String,
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// Role.
    pub role: String,
    /// Prediction time (ms).
    pub time_ms: i64,
    /// Final log-odds.
    pub adjusted_log_odds: f64,
    /// Probability returned.
    pub probability: f64,
    /// The latest label, if the outcome is known.
    pub label: Option<bool>,
    /// Whether that label came from the maturity rule rather than a client.
    pub by_maturity: bool,
    /// Whether the label was corrected at least once.
    pub corrected: bool,
    /// The base rate its probability is calibrated to, when the log kept it ([`Served::prior`]).
    pub served_prior: Option<f64>,
    /// The decision rule it was served under in the words of [`decision_words`] ([`Served::decision`]); empty when
    /// the route had none or the row was logged before the log kept it.
    pub served_decision: String,
    /// When the latest label was received (ms), if the outcome is known.
    pub outcome_received_ms: Option<i64>,
}

/// Counts of the outcome table, for reports and gauges.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, serde::Serialize)]
pub struct OutcomeCounts {
    /// Outcomes held, waiting for their prediction.
    pub pending: u64,
    /// Outcomes whose prediction never came within the hold period.
    pub unmatched: u64,
}

/// Why the store failed.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// The database refused an operation.
    #[error("prediction store database ({what}): {source}")]
    Database {
        /// What was being done.
        what: &'static str,
        /// The database error.
        source: rusqlite::Error,
    },
    /// The data directory could not be created or opened.
    #[error("prediction store directory {dir}: {source}")]
    Directory {
        /// The directory.
        dir: String,
        /// The I/O error.
        source: std::io::Error,
    },
    /// The data directory exists but no file can be created in it (read-only file system, permissions).
    #[error("prediction store directory {dir} is not writable ({source})")]
    NotWritable {
        /// The directory.
        dir: String,
        /// The I/O error of the probe file.
        source: std::io::Error,
    },
    /// The log file was written by a newer probity with a different layout.
    #[error(
        "prediction store schema version {found} is not supported (this build reads {supported})"
    )]
    Schema {
        /// Version found in the file.
        found: i64,
        /// Version this build writes.
        supported: i64,
    },
    /// The PostgreSQL database refused an operation or could not be reached. The message never holds the
    /// connection URL's password.
    #[error("prediction store database ({what}): {message}")]
    Postgres {
        /// What was being done.
        what: &'static str,
        /// The database's message.
        message: String,
        /// The SQLSTATE code, when the server answered.
        code: Option<String>,
        /// Whether the connection was lost (or never made): the operation may work once the database is back.
        lost: bool,
    },
    /// A report's working file (a spill of values a statistic passes over more than once) failed.
    #[error("report working file: {0}")]
    Spill(std::io::Error),
    /// A stored row holds a value no build writes.
    #[error("prediction store holds an unreadable row: {what}")]
    Corrupt {
        /// Which row and value.
        what: String,
    },
    /// The writer thread is gone (the server is stopping).
    #[error("the prediction store is closed")]
    Closed,
}

/// Why a write to the log failed, as counted (`reason` label) and logged. Anything but a full disk and a
/// read-only (or otherwise unwritable) file system is `Other`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum WriteFailure {
    /// No space left on the device (`SQLITE_FULL`, `ENOSPC`).
    DiskFull,
    /// The file system or the database file is read-only, or the directory is not writable (`SQLITE_READONLY`,
    /// `EROFS`, `EACCES`).
    ReadOnly,
    /// Any other database or I/O error.
    Other,
}

impl WriteFailure {
    /// The metric label.
    pub fn as_str(self) -> &'static str {
        match self {
            WriteFailure::DiskFull => "disk_full",
            WriteFailure::ReadOnly => "read_only",
            WriteFailure::Other => "write_error",
        }
    }

    pub(crate) fn of_io(error: &std::io::Error) -> WriteFailure {
        match error.kind() {
            std::io::ErrorKind::StorageFull => WriteFailure::DiskFull,
            std::io::ErrorKind::ReadOnlyFilesystem | std::io::ErrorKind::PermissionDenied => {
                WriteFailure::ReadOnly
            }
            _ => WriteFailure::Other,
        }
    }
}

impl StoreError {
    /// What kind of write failure this is.
    pub fn write_failure(&self) -> WriteFailure {
        match self {
            StoreError::Database { what: _, source } => match source.sqlite_error_code() {
                Some(rusqlite::ErrorCode::DiskFull) => WriteFailure::DiskFull,
                Some(rusqlite::ErrorCode::ReadOnly) => WriteFailure::ReadOnly,
                _ => WriteFailure::Other,
            },
            StoreError::Directory { dir: _, source } => WriteFailure::of_io(source),
            StoreError::NotWritable { dir: _, source } => match WriteFailure::of_io(source) {
                WriteFailure::DiskFull => WriteFailure::DiskFull,
                WriteFailure::ReadOnly | WriteFailure::Other => WriteFailure::ReadOnly,
            },
            StoreError::Schema {
                found: _,
                supported: _,
            }
            | StoreError::Corrupt { what: _ }
            | StoreError::Postgres {
                what: _,
                message: _,
                code: None,
                lost: _,
            } => WriteFailure::Other,
            StoreError::Postgres {
                what: _,
                message: _,
                code: Some(code),
                lost: _,
            } => match code.as_str() {
                // disk_full, and read_only_sql_transaction (a standby, or default_transaction_read_only)
                "53100" => WriteFailure::DiskFull,
                "25006" => WriteFailure::ReadOnly,
                _ => WriteFailure::Other,
            },
            StoreError::Closed => WriteFailure::Other,
            StoreError::Spill(source) => WriteFailure::of_io(source),
        }
    }
}

/// The storage interface of the prediction store. Every method is one transaction: it either happens whole or not
/// at all, so the running figures (emitted from the returned [`Settled`] pairs after the commit) count each
/// settlement exactly once.
pub trait Store: Send {
    /// Writes predictions (a record whose (id, route, model, role) is already logged is skipped) and matches any
    /// held or recorded outcome for their ids. Returns, per record, whether it was written, and the pairs settled.
    fn insert_predictions(
        &mut self,
        records: &[PredictionRecord],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError>;

    /// [`Store::insert_predictions`], adding in the same transaction the feature slot counts of the records it
    /// writes (`features[i]` belongs to `records[i]`; a record not written, already logged, adds nothing), to
    /// their hour windows ([`features`]). Both backends implement it; the default, for a store that keeps no
    /// feature counts (a test's wrapper), writes the predictions alone.
    fn insert_predictions_counted(
        &mut self,
        records: &[PredictionRecord],
        features: &[Option<&features::RowFeatures>],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError> {
        let _ = features;
        self.insert_predictions(records)
    }

    /// The feature slot counts of the windows that overlap the filter's time range (a window is included when its
    /// hour holds any instant of `[from, to)`: the range widened to whole UTC hours), with its route, model and
    /// version filters, summed over the windows: one row per (route, model, version, role, feature, slot), its
    /// `window_ms` the first window's start.
    /// Both backends implement it; the default (a store that keeps no feature counts) has none.
    fn feature_counts(
        &mut self,
        filter: &ReportFilter,
    ) -> Result<Vec<features::FeatureCount>, StoreError> {
        let _ = filter;
        Ok(Vec::new())
    }

    /// Records a model version's facts (once; later calls for the same version change nothing, but for adding
    /// the training distributions to facts an earlier build recorded without them).
    fn register_model(&mut self, info: &ModelVersionInfo) -> Result<(), StoreError>;

    /// Applies outcomes in order; one result per input, and the pairs settled or re-labelled.
    fn record_outcomes(
        &mut self,
        outcomes: &[OutcomeInput],
        now_ms: i64,
    ) -> Result<(Vec<OutcomeResult>, Vec<Settled>), StoreError>;

    /// Settles as negatives the predictions of each route (route -> maturity in ms) that are at least that old and
    /// have no outcome; at most `limit` prediction ids per call.
    fn settle_matured(
        &mut self,
        maturity_ms: &BTreeMap<String, i64>,
        now_ms: i64,
        limit: usize,
    ) -> Result<Vec<Settled>, StoreError>;

    /// Marks outcomes held longer than `hold_ms` as unmatched; returns how many.
    fn expire_pending(&mut self, hold_ms: i64, now_ms: i64) -> Result<u64, StoreError>;

    /// Removes predictions older than `retention_ms` (and outcomes left with no prediction); returns how many
    /// predictions were removed.
    fn remove_expired(&mut self, retention_ms: i64, now_ms: i64) -> Result<u64, StoreError>;

    /// The predictions a report covers, in the order they were written, with their outcomes.
    fn load(&mut self, filter: &ReportFilter) -> Result<Vec<LoggedPrediction>, StoreError>;

    /// The facts recorded for a model version.
    fn model_version(
        &mut self,
        model: &str,
        version: &str,
    ) -> Result<Option<ModelVersionInfo>, StoreError>;

    /// Pending and unmatched outcome counts.
    fn outcome_counts(&mut self) -> Result<OutcomeCounts, StoreError>;

    /// The series (route, model, version, role) with predictions in `filter`, sorted.
    fn series(&mut self, filter: &ReportFilter) -> Result<Vec<SeriesName>, StoreError>;

    /// Streams the predictions of one series in `order` (only those with an outcome when `labelled_only`), one at
    /// a time: the store holds at most one fetch batch, whatever the size of the range. An error from `each`
    /// stops the scan and is returned.
    fn scan(
        &mut self,
        series: &SeriesScan<'_>,
        order: ScanOrder,
        labelled_only: bool,
        each: &mut dyn FnMut(&ScanRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError>;

    /// The prediction time of the series' `k`-th oldest prediction (from 0; ties in any order).
    fn nth_oldest(&mut self, series: &SeriesScan<'_>, k: u64) -> Result<Option<i64>, StoreError>;

    /// The series' follow-up grouped by time, ascending (see [`FollowUpGroup`]).
    fn follow_up(
        &mut self,
        series: &SeriesScan<'_>,
        now_ms: i64,
        horizon_ms: i64,
        each: &mut dyn FnMut(&FollowUpGroup) -> Result<(), StoreError>,
    ) -> Result<(), StoreError>;

    /// The models logged with `role` on `filter`'s route in its window, with their prediction counts, by name and version.
    fn role_models(
        &mut self,
        filter: &ReportFilter,
        role: &str,
    ) -> Result<Vec<(String, String, u64)>, StoreError>;

    /// Streams the champion-challenger pairs in the challenger's written order, with the ranks asked for
    /// ([`PairRanks`]); the database computes them by window functions, so no pair is held here.
    fn scan_pairs(
        &mut self,
        pairs: &PairScan<'_>,
        ranks: PairRanks,
        each: &mut dyn FnMut(&PairRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError>;

    /// Whether this replica runs the sweeps now. A store of one process always does; a shared store lets one
    /// replica at a time (the one holding its lock), and another takes over when that one is gone.
    fn lead_sweeps(&mut self) -> Result<bool, StoreError> {
        Ok(true)
    }

    /// The matched pairs of one route in a lean form (no names or ids per row), for figures refreshed often (the
    /// calibration gauges). By default taken from [`Store::load`].
    fn labelled_pairs(&mut self, route: &str) -> Result<LabelledPairs, StoreError> {
        let rows = self.load(&ReportFilter {
            route: Some(route.to_string()),
            ..ReportFilter::default()
        })?;
        let mut out = LabelledPairs::default();
        for r in rows {
            if let Some(label) = r.label {
                out.push(
                    &r.model,
                    &r.version,
                    &r.role,
                    r.probability,
                    r.adjusted_log_odds,
                    label,
                );
            }
        }
        Ok(out)
    }
}

/// Route, model, version and role of a series.
pub type SeriesName = (String, String, String, String);

/// Why an outcome is refused, or `None`.
pub(crate) fn invalid_outcome(o: &OutcomeInput) -> Option<String> {
    let id = &o.prediction_id;
    if id.is_empty() {
        return Some("prediction_id: is empty".into());
    }
    if id.len() > 128 || !id.bytes().all(|b| (0x21..=0x7e).contains(&b)) {
        return Some("prediction_id: must be 1 to 128 printable ASCII characters".into());
    }
    if o.time_ms.is_some_and(|t| t < 0) {
        return Some("outcome_time: must not be before 1970".into());
    }
    None
}

/// Matched pairs of one route grouped by series, without per-row names.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct LabelledPairs {
    /// (model, version, role) of each series.
    pub series: Vec<(String, String, String)>,
    /// (series index, probability, final log-odds, label) of each pair.
    pub rows: Vec<(usize, f64, f64, bool)>,
}

impl LabelledPairs {
    /// Adds one pair, finding or adding its series (a handful per route, so a scan).
    pub fn push(
        &mut self,
        model: &str,
        version: &str,
        role: &str,
        probability: f64,
        log_odds: f64,
        label: bool,
    ) {
        let i = match self
            .series
            .iter()
            .position(|(m, v, r)| m == model && v == version && r == role)
        {
            Some(i) => i,
            None => {
                self.series
                    .push((model.to_string(), version.to_string(), role.to_string()));
                self.series.len() - 1
            }
        };
        self.rows.push((i, probability, log_odds, label));
    }
}
