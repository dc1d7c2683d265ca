//! Fitting calibration maps and base-rate corrections from labelled holdout data, and estimating a new base rate
//! from unlabelled scores.
//!
//! Every fit takes the uncalibrated log-odds `h` of a holdout set and its labels (`0.0` or `1.0`; anything else,
//! NaN included, is refused with its row) and returns a [`Calibration`], the same value the engine applies.
//! All fits are plain Rust: Newton's method with a backtracking line search for the small logistic fits
//! ([`newton`]), a safeguarded one-dimensional Newton search for temperature, and pool-adjacent-violators for
//! isotonic regression.
//!
//! Submodules:
//! - [`platt`]: Platt (1999) sigmoid, with his smoothed targets (as scikit-learn) or plain 0/1 targets;
//! - [`isotonic`]: isotonic regression (as scikit-learn's `IsotonicRegression`), and a strictly increasing
//!   interpolated variant that keeps rank order;
//! - [`beta`]: beta calibration (Kull, Silva Filho and Flach 2017);
//! - [`temperature`]: temperature scaling (Guo, Pleiss, Sun and Weinberger 2017);
//! - [`select`]: stratified k-fold cross-validation, the automatic choice of method and the fit report;
//! - [`sampling`]: base-rate corrections for re-sampled training data (Dal Pozzolo et al. 2015; Elkan 2001;
//!   King and Zeng 2001);
//! - [`prior_em`]: the EM estimate of a new base rate from unlabelled calibrated scores (Saerens, Latinne and
//!   Decaestecker 2002).
//!
//! Degenerate input, for every method: no rows, a label that is not 0/1 (NaN included) or a non-finite score is an
//! error naming the row; one class only ([`FitError::OneClass`]) and constant scores ([`FitError::ConstantScores`])
//! are errors, because neither carries information about how scores relate to outcomes. Cross-validation with
//! fewer rows than folds, or a class too small to appear in every training part, is an error too.

pub mod beta;
pub mod isotonic;
pub mod newton;
pub mod platt;
pub mod prior_em;
pub mod sampling;
pub mod select;
pub mod temperature;

use crate::calibration::Calibration;

pub use prior_em::{estimate_prior, estimate_prior_by, EmOptions, PriorEstimate};
pub use sampling::{king_zeng_intercept, shift_calibration, BaseRateCorrection, Sampling};
pub use select::{
    auto_select, cross_validate, fit_report, FitReport, Folds, MethodScore, Scores, Selection,
};

/// A calibration method that can be fitted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Method {
    /// Platt (1999) sigmoid with his smoothed targets `(N+ + 1)/(N+ + 2)` and `1/(N- + 2)`.
    Platt,
    /// Platt sigmoid on the plain 0/1 labels (the maximum-likelihood logistic regression on `h`).
    PlattUnsmoothed,
    /// Isotonic regression by pool-adjacent-violators, interpolated and clipped as scikit-learn does.
    Isotonic,
    /// Isotonic regression through the centres of the pooled blocks: strictly increasing, so rank order is kept.
    IsotonicStrict,
    /// Beta calibration (Kull, Silva Filho and Flach 2017).
    Beta,
    /// Temperature scaling (Guo et al. 2017).
    Temperature,
}

impl Method {
    /// Every method, in the order [`select::auto_select`] breaks ties (fewer parameters first).
    pub const ALL: [Method; 6] = [
        Method::Temperature,
        Method::Platt,
        Method::PlattUnsmoothed,
        Method::Beta,
        Method::IsotonicStrict,
        Method::Isotonic,
    ];

    /// The method's name on the command line and in reports.
    pub fn as_str(self) -> &'static str {
        match self {
            Method::Platt => "platt",
            Method::PlattUnsmoothed => "platt-unsmoothed",
            Method::Isotonic => "isotonic",
            Method::IsotonicStrict => "isotonic-strict",
            Method::Beta => "beta",
            Method::Temperature => "temperature",
        }
    }

    /// The method named `name` (as [`Method::as_str`] writes it).
    pub fn from_name(name: &str) -> Option<Method> {
        Method::ALL.into_iter().find(|m| m.as_str() == name)
    }

    /// Fits this method on log-odds `h` and labels `y`; see the module documentation for the input rules.
    pub fn fit(self, h: &[f64], y: &[f64]) -> Result<Calibration, FitError> {
        match self {
            Method::Platt => platt::fit_platt(h, y, platt::Targets::Smoothed),
            Method::PlattUnsmoothed => platt::fit_platt(h, y, platt::Targets::Labels),
            Method::Isotonic => isotonic::fit_isotonic(h, y),
            Method::IsotonicStrict => isotonic::fit_isotonic_strict(h, y),
            Method::Beta => beta::fit_beta(h, y),
            Method::Temperature => temperature::fit_temperature(h, y),
        }
    }
}

impl std::fmt::Display for Method {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Why a fit (or an estimate) could not be made.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FitError {
    /// No rows at all.
    #[error("no rows to fit on")]
    Empty,
    /// Scores and labels do not pair up.
    #[error("{scores} scores but {labels} labels")]
    LengthMismatch {
        /// Number of scores.
        scores: usize,
        /// Number of labels.
        labels: usize,
    },
    /// A label other than 0 or 1 (NaN included).
    #[error("row {row}: label is {value}; labels must be 0 or 1")]
    BadLabel {
        /// 0-based row.
        row: usize,
        /// The value found.
        value: f64,
    },
    /// A score (log-odds or probability) that is NaN, infinite, or outside its range.
    #[error("row {row}: {what} is {value}; {rule}")]
    BadScore {
        /// 0-based row.
        row: usize,
        /// `log-odds` or `probability`.
        what: &'static str,
        /// The value found.
        value: f64,
        /// The rule broken.
        rule: &'static str,
    },
    /// Every label is the same class.
    #[error("all {rows} labels are {present}; a calibration map needs both classes")]
    OneClass {
        /// Number of rows.
        rows: usize,
        /// The only class present.
        present: u8,
    },
    /// Every score is the same, so nothing relates scores to outcomes.
    #[error("all scores equal {value}; a calibration map needs at least two distinct scores")]
    ConstantScores {
        /// The common score.
        value: f64,
    },
    /// The classes are perfectly separated by the score, so the unsmoothed maximum-likelihood fit does not exist.
    #[error("{method}: the scores separate the classes perfectly, so the maximum-likelihood fit does not exist; use a smoothed method")]
    Separable {
        /// The method asked for.
        method: Method,
    },
    /// The best fit would reverse or ignore the scores' order.
    #[error("{method}: the scores do not rise with the positive class (best slope {slope}); refusing a map that reverses or ignores them")]
    NoPositiveRelation {
        /// The method asked for.
        method: Method,
        /// The fitted slope (or inverse temperature) that is not positive.
        slope: f64,
    },
    /// The iteration did not settle.
    #[error("{method}: no convergence after {iterations} iterations")]
    NotConverged {
        /// The method, or the procedure, that did not converge.
        method: &'static str,
        /// Iterations used.
        iterations: usize,
    },
    /// Cross-validation needs at least two folds and no more folds than rows.
    #[error("{folds} folds for {rows} rows; need 2 <= folds <= rows")]
    BadFolds {
        /// Folds asked for.
        folds: usize,
        /// Rows available.
        rows: usize,
    },
    /// A class with fewer than two rows cannot appear in every training part of a cross-validation.
    #[error("class {class} has {count} rows; cross-validation needs at least 2 of each class")]
    ClassTooSmall {
        /// The class (0 or 1).
        class: u8,
        /// Its number of rows.
        count: usize,
    },
    /// A fit inside one fold of a cross-validation failed.
    #[error("fold {fold}, method {method}: {error}")]
    InFold {
        /// 0-based fold whose training part failed.
        fold: usize,
        /// The method.
        method: Method,
        /// What went wrong.
        error: Box<FitError>,
    },
    /// A statistic of the fit report could not be computed.
    #[error(transparent)]
    Metrics(#[from] crate::metrics::MetricsError),
    /// A parameter out of its range.
    #[error("{name} is {value}; {rule}")]
    BadParameter {
        /// The parameter.
        name: &'static str,
        /// Its value.
        value: f64,
        /// The allowed range.
        rule: &'static str,
    },
}

/// Checks a holdout set and returns its labels as booleans and the number of positives.
///
/// Refuses: no rows, a length mismatch, a label other than 0/1, a non-finite score, one class only, constant scores.
pub fn check_holdout(h: &[f64], y: &[f64]) -> Result<(Vec<bool>, usize), FitError> {
    if h.len() != y.len() {
        return Err(FitError::LengthMismatch {
            scores: h.len(),
            labels: y.len(),
        });
    }
    if h.is_empty() {
        return Err(FitError::Empty);
    }
    let mut labels = Vec::with_capacity(y.len());
    for (row, &v) in y.iter().enumerate() {
        labels.push(match v {
            0.0 => false,
            1.0 => true,
            _ => return Err(FitError::BadLabel { row, value: v }),
        });
    }
    if let Some(row) = h.iter().position(|v| !v.is_finite()) {
        return Err(FitError::BadScore {
            row,
            what: "log-odds",
            value: h[row],
            rule: "log-odds must be finite",
        });
    }
    let positives = labels.iter().filter(|&&b| b).count();
    if positives == 0 || positives == labels.len() {
        return Err(FitError::OneClass {
            rows: labels.len(),
            present: u8::from(positives > 0),
        });
    }
    if h.iter().all(|&v| v == h[0]) {
        return Err(FitError::ConstantScores { value: h[0] });
    }
    Ok((labels, positives))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn degenerate_holdouts_are_refused_by_every_method() {
        let h = [0.1, 0.5, -0.3, 2.0];
        for m in Method::ALL {
            assert_eq!(m.fit(&[], &[]), Err(FitError::Empty), "{m}");
            assert_eq!(
                m.fit(&h, &[0.0, 1.0]),
                Err(FitError::LengthMismatch {
                    scores: 4,
                    labels: 2
                })
            );
            let nan = m.fit(&h, &[0.0, f64::NAN, 1.0, 1.0]);
            assert!(
                matches!(nan, Err(FitError::BadLabel { row: 1, value }) if value.is_nan()),
                "{m}: {nan:?}"
            );
            assert_eq!(
                m.fit(&h, &[0.0, 2.0, 1.0, 1.0]),
                Err(FitError::BadLabel { row: 1, value: 2.0 })
            );
            assert_eq!(
                m.fit(&h, &[1.0; 4]),
                Err(FitError::OneClass {
                    rows: 4,
                    present: 1
                })
            );
            assert_eq!(
                m.fit(&h, &[0.0; 4]),
                Err(FitError::OneClass {
                    rows: 4,
                    present: 0
                })
            );
            assert_eq!(
                m.fit(&[0.7; 4], &[0.0, 1.0, 0.0, 1.0]),
                Err(FitError::ConstantScores { value: 0.7 })
            );
            let inf = m.fit(&[0.1, f64::INFINITY, 0.0, 1.0], &[0.0, 1.0, 0.0, 1.0]);
            assert!(
                matches!(inf, Err(FitError::BadScore { row: 1, .. })),
                "{m}: {inf:?}"
            );
        }
    }

    #[test]
    fn method_names_round_trip() {
        for m in Method::ALL {
            assert_eq!(Method::from_name(m.as_str()), Some(m));
        }
        assert_eq!(Method::from_name("sigmoid"), None);
    }
}
