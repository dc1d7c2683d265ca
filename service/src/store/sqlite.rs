//! [`Store`] on an embedded SQLite database: one file, `predictions.db`, in the data directory.
//!
//! The journal is write-ahead (WAL): a commit appends to the `-wal` file beside the database, so a process killed
//! at any instant leaves every committed transaction readable at the next open. [`Durability`] sets how often the
//! log is flushed to the disk itself, which only matters for a power loss or an operating system crash.
//!
//! The tables are plain SQL (no SQLite-only types beyond `INTEGER`, `REAL`, `TEXT`), so that a shared SQL
//! database server can hold the same rows for several replicas.

use std::collections::BTreeMap;
use std::path::Path;

use rusqlite::{params, Connection, OptionalExtension};

use super::features::{counts_of, FeatureCount, RowFeatures};
use super::matching::{self, Outcome, OutcomeState, Source};
use super::{
    FollowUpGroup, PairRanks, PairRow, PairScan, ScanOrder, ScanRow, SeriesName, SeriesScan,
};
use super::{
    LoggedPrediction, ModelVersionInfo, OutcomeCounts, OutcomeInput, OutcomeResult, OutcomeStatus,
    PredictionRecord, ReportFilter, Settled, Store, StoreError,
};

/// The table layout this build writes; kept in `PRAGMA user_version`. Version 2 added what each prediction was
/// served under (`served_prior`, `decision`); a version 1 file gets the columns at open ([`MIGRATE_1_2`]). Version 3
/// renamed the key of the card, account or customer a row is about to `subject_key` ([`MIGRATE_2_3`]). Version 4
/// added the per-feature slot counts by hour ([`MIGRATE_3_4`], `super::features`).
const SCHEMA_VERSION: i64 = 4;

/// From version 1: the served-under columns (NULL prior and no decision in the rows already there).
const MIGRATE_1_2: &str = "
ALTER TABLE predictions ADD COLUMN served_prior REAL;
ALTER TABLE predictions ADD COLUMN decision TEXT NOT NULL DEFAULT '';
";

/// From version 2: the key column's new name.
const MIGRATE_2_3: &str = "ALTER TABLE predictions RENAME COLUMN entity_key TO subject_key;";

/// From version 3 (and in a new file): the per-feature slot counts, one row per (hour window, route, model,
/// version, role, feature, slot).
const MIGRATE_3_4: &str = "
CREATE TABLE IF NOT EXISTS feature_counts (
    window_ms INTEGER NOT NULL,
    route TEXT NOT NULL,
    model TEXT NOT NULL,
    version TEXT NOT NULL,
    role TEXT NOT NULL,
    feature TEXT NOT NULL,
    slot INTEGER NOT NULL,
    row_count INTEGER NOT NULL,
    PRIMARY KEY (window_ms, route, model, version, role, feature, slot)
);
";

/// The database file name inside the data directory.
pub const FILE_NAME: &str = "predictions.db";

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS predictions (
    seq INTEGER PRIMARY KEY,
    prediction_id TEXT NOT NULL,
    route TEXT NOT NULL,
    model TEXT NOT NULL,
    version TEXT NOT NULL,
    role TEXT NOT NULL,
    time_ms INTEGER NOT NULL,
    margin REAL NOT NULL,
    log_odds REAL NOT NULL,
    adjusted_log_odds REAL NOT NULL,
    probability REAL NOT NULL,
    subject_key TEXT NOT NULL,
    tags TEXT NOT NULL,
    served_prior REAL,
    decision TEXT NOT NULL DEFAULT '',
    UNIQUE (prediction_id, route, model, role)
);
CREATE INDEX IF NOT EXISTS predictions_time ON predictions (time_ms);
CREATE INDEX IF NOT EXISTS predictions_route_time ON predictions (route, time_ms);
CREATE TABLE IF NOT EXISTS outcomes (
    prediction_id TEXT PRIMARY KEY,
    label INTEGER NOT NULL,
    outcome_time_ms INTEGER NOT NULL,
    received_ms INTEGER NOT NULL,
    source TEXT NOT NULL,
    revision INTEGER NOT NULL,
    state TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS outcomes_state ON outcomes (state, received_ms);
CREATE TABLE IF NOT EXISTS outcome_history (
    prediction_id TEXT NOT NULL,
    label INTEGER NOT NULL,
    outcome_time_ms INTEGER NOT NULL,
    received_ms INTEGER NOT NULL,
    source TEXT NOT NULL,
    revision INTEGER NOT NULL
);
CREATE TABLE IF NOT EXISTS model_versions (
    model TEXT NOT NULL,
    version TEXT NOT NULL,
    info TEXT NOT NULL,
    PRIMARY KEY (model, version)
);
";

/// How often committed transactions reach the disk.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Durability {
    /// `synchronous = NORMAL` in WAL mode: the log is flushed at checkpoints, not at every commit. A killed process
    /// loses nothing committed; a power loss or OS crash may lose the transactions committed since the last
    /// checkpoint (the database itself stays consistent).
    Normal,
    /// `synchronous = FULL`: every commit is flushed before it returns; a power loss loses nothing committed, at
    /// the cost of one disk flush per batch.
    Full,
}

impl Durability {
    /// The configuration word.
    pub fn as_str(self) -> &'static str {
        match self {
            Durability::Normal => "normal",
            Durability::Full => "full",
        }
    }
}

/// The embedded prediction store.
pub struct SqliteStore {
    conn: Connection,
    /// The data directory, probed when a write fails with an I/O error.
    dir: std::path::PathBuf,
}

fn db(what: &'static str) -> impl Fn(rusqlite::Error) -> StoreError {
    move |source| StoreError::Database { what, source }
}

impl SqliteStore {
    /// Opens (creating if needed) `predictions.db` in `dir`. A directory in which no file can be created
    /// (read-only file system, permissions) is refused with [`StoreError::NotWritable`] before SQLite sees it.
    pub fn open(dir: &Path, durability: Durability) -> Result<SqliteStore, StoreError> {
        std::fs::create_dir_all(dir).map_err(|source| {
            let dir = dir.display().to_string();
            match super::WriteFailure::of_io(&source) {
                super::WriteFailure::ReadOnly => StoreError::NotWritable { dir, source },
                _ => StoreError::Directory { dir, source },
            }
        })?;
        probe_writable(dir)?;
        let conn = Connection::open(dir.join(FILE_NAME)).map_err(db("open"))?;
        Self::init(conn, durability, dir)
    }

    /// Opens an existing log read-only-in-spirit for a report (it still may replay the WAL).
    pub fn open_existing(file: &Path) -> Result<SqliteStore, StoreError> {
        let conn = Connection::open_with_flags(
            file,
            rusqlite::OpenFlags::SQLITE_OPEN_READ_WRITE | rusqlite::OpenFlags::SQLITE_OPEN_NO_MUTEX,
        )
        .map_err(db("open"))?;
        Self::init(
            conn,
            Durability::Normal,
            file.parent().unwrap_or_else(|| Path::new(".")),
        )
    }

    fn init(
        conn: Connection,
        durability: Durability,
        dir: &Path,
    ) -> Result<SqliteStore, StoreError> {
        conn.pragma_update(None, "journal_mode", "WAL")
            .map_err(db("journal mode"))?;
        conn.pragma_update(None, "synchronous", durability.as_str())
            .map_err(db("synchronous"))?;
        conn.busy_timeout(std::time::Duration::from_secs(5))
            .map_err(db("busy timeout"))?;
        let found: i64 = conn
            .pragma_query_value(None, "user_version", |r| r.get(0))
            .map_err(db("schema version"))?;
        if found > SCHEMA_VERSION {
            return Err(StoreError::Schema {
                found,
                supported: SCHEMA_VERSION,
            });
        }
        if found == 1 {
            conn.execute_batch(MIGRATE_1_2)
                .map_err(db("schema migration 1 to 2"))?;
        }
        if (1..=2).contains(&found) {
            conn.execute_batch(MIGRATE_2_3)
                .map_err(db("schema migration 2 to 3"))?;
        }
        conn.execute_batch(SCHEMA).map_err(db("create tables"))?;
        if found < 4 {
            conn.execute_batch(MIGRATE_3_4)
                .map_err(db("schema migration 3 to 4"))?;
        }
        if found != SCHEMA_VERSION {
            // Written only when it changes, so an existing log opens without a write (on a full disk too).
            conn.pragma_update(None, "user_version", SCHEMA_VERSION)
                .map_err(db("schema version"))?;
        }
        Ok(SqliteStore {
            conn,
            dir: dir.to_path_buf(),
        })
    }

    /// SQLite reports a write refused by the operating system as a plain I/O error (`SQLITE_IOERR`) without its
    /// cause; a file system that turned read-only under a running server (ext4 `errors=remount-ro`, say) shows up
    /// that way. After such an error the directory is probed: if no file can be created in it the error becomes
    /// [`StoreError::NotWritable`] (counted as `read_only`), or a directory error with the probe's cause (a full
    /// disk counts as `disk_full`).
    fn diagnosed(&self, error: StoreError) -> StoreError {
        let StoreError::Database { what: _, source } = &error else {
            return error;
        };
        if !matches!(
            source.sqlite_error_code(),
            Some(rusqlite::ErrorCode::SystemIoFailure | rusqlite::ErrorCode::CannotOpen)
        ) {
            return error;
        }
        match probe_writable(&self.dir) {
            Err(StoreError::NotWritable { dir, source })
                if super::WriteFailure::of_io(&source) == super::WriteFailure::DiskFull =>
            {
                StoreError::Directory { dir, source }
            }
            Err(probe) => probe,
            Ok(()) => error,
        }
    }
}

/// Creates and removes an empty file in `dir`: SQLite needs to create its journal files there, and its own error
/// for a read-only directory does not name the directory.
fn probe_writable(dir: &Path) -> Result<(), StoreError> {
    let probe = dir.join(".probity-write-check");
    std::fs::OpenOptions::new()
        .write(true)
        .create(true)
        .truncate(true)
        .open(&probe)
        .and_then(|_| std::fs::remove_file(&probe))
        .map_err(|source| StoreError::NotWritable {
            dir: dir.display().to_string(),
            source,
        })
}

/// A prediction's facts needed to settle it.
struct Row {
    route: String,
    model: String,
    version: String,
    time_ms: i64,
    adjusted_log_odds: f64,
    probability: f64,
}

fn settled(row: Row, label: bool, previous: Option<bool>, outcome_time_ms: i64) -> Settled {
    Settled {
        delay_seconds: (outcome_time_ms - row.time_ms) as f64 / 1000.0,
        route: row.route,
        model: row.model,
        version: row.version,
        probability: row.probability,
        adjusted_log_odds: row.adjusted_log_odds,
        label,
        previous,
    }
}

fn predictions_of(tx: &rusqlite::Transaction<'_>, id: &str) -> Result<Vec<Row>, StoreError> {
    let mut stmt = tx
        .prepare_cached(
            "SELECT route, model, version, time_ms, adjusted_log_odds, probability
             FROM predictions WHERE prediction_id = ?1 ORDER BY seq",
        )
        .map_err(db("read predictions"))?;
    let rows = stmt
        .query_map([id], |r| {
            Ok(Row {
                route: r.get(0)?,
                model: r.get(1)?,
                version: r.get(2)?,
                time_ms: r.get(3)?,
                adjusted_log_odds: r.get(4)?,
                probability: r.get(5)?,
            })
        })
        .map_err(db("read predictions"))?
        .collect::<Result<Vec<_>, _>>()
        .map_err(db("read predictions"))?;
    Ok(rows)
}

/// The recorded outcome row of an id.
fn outcome_of(tx: &rusqlite::Transaction<'_>, id: &str) -> Result<Option<Outcome>, StoreError> {
    let row = tx
        .prepare_cached(
            "SELECT label, outcome_time_ms, received_ms, source, revision, state
             FROM outcomes WHERE prediction_id = ?1",
        )
        .map_err(db("read outcome"))?
        .query_row([id], |r| {
            Ok((
                r.get::<_, i64>(0)? != 0,
                r.get::<_, i64>(1)?,
                r.get::<_, i64>(2)?,
                r.get::<_, String>(3)?,
                r.get::<_, i64>(4)?,
                r.get::<_, String>(5)?,
            ))
        })
        .optional()
        .map_err(db("read outcome"))?;
    let Some((label, outcome_time_ms, received_ms, source, revision, state)) = row else {
        return Ok(None);
    };
    let (Some(source), Some(state)) = (Source::parse(&source), OutcomeState::parse(&state)) else {
        return Err(StoreError::Corrupt {
            what: format!("outcome of prediction id {id}: source `{source}`, state `{state}`"),
        });
    };
    Ok(Some(Outcome {
        label,
        outcome_time_ms,
        received_ms,
        source,
        revision,
        state,
    }))
}

/// Stores an id's outcome row (inserted, or replacing the one there).
fn put_outcome(tx: &rusqlite::Transaction<'_>, id: &str, o: &Outcome) -> Result<(), StoreError> {
    tx.prepare_cached(
        "INSERT INTO outcomes (prediction_id, label, outcome_time_ms, received_ms, source, revision, state)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7)
         ON CONFLICT (prediction_id) DO UPDATE SET label = excluded.label,
           outcome_time_ms = excluded.outcome_time_ms, received_ms = excluded.received_ms,
           source = excluded.source, revision = excluded.revision, state = excluded.state",
    )
    .map_err(db("write outcome"))?
    .execute(params![
        id,
        i64::from(o.label),
        o.outcome_time_ms,
        o.received_ms,
        o.source.as_str(),
        o.revision,
        o.state.as_str()
    ])
    .map_err(db("write outcome"))?;
    Ok(())
}

fn history(tx: &rusqlite::Transaction<'_>, id: &str) -> Result<(), StoreError> {
    tx.prepare_cached(
        "INSERT INTO outcome_history SELECT prediction_id, label, outcome_time_ms, received_ms, source, revision
         FROM outcomes WHERE prediction_id = ?1",
    )
    .map_err(db("outcome history"))?
    .execute([id])
    .map_err(db("outcome history"))?;
    Ok(())
}

impl Store for SqliteStore {
    fn insert_predictions(
        &mut self,
        records: &[PredictionRecord],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError> {
        let r = self.insert_predictions_inner(records, &[]);
        r.map_err(|e| self.diagnosed(e))
    }

    fn insert_predictions_counted(
        &mut self,
        records: &[PredictionRecord],
        features: &[Option<&RowFeatures>],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError> {
        let r = self.insert_predictions_inner(records, features);
        r.map_err(|e| self.diagnosed(e))
    }

    fn feature_counts(&mut self, filter: &ReportFilter) -> Result<Vec<FeatureCount>, StoreError> {
        let mut stmt = self
            .conn
            .prepare_cached(
                "SELECT MIN(window_ms), route, model, version, role, feature, slot, SUM(row_count)
                 FROM feature_counts
                 WHERE (?1 IS NULL OR window_ms + ?6 > ?1) AND (?2 IS NULL OR window_ms < ?2)
                   AND (?3 IS NULL OR route = ?3) AND (?4 IS NULL OR model = ?4)
                   AND (?5 IS NULL OR version = ?5)
                 GROUP BY route, model, version, role, feature, slot
                 ORDER BY route, model, version, role, feature, slot",
            )
            .map_err(db("feature counts query"))?;
        let rows = stmt
            .query_map(
                params![
                    filter.from_ms,
                    filter.to_ms,
                    filter.route,
                    filter.model,
                    filter.version,
                    super::features::WINDOW_MS
                ],
                |r| {
                    Ok(FeatureCount {
                        window_ms: r.get(0)?,
                        route: r.get(1)?,
                        model: r.get(2)?,
                        version: r.get(3)?,
                        role: r.get(4)?,
                        feature: r.get(5)?,
                        slot: r.get(6)?,
                        rows: r.get(7)?,
                    })
                },
            )
            .map_err(db("feature counts query"))?
            .collect::<Result<Vec<_>, _>>()
            .map_err(db("feature counts query"))?;
        Ok(rows)
    }

    fn register_model(&mut self, info: &ModelVersionInfo) -> Result<(), StoreError> {
        let r = self.register_model_inner(info);
        r.map_err(|e| self.diagnosed(e))
    }

    fn record_outcomes(
        &mut self,
        outcomes: &[OutcomeInput],
        now_ms: i64,
    ) -> Result<(Vec<OutcomeResult>, Vec<Settled>), StoreError> {
        let r = self.record_outcomes_inner(outcomes, now_ms);
        r.map_err(|e| self.diagnosed(e))
    }

    fn settle_matured(
        &mut self,
        maturity_ms: &BTreeMap<String, i64>,
        now_ms: i64,
        limit: usize,
    ) -> Result<Vec<Settled>, StoreError> {
        let r = self.settle_matured_inner(maturity_ms, now_ms, limit);
        r.map_err(|e| self.diagnosed(e))
    }

    fn expire_pending(&mut self, hold_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        let r = self.expire_pending_inner(hold_ms, now_ms);
        r.map_err(|e| self.diagnosed(e))
    }

    fn remove_expired(&mut self, retention_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        let r = self.remove_expired_inner(retention_ms, now_ms);
        r.map_err(|e| self.diagnosed(e))
    }

    fn load(&mut self, filter: &ReportFilter) -> Result<Vec<LoggedPrediction>, StoreError> {
        self.load_inner(filter)
    }

    fn labelled_pairs(&mut self, route: &str) -> Result<super::LabelledPairs, StoreError> {
        let mut stmt = self
            .conn
            .prepare_cached(
                "SELECT p.model, p.version, p.role, p.probability, p.adjusted_log_odds, o.label
                 FROM predictions p
                 JOIN outcomes o ON o.prediction_id = p.prediction_id AND o.state = 'matched'
                 WHERE p.route = ?1
                 ORDER BY p.seq",
            )
            .map_err(db("labelled pairs query"))?;
        let mut rows = stmt
            .query(params![route])
            .map_err(db("labelled pairs query"))?;
        let mut out = super::LabelledPairs::default();
        while let Some(r) = rows.next().map_err(db("labelled pairs query"))? {
            let text = |i: usize| -> Result<&str, StoreError> {
                r.get_ref(i)
                    .and_then(|v| v.as_str().map_err(Into::into))
                    .map_err(db("labelled pairs query"))
            };
            let label: i64 = r.get(5).map_err(db("labelled pairs query"))?;
            out.push(
                text(0)?,
                text(1)?,
                text(2)?,
                r.get(3).map_err(db("labelled pairs query"))?,
                r.get(4).map_err(db("labelled pairs query"))?,
                label != 0,
            );
        }
        Ok(out)
    }

    fn model_version(
        &mut self,
        model: &str,
        version: &str,
    ) -> Result<Option<ModelVersionInfo>, StoreError> {
        self.model_version_inner(model, version)
    }

    fn outcome_counts(&mut self) -> Result<OutcomeCounts, StoreError> {
        self.outcome_counts_inner()
    }

    fn series(&mut self, filter: &ReportFilter) -> Result<Vec<SeriesName>, StoreError> {
        self.series_inner(filter)
    }

    fn scan(
        &mut self,
        series: &SeriesScan<'_>,
        order: ScanOrder,
        labelled_only: bool,
        each: &mut dyn FnMut(&ScanRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.scan_inner(series, order, labelled_only, each)
    }

    fn nth_oldest(&mut self, series: &SeriesScan<'_>, k: u64) -> Result<Option<i64>, StoreError> {
        self.nth_oldest_inner(series, k)
    }

    fn follow_up(
        &mut self,
        series: &SeriesScan<'_>,
        now_ms: i64,
        horizon_ms: i64,
        each: &mut dyn FnMut(&FollowUpGroup) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.follow_up_inner(series, now_ms, horizon_ms, each)
    }

    fn role_models(
        &mut self,
        filter: &ReportFilter,
        role: &str,
    ) -> Result<Vec<(String, String, u64)>, StoreError> {
        self.role_models_inner(filter, role)
    }

    fn scan_pairs(
        &mut self,
        pairs: &PairScan<'_>,
        ranks: PairRanks,
        each: &mut dyn FnMut(&PairRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        self.scan_pairs_inner(pairs, ranks, each)
    }
}

/// The operations, before [`SqliteStore::diagnosed`] looks at their errors.
impl SqliteStore {
    fn insert_predictions_inner(
        &mut self,
        records: &[PredictionRecord],
        features: &[Option<&RowFeatures>],
    ) -> Result<(Vec<bool>, Vec<Settled>), StoreError> {
        let tx = self.conn.transaction().map_err(db("begin"))?;
        let mut written = Vec::with_capacity(records.len());
        let mut pairs = Vec::new();
        {
            let mut insert = tx
                .prepare_cached(
                    "INSERT OR IGNORE INTO predictions (prediction_id, route, model, version, role, time_ms,
                     margin, log_odds, adjusted_log_odds, probability, subject_key, tags, served_prior, decision)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14)",
                )
                .map_err(db("insert prediction"))?;
            for r in records {
                let tags = serde_json::to_string(&r.tags).unwrap_or_else(|_| "{}".into());
                let n = insert
                    .execute(params![
                        r.prediction_id,
                        r.route,
                        r.model,
                        r.version,
                        r.role,
                        r.time_ms,
                        r.margin,
                        r.log_odds,
                        r.adjusted_log_odds,
                        r.probability,
                        r.subject_key,
                        tags,
                        r.served.prior,
                        r.served.decision
                    ])
                    .map_err(db("insert prediction"))?;
                written.push(n > 0);
                if n == 0 {
                    continue; // already logged under this id, route, model and role
                }
                // A held outcome (or one already matched to another prediction with this id) settles it now.
                let outcome = outcome_of(&tx, &r.prediction_id)?;
                if let Some(next) = matching::prediction_written(outcome.as_ref()) {
                    if outcome != Some(next) {
                        put_outcome(&tx, &r.prediction_id, &next)?;
                    }
                    let row = Row {
                        route: r.route.clone(),
                        model: r.model.clone(),
                        version: r.version.clone(),
                        time_ms: r.time_ms,
                        adjusted_log_odds: r.adjusted_log_odds,
                        probability: r.probability,
                    };
                    pairs.push(settled(row, next.label, None, next.outcome_time_ms));
                }
            }
        }
        // The feature slots of the rows written, in the same transaction (`super::features`).
        if !features.is_empty() {
            let mut add = tx
                .prepare_cached(
                    "INSERT INTO feature_counts (window_ms, route, model, version, role, feature, slot, row_count)
                     VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8)
                     ON CONFLICT (window_ms, route, model, version, role, feature, slot)
                     DO UPDATE SET row_count = row_count + excluded.row_count",
                )
                .map_err(db("add feature counts"))?;
            for c in counts_of(records, features, &written) {
                add.execute(params![
                    c.window_ms,
                    c.route,
                    c.model,
                    c.version,
                    c.role,
                    c.feature,
                    c.slot,
                    c.rows
                ])
                .map_err(db("add feature counts"))?;
            }
        }
        tx.commit().map_err(db("commit predictions"))?;
        Ok((written, pairs))
    }

    fn register_model_inner(&mut self, info: &ModelVersionInfo) -> Result<(), StoreError> {
        let text = serde_json::to_string(info).unwrap_or_else(|_| "{}".into());
        let tx = self.conn.transaction().map_err(db("begin"))?;
        let added = tx
            .execute(
                "INSERT OR IGNORE INTO model_versions (model, version, info) VALUES (?1, ?2, ?3)",
                params![info.model, info.version, text],
            )
            .map_err(db("register model"))?;
        if added == 0 && !info.features.is_empty() {
            // Facts of an earlier build get the training distributions they lack (`super::features`).
            let stored: String = tx
                .query_row(
                    "SELECT info FROM model_versions WHERE model = ?1 AND version = ?2",
                    params![info.model, info.version],
                    |r| r.get(0),
                )
                .map_err(db("register model"))?;
            if let Some(text) = super::features::facts_with_distributions(&stored, info) {
                tx.execute(
                    "UPDATE model_versions SET info = ?3 WHERE model = ?1 AND version = ?2",
                    params![info.model, info.version, text],
                )
                .map_err(db("register model"))?;
            }
        }
        tx.commit().map_err(db("commit model version"))?;
        Ok(())
    }

    fn record_outcomes_inner(
        &mut self,
        outcomes: &[OutcomeInput],
        now_ms: i64,
    ) -> Result<(Vec<OutcomeResult>, Vec<Settled>), StoreError> {
        let tx = self.conn.transaction().map_err(db("begin"))?;
        let mut results = Vec::with_capacity(outcomes.len());
        let mut pairs = Vec::new();
        for o in outcomes {
            if let Some(message) = super::invalid_outcome(o) {
                results.push(OutcomeResult {
                    status: OutcomeStatus::Invalid,
                    predictions_matched: 0,
                    message,
                });
                continue;
            }
            let id = o.prediction_id.as_str();
            let time = o.time_ms.unwrap_or(now_ms);
            let existing = outcome_of(&tx, id)?;
            let rows = predictions_of(&tx, id)?;
            let step =
                matching::receive(existing.as_ref(), !rows.is_empty(), o.label, time, now_ms);
            if step.archive {
                history(&tx, id)?;
            }
            if existing != Some(step.next) {
                put_outcome(&tx, id, &step.next)?;
            }
            let n = step.predictions_matched(rows.len());
            if step.settles {
                for row in rows {
                    pairs.push(settled(row, o.label, step.previous, time));
                }
            }
            results.push(OutcomeResult {
                status: step.status,
                predictions_matched: n,
                message: String::new(),
            });
        }
        tx.commit().map_err(db("commit outcomes"))?;
        Ok((results, pairs))
    }

    fn settle_matured_inner(
        &mut self,
        maturity_ms: &BTreeMap<String, i64>,
        now_ms: i64,
        limit: usize,
    ) -> Result<Vec<Settled>, StoreError> {
        let tx = self.conn.transaction().map_err(db("begin"))?;
        let mut pairs = Vec::new();
        let mut left = limit;
        for (route, &maturity) in maturity_ms {
            if left == 0 {
                break;
            }
            let due: Vec<(String, i64)> = {
                let mut stmt = tx
                    .prepare_cached(
                        "SELECT p.prediction_id, MIN(p.time_ms) FROM predictions p
                         WHERE p.route = ?1 AND p.time_ms <= ?2 AND NOT EXISTS
                           (SELECT 1 FROM outcomes o WHERE o.prediction_id = p.prediction_id AND o.state = ?4)
                         GROUP BY p.prediction_id LIMIT ?3",
                    )
                    .map_err(db("find matured"))?;
                let rows = stmt
                    .query_map(
                        params![
                            route,
                            now_ms - maturity,
                            i64::try_from(left).unwrap_or(i64::MAX),
                            OutcomeState::Matched.as_str()
                        ],
                        |r| Ok((r.get(0)?, r.get(1)?)),
                    )
                    .map_err(db("find matured"))?
                    .collect::<Result<Vec<_>, _>>()
                    .map_err(db("find matured"))?;
                rows
            };
            left = left.saturating_sub(due.len());
            for (id, first_time) in due {
                let existing = outcome_of(&tx, &id)?;
                let Some(next) = matching::mature(existing.as_ref(), first_time, maturity, now_ms)
                else {
                    continue;
                };
                put_outcome(&tx, &id, &next)?;
                for row in predictions_of(&tx, &id)? {
                    pairs.push(settled(row, next.label, None, next.outcome_time_ms));
                }
            }
        }
        tx.commit().map_err(db("commit matured"))?;
        Ok(pairs)
    }

    fn expire_pending_inner(&mut self, hold_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        let n = self
            .conn
            .execute(
                "UPDATE outcomes SET state = ?1 WHERE state = ?2 AND received_ms <= ?3",
                params![
                    OutcomeState::Unmatched.as_str(),
                    OutcomeState::Pending.as_str(),
                    matching::expiry_cutoff(hold_ms, now_ms)
                ],
            )
            .map_err(db("expire pending"))?;
        Ok(n as u64)
    }

    fn remove_expired_inner(&mut self, retention_ms: i64, now_ms: i64) -> Result<u64, StoreError> {
        let tx = self.conn.transaction().map_err(db("begin"))?;
        let cutoff = now_ms - retention_ms;
        let n = tx
            .execute("DELETE FROM predictions WHERE time_ms < ?1", [cutoff])
            .map_err(db("remove predictions"))?;
        // Outcomes that no prediction refers to any more, and that are not waiting for one.
        tx.execute(
            "DELETE FROM outcomes WHERE state != ?2 AND received_ms < ?1 AND NOT EXISTS
             (SELECT 1 FROM predictions p WHERE p.prediction_id = outcomes.prediction_id)",
            params![cutoff, OutcomeState::Pending.as_str()],
        )
        .map_err(db("remove outcomes"))?;
        tx.execute(
            "DELETE FROM outcome_history WHERE received_ms < ?1",
            [cutoff],
        )
        .map_err(db("remove history"))?;
        // Windows whose whole hour is older than the cutoff.
        tx.execute(
            "DELETE FROM feature_counts WHERE window_ms + ?2 <= ?1",
            params![cutoff, super::features::WINDOW_MS],
        )
        .map_err(db("remove feature counts"))?;
        tx.commit().map_err(db("commit retention"))?;
        Ok(n as u64)
    }

    fn load_inner(&mut self, filter: &ReportFilter) -> Result<Vec<LoggedPrediction>, StoreError> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT p.route, p.model, p.version, p.role, p.time_ms, p.adjusted_log_odds, p.probability,
                        o.label, o.source, o.revision, p.prediction_id, p.served_prior, o.received_ms,
                        p.decision
                 FROM predictions p
                 LEFT JOIN outcomes o ON o.prediction_id = p.prediction_id AND o.state = ?6
                 WHERE (?1 IS NULL OR p.time_ms >= ?1) AND (?2 IS NULL OR p.time_ms < ?2)
                   AND (?3 IS NULL OR p.route = ?3) AND (?4 IS NULL OR p.model = ?4)
                   AND (?5 IS NULL OR p.version = ?5)
                 ORDER BY p.seq",
            )
            .map_err(db("report query"))?;
        let rows = stmt
            .query_map(
                params![
                    filter.from_ms,
                    filter.to_ms,
                    filter.route,
                    filter.model,
                    filter.version,
                    OutcomeState::Matched.as_str()
                ],
                |r| {
                    let label: Option<i64> = r.get(7)?;
                    let source: Option<String> = r.get(8)?;
                    let revision: Option<i64> = r.get(9)?;
                    Ok(LoggedPrediction {
                        prediction_id: r.get(10)?,
                        route: r.get(0)?,
                        model: r.get(1)?,
                        version: r.get(2)?,
                        role: r.get(3)?,
                        time_ms: r.get(4)?,
                        adjusted_log_odds: r.get(5)?,
                        probability: r.get(6)?,
                        label: label.map(|l| l != 0),
                        by_maturity: source.as_deref().and_then(Source::parse)
                            == Some(Source::Maturity),
                        corrected: revision.unwrap_or(0) > 0,
                        served_prior: r.get(11)?,
                        outcome_received_ms: r.get(12)?,
                        served_decision: r.get(13)?,
                    })
                },
            )
            .map_err(db("report query"))?
            .collect::<Result<Vec<_>, _>>()
            .map_err(db("report query"))?;
        Ok(rows)
    }

    fn model_version_inner(
        &mut self,
        model: &str,
        version: &str,
    ) -> Result<Option<ModelVersionInfo>, StoreError> {
        let text: Option<String> = self
            .conn
            .query_row(
                "SELECT info FROM model_versions WHERE model = ?1 AND version = ?2",
                params![model, version],
                |r| r.get(0),
            )
            .optional()
            .map_err(db("read model version"))?;
        Ok(text.and_then(|t| serde_json::from_str(&t).ok()))
    }

    fn outcome_counts_inner(&mut self) -> Result<OutcomeCounts, StoreError> {
        let count = |state: &str| -> Result<u64, StoreError> {
            let n: i64 = self
                .conn
                .query_row(
                    "SELECT COUNT(*) FROM outcomes WHERE state = ?1",
                    [state],
                    |r| r.get(0),
                )
                .map_err(db("count outcomes"))?;
            Ok(u64::try_from(n).unwrap_or(0))
        };
        Ok(OutcomeCounts {
            pending: count(OutcomeState::Pending.as_str())?,
            unmatched: count(OutcomeState::Unmatched.as_str())?,
        })
    }
}

/// The rows of one series (parameters 1 to 6: from, to, route, model, version, role).
const SERIES_WHERE: &str = "(?1 IS NULL OR p.time_ms >= ?1) AND (?2 IS NULL OR p.time_ms < ?2)
    AND p.route = ?3 AND p.model = ?4 AND p.version = ?5 AND p.role = ?6";

/// The champion-challenger pairs (parameters 1 to 7: from, to, route, champion, challenger, champion version,
/// challenger version, a version NULL for any), in a CTE `pr` with
/// the challenger's `seq`, the log-odds `a` (champion) and `b` (challenger), and the label `l` (NULL without one).
const PAIRS_CTE: &str = "WITH pr AS (
    SELECT d.seq AS seq, c.adjusted_log_odds AS a, d.adjusted_log_odds AS b, o.label AS l
    FROM predictions d
    JOIN predictions c ON c.prediction_id = d.prediction_id AND c.route = d.route AND c.role = 'champion'
        AND c.model = ?4 AND (?6 IS NULL OR c.version = ?6) AND (?1 IS NULL OR c.time_ms >= ?1) AND (?2 IS NULL OR c.time_ms < ?2)
    LEFT JOIN outcomes o ON o.prediction_id = d.prediction_id AND o.state = 'matched'
    WHERE d.route = ?3 AND d.role = 'challenger' AND d.model = ?5 AND (?7 IS NULL OR d.version = ?7)
        AND (?1 IS NULL OR d.time_ms >= ?1) AND (?2 IS NULL OR d.time_ms < ?2))";

/// The select over `pr` for each [`PairRanks`] (see [`super::PairRow`]).
pub(crate) fn pair_select(ranks: PairRanks) -> &'static str {
    match ranks {
        PairRanks::None => "SELECT a, b, l, CAST(0 AS BIGINT), CAST(0 AS BIGINT) FROM pr ORDER BY seq",
        PairRanks::Midranks => {
            "SELECT a, b, l,
                2 * RANK() OVER (ORDER BY a) + COUNT(*) OVER (PARTITION BY a) - 1,
                2 * RANK() OVER (ORDER BY b) + COUNT(*) OVER (PARTITION BY b) - 1
             FROM pr ORDER BY seq"
        }
        PairRanks::Placements => {
            "SELECT a, b, l,
                CASE WHEN l = 1 THEN 2 * SUM(1 - l) OVER wa - SUM(1 - l) OVER pa
                     ELSE 2 * (SUM(l) OVER () - SUM(l) OVER wa) + SUM(l) OVER pa END,
                CASE WHEN l = 1 THEN 2 * SUM(1 - l) OVER wb - SUM(1 - l) OVER pb
                     ELSE 2 * (SUM(l) OVER () - SUM(l) OVER wb) + SUM(l) OVER pb END
             FROM pr WHERE l IS NOT NULL
             WINDOW wa AS (ORDER BY a), pa AS (PARTITION BY a), wb AS (ORDER BY b), pb AS (PARTITION BY b)
             ORDER BY seq"
        }
        PairRanks::ChampionAscending => "SELECT a, b, l, CAST(0 AS BIGINT), CAST(0 AS BIGINT) FROM pr ORDER BY a",
    }
}

/// The ORDER BY of each [`ScanOrder`].
pub(crate) fn scan_order(order: ScanOrder) -> &'static str {
    match order {
        ScanOrder::Written => "p.seq",
        ScanOrder::LogOdds => "p.adjusted_log_odds ASC, p.seq DESC",
        ScanOrder::Probability => "p.probability ASC, p.seq ASC",
    }
}

/// The streamed reads of reports and comparisons.
impl SqliteStore {
    fn series_inner(&mut self, filter: &ReportFilter) -> Result<Vec<SeriesName>, StoreError> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT DISTINCT p.route, p.model, p.version, p.role FROM predictions p
                 WHERE (?1 IS NULL OR p.time_ms >= ?1) AND (?2 IS NULL OR p.time_ms < ?2)
                   AND (?3 IS NULL OR p.route = ?3) AND (?4 IS NULL OR p.model = ?4)
                   AND (?5 IS NULL OR p.version = ?5)",
            )
            .map_err(db("series query"))?;
        let mut out = stmt
            .query_map(
                params![
                    filter.from_ms,
                    filter.to_ms,
                    filter.route,
                    filter.model,
                    filter.version
                ],
                |r| Ok((r.get(0)?, r.get(1)?, r.get(2)?, r.get(3)?)),
            )
            .map_err(db("series query"))?
            .collect::<Result<Vec<SeriesName>, _>>()
            .map_err(db("series query"))?;
        out.sort();
        Ok(out)
    }

    fn scan_inner(
        &mut self,
        s: &SeriesScan<'_>,
        order: ScanOrder,
        labelled_only: bool,
        each: &mut dyn FnMut(&ScanRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let sql = format!(
            "SELECT p.time_ms, p.adjusted_log_odds, p.probability, o.label, o.source, o.revision,
                    p.served_prior, o.received_ms, p.decision
             FROM predictions p
             LEFT JOIN outcomes o ON o.prediction_id = p.prediction_id AND o.state = 'matched'
             WHERE {SERIES_WHERE}{}
             ORDER BY {}",
            if labelled_only {
                " AND o.label IS NOT NULL"
            } else {
                ""
            },
            scan_order(order)
        );
        let mut stmt = self.conn.prepare(&sql).map_err(db("report scan"))?;
        let mut rows = stmt
            .query(params![
                s.from_ms, s.to_ms, s.route, s.model, s.version, s.role
            ])
            .map_err(db("report scan"))?;
        while let Some(r) = rows.next().map_err(db("report scan"))? {
            let label: Option<i64> = r.get(3).map_err(db("report scan"))?;
            let source: Option<String> = r.get(4).map_err(db("report scan"))?;
            let revision: Option<i64> = r.get(5).map_err(db("report scan"))?;
            each(&ScanRow {
                time_ms: r.get(0).map_err(db("report scan"))?,
                adjusted_log_odds: r.get(1).map_err(db("report scan"))?,
                probability: r.get(2).map_err(db("report scan"))?,
                label: label.map(|l| l != 0),
                by_maturity: source.as_deref().and_then(Source::parse) == Some(Source::Maturity),
                corrected: revision.unwrap_or(0) > 0,
                served_prior: r.get(6).map_err(db("report scan"))?,
                outcome_received_ms: r.get(7).map_err(db("report scan"))?,
                served_decision: r.get(8).map_err(db("report scan"))?,
            })?;
        }
        Ok(())
    }

    fn nth_oldest_inner(&mut self, s: &SeriesScan<'_>, k: u64) -> Result<Option<i64>, StoreError> {
        let sql = format!(
            "SELECT p.time_ms FROM predictions p WHERE {SERIES_WHERE} ORDER BY p.time_ms LIMIT 1 OFFSET ?7"
        );
        self.conn
            .query_row(
                &sql,
                params![
                    s.from_ms,
                    s.to_ms,
                    s.route,
                    s.model,
                    s.version,
                    s.role,
                    i64::try_from(k).unwrap_or(i64::MAX)
                ],
                |r| r.get(0),
            )
            .optional()
            .map_err(db("report follow-up"))
    }

    fn follow_up_inner(
        &mut self,
        s: &SeriesScan<'_>,
        now_ms: i64,
        horizon_ms: i64,
        each: &mut dyn FnMut(&FollowUpGroup) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let sql = format!(
            "SELECT t, COUNT(*), SUM(ev) FROM (
                SELECT CASE WHEN ev = 1 THEN d ELSE MIN(?7 - time_ms, ?8) END AS t, ev FROM (
                    SELECT p.time_ms AS time_ms, MAX(o.received_ms - p.time_ms, 0) AS d,
                           CASE WHEN o.label = 1 AND MAX(o.received_ms - p.time_ms, 0) <= ?8 THEN 1 ELSE 0 END
                               AS ev
                    FROM predictions p
                    LEFT JOIN outcomes o ON o.prediction_id = p.prediction_id AND o.state = 'matched'
                    WHERE {SERIES_WHERE}))
             GROUP BY t ORDER BY t"
        );
        let mut stmt = self.conn.prepare(&sql).map_err(db("report follow-up"))?;
        let mut rows = stmt
            .query(params![
                s.from_ms, s.to_ms, s.route, s.model, s.version, s.role, now_ms, horizon_ms
            ])
            .map_err(db("report follow-up"))?;
        while let Some(r) = rows.next().map_err(db("report follow-up"))? {
            each(&FollowUpGroup {
                time_ms: r.get(0).map_err(db("report follow-up"))?,
                count: r.get(1).map_err(db("report follow-up"))?,
                events: r.get(2).map_err(db("report follow-up"))?,
            })?;
        }
        Ok(())
    }

    fn role_models_inner(
        &mut self,
        filter: &ReportFilter,
        role: &str,
    ) -> Result<Vec<(String, String, u64)>, StoreError> {
        let mut stmt = self
            .conn
            .prepare(
                "SELECT p.model, p.version, COUNT(*) FROM predictions p
                 WHERE (?1 IS NULL OR p.time_ms >= ?1) AND (?2 IS NULL OR p.time_ms < ?2)
                   AND p.route = ?3 AND p.role = ?4
                 GROUP BY p.model, p.version ORDER BY p.model, p.version",
            )
            .map_err(db("comparison models"))?;
        let out = stmt
            .query_map(
                params![filter.from_ms, filter.to_ms, filter.route, role],
                |r| {
                    Ok((
                        r.get::<_, String>(0)?,
                        r.get::<_, String>(1)?,
                        r.get::<_, i64>(2)?,
                    ))
                },
            )
            .map_err(db("comparison models"))?
            .collect::<Result<Vec<_>, _>>()
            .map_err(db("comparison models"))?;
        Ok(out
            .into_iter()
            .map(|(m, v, c)| (m, v, u64::try_from(c).unwrap_or(0)))
            .collect())
    }

    fn scan_pairs_inner(
        &mut self,
        q: &PairScan<'_>,
        ranks: PairRanks,
        each: &mut dyn FnMut(&PairRow) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let sql = format!("{PAIRS_CTE}\n{}", pair_select(ranks));
        let mut stmt = self.conn.prepare(&sql).map_err(db("comparison scan"))?;
        let mut rows = stmt
            .query(params![
                q.from_ms,
                q.to_ms,
                q.route,
                q.champion,
                q.challenger,
                q.champion_version,
                q.challenger_version
            ])
            .map_err(db("comparison scan"))?;
        while let Some(r) = rows.next().map_err(db("comparison scan"))? {
            let label: Option<i64> = r.get(2).map_err(db("comparison scan"))?;
            each(&PairRow {
                champion: r.get(0).map_err(db("comparison scan"))?,
                challenger: r.get(1).map_err(db("comparison scan"))?,
                label: label.map(|l| l != 0),
                champion_twice: r.get(3).map_err(db("comparison scan"))?,
                challenger_twice: r.get(4).map_err(db("comparison scan"))?,
            })?;
        }
        Ok(())
    }
}
