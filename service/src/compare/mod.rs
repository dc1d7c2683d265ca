//! Champion against challenger from the prediction store: the predictions both models made for the same ids on one
//! route, compared with [`probity_models::compare`] before and with outcomes.
//!
//! Pairing: the champion's predictions are those logged with role `champion` by the champion model, the challenger's
//! those with role `challenger` by the challenger model. A model is named `NAME` (any version of it) or
//! `NAME@VERSION` ([`ModelRef`]), so a challenger that is the next version of the champion's own model is compared
//! by its role and version, and after a promotion between two versions each side keeps its own predictions; a pair is one prediction id present in both (silent
//! challengers, or a live one with `paired`). Predictions of only one side are counted but not compared. The store
//! keeps the latest outcome per id, so both sides of a pair carry the same label.
//!
//! [`text`] renders the table, [`svg`] the picture of both reliability curves and the paired-difference distribution;
//! the report itself serializes to JSON.

pub mod always_valid;
pub mod stream;
pub mod svg;
pub mod text;

use std::collections::{BTreeMap, HashMap};

use probity_models::compare::{
    agreement, compare_outcomes, Agreement, AgreementOptions, OutcomeComparison, OutcomeOptions,
    VarianceEstimator,
};
use probity_models::link::sigmoid;
use probity_models::metrics::{calibration_table, BinStrategy, CalibrationTable};
use serde::Serialize;
use serde_json::{json, Value};

use crate::charts::pictures::DifferencesHistogram;
use crate::serve::model_ref::ModelRef;
use crate::store::{LoggedPrediction, ReportFilter, Store, StoreError};

/// Bars of the differences histogram.
pub const DIFFERENCE_BARS: usize = 30;

/// Why a comparison could not be built.
#[derive(Debug, thiserror::Error)]
pub enum CompareReportError {
    /// The store could not be read.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// Which models to compare is not clear, or one has no prediction.
    #[error("{0}")]
    Models(String),
    /// A statistic refused its input.
    #[error("comparison: {0}")]
    Statistic(#[from] probity_models::compare::CompareError),
}

/// What to compare and how.
#[derive(Debug, Clone, Default)]
pub struct CompareRequest {
    /// Route and time window (the route is required).
    pub filter: ReportFilter,
    /// The champion model; by default the model of the route's champion-role predictions (the most frequent name;
    /// pinned to its most frequent version when the challenger is another version of it).
    pub champion: Option<ModelRef>,
    /// The challenger model; by default the only challenger-role model on the route (by name, or by version when
    /// it has the champion's name).
    pub challenger: Option<ModelRef>,
    /// The decision threshold on the probability, for the share of flipped decisions.
    pub threshold: Option<f64>,
    /// Newey-West lag for the paired tests instead of the independent-cases variance.
    pub newey_west_lag: Option<usize>,
}

/// The comparison, ready for the table, JSON and SVG.
#[derive(Debug, Clone, Serialize)]
pub struct CompareReport {
    /// Route.
    pub route: String,
    /// Champion model (`NAME` or `NAME@VERSION`).
    pub champion: String,
    /// Challenger model (`NAME` or `NAME@VERSION`).
    pub challenger: String,
    /// Predictions by the champion in the window.
    pub champion_predictions: usize,
    /// Predictions by the challenger in the window.
    pub challenger_predictions: usize,
    /// Ids scored by both.
    pub paired: usize,
    /// Of the paired ids, those with a known outcome.
    pub paired_with_outcome: usize,
    /// Agreement before outcomes (JSON form), when any pair exists.
    pub agreement: Option<Value>,
    /// The comparison with outcomes (JSON form).
    pub outcomes: Value,
    /// The verdict's code.
    pub verdict_code: String,
    /// The verdict in words.
    pub verdict: String,
    /// Both models' reliability tables on the paired cases with outcomes (ten equal-width bins).
    #[serde(skip)]
    pub reliability: Option<(CalibrationTable, CalibrationTable)>,
    /// The distribution of the per-case differences for the picture ([`DIFFERENCE_BARS`] bars): log-loss
    /// (challenger minus champion) when outcomes are known, else adjusted log-odds differences.
    #[serde(skip)]
    pub differences: DifferencesHistogram,
    /// What `differences` holds.
    pub differences_kind: String,
    /// The always-valid figures the verdict is based on.
    pub always_valid: always_valid::AlwaysValid,
    /// The verdict of the fixed-sample tests (valid at one planned look only), beside it.
    pub fixed_sample_verdict_code: String,
    /// The same in words.
    pub fixed_sample_verdict: String,
}

fn most_frequent<'a>(it: impl Iterator<Item = &'a str>) -> Option<String> {
    let mut counts: BTreeMap<&str, usize> = BTreeMap::new();
    for m in it {
        *counts.entry(m).or_default() += 1;
    }
    counts
        .into_iter()
        .max_by_key(|(_, c)| *c)
        .map(|(m, _)| m.to_string())
}

fn agreement_json(g: &Agreement) -> Value {
    json!({
        "cases": g.cases,
        "spearman": g.spearman,
        "mean_log_odds_difference": g.mean_difference,
        "mean_absolute_log_odds_difference": g.mean_absolute_difference,
        "max_absolute_log_odds_difference": g.max_absolute_difference,
        "decision_flips": g.flips.map(|f| json!({
            "threshold": f.threshold,
            "champion_only_positive": f.champion_only,
            "challenger_only_positive": f.challenger_only,
            "share": f.share,
        })),
        "psi": g.psi,
        "psi_bins": g.psi_bins_used,
        "psi_rule": format!("{:?}", g.psi_rule),
    })
}

fn outcomes_json(c: &OutcomeComparison) -> Value {
    let test = |t: &probity_models::compare::PairedTest| {
        json!({
            "mean_difference": t.mean,
            "standard_error": t.standard_error,
            "statistic": t.statistic,
            "p_value": t.p_value,
            "variance": t.estimator.label(),
        })
    };
    let model = |m: &probity_models::compare::ModelScores| json!({"log_loss": m.log_loss, "brier": m.brier, "ece": m.ece});
    json!({
        "cases": c.cases,
        "positives": c.positives,
        "negatives": c.negatives,
        "champion": c.champion.as_ref().map(model),
        "challenger": c.challenger.as_ref().map(model),
        "log_loss_test": c.log_loss.as_ref().map(test),
        "brier_test": c.brier.as_ref().map(test),
        "delong": c.delong.as_ref().map(|d| json!({
            "auc_champion": d.auc_champion,
            "auc_challenger": d.auc_challenger,
            "se_champion": d.se_champion,
            "se_challenger": d.se_challenger,
            "difference": d.difference,
            "standard_error": d.standard_error,
            "z": d.z,
            "p_value": d.p_value,
        })),
    })
}

/// Builds the comparison of one route's champion and challenger from the store, in bounded memory
/// ([`stream::build`]).
pub fn build(
    store: &mut dyn Store,
    request: &CompareRequest,
) -> Result<CompareReport, CompareReportError> {
    stream::build(store, request)
}

/// [`build`] from the whole window loaded at once ([`Store::load`]): the plain form of every figure, which the
/// streamed comparison is checked against (`tests/report_stream.rs`).
pub fn build_loaded(
    store: &mut dyn Store,
    request: &CompareRequest,
) -> Result<CompareReport, CompareReportError> {
    let route = request
        .filter
        .route
        .clone()
        .ok_or_else(|| CompareReportError::Models("a route is required".into()))?;
    let filter = ReportFilter {
        model: None,
        version: None,
        ..request.filter.clone()
    };
    let all = store.load(&filter)?;
    let by_role = |role: &'static str| all.iter().filter(move |p| p.role == role);
    let champion = match &request.champion {
        Some(m) => m.clone(),
        None => most_frequent(by_role("champion").map(|p| p.model.as_str()))
            .map(ModelRef::bare)
            .ok_or_else(|| {
                CompareReportError::Models(format!(
                    "route {route}: no champion prediction in the store"
                ))
            })?,
    };
    let distinct = |role: &'static str, f: &dyn Fn(&LoggedPrediction) -> Option<String>| {
        let mut v: Vec<String> = by_role(role).filter_map(f).collect();
        v.sort_unstable();
        v.dedup();
        v
    };
    let challenger = match &request.challenger {
        Some(m) => m.clone(),
        None => {
            let names = distinct("challenger", &|p| Some(p.model.clone()));
            let one = match names.as_slice() {
                [one] => one.clone(),
                [] => {
                    return Err(CompareReportError::Models(format!(
                        "route {route}: no challenger prediction in the store"
                    )))
                }
                many => {
                    return Err(CompareReportError::Models(format!(
                        "route {route}: several challengers ({}); name one",
                        many.join(", ")
                    )))
                }
            };
            if one != champion.name {
                ModelRef::bare(one)
            } else {
                // Another version of the champion's model: told apart by version.
                let champion_versions = match &champion.version {
                    Some(v) => vec![v.clone()],
                    None => Vec::new(),
                };
                let versions = distinct("challenger", &|p| {
                    (p.model == one && !champion_versions.contains(&p.version))
                        .then(|| p.version.clone())
                });
                match versions.as_slice() {
                    [v] => ModelRef::pinned(one, v.clone()),
                    _ => {
                        return Err(CompareReportError::Models(format!(
                            "route {route}: the challengers are versions of the champion's model `{one}` ({}); \
                             name one as {one}@VERSION",
                            versions.join(", ")
                        )))
                    }
                }
            }
        }
    };
    // A challenger of the champion's own name pins the champion to a version too (its most frequent one), so the
    // two sides never share predictions.
    let champion = if champion.version.is_none() && challenger.name == champion.name {
        let versions = by_role("champion")
            .filter(|p| p.model == champion.name && !challenger.matches(&p.model, &p.version));
        match most_frequent(versions.map(|p| p.version.as_str())) {
            Some(v) => ModelRef::pinned(champion.name.clone(), v),
            None => champion,
        }
    } else {
        champion
    };
    if champion == challenger || (champion.name == challenger.name && !challenger.is_pinned()) {
        return Err(CompareReportError::Models(format!(
            "route {route}: champion `{champion}` and challenger `{challenger}` are not told apart; name the \
             challenger as {}@VERSION",
            challenger.name
        )));
    }
    let champs: Vec<&LoggedPrediction> = by_role("champion")
        .filter(|p| champion.matches(&p.model, &p.version))
        .collect();
    let challs: Vec<&LoggedPrediction> = by_role("challenger")
        .filter(|p| challenger.matches(&p.model, &p.version))
        .collect();
    for (role, model, missing) in [
        ("champion", &champion, champs.is_empty()),
        ("challenger", &challenger, challs.is_empty()),
    ] {
        if missing {
            let known = distinct(role, &|p| Some(format!("{}@{}", p.model, p.version)));
            return Err(CompareReportError::Models(format!(
                "route {route}: no {role} prediction by `{model}` in the store ({role}s logged: {})",
                if known.is_empty() {
                    "none".to_string()
                } else {
                    known.join(", ")
                }
            )));
        }
    }
    let mut index: HashMap<&str, &LoggedPrediction> = HashMap::with_capacity(champs.len());
    for p in &champs {
        index.entry(p.prediction_id.as_str()).or_insert(p);
    }
    let pairs: Vec<(&LoggedPrediction, &LoggedPrediction)> = challs
        .iter()
        .filter_map(|b| index.get(b.prediction_id.as_str()).map(|a| (*a, *b)))
        .collect();
    let a: Vec<f64> = pairs.iter().map(|(a, _)| a.adjusted_log_odds).collect();
    let b: Vec<f64> = pairs.iter().map(|(_, b)| b.adjusted_log_odds).collect();
    let agreement = if pairs.is_empty() {
        None
    } else {
        let options = AgreementOptions {
            threshold: request.threshold,
            ..AgreementOptions::default()
        };
        Some(agreement(&a, &b, &options)?)
    };
    let labelled: Vec<(f64, f64, bool)> = pairs
        .iter()
        .filter_map(|(pa, pb)| {
            pa.label
                .map(|y| (pa.adjusted_log_odds, pb.adjusted_log_odds, y))
        })
        .collect();
    let la: Vec<f64> = labelled.iter().map(|t| t.0).collect();
    let lb: Vec<f64> = labelled.iter().map(|t| t.1).collect();
    let y: Vec<bool> = labelled.iter().map(|t| t.2).collect();
    let options = OutcomeOptions {
        estimator: match request.newey_west_lag {
            Some(lag) => VarianceEstimator::NeweyWest { lag },
            None => VarianceEstimator::Independent,
        },
        ..OutcomeOptions::default()
    };
    let outcomes = compare_outcomes(&la, &lb, &y, &options)?;
    let (always_valid, verdict) = always_valid::compute(&outcomes);
    let reliability = if y.is_empty() {
        None
    } else {
        let table = |h: &[f64]| {
            let p: Vec<f64> = h.iter().map(|&v| sigmoid(v)).collect();
            calibration_table(&p, &y, BinStrategy::Uniform(10))
        };
        Some((
            table(&la).map_err(probity_models::compare::CompareError::from)?,
            table(&lb).map_err(probity_models::compare::CompareError::from)?,
        ))
    };
    let (differences, differences_kind) = if y.is_empty() {
        (
            a.iter().zip(&b).map(|(x, z)| z - x).collect::<Vec<f64>>(),
            "adjusted log-odds, challenger minus champion",
        )
    } else {
        (
            probity_models::compare::log_loss_differences(&la, &lb, &y)?,
            "log-loss, challenger minus champion",
        )
    };
    Ok(CompareReport {
        route,
        champion: champion.to_string(),
        challenger: challenger.to_string(),
        champion_predictions: champs.len(),
        challenger_predictions: challs.len(),
        paired: pairs.len(),
        paired_with_outcome: labelled.len(),
        agreement: agreement.as_ref().map(agreement_json),
        outcomes: outcomes_json(&outcomes),
        verdict_code: verdict.code().to_string(),
        verdict: format!("{verdict} (always-valid p-values)"),
        reliability,
        differences: DifferencesHistogram::of(&differences, DIFFERENCE_BARS),
        differences_kind: differences_kind.to_string(),
        always_valid,
        fixed_sample_verdict_code: outcomes.verdict.code().to_string(),
        fixed_sample_verdict: outcomes.verdict.to_string(),
    })
}
