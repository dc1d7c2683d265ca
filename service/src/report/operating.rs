//! Operating points on the matured outcomes, at the decision rule each prediction was served under.
//!
//! The store keeps with every prediction the route's decision rule when it was served
//! ([`Served::decision`](crate::store::Served::decision)), so a report over a range in which the rule changed
//! gives one entry per distinct rule, in the order the rules were first served, each on the pairs (predictions with
//! an outcome, client-sent or settled by maturity) served under it. Today's configuration is not read.
//!
//! Every figure comes from [`probity_models::evaluate`], the functions `probity evaluate` uses: a threshold rule
//! and the cost rule (its threshold `c_fp / (c_fp + c_fn)`, Elkan 2001) get [`operating_point`] (declined when the
//! probability is above the threshold); bands get [`band_points`], each band with the operating point of declining
//! it and every band above. The expected cost per case, `(c_fp FP + c_fn FN) / n`, is given only under the cost
//! rule, whose words carry the costs; a threshold or bands rule has none and none is assumed.

use std::fmt::Write as _;

use probity_models::evaluate::{
    band_points, operating_point, operating_point_from_counts, Costs, OperatingPoint,
};
use probity_models::metrics::ConfusionCounts;
use probity_models::DecisionRule;
use serde::Serialize;

use crate::store::{parse_decision_words, LoggedPrediction};

/// The operating points of the predictions served under one decision rule.
#[derive(Debug, Clone, Serialize)]
pub struct ServedRule {
    /// The rule in the store's words (`threshold 0.5`, `costs false_positive=1 false_negative=5`,
    /// `bands 0.2,0.6 low,medium,high`).
    pub rule: String,
    /// Predictions in the range served under it.
    pub predictions: usize,
    /// Of which with an outcome: the pairs the figures are computed on.
    pub with_outcome: usize,
    /// Positives among them.
    pub positives: usize,
    /// First and last prediction time served under it (ms since the epoch).
    pub first_ms: i64,
    /// Last prediction time.
    pub last_ms: i64,
    /// The costs of a cost rule.
    pub costs: Option<RuleCosts>,
    /// The operating point at the threshold of a threshold or cost rule with outcomes.
    pub point: Option<Point>,
    /// Each band of a bands rule with outcomes, lowest first.
    pub bands: Vec<Band>,
}

/// A cost rule's costs.
#[derive(Debug, Clone, Copy, Serialize)]
pub struct RuleCosts {
    /// Cost of declining a case that turns out negative.
    pub false_positive: f64,
    /// Cost of approving a case that turns out positive.
    pub false_negative: f64,
}

/// Approvals and declines at one threshold (declined when the probability is above it).
#[derive(Debug, Clone, Serialize)]
pub struct Point {
    /// The threshold.
    pub threshold: f64,
    /// Declined positives.
    pub true_positive: usize,
    /// Declined negatives.
    pub false_positive: usize,
    /// Approved negatives.
    pub true_negative: usize,
    /// Approved positives.
    pub false_negative: usize,
    /// Share approved.
    pub approval_rate: f64,
    /// Share declined.
    pub decline_rate: f64,
    /// Share of the declined that are positive; `None` when nothing is declined.
    pub precision: Option<f64>,
    /// Share of the positives declined; `None` without positives.
    pub recall: Option<f64>,
    /// `(c_fp FP + c_fn FN) / n` under a cost rule.
    pub expected_cost: Option<f64>,
}

impl From<&OperatingPoint> for Point {
    fn from(p: &OperatingPoint) -> Point {
        Point {
            threshold: p.threshold,
            true_positive: p.counts.true_positive,
            false_positive: p.counts.false_positive,
            true_negative: p.counts.true_negative,
            false_negative: p.counts.false_negative,
            approval_rate: p.approval_rate,
            decline_rate: p.decline_rate,
            precision: p.precision,
            recall: p.recall,
            expected_cost: p.expected_cost,
        }
    }
}

/// One score band.
#[derive(Debug, Clone, Serialize)]
pub struct Band {
    /// Its label.
    pub label: String,
    /// Lower probability edge (excluded; 0 for the first band, included there).
    pub lower: f64,
    /// Upper probability edge (included).
    pub upper: f64,
    /// Pairs in the band.
    pub count: usize,
    /// Positives in the band.
    pub positives: usize,
    /// Their share; `None` for an empty band.
    pub positive_rate: Option<f64>,
    /// Declining this band and every band above it.
    pub declining_from_here: Point,
}

/// The operating points of `rows` (one series, in the order written) per distinct served decision rule. Rows served
/// without a rule are left out; with rules served too, how many is noted, as is any rule the report cannot read.
pub fn compute(rows: &[LoggedPrediction], notes: &mut Vec<String>) -> Vec<ServedRule> {
    // A handful of distinct rules per series: found by a scan.
    let mut groups: Vec<(&str, Vec<&LoggedPrediction>)> = Vec::new();
    let mut without = 0usize;
    for r in rows {
        if r.served_decision.is_empty() {
            without += 1;
            continue;
        }
        match groups
            .iter_mut()
            .find(|(w, _)| *w == r.served_decision.as_str())
        {
            Some((_, members)) => members.push(r),
            None => groups.push((r.served_decision.as_str(), vec![r])),
        }
    }
    if without > 0 && !groups.is_empty() {
        notes.push(format!(
            "operating points: predictions served without a decision rule, left out: {without}"
        ));
    }
    let mut out = Vec::new();
    for (words, members) in groups {
        let Some(rule) = parse_decision_words(words) else {
            notes.push(format!(
                "operating points: the stored decision rule `{words}` is not readable ({} predictions left out)",
                members.len()
            ));
            continue;
        };
        let pairs: Vec<&&LoggedPrediction> = members.iter().filter(|r| r.label.is_some()).collect();
        let p: Vec<f64> = pairs.iter().map(|r| r.probability).collect();
        let y: Vec<bool> = pairs.iter().map(|r| r.label == Some(true)).collect();
        let costs = match rule {
            DecisionRule::Costs {
                false_positive,
                false_negative,
            } => Some(Costs {
                false_positive,
                false_negative,
            }),
            _ => None,
        };
        let mut entry = ServedRule {
            rule: words.to_string(),
            predictions: members.len(),
            with_outcome: pairs.len(),
            positives: y.iter().filter(|&&b| b).count(),
            first_ms: members.iter().map(|r| r.time_ms).min().unwrap_or(0),
            last_ms: members.iter().map(|r| r.time_ms).max().unwrap_or(0),
            costs: costs.map(|c| RuleCosts {
                false_positive: c.false_positive,
                false_negative: c.false_negative,
            }),
            point: None,
            bands: Vec::new(),
        };
        if pairs.is_empty() {
            notes.push(format!(
                "operating points ({words}): no outcome yet among its predictions ({})",
                members.len()
            ));
            out.push(entry);
            continue;
        }
        match &rule {
            DecisionRule::Bands { edges, labels } => {
                match band_points(&p, &y, edges, labels, None) {
                    Ok(bands) => {
                        entry.bands = bands
                            .iter()
                            .map(|b| Band {
                                label: b.label.clone(),
                                lower: b.lower,
                                upper: b.upper,
                                count: b.cases,
                                positives: b.positives,
                                positive_rate: (b.cases > 0)
                                    .then(|| b.positives as f64 / b.cases as f64),
                                declining_from_here: Point::from(&b.from_here),
                            })
                            .collect();
                    }
                    Err(e) => notes.push(format!("operating points ({words}): {e}")),
                }
            }
            _ => {
                let threshold = rule.threshold().unwrap_or(0.5);
                match operating_point(&p, &y, threshold, costs) {
                    Ok(point) => entry.point = Some(Point::from(&point)),
                    Err(e) => notes.push(format!("operating points ({words}): {e}")),
                }
            }
        }
        out.push(entry);
    }
    out
}

/// The operating points of a series accumulated over its rows one at a time (a streamed report), without holding
/// them: per distinct rule (a handful per series), counts of the pairs above the threshold, or per band. The
/// figures are [`compute`]'s on the same rows, from the same counts (`evaluate::operating_point_from_counts`).
#[derive(Debug, Default)]
pub struct Tally {
    groups: Vec<Group>,
    without: usize,
}

#[derive(Debug)]
struct Group {
    words: String,
    rule: Option<DecisionRule>,
    predictions: usize,
    with_outcome: usize,
    positives: usize,
    first_ms: i64,
    last_ms: i64,
    /// Threshold or cost rule: positives and negatives declined (above the threshold).
    declined: (usize, usize),
    /// Bands rule: cases and positives per band.
    bands: Vec<(usize, usize)>,
}

impl Tally {
    /// Counts one prediction (in the order written) served under `words`, with probability `p` and its label if
    /// known.
    pub fn add(&mut self, words: &str, time_ms: i64, p: f64, label: Option<bool>) {
        if words.is_empty() {
            self.without += 1;
            return;
        }
        let at = match self.groups.iter().position(|g| g.words == words) {
            Some(at) => at,
            None => {
                let rule = parse_decision_words(words);
                let bands = match &rule {
                    Some(DecisionRule::Bands { labels, .. }) => vec![(0, 0); labels.len()],
                    _ => Vec::new(),
                };
                self.groups.push(Group {
                    words: words.to_string(),
                    rule,
                    predictions: 0,
                    with_outcome: 0,
                    positives: 0,
                    first_ms: time_ms,
                    last_ms: time_ms,
                    declined: (0, 0),
                    bands,
                });
                self.groups.len() - 1
            }
        };
        let g = &mut self.groups[at];
        g.predictions += 1;
        g.first_ms = g.first_ms.min(time_ms);
        g.last_ms = g.last_ms.max(time_ms);
        let Some(y) = label else { return };
        g.with_outcome += 1;
        g.positives += usize::from(y);
        match &g.rule {
            Some(DecisionRule::Bands { edges, .. }) => {
                let i = edges.partition_point(|&e| e < p);
                if let Some(b) = g.bands.get_mut(i) {
                    b.0 += 1;
                    b.1 += usize::from(y);
                }
            }
            Some(rule) if p > rule.threshold().unwrap_or(0.5) => {
                if y {
                    g.declined.0 += 1;
                } else {
                    g.declined.1 += 1;
                }
            }
            _ => {}
        }
    }

    /// The entries and notes [`compute`] gives on the same rows.
    pub fn finish(self, notes: &mut Vec<String>) -> Vec<ServedRule> {
        if self.without > 0 && !self.groups.is_empty() {
            notes.push(format!(
                "operating points: predictions served without a decision rule, left out: {}",
                self.without
            ));
        }
        let mut out = Vec::new();
        for g in self.groups {
            let words = g.words.as_str();
            let Some(rule) = g.rule else {
                notes.push(format!(
                    "operating points: the stored decision rule `{words}` is not readable ({} predictions left out)",
                    g.predictions
                ));
                continue;
            };
            let costs = match rule {
                DecisionRule::Costs {
                    false_positive,
                    false_negative,
                } => Some(Costs {
                    false_positive,
                    false_negative,
                }),
                _ => None,
            };
            let mut entry = ServedRule {
                rule: words.to_string(),
                predictions: g.predictions,
                with_outcome: g.with_outcome,
                positives: g.positives,
                first_ms: g.first_ms,
                last_ms: g.last_ms,
                costs: costs.map(|c| RuleCosts {
                    false_positive: c.false_positive,
                    false_negative: c.false_negative,
                }),
                point: None,
                bands: Vec::new(),
            };
            if g.with_outcome == 0 {
                notes.push(format!(
                    "operating points ({words}): no outcome yet among its predictions ({})",
                    g.predictions
                ));
                out.push(entry);
                continue;
            }
            let negatives = g.with_outcome - g.positives;
            let at = |threshold: f64, tp: usize, fp: usize| {
                operating_point_from_counts(
                    threshold,
                    ConfusionCounts {
                        true_positive: tp,
                        false_positive: fp,
                        true_negative: negatives - fp,
                        false_negative: g.positives - tp,
                    },
                    costs,
                )
            };
            match &rule {
                DecisionRule::Bands { edges, labels } => {
                    let mut bands = Vec::new();
                    let mut failed = None;
                    for (i, label) in labels.iter().enumerate() {
                        let lower = if i == 0 { 0.0 } else { edges[i - 1] };
                        let upper = edges.get(i).copied().unwrap_or(1.0);
                        // Declining this band and every band above it: the cases of bands i and up.
                        let (tp, fp) = g.bands[i..]
                            .iter()
                            .fold((0, 0), |(tp, fp), &(c, k)| (tp + k, fp + c - k));
                        match at(lower, tp, fp) {
                            Ok(point) => {
                                let (count, positives) = g.bands[i];
                                bands.push(Band {
                                    label: label.clone(),
                                    lower,
                                    upper,
                                    count,
                                    positives,
                                    positive_rate: (count > 0)
                                        .then(|| positives as f64 / count as f64),
                                    declining_from_here: Point::from(&point),
                                });
                            }
                            Err(e) => {
                                failed = Some(e);
                                break;
                            }
                        }
                    }
                    match failed {
                        None => entry.bands = bands,
                        Some(e) => notes.push(format!("operating points ({words}): {e}")),
                    }
                }
                _ => {
                    let threshold = rule.threshold().unwrap_or(0.5);
                    match at(threshold, g.declined.0, g.declined.1) {
                        Ok(point) => entry.point = Some(Point::from(&point)),
                        Err(e) => notes.push(format!("operating points ({words}): {e}")),
                    }
                }
            }
            out.push(entry);
        }
        out
    }
}

fn opt(v: Option<f64>) -> String {
    v.map_or_else(|| "-".to_string(), |v| format!("{v:.4}"))
}

fn point_row(s: &mut String, what: &str, pairs: usize, p: &Point) {
    let _ = writeln!(
        s,
        "  {what:<42} {pairs:>7} {:>9.4} {:>9.4} {:>10} {:>7} {:>10}",
        p.approval_rate,
        p.decline_rate,
        opt(p.precision),
        opt(p.recall),
        p.expected_cost
            .map_or_else(|| "-".to_string(), |c| format!("{c:.6}"))
    );
}

/// The operating points as a short table.
pub fn render(s: &mut String, rules: &[ServedRule]) {
    if rules.is_empty() {
        return;
    }
    let _ = writeln!(
        s,
        "operating points (pairs with an outcome, at the rule each prediction was served under; declined = above the threshold):"
    );
    let _ = writeln!(
        s,
        "  {:<42} {:>7} {:>9} {:>9} {:>10} {:>7} {:>10}",
        "rule", "pairs", "approved", "declined", "precision", "recall", "cost/case"
    );
    for r in rules {
        match &r.point {
            Some(p) => point_row(s, &r.rule, r.with_outcome, p),
            None => {
                let _ = writeln!(s, "  {:<42} {:>7}", r.rule, r.with_outcome);
            }
        }
        for b in &r.bands {
            let _ = writeln!(
                s,
                "    band {} ({:.4}, {:.4}]: pairs {}  positives {}  positive rate {}",
                b.label,
                b.lower,
                b.upper,
                b.count,
                b.positives,
                opt(b.positive_rate)
            );
            point_row(
                s,
                &format!("    declining {} and above", b.label),
                r.with_outcome,
                &b.declining_from_here,
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::store::{decision_words, parse_decision_words};
    use probity_models::DecisionRule;

    #[test]
    fn a_stored_rule_reads_back_as_the_rule_served() {
        // The store's words of every rule form read back to the same rule (the report reads them, not a configuration).
        for rule in [
            DecisionRule::Threshold { threshold: 0.3 },
            DecisionRule::Threshold {
                threshold: 0.1 + 0.2,
            },
            DecisionRule::Costs {
                false_positive: 1.0,
                false_negative: 20.0,
            },
            DecisionRule::Bands {
                edges: vec![0.05, 0.5],
                labels: ["approve", "refer to an analyst", "decline"]
                    .map(String::from)
                    .to_vec(),
            },
        ] {
            assert_eq!(parse_decision_words(&decision_words(&rule)), Some(rule));
        }
        assert_eq!(parse_decision_words(""), None);
        assert_eq!(parse_decision_words("threshold 1.5"), None);
    }

    fn row(
        time_ms: i64,
        p: f64,
        label: Option<bool>,
        decision: &str,
    ) -> crate::store::LoggedPrediction {
        crate::store::LoggedPrediction {
            prediction_id: format!("p{time_ms}"),
            route: "r".into(),
            model: "m".into(),
            version: "1".into(),
            role: "champion".into(),
            time_ms,
            adjusted_log_odds: (p / (1.0 - p)).ln(),
            probability: p,
            label,
            by_maturity: false,
            corrected: false,
            served_prior: None,
            outcome_received_ms: None,
            served_decision: decision.into(),
        }
    }

    #[test]
    fn rules_are_kept_apart_and_what_cannot_be_computed_is_noted() {
        // Hand-computed: under `threshold 0.5`, 0.6 (positive) and 0.9 (negative) are declined, 0.2 (negative)
        // approved: precision 1/2, recall 1, decline rate 2/3. The row without an outcome counts as a prediction
        // only; the rule served later with no outcome yet gets an entry without a point; a row without a rule and
        // one with unreadable words are noted.
        let rows = vec![
            row(1, 0.6, Some(true), "threshold 0.5"),
            row(2, 0.9, Some(false), "threshold 0.5"),
            row(3, 0.2, Some(false), "threshold 0.5"),
            row(4, 0.7, None, "threshold 0.5"),
            row(5, 0.7, None, "threshold 0.8"),
            row(6, 0.7, Some(true), ""),
            row(7, 0.7, Some(true), "threshold 2"),
        ];
        let mut notes = Vec::new();
        let rules = super::compute(&rows, &mut notes);
        assert_eq!(rules.len(), 2);
        assert_eq!(
            (
                rules[0].predictions,
                rules[0].with_outcome,
                rules[0].positives
            ),
            (4, 3, 1)
        );
        assert_eq!((rules[0].first_ms, rules[0].last_ms), (1, 4));
        let p = rules[0].point.as_ref().unwrap();
        assert_eq!(
            (
                p.true_positive,
                p.false_positive,
                p.true_negative,
                p.false_negative
            ),
            (1, 1, 1, 0)
        );
        assert_eq!((p.precision, p.recall), (Some(0.5), Some(1.0)));
        assert_eq!(p.decline_rate, 2.0 / 3.0);
        assert_eq!(p.expected_cost, None);
        assert_eq!(rules[1].rule, "threshold 0.8");
        assert!(rules[1].point.is_none());
        assert_eq!(notes.len(), 3, "{notes:?}");
        assert!(notes[0].contains("predictions served without a decision rule, left out: 1"));
        assert!(notes.iter().any(|n| n.contains("`threshold 2`")));
        assert!(notes
            .iter()
            .any(|n| n.contains("threshold 0.8") && n.contains("no outcome yet")));
    }
}
