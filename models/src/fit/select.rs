//! Stratified k-fold cross-validation of calibration methods, the automatic choice of method, and the fit report.
//!
//! Folds are assigned without randomness: the rows of each class, in their given order, are dealt to folds
//! 0, 1, ..., k-1, 0, 1, ... so every fold holds each class in proportion (stratified k-fold, common practice, no
//! single source; scikit-learn's `StratifiedKFold` shuffles first, we do not, so a run is reproducible without a
//! seed). Each fold's rows are calibrated by a map fitted on the other folds; those out-of-fold calibrated log-odds
//! are what the choice and the report are computed on, so a method is never scored on the rows it was fitted to.
//!
//! [`auto_select`] picks the method with the smallest out-of-fold log-loss, computed from the log-odds
//! (`softplus(-(2y - 1) h)`, [`crate::metrics::log_loss_term_pm1`]). An isotonic map that gives probability 0 or 1
//! to a row of the other class scores an infinite log-loss there, and so is not chosen. Ties go to the method with
//! fewer parameters ([`Method::ALL`] order).

use super::{check_holdout, FitError, Method};
use crate::calibration::Calibration;
use crate::link::sigmoid;
use crate::metrics::{
    brier_score, calibration_table, log_loss_term_pm1, BinStrategy, CalibrationTable,
};

/// A fold number for every row.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Folds {
    k: usize,
    fold: Vec<usize>,
}

impl Folds {
    /// Deals the rows of each class to `k` folds in turn.
    ///
    /// Errors: [`FitError::BadFolds`] unless `2 <= k <= rows`; [`FitError::ClassTooSmall`] when a class has fewer
    /// than two rows (a training part would then lack it).
    pub fn stratified(labels: &[bool], k: usize) -> Result<Folds, FitError> {
        if k < 2 || k > labels.len() {
            return Err(FitError::BadFolds {
                folds: k,
                rows: labels.len(),
            });
        }
        let positives = labels.iter().filter(|&&b| b).count();
        for (class, count) in [(0u8, labels.len() - positives), (1u8, positives)] {
            if count < 2 {
                return Err(FitError::ClassTooSmall { class, count });
            }
        }
        let (mut next_pos, mut next_neg) = (0, 0);
        let fold = labels
            .iter()
            .map(|&b| {
                let counter = if b { &mut next_pos } else { &mut next_neg };
                let f = *counter % k;
                *counter += 1;
                f
            })
            .collect();
        Ok(Folds { k, fold })
    }

    /// The number of folds.
    pub fn k(&self) -> usize {
        self.k
    }

    /// The fold of each row.
    pub fn assignment(&self) -> &[usize] {
        &self.fold
    }
}

/// Out-of-fold calibrated log-odds of `method`: row `i` is mapped by a fit on every fold but its own.
///
/// Errors: those of [`check_holdout`] and [`Folds::stratified`]; a failed fit is [`FitError::InFold`].
pub fn cross_validate(
    method: Method,
    h: &[f64],
    y: &[f64],
    folds: &Folds,
) -> Result<Vec<f64>, FitError> {
    check_holdout(h, y)?;
    let mut out = vec![0.0; h.len()];
    for f in 0..folds.k {
        let (mut th, mut ty) = (Vec::new(), Vec::new());
        for (i, &fi) in folds.fold.iter().enumerate() {
            if fi != f {
                th.push(h[i]);
                ty.push(y[i]);
            }
        }
        let map = method.fit(&th, &ty).map_err(|e| FitError::InFold {
            fold: f,
            method,
            error: Box::new(e),
        })?;
        for (i, &fi) in folds.fold.iter().enumerate() {
            if fi == f {
                out[i] = map.apply(h[i]);
            }
        }
    }
    Ok(out)
}

/// Mean log-loss from log-odds, allowing infinite log-odds (an infinite loss where they point the wrong way).
pub fn mean_log_loss(log_odds: &[f64], labels: &[bool]) -> f64 {
    let total: f64 = log_odds
        .iter()
        .zip(labels)
        .map(|(&h, &b)| log_loss_term_pm1(h, b))
        .sum();
    total / log_odds.len() as f64
}

/// One candidate's cross-validated result.
#[derive(Debug, Clone, PartialEq)]
pub struct MethodScore {
    /// The method.
    pub method: Method,
    /// Mean out-of-fold log-loss, or why the method could not be cross-validated.
    pub result: Result<f64, FitError>,
}

/// The outcome of [`auto_select`].
#[derive(Debug, Clone, PartialEq)]
pub struct Selection {
    /// The chosen method.
    pub method: Method,
    /// Its map, fitted on all rows.
    pub calibration: Calibration,
    /// Every candidate's score, in the order given.
    pub scores: Vec<MethodScore>,
    /// One sentence saying why.
    pub reason: String,
}

/// Cross-validates every candidate on the same folds and fits the one with the lowest log-loss on all rows.
///
/// Errors: those of [`check_holdout`] and [`Folds::stratified`]; when no candidate could be cross-validated, the
/// first candidate's error.
pub fn auto_select(
    h: &[f64],
    y: &[f64],
    k: usize,
    candidates: &[Method],
) -> Result<Selection, FitError> {
    let (labels, _) = check_holdout(h, y)?;
    let folds = Folds::stratified(&labels, k)?;
    let scores: Vec<MethodScore> = candidates
        .iter()
        .map(|&method| MethodScore {
            method,
            result: cross_validate(method, h, y, &folds).map(|oof| mean_log_loss(&oof, &labels)),
        })
        .collect();
    let mut order: Vec<&MethodScore> = scores.iter().filter(|s| s.result.is_ok()).collect();
    let rank = |m: Method| {
        Method::ALL
            .iter()
            .position(|&x| x == m)
            .unwrap_or(usize::MAX)
    };
    order.sort_by(|a, b| {
        let (la, lb) = (
            a.result.as_ref().map_or(f64::INFINITY, |v| *v),
            b.result.as_ref().map_or(f64::INFINITY, |v| *v),
        );
        la.total_cmp(&lb).then(rank(a.method).cmp(&rank(b.method)))
    });
    let Some(best) = order.first() else {
        return Err(scores
            .into_iter()
            .next()
            .and_then(|s| s.result.err())
            .unwrap_or(FitError::Empty));
    };
    let best_loss = best.result.as_ref().map_or(f64::INFINITY, |v| *v);
    let mut reason = format!(
        "{} has the lowest {k}-fold cross-validated log-loss, {best_loss:.6}",
        best.method
    );
    if let Some(second) = order.get(1) {
        let l2 = second.result.as_ref().map_or(f64::INFINITY, |v| *v);
        reason.push_str(&format!("; next is {} at {l2:.6}", second.method));
    }
    let failed: Vec<String> = scores
        .iter()
        .filter_map(|s| {
            s.result
                .as_ref()
                .err()
                .map(|e| format!("{} ({e})", s.method))
        })
        .collect();
    if !failed.is_empty() {
        reason.push_str(&format!("; not scored: {}", failed.join(", ")));
    }
    let method = best.method;
    let calibration = method.fit(h, y)?;
    Ok(Selection {
        method,
        calibration,
        scores,
        reason,
    })
}

/// Log-loss, Brier score and reliability table of one set of predictions.
#[derive(Debug, Clone, PartialEq)]
pub struct Scores {
    /// Mean log-loss from the log-odds (infinite when a probability of 0 or 1 meets the other class).
    pub log_loss: f64,
    /// Brier (1950) score.
    pub brier: f64,
    /// Reliability table with the expected calibration error (Naeini, Cooper and Hauskrecht 2015).
    pub table: CalibrationTable,
}

/// Scores before and after calibration, on the same rows.
#[derive(Debug, Clone, PartialEq)]
pub struct FitReport {
    /// The method.
    pub method: Method,
    /// Number of folds.
    pub folds: usize,
    /// The uncalibrated log-odds.
    pub before: Scores,
    /// The out-of-fold calibrated log-odds.
    pub after: Scores,
    /// The out-of-fold calibrated log-odds themselves, row by row.
    pub out_of_fold: Vec<f64>,
}

/// Scores `log_odds` against the labels with `bins` uniform reliability bins.
pub fn scores(log_odds: &[f64], labels: &[bool], bins: usize) -> Result<Scores, FitError> {
    let p: Vec<f64> = log_odds.iter().map(|&h| sigmoid(h)).collect();
    Ok(Scores {
        log_loss: mean_log_loss(log_odds, labels),
        brier: brier_score(&p, labels)?,
        table: calibration_table(&p, labels, BinStrategy::Uniform(bins))?,
    })
}

/// The fit report of `method`: scores of the raw log-odds and of the out-of-fold calibrated log-odds.
pub fn fit_report(
    method: Method,
    h: &[f64],
    y: &[f64],
    k: usize,
    bins: usize,
) -> Result<FitReport, FitError> {
    let (labels, _) = check_holdout(h, y)?;
    let folds = Folds::stratified(&labels, k)?;
    let out_of_fold = cross_validate(method, h, y, &folds)?;
    Ok(FitReport {
        method,
        folds: k,
        before: scores(h, &labels, bins)?,
        after: scores(&out_of_fold, &labels, bins)?,
        out_of_fold,
    })
}
