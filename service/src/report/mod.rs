//! Exact reports from the prediction store over any time range, route, model and version: one section per route,
//! model, version and role found.
//!
//! Every figure is computed by `probity_models::metrics` on the matched (prediction, latest label) pairs, so the
//! report agrees with the references those functions are tested against (scikit-learn, SciPy; see
//! `tests/tests/metrics_reference.rs`). The choices are fixed and stated in the output: log-loss from the final
//! log-odds; Brier decomposition and calibration table over ten equal-width bins (as
//! `sklearn.calibration.calibration_curve(strategy="uniform")`); Hosmer-Lemeshow over ten groups cut by rank;
//! AUC, KS and gains by decile on the final log-odds; PSI of all predictions in the range (with or without
//! outcome) against the model file's reference distribution, empty bins floored at 1e-4.
//!
//! Each section also carries the Saerens, Latinne and Decaestecker (2002) EM estimate of the base rate of the
//! scored population ([`estimate_prior`]) over all its predictions in the range, beside the configured (target)
//! base rate and the observed positive rate among matched outcomes. The EM needs posteriors calibrated under a known
//! prior; the store keeps the served probability (calibrated, then shifted to the route's target base rate when one
//! was applied) but not the route's configuration, so the caller of [`build_with`] passes each route's configured
//! target base rate, and a route without one is taken to have served under the model's own base rate (recorded in
//! the store's model version facts).
//!
//! Each section also has the operating points (approval and decline rates, precision, recall, expected cost) at
//! each decision rule its predictions were served under, as the store kept it with them ([`operating`]).
//!
//! [`text`] renders the terminal table, [`svg`] the pictures; the JSON is this module's types through serde.

pub mod calibration_tests;
pub mod features;
pub mod immature;
pub mod operating;
pub mod stream;
pub mod svg;
pub mod text;

use std::collections::BTreeMap;

use probity_models::fit::{estimate_prior, EmOptions};
use probity_models::metrics::{
    brier_decomposition, brier_score, calibration_table, gains_lift, hosmer_lemeshow, ks_statistic,
    log_loss_from_log_odds, psi_from_fractions, roc_auc, BinStrategy, EmptyBinRule, HlGrouping,
};
use serde::Serialize;

use crate::store::{LoggedPrediction, OutcomeCounts, ReportFilter, Store, StoreError};

/// Bins of the calibration table and the Brier decomposition.
pub const CALIBRATION_BINS: usize = 10;
/// Hosmer-Lemeshow groups (by rank).
pub const HL_GROUPS: usize = 10;
/// Gains and lift groups.
pub const GAINS_GROUPS: usize = 10;
/// Empty-bin rule of the PSI.
pub const PSI_FLOOR: f64 = 1e-4;
/// Bins of the class-conditional score histograms.
pub const HISTOGRAM_BINS: usize = 20;

/// A whole report.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// The time range and filters asked for (ms since the epoch).
    pub from_ms: Option<i64>,
    /// End of the range (exclusive).
    pub to_ms: Option<i64>,
    /// Route filter.
    pub route: Option<String>,
    /// Model filter.
    pub model: Option<String>,
    /// Version filter.
    pub version: Option<String>,
    /// Outcomes waiting for their prediction, and outcomes that never matched (whole store).
    pub outcomes: OutcomeCounts,
    /// One section per route, model, version and role.
    pub series: Vec<SeriesReport>,
}

/// The figures of one route, model, version and role.
#[derive(Debug, Clone, Serialize)]
pub struct SeriesReport {
    /// Route.
    pub route: String,
    /// Model name.
    pub model: String,
    /// Model version.
    pub version: String,
    /// Role (`champion`, ...).
    pub role: String,
    /// Predictions in the range.
    pub predictions: usize,
    /// Predictions with a known outcome (the pairs every figure below is computed on).
    pub with_outcome: usize,
    /// Predictions still waiting for their outcome (immature).
    pub immature: usize,
    /// Outcomes settled as negatives by the maturity rule.
    pub settled_by_maturity: usize,
    /// Outcomes whose label was corrected at least once (the latest label is used).
    pub corrected: usize,
    /// Mean probability over all predictions in the range.
    pub mean_probability: f64,
    /// Mean probability over the pairs with an outcome (the predicted base rate).
    pub predicted_base_rate: Option<f64>,
    /// Share of positives among them (the observed base rate).
    pub observed_base_rate: Option<f64>,
    /// The route's configured target base rate, when the caller knew one (see [`build_with`]).
    pub configured_base_rate: Option<f64>,
    /// The prior the served probabilities are calibrated under, which the EM starts from and shifts away from: the
    /// configured target base rate if there is one, else the model's base rate; `None` when neither is known.
    pub served_base_rate: Option<f64>,
    /// Saerens, Latinne and Decaestecker (2002) EM estimate of the base rate over all predictions in the range
    /// (with or without outcome), from their probabilities under `served_base_rate`.
    pub base_rate_estimate: Option<f64>,
    /// Mean log-loss (nats) from the final log-odds.
    pub log_loss: Option<f64>,
    /// Brier score.
    pub brier: Option<f64>,
    /// Brier decomposition over the calibration bins.
    pub brier_decomposition: Option<Decomposition>,
    /// ROC AUC.
    pub roc_auc: Option<f64>,
    /// KS statistic between the classes' score distributions.
    pub ks: Option<f64>,
    /// Calibration table.
    pub calibration: Option<Calibration>,
    /// Hosmer-Lemeshow test.
    pub hosmer_lemeshow: Option<HosmerLemeshow>,
    /// Gains and lift by decile.
    pub gains: Vec<Gains>,
    /// PSI against the reference distribution.
    pub psi: Option<Psi>,
    /// Probability histograms of the pairs by class: counts per equal-width bin.
    pub histogram_negative: Vec<u64>,
    /// Same for positives.
    pub histogram_positive: Vec<u64>,
    /// Why a figure is missing.
    pub notes: Vec<String>,
    /// Calibration tests on the pairs with an outcome (Spiegelhalter 1986; Cox 1958).
    pub calibration_tests: calibration_tests::CalibrationTests,
    /// Estimated eventual positive rate of all the section's predictions, outcomes still arriving included
    /// (Kaplan-Meier; see [`immature`]).
    pub eventual_positive_rate: Option<immature::EventualRate>,
    /// Estimated eventual figures of the predictions younger than the horizon, beside the matured ones (see
    /// [`immature`]), or why they are unknown.
    pub immature_window: immature::ImmatureWindow,
    /// The operating points on the pairs with an outcome at each distinct decision rule the predictions were served
    /// under, in the order first served (see [`operating`]); empty when the route had no rule.
    pub operating_points: Vec<operating::ServedRule>,
    /// Per-feature stability (PSI, missing and unknown-category rates) over the hour windows that overlap the
    /// range, for the monitored features of the model file (see [`features`]); empty when none was counted.
    pub features: Vec<features::FeatureReport>,
}

/// Murphy's decomposition with the two within-bin terms.
#[derive(Debug, Clone, Serialize)]
pub struct Decomposition {
    /// Reliability.
    pub reliability: f64,
    /// Resolution.
    pub resolution: f64,
    /// Uncertainty.
    pub uncertainty: f64,
    /// Within-bin variance.
    pub within_bin_variance: f64,
    /// Within-bin covariance (times two).
    pub within_bin_covariance: f64,
}

/// The calibration table.
#[derive(Debug, Clone, Serialize)]
pub struct Calibration {
    /// Non-empty bins.
    pub bins: Vec<CalibrationBin>,
    /// Expected calibration error.
    pub ece: f64,
    /// Maximum calibration error.
    pub mce: f64,
}

/// One bin.
#[derive(Debug, Clone, Serialize)]
pub struct CalibrationBin {
    /// Lower edge (excluded except for the first bin).
    pub lower: f64,
    /// Upper edge (included).
    pub upper: f64,
    /// Pairs.
    pub count: usize,
    /// Positives.
    pub positives: usize,
    /// Mean predicted probability.
    pub mean_predicted: f64,
    /// Observed share of positives.
    pub fraction_positive: f64,
}

/// Hosmer-Lemeshow.
#[derive(Debug, Clone, Serialize)]
pub struct HosmerLemeshow {
    /// The statistic.
    pub statistic: f64,
    /// Degrees of freedom.
    pub degrees_of_freedom: usize,
    /// Chi-square tail probability.
    pub p_value: f64,
}

/// One gains row.
#[derive(Debug, Clone, Serialize)]
pub struct Gains {
    /// Group, 0 = highest scores.
    pub group: usize,
    /// Pairs.
    pub count: usize,
    /// Positives.
    pub positives: usize,
    /// Share of all positives in this and higher groups.
    pub cumulative_gain: f64,
    /// Lift of the group.
    pub lift: f64,
    /// Cumulative lift.
    pub cumulative_lift: f64,
}

/// PSI and its bins.
#[derive(Debug, Clone, Serialize)]
pub struct Psi {
    /// The index.
    pub value: f64,
    /// What the bins are on.
    pub on: String,
    /// The empty-bin rule.
    pub rule: String,
    /// Reference shares.
    pub expected: Vec<f64>,
    /// Counts in the range.
    pub actual: Vec<u64>,
}

/// Builds the report of `filter` from a store, with no configured target base rates (every route is taken to
/// have served under its model's base rate; see [`build_with`]).
pub fn build(store: &mut dyn Store, filter: &ReportFilter) -> Result<Report, StoreError> {
    build_with(store, filter, &BTreeMap::new())
}

/// Builds the report of `filter` from a store. `configured` maps a route name to its configured target base rate:
/// the prior its served probabilities are calibrated under, which the base-rate EM needs. A route missing from it
/// is taken to have served under the model's own base rate, as the scorer does without a target.
pub fn build_with(
    store: &mut dyn Store,
    filter: &ReportFilter,
    configured: &BTreeMap<String, f64>,
) -> Result<Report, StoreError> {
    build_binned(
        store,
        filter,
        configured,
        BinStrategy::Uniform(CALIBRATION_BINS),
    )
}

/// [`build_with`] with calibration bins (and the Brier decomposition's) cut by `bins`: equal-width, or equal-count
/// (`BinStrategy::Quantile`), which at fraud base rates spreads the cases that equal-width bins put in the first.
pub fn build_binned(
    store: &mut dyn Store,
    filter: &ReportFilter,
    configured: &BTreeMap<String, f64>,
    bins: BinStrategy,
) -> Result<Report, StoreError> {
    build_full(store, filter, configured, bins, &Horizons::default())
}

/// The horizons of the immature-window estimates (ms): a route's label maturity when known.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Horizons {
    /// Per route.
    pub by_route: BTreeMap<String, i64>,
    /// For every route not in `by_route`.
    pub all: Option<i64>,
}

impl Horizons {
    /// The horizon of `route`, if one is known.
    pub fn of(&self, route: &str) -> Option<i64> {
        self.by_route.get(route).copied().or(self.all)
    }
}

/// [`build_binned`] with the immature window's horizons (else each section's follow-up rule, see [`immature`]).
pub fn build_full(
    store: &mut dyn Store,
    filter: &ReportFilter,
    configured: &BTreeMap<String, f64>,
    bins: BinStrategy,
    horizons: &Horizons,
) -> Result<Report, StoreError> {
    // A range of at most `LOADED_UP_TO` predictions per series is loaded at once (about 1 KB a prediction, so a
    // few MB): one query instead of the streamed passes' eight or so per series, which on a store whose planner
    // has no statistics yet (a fresh PostgreSQL table) cost more than the rows. The figures are the same either
    // way (tests/report_stream.rs).
    let names = store.series(filter)?;
    let mut small = names.len() <= 8;
    for (route, model, version, role) in &names {
        if !small {
            break;
        }
        let scan = crate::store::SeriesScan {
            from_ms: filter.from_ms,
            to_ms: filter.to_ms,
            route,
            model,
            version,
            role,
        };
        small = store.nth_oldest(&scan, LOADED_UP_TO as u64)?.is_none();
    }
    if small {
        build_loaded(store, filter, configured, bins, horizons)
    } else {
        stream::build(store, filter, configured, bins, horizons)
    }
}

/// The most predictions per series a report loads at once instead of streaming (see [`build_binned`]).
pub const LOADED_UP_TO: usize = 4096;

/// [`build_binned`] computed from the whole range loaded at once ([`Store::load`], about 1 KB a prediction
/// while it runs): the plain form of every figure, which the streamed report is checked against
/// (`tests/report_stream.rs`).
pub fn build_loaded(
    store: &mut dyn Store,
    filter: &ReportFilter,
    configured: &BTreeMap<String, f64>,
    bins: BinStrategy,
    horizons: &Horizons,
) -> Result<Report, StoreError> {
    let rows = store.load(filter)?;
    // A handful of series, found by a scan, so that no row's names are copied: four more strings per row were
    // most of a report's memory.
    type Key = (String, String, String, String);
    let mut groups: Vec<(Key, Vec<LoggedPrediction>)> = Vec::new();
    for r in rows {
        let same = |k: &Key| k.0 == r.route && k.1 == r.model && k.2 == r.version && k.3 == r.role;
        match groups.iter_mut().find(|(k, _)| same(k)) {
            Some((_, members)) => members.push(r),
            None => {
                let key = (
                    r.route.clone(),
                    r.model.clone(),
                    r.version.clone(),
                    r.role.clone(),
                );
                groups.push((key, vec![r]));
            }
        }
    }
    groups.sort_by(|a, b| a.0.cmp(&b.0));
    let mut series = Vec::new();
    for ((route, model, version, role), rows) in groups {
        let info = store.model_version(&model, &version)?;
        let rates = BaseRates {
            configured: configured.get(&route).copied(),
            model: info.as_ref().map(|i| i.base_rate),
        };
        let reference = info.and_then(|i| i.reference);
        let horizon = horizons.of(&route);
        series.push(section(
            (route, model, version, role),
            &rows,
            reference.as_ref(),
            rates,
            (bins, horizon),
        ));
    }
    features::add(store, filter, &mut series)?;
    Ok(Report {
        from_ms: filter.from_ms,
        to_ms: filter.to_ms,
        route: filter.route.clone(),
        model: filter.model.clone(),
        version: filter.version.clone(),
        outcomes: store.outcome_counts()?,
        series,
    })
}

/// The value, or `None` with the reason noted.
fn keep<T>(
    notes: &mut Vec<String>,
    what: &str,
    result: Result<T, probity_models::metrics::MetricsError>,
) -> Option<T> {
    match result {
        Ok(v) => Some(v),
        Err(e) => {
            notes.push(format!("{what}: {e}"));
            None
        }
    }
}

/// The base rates a section is reported against.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct BaseRates {
    /// The route's configured target base rate, if any.
    pub configured: Option<f64>,
    /// The model version's base rate, if the store knows it.
    pub model: Option<f64>,
}

impl BaseRates {
    /// The prior the served probabilities are calibrated under: the target if one was applied, else the model's.
    pub fn served(&self) -> Option<f64> {
        self.configured.or(self.model)
    }
}

/// The probabilities of `rows` on one prior, for the base-rate EM, and the rates with that prior as the served
/// one. Each row's prior is the one the store kept with it ([`LoggedPrediction::served_prior`]), else `rates`'s
/// served prior (rows logged before the store kept it). The common prior is the latest row's; a row served under
/// another is moved to it by the base-rate shift of its log-odds, `logit(p') = logit(p) - logit(prior) +
/// logit(common)` (Saerens, Latinne and Decaestecker 2002, "Adjusting the outputs of a classifier to new a priori
/// probabilities", eq. 2.4, the same shift the scorer applies). With one prior throughout nothing moves.
fn on_one_prior(
    notes: &mut Vec<String>,
    rows: &[LoggedPrediction],
    rates: BaseRates,
) -> (Vec<f64>, BaseRates) {
    let prior_of = |r: &LoggedPrediction| r.served_prior.or(rates.served());
    let Some(common) = rows.last().and_then(prior_of) else {
        return (rows.iter().map(|r| r.probability).collect(), rates);
    };
    let logit = |q: f64| (q / (1.0 - q)).ln();
    let mut moved = 0usize;
    let p = rows
        .iter()
        .map(|r| match prior_of(r) {
            Some(own) if own != common => {
                moved += 1;
                let h = r.adjusted_log_odds - logit(own) + logit(common);
                1.0 / (1.0 + (-h).exp())
            }
            _ => r.probability,
        })
        .collect();
    if moved > 0 {
        notes.push(moved_note(moved, rows.len(), common));
    }
    (
        p,
        rates_on(rates, rows.last().and_then(|r| r.served_prior), common),
    )
}

/// The note of [`on_one_prior`] when `moved` of `rows` predictions were shifted to `common`.
fn moved_note(moved: usize, rows: usize, common: f64) -> String {
    format!(
        "base-rate estimate: {moved} of {rows} predictions were served under another base rate than the latest              ({common}); their probabilities were shifted to it first"
    )
}

/// The rates with `common` as the served prior, given the prior the latest prediction was served under.
fn rates_on(rates: BaseRates, latest: Option<f64>, common: f64) -> BaseRates {
    let rates = BaseRates {
        configured: rates.configured.or_else(|| {
            // The target the store says the latest prediction was served under, when it is not the model's own.
            (latest.is_some() && Some(common) != rates.model).then_some(common)
        }),
        model: rates.model,
    };
    rates.with_served(common)
}

impl BaseRates {
    /// These rates with `served` as the prior the probabilities are calibrated under.
    fn with_served(self, served: f64) -> BaseRates {
        if self.served() == Some(served) {
            self
        } else {
            BaseRates {
                configured: Some(served),
                model: self.model,
            }
        }
    }
}

/// The EM estimate over `probabilities` served under `rates`, or `None` with the reason noted.
fn em_estimate(notes: &mut Vec<String>, probabilities: &[f64], rates: BaseRates) -> Option<f64> {
    let Some(served) = rates.served() else {
        notes.push(
            "base-rate estimate: neither a configured nor the model's base rate is known".into(),
        );
        return None;
    };
    match estimate_prior(probabilities, served, EmOptions::default()) {
        Ok(e) => {
            if !e.converged {
                notes.push(format!(
                    "base-rate estimate: EM stopped at its {} iteration cap before converging",
                    e.iterations
                ));
            }
            Some(e.prior)
        }
        Err(e) => {
            notes.push(format!("base-rate estimate: {e}"));
            None
        }
    }
}

/// A series: route, model, version and role.
pub type SeriesKey = (String, String, String, String);

/// The figures of one series; `rows` in the order they were written; calibration bins cut by `bins`, and the
/// immature window's horizon (ms) when the route's maturity is known.
pub fn section(
    (route, model, version, role): SeriesKey,
    rows: &[LoggedPrediction],
    reference: Option<&crate::store::Reference>,
    rates: BaseRates,
    (bins, horizon_ms): (BinStrategy, Option<i64>),
) -> SeriesReport {
    let mut notes = Vec::new();
    let pairs: Vec<&LoggedPrediction> = rows.iter().filter(|r| r.label.is_some()).collect();
    let p: Vec<f64> = pairs.iter().map(|r| r.probability).collect();
    let h: Vec<f64> = pairs.iter().map(|r| r.adjusted_log_odds).collect();
    let y: Vec<bool> = pairs.iter().map(|r| r.label == Some(true)).collect();
    let n = pairs.len();
    let mean = |xs: &[f64]| (!xs.is_empty()).then(|| xs.iter().sum::<f64>() / xs.len() as f64);
    let log_loss = keep(&mut notes, "log-loss", log_loss_from_log_odds(&h, &y));
    let brier = keep(&mut notes, "Brier", brier_score(&p, &y));
    let roc = keep(&mut notes, "AUC", roc_auc(&h, &y));
    let ks = keep(&mut notes, "KS", ks_statistic(&h, &y));
    let decomposition = brier_decomposition(&p, &y, bins)
        .ok()
        .map(|d| Decomposition {
            reliability: d.reliability,
            resolution: d.resolution,
            uncertainty: d.uncertainty,
            within_bin_variance: d.within_bin_variance,
            within_bin_covariance: d.within_bin_covariance,
        });
    let calibration = calibration_table(&p, &y, bins).ok().map(|t| Calibration {
        bins: t
            .bins
            .iter()
            .map(|b| CalibrationBin {
                lower: b.lower,
                upper: b.upper,
                count: b.count,
                positives: b.positives,
                mean_predicted: b.mean_predicted,
                fraction_positive: b.fraction_positive,
            })
            .collect(),
        ece: t.ece,
        mce: t.mce,
    });
    let hl = keep(
        &mut notes,
        "Hosmer-Lemeshow",
        hosmer_lemeshow(&p, &y, HlGrouping::ByRank(HL_GROUPS)).map(|t| HosmerLemeshow {
            statistic: t.statistic,
            degrees_of_freedom: t.degrees_of_freedom,
            p_value: t.p_value,
        }),
    );
    let gains = if n >= GAINS_GROUPS {
        keep(&mut notes, "gains", gains_lift(&h, &y, GAINS_GROUPS))
            .unwrap_or_default()
            .into_iter()
            .map(|g| Gains {
                group: g.group,
                count: g.count,
                positives: g.positives,
                cumulative_gain: g.cumulative_gain,
                lift: g.lift,
                cumulative_lift: g.cumulative_lift,
            })
            .collect()
    } else {
        notes.push(format!(
            "gains: {n} pairs, fewer than the {GAINS_GROUPS} groups"
        ));
        Vec::new()
    };
    let psi = match reference {
        None => {
            notes.push("PSI: the model file has no reference distribution".into());
            None
        }
        Some(r) => {
            let mut actual = vec![0u64; r.fractions.len()];
            for row in rows {
                if let Some(c) =
                    actual.get_mut(r.bin_of(r.value_of(row.probability, row.adjusted_log_odds)))
                {
                    *c += 1;
                }
            }
            match psi_from_fractions(&r.fractions, &actual, EmptyBinRule::Floor(PSI_FLOOR)) {
                Ok(value) => Some(Psi {
                    value,
                    on: r.on.clone(),
                    rule: format!("shares below {PSI_FLOOR} floored to {PSI_FLOOR}"),
                    expected: r.fractions.clone(),
                    actual,
                }),
                Err(e) => {
                    notes.push(format!("PSI: {e}"));
                    None
                }
            }
        }
    };
    let mut histogram_negative = vec![0u64; HISTOGRAM_BINS];
    let mut histogram_positive = vec![0u64; HISTOGRAM_BINS];
    for (&pi, &yi) in p.iter().zip(&y) {
        let bin = ((pi * HISTOGRAM_BINS as f64) as usize).min(HISTOGRAM_BINS - 1);
        if yi {
            histogram_positive[bin] += 1;
        } else {
            histogram_negative[bin] += 1;
        }
    }
    let all_p: Vec<f64> = rows.iter().map(|r| r.probability).collect();
    let (em_p, rates) = on_one_prior(&mut notes, rows, rates);
    let base_rate_estimate = em_estimate(&mut notes, &em_p, rates);
    let calibration_tests = calibration_tests::compute(&p, &h, &y, &mut notes);
    let eventual_positive_rate = immature::compute(rows, &mut notes);
    let immature_window = immature::window(rows, bins, horizon_ms);
    let operating_points = operating::compute(rows, &mut notes);
    SeriesReport {
        route,
        model,
        version,
        role,
        predictions: rows.len(),
        with_outcome: n,
        immature: rows.len() - n,
        settled_by_maturity: pairs.iter().filter(|r| r.by_maturity).count(),
        corrected: pairs.iter().filter(|r| r.corrected).count(),
        mean_probability: mean(&all_p).unwrap_or(0.0),
        predicted_base_rate: mean(&p),
        observed_base_rate: (n > 0).then(|| y.iter().filter(|&&b| b).count() as f64 / n as f64),
        configured_base_rate: rates.configured,
        served_base_rate: rates.served(),
        base_rate_estimate,
        log_loss,
        brier,
        brier_decomposition: decomposition,
        roc_auc: roc,
        ks,
        calibration,
        hosmer_lemeshow: hl,
        gains,
        psi,
        histogram_negative,
        histogram_positive,
        notes,
        calibration_tests,
        eventual_positive_rate,
        immature_window,
        operating_points,
        features: Vec::new(),
    }
}

#[cfg(test)]
mod base_rate_tests;
