//! Reasons: the features, grouped in the deployer's reason families, that pushed a row's score the adverse way
//! the most.
//!
//! Each feature gets an adverse weight on the log-odds scale:
//! - trees and numeric or categorical linear terms: its contribution, signed so that a push the adverse way is
//!   positive;
//! - a binned (scorecard) term: the points the row's bin falls short of the best bin of that characteristic, the
//!   missing bin included. Listing the characteristics that lost the most points against their maximum is
//!   common practice, no single source (it is not derived from a published method). A characteristic whose
//!   row is in its best bin has weight 0.
//!
//! A family's weight is the sum over its features; a feature in no family is its own group, coded by its name.
//! The reasons are the groups of positive weight, largest first, ties broken by code (byte order), at most
//! `limit` of them. The default limit is 4: the official commentary to the US Regulation B (12 CFR 1002,
//! Supplement I, 9(b)(2)-1) says that disclosing more than four principal reasons is not likely to be helpful
//! (from memory). Reasons are decision support; which ones a notice must state is a matter of local law.

use super::{Contributions, ReasonFamilies};
use crate::engine::linear::Term;
use crate::engine::Body;
use crate::model::Model;

/// At most this many reasons unless a route says otherwise.
pub const DEFAULT_REASONS: usize = 4;

/// Which direction of the log-odds counts against the subject.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum Adverse {
    /// A higher log-odds is adverse (the positive class is the bad outcome: default, fraud).
    #[default]
    Higher,
    /// A lower log-odds is adverse.
    Lower,
}

impl Adverse {
    fn sign(self) -> f64 {
        match self {
            Adverse::Higher => 1.0,
            Adverse::Lower => -1.0,
        }
    }
}

/// How many reasons and which direction is adverse.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ReasonRequest {
    /// At most this many reasons.
    pub limit: usize,
    /// Which direction counts against the subject.
    pub adverse: Adverse,
}

impl Default for ReasonRequest {
    fn default() -> Self {
        ReasonRequest {
            limit: DEFAULT_REASONS,
            adverse: Adverse::Higher,
        }
    }
}

/// One reason: a family (or a lone feature) and how far it pushed the log-odds the adverse way.
#[derive(Debug, Clone, PartialEq)]
pub struct Reason {
    /// The family's code, or the feature's name for a feature in no family.
    pub code: String,
    /// The family's text, or the feature's name.
    pub text: String,
    /// The adverse weight on the log-odds scale (positive).
    pub weight: f64,
    /// The features of the group with a non-zero adverse weight, in schema order.
    pub features: Vec<usize>,
}

impl Model {
    /// Each feature's adverse weight for a row's contributions (see the module overview).
    pub fn adverse_weights(&self, c: &Contributions, adverse: Adverse) -> Vec<f64> {
        let s = adverse.sign();
        let mut w: Vec<f64> = c.features.iter().map(|&x| s * x).collect();
        if let Body::Linear(l) = &self.body {
            let scale = self.margin_scale.to_log_odds(1.0);
            for term in &l.terms {
                if let Term::Binned {
                    feature,
                    contributions,
                    missing,
                    ..
                } = term
                {
                    // The best attainable points: the least adverse bin.
                    let best = contributions
                        .iter()
                        .chain(missing.iter())
                        .map(|&p| s * p * scale)
                        .fold(f64::INFINITY, f64::min);
                    if let Some(x) = w.get_mut(*feature) {
                        *x -= best;
                    }
                }
            }
        }
        w
    }

    /// The top reasons for a row's contributions.
    pub fn reasons(&self, c: &Contributions, request: &ReasonRequest) -> Vec<Reason> {
        let weights = self.adverse_weights(c, request.adverse);
        group(&weights, &self.families, |i| {
            self.schema
                .feature(i)
                .map(|f| f.name.clone())
                .unwrap_or_default()
        })
        .into_iter()
        .take(request.limit)
        .collect()
    }
}

/// Groups feature weights by family, keeps the positive groups, sorts them (weight descending, then code).
fn group(
    weights: &[f64],
    families: &ReasonFamilies,
    name: impl Fn(usize) -> String,
) -> Vec<Reason> {
    let mut by_family: Vec<Option<Reason>> = vec![None; families.families.len()];
    let mut out = Vec::new();
    for (i, &w) in weights.iter().enumerate() {
        if w == 0.0 || w.is_nan() {
            continue;
        }
        match families.of_feature.get(i).copied().flatten() {
            Some(k) => {
                let f = &families.families[k as usize];
                let r = by_family[k as usize].get_or_insert_with(|| Reason {
                    code: f.code.clone(),
                    text: f.text.clone(),
                    weight: 0.0,
                    features: Vec::new(),
                });
                r.weight += w;
                r.features.push(i);
            }
            None => {
                let n = name(i);
                out.push(Reason {
                    code: n.clone(),
                    text: n,
                    weight: w,
                    features: vec![i],
                });
            }
        }
    }
    out.extend(by_family.into_iter().flatten());
    out.retain(|r| r.weight > 0.0);
    out.sort_by(|a, b| {
        b.weight
            .total_cmp(&a.weight)
            .then_with(|| a.code.cmp(&b.code))
    });
    out
}
