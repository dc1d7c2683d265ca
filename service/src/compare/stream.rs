//! The comparison built in bounded memory: passes over the champion-challenger pairs the store streams
//! ([`Store::scan_pairs`]), with the ranks the database computes by window functions, never the window loaded.
//!
//! Every figure is the one [`build_loaded`](super::build_loaded) computes with `probity_models::compare`, in the
//! same arithmetic and order where sums are in floating point:
//! - agreement (every pair): sums, flips and the largest difference in the challenger's written order; Spearman's
//!   correlation from twice the midranks over all pairs (`2 * RANK() + ties - 1`), with its sums as exact integers;
//!   the PSI's edges from the champion's order statistics (a pass in champion order), its counts in another pass;
//! - outcomes (pairs with an outcome): log-loss, Brier and the equal-width bins of both models, and the means of
//!   the paired differences, in one pass; the centred sums and Newey-West autocovariances (a ring of `lag` values)
//!   in a second. DeLong, DeLong and Clarke-Pearson (1988): a positive's structural component is the share of
//!   negatives it outranks, ties one half, `V10 = (2 * below + tied) / (2 n)`, and likewise `V01` for a negative;
//!   the database counts `2 * below + tied` per case and model with window sums over the pairs sorted by each
//!   model's score, so the AUCs (mean components) and the 2x2 covariances are computed here from exact integer sums
//!   of the counts, their squares and their cross products.
//!
//! What is held: counters, sums, the bins, the ring of `lag` values, the differences histogram's bars.

use std::collections::VecDeque;

use probity_models::compare::{
    normal_z_and_p, Agreement, AgreementOptions, CompareError, DeLongTest, Flips, ModelScores,
    OutcomeComparison, OutcomeOptions, PairedTest, VarianceEstimator,
};
use probity_models::link::sigmoid;
use probity_models::metrics::quantile::{
    linspace_unit, quantile_by, quantile_positions, right_closed_bin,
};
use probity_models::metrics::{
    bin_index, log_loss_term_pm1, psi_from_counts, CalibrationBin, CalibrationTable, MetricsError,
};

use super::{
    agreement_json, always_valid, outcomes_json, CompareReport, CompareReportError, CompareRequest,
    DIFFERENCE_BARS,
};
use crate::charts::pictures::DifferencesHistogram;
use crate::serve::model_ref::ModelRef;
use crate::store::{PairRanks, PairRow, PairScan, ReportFilter, Store};

/// Bins of the reliability tables and the ECE.
const ECE_BINS: usize = 10;

/// Counts per model name, by name.
fn by_name(list: &[(String, String, u64)]) -> Vec<(String, u64)> {
    let mut out: Vec<(String, u64)> = Vec::new();
    for (m, _, c) in list {
        match out.last_mut() {
            Some((last, total)) if last == m => *total += c,
            _ => out.push((m.clone(), *c)),
        }
    }
    out
}

/// The most frequent name (the last in order among equals, as the loaded comparison picks), from counts sorted by
/// name.
fn most_frequent(counts: &[(String, u64)]) -> Option<String> {
    counts
        .iter()
        .max_by_key(|(_, c)| *c)
        .map(|(m, _)| m.clone())
}

/// Equal-width bins of one model's probabilities.
#[derive(Clone)]
struct Bins {
    count: Vec<usize>,
    positives: Vec<usize>,
    sum: Vec<f64>,
}

impl Bins {
    fn new() -> Bins {
        Bins {
            count: vec![0; ECE_BINS],
            positives: vec![0; ECE_BINS],
            sum: vec![0.0; ECE_BINS],
        }
    }
    fn add(&mut self, inner: &[f64], p: f64, y: bool) {
        let k = right_closed_bin(inner, p);
        self.count[k] += 1;
        self.positives[k] += usize::from(y);
        self.sum[k] += p;
    }
    /// As `metrics::calibration_table`.
    fn table(&self) -> CalibrationTable {
        let edges: Vec<f64> = (0..=ECE_BINS).map(|i| linspace_unit(i, ECE_BINS)).collect();
        let total: usize = self.count.iter().sum();
        let total = total as f64;
        let mut bins = Vec::new();
        let (mut ece, mut mce) = (0.0f64, 0.0f64);
        for k in (0..ECE_BINS).filter(|&k| self.count[k] > 0) {
            let c = self.count[k] as f64;
            let mean_predicted = self.sum[k] / c;
            let fraction_positive = self.positives[k] as f64 / c;
            let gap = (mean_predicted - fraction_positive).abs();
            ece += c / total * gap;
            mce = mce.max(gap);
            bins.push(CalibrationBin {
                index: k,
                lower: edges[k],
                upper: edges[k + 1],
                count: self.count[k],
                positives: self.positives[k],
                mean_predicted,
                fraction_positive,
            });
        }
        CalibrationTable {
            edges,
            bins,
            ece,
            mce,
        }
    }
}

/// Exact sums of DeLong's doubled components over one class: per model, the sum and the sum of squares, and the
/// sum of cross products.
#[derive(Default)]
struct Components {
    count: i128,
    a: i128,
    b: i128,
    aa: i128,
    bb: i128,
    ab: i128,
}

impl Components {
    fn add(&mut self, a: i64, b: i64) {
        let (a, b) = (i128::from(a), i128::from(b));
        self.count += 1;
        self.a += a;
        self.b += b;
        self.aa += a * a;
        self.bb += b * b;
        self.ab += a * b;
    }
    /// Sample covariance matrix `[aa, ab, bb]` (divisor `count - 1`) of the components `doubled / scale`.
    fn covariance(&self, scale: f64) -> [f64; 3] {
        let k = self.count;
        let cov = |sxy: i128, sx: i128, sy: i128| {
            (k * sxy - sx * sy) as f64 / (k as f64 * (k - 1) as f64 * scale * scale)
        };
        [
            cov(self.aa, self.a, self.a),
            cov(self.ab, self.a, self.b),
            cov(self.bb, self.b, self.b),
        ]
    }
}

/// Builds the comparison in bounded memory (see the module documentation).
pub fn build(
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
    let champions = store.role_models(&filter, "champion")?;
    let challengers = store.role_models(&filter, "challenger")?;
    // The models are chosen as the loaded comparison chooses them, from the counts per name and version.
    let champion = match &request.champion {
        Some(m) => m.clone(),
        None => most_frequent(&by_name(&champions))
            .map(ModelRef::bare)
            .ok_or_else(|| {
                CompareReportError::Models(format!(
                    "route {route}: no champion prediction in the store"
                ))
            })?,
    };
    let challenger = match &request.challenger {
        Some(m) => m.clone(),
        None => {
            let names: Vec<String> = by_name(&challengers).into_iter().map(|(m, _)| m).collect();
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
                let mut versions: Vec<String> = challengers
                    .iter()
                    .filter(|(m, v, _)| *m == one && champion.version.as_ref() != Some(v))
                    .map(|(_, v, _)| v.clone())
                    .collect();
                versions.sort_unstable();
                versions.dedup();
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
    // A challenger of the champion's own name pins the champion to a version too (its most frequent one).
    let champion = if champion.version.is_none() && challenger.name == champion.name {
        let versions: Vec<(String, u64)> = champions
            .iter()
            .filter(|(m, v, _)| *m == champion.name && !challenger.matches(m, v))
            .map(|(_, v, c)| (v.clone(), *c))
            .collect();
        match most_frequent(&versions) {
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
    let count_of = |list: &[(String, String, u64)], model: &ModelRef| {
        list.iter()
            .filter(|(m, v, _)| model.matches(m, v))
            .map(|(_, _, c)| *c as usize)
            .sum::<usize>()
    };
    let champion_predictions = count_of(&champions, &champion);
    let challenger_predictions = count_of(&challengers, &challenger);
    for (role, model, missing, known) in [
        ("champion", &champion, champion_predictions == 0, &champions),
        (
            "challenger",
            &challenger,
            challenger_predictions == 0,
            &challengers,
        ),
    ] {
        if missing {
            return Err(CompareReportError::Models(format!(
                "route {route}: no {role} prediction by `{model}` in the store ({role}s logged: {})",
                if known.is_empty() {
                    "none".to_string()
                } else {
                    known
                        .iter()
                        .map(|(m, v, _)| format!("{m}@{v}"))
                        .collect::<Vec<_>>()
                        .join(", ")
                }
            )));
        }
    }
    let scan = PairScan {
        from_ms: filter.from_ms,
        to_ms: filter.to_ms,
        route: &route,
        champion: &champion.name,
        champion_version: champion.version.as_deref(),
        challenger: &challenger.name,
        challenger_version: challenger.version.as_deref(),
    };

    // Agreement over every pair.
    let options = AgreementOptions {
        threshold: request.threshold,
        ..AgreementOptions::default()
    };
    let mut paired = 0usize;
    let (mut sum, mut sum_abs, mut max_abs, mut max_row) = (0.0f64, 0.0f64, 0.0f64, 0usize);
    let (mut champion_only, mut challenger_only) = (0usize, 0usize);
    let (mut ra, mut rb, mut raa, mut rbb, mut rab) = (0i128, 0i128, 0i128, 0i128, 0i128);
    let (mut d_min, mut d_max) = (f64::INFINITY, f64::NEG_INFINITY);
    let mut labelled = 0usize;
    store.scan_pairs(&scan, PairRanks::Midranks, &mut |r: &PairRow| {
        let d = r.challenger - r.champion;
        sum += d;
        sum_abs += d.abs();
        if d.abs() > max_abs {
            max_abs = d.abs();
            max_row = paired;
        }
        if let Some(t) = options.threshold {
            match (sigmoid(r.champion) > t, sigmoid(r.challenger) > t) {
                (true, false) => champion_only += 1,
                (false, true) => challenger_only += 1,
                _ => {}
            }
        }
        let (a, b) = (i128::from(r.champion_twice), i128::from(r.challenger_twice));
        ra += a;
        rb += b;
        raa += a * a;
        rbb += b * b;
        rab += a * b;
        d_min = d_min.min(d);
        d_max = d_max.max(d);
        labelled += usize::from(r.label.is_some());
        paired += 1;
        Ok(())
    })?;
    let agreement = if paired == 0 {
        None
    } else {
        if let Some(t) = options.threshold {
            if !(0.0..=1.0).contains(&t) {
                return Err(CompareError::BadOption {
                    name: "threshold",
                    value: t,
                    reason: "must be a probability in [0, 1]",
                }
                .into());
            }
        }
        // PSI of the challenger against the champion on the champion's quantile edges.
        let bins = options.psi_bins;
        if bins == 0 {
            return Err(CompareError::from(MetricsError::BadBinCount {
                what: "number of bins",
                got: 0,
                min: 1,
                max: None,
            })
            .into());
        }
        let levels: Vec<f64> = (0..=bins)
            .map(|i| linspace_unit(i, bins) * 100.0 / 100.0)
            .collect();
        let mut wanted: std::collections::BTreeMap<usize, f64> = levels
            .iter()
            .flat_map(|&q| quantile_positions(paired, q))
            .map(|i| (i, f64::NAN))
            .collect();
        let mut i = 0usize;
        store.scan_pairs(&scan, PairRanks::ChampionAscending, &mut |r: &PairRow| {
            if let Some(v) = wanted.get_mut(&i) {
                *v = r.champion;
            }
            i += 1;
            Ok(())
        })?;
        let all: Vec<f64> = levels
            .iter()
            .map(|&q| quantile_by(paired, q, |i| wanted.get(&i).copied().unwrap_or(f64::NAN)))
            .collect();
        let mut edges: Vec<f64> = all[1..bins].to_vec();
        edges.dedup();
        let mut expected = vec![0u64; edges.len() + 1];
        let mut actual = vec![0u64; edges.len() + 1];
        store.scan_pairs(&scan, PairRanks::None, &mut |r: &PairRow| {
            expected[bin_index(r.champion, &edges)] += 1;
            actual[bin_index(r.challenger, &edges)] += 1;
            Ok(())
        })?;
        let psi =
            psi_from_counts(&expected, &actual, options.psi_rule).map_err(CompareError::from)?;
        let n = paired as f64;
        // Pearson's correlation of the midranks from exact sums: n sum(ab) - sum(a) sum(b), and so on.
        let spearman = (paired >= 2)
            .then(|| {
                let k = paired as i128;
                let sab = (k * rab - ra * rb) as f64;
                let saa = (k * raa - ra * ra) as f64;
                let sbb = (k * rbb - rb * rb) as f64;
                (saa > 0.0 && sbb > 0.0).then(|| (sab / (saa * sbb).sqrt()).clamp(-1.0, 1.0))
            })
            .flatten();
        Some(Agreement {
            cases: paired,
            spearman,
            mean_difference: sum / n,
            mean_absolute_difference: sum_abs / n,
            max_absolute_difference: max_abs,
            max_difference_row: max_row,
            flips: options.threshold.map(|threshold| Flips {
                threshold,
                champion_only,
                challenger_only,
                share: (champion_only + challenger_only) as f64 / n,
            }),
            psi,
            psi_bins_used: edges.len() + 1,
            psi_rule: options.psi_rule,
        })
    };

    // Outcomes: first pass over the pairs with an outcome, with DeLong's placements.
    let outcome_options = OutcomeOptions {
        estimator: match request.newey_west_lag {
            Some(lag) => VarianceEstimator::NeweyWest { lag },
            None => VarianceEstimator::Independent,
        },
        ..OutcomeOptions::default()
    };
    let inner: Vec<f64> = (1..ECE_BINS).map(|i| linspace_unit(i, ECE_BINS)).collect();
    let (mut bins_a, mut bins_b) = (Bins::new(), Bins::new());
    let (mut loss_a, mut loss_b, mut sq_a, mut sq_b) = (0.0f64, 0.0f64, 0.0f64, 0.0f64);
    let (mut sum_d, mut sum_s) = (0.0f64, 0.0f64);
    let (mut pos, mut neg) = (Components::default(), Components::default());
    let (mut l_min, mut l_max) = (f64::INFINITY, f64::NEG_INFINITY);
    let mut n = 0usize;
    if labelled > 0 {
        store.scan_pairs(&scan, PairRanks::Placements, &mut |r: &PairRow| {
            let Some(y) = r.label else { return Ok(()) };
            let (a, b) = (r.champion, r.challenger);
            let (pa, pb) = (sigmoid(a), sigmoid(b));
            let t = f64::from(u8::from(y));
            let (la, lb) = (log_loss_term_pm1(a, y), log_loss_term_pm1(b, y));
            loss_a += la;
            loss_b += lb;
            sq_a += (pa - t) * (pa - t);
            sq_b += (pb - t) * (pb - t);
            bins_a.add(&inner, pa, y);
            bins_b.add(&inner, pb, y);
            let d = lb - la;
            sum_d += d;
            sum_s += (pb - t).powi(2) - (pa - t).powi(2);
            l_min = l_min.min(d);
            l_max = l_max.max(d);
            if y {
                pos.add(r.champion_twice, r.challenger_twice);
            } else {
                neg.add(r.champion_twice, r.challenger_twice);
            }
            n += 1;
            Ok(())
        })?;
    }
    let positives = pos.count as usize;
    let negatives = neg.count as usize;
    let nf = n as f64;
    let model_scores = |loss: f64, sq: f64, bins: &Bins| ModelScores {
        log_loss: loss / nf,
        brier: sq / nf,
        ece: bins.table().ece,
    };
    // Second pass: centred sums, Newey-West autocovariances, the differences histogram.
    let lag = match outcome_options.estimator {
        VarianceEstimator::NeweyWest { lag } => {
            if n >= 2 && lag >= n {
                return Err(CompareError::BadOption {
                    name: "Newey-West lag",
                    value: lag as f64,
                    reason: "must be below the number of cases",
                }
                .into());
            }
            Some(lag)
        }
        VarianceEstimator::Independent => None,
    };
    let (mean_d, mean_s) = (sum_d / nf, sum_s / nf);
    let (mut ss_d, mut ss_s) = (0.0f64, 0.0f64);
    let lags = lag.unwrap_or(0);
    let (mut gamma_d, mut gamma_s) = (vec![0.0f64; lags + 1], vec![0.0f64; lags + 1]);
    let (mut ring_d, mut ring_s): (VecDeque<f64>, VecDeque<f64>) =
        (VecDeque::new(), VecDeque::new());
    let mut histogram = if n > 0 {
        let (lo, hi) = DifferencesHistogram::range(l_min, l_max);
        DifferencesHistogram::new(lo, hi, DIFFERENCE_BARS)
    } else {
        let (lo, hi) = DifferencesHistogram::range(d_min, d_max);
        DifferencesHistogram::new(lo, hi, DIFFERENCE_BARS)
    };
    if n >= 2 || paired > 0 {
        store.scan_pairs(&scan, PairRanks::None, &mut |r: &PairRow| {
            let (a, b) = (r.champion, r.challenger);
            let Some(y) = r.label else {
                if n == 0 {
                    histogram.add(b - a);
                }
                return Ok(());
            };
            let t = f64::from(u8::from(y));
            let d = log_loss_term_pm1(b, y) - log_loss_term_pm1(a, y);
            histogram.add(d);
            let s = (sigmoid(b) - t).powi(2) - (sigmoid(a) - t).powi(2);
            let (cd, cs) = (d - mean_d, s - mean_s);
            ss_d += cd * cd;
            ss_s += cs * cs;
            if lags > 0 {
                // ring[j] holds the centred value j + 1 cases back.
                for (k, (pd, ps)) in ring_d.iter().zip(&ring_s).enumerate() {
                    gamma_d[k + 1] += cd * pd;
                    gamma_s[k + 1] += cs * ps;
                }
                ring_d.push_front(cd);
                ring_s.push_front(cs);
                ring_d.truncate(lags);
                ring_s.truncate(lags);
            }
            Ok(())
        })?;
    }
    let paired_test = |mean: f64, sum_sq: f64, gamma: &[f64]| {
        let long_run = match lag {
            None => sum_sq / (nf - 1.0),
            Some(lag) => {
                let mut v = sum_sq / nf;
                for (k, g) in gamma.iter().enumerate().skip(1).take(lag) {
                    v += 2.0 * (1.0 - k as f64 / (lag as f64 + 1.0)) * (g / nf);
                }
                v.max(0.0)
            }
        };
        let standard_error = (long_run / nf).sqrt();
        let (statistic, p_value) = normal_z_and_p(mean, standard_error);
        PairedTest {
            cases: n,
            mean,
            standard_error,
            statistic,
            p_value,
            estimator: outcome_options.estimator,
        }
    };
    let (log_loss, brier) = if n >= 2 {
        (
            Some(paired_test(mean_d, ss_d, &gamma_d)),
            Some(paired_test(mean_s, ss_s, &gamma_s)),
        )
    } else {
        (None, None)
    };
    let delong = (positives >= 2 && negatives >= 2).then(|| {
        let (m, nn) = (positives as f64, negatives as f64);
        let auc_a = pos.a as f64 / (2.0 * m * nn);
        let auc_b = pos.b as f64 / (2.0 * m * nn);
        let s10 = pos.covariance(2.0 * nn);
        let s01 = neg.covariance(2.0 * m);
        let s: [f64; 3] = std::array::from_fn(|k| s10[k] / m + s01[k] / nn);
        let var_diff = (s[0] + s[2] - 2.0 * s[1]).max(0.0);
        let difference = auc_b - auc_a;
        let standard_error = var_diff.sqrt();
        let (z, p_value) = normal_z_and_p(difference, standard_error);
        DeLongTest {
            positives,
            negatives,
            auc_champion: auc_a,
            auc_challenger: auc_b,
            se_champion: s[0].max(0.0).sqrt(),
            se_challenger: s[2].max(0.0).sqrt(),
            covariance: s[1],
            difference,
            standard_error,
            z,
            p_value,
        }
    });
    let verdict =
        outcome_options
            .rule
            .judge(positives, negatives, log_loss.as_ref(), delong.as_ref());
    let outcomes = OutcomeComparison {
        cases: n,
        positives,
        negatives,
        champion: (n > 0).then(|| model_scores(loss_a, sq_a, &bins_a)),
        challenger: (n > 0).then(|| model_scores(loss_b, sq_b, &bins_b)),
        log_loss,
        brier,
        delong,
        verdict,
    };
    let (always_valid, verdict) = always_valid::compute(&outcomes);
    let reliability = (n > 0).then(|| (bins_a.table(), bins_b.table()));
    let differences_kind = if n == 0 {
        "adjusted log-odds, challenger minus champion"
    } else {
        "log-loss, challenger minus champion"
    };
    Ok(CompareReport {
        route,
        champion: champion.to_string(),
        challenger: challenger.to_string(),
        champion_predictions,
        challenger_predictions,
        paired,
        paired_with_outcome: n,
        agreement: agreement.as_ref().map(agreement_json),
        outcomes: outcomes_json(&outcomes),
        verdict_code: verdict.code().to_string(),
        verdict: format!("{verdict} (always-valid p-values)"),
        reliability,
        differences: histogram,
        differences_kind: differences_kind.to_string(),
        always_valid,
        fixed_sample_verdict_code: outcomes.verdict.code().to_string(),
        fixed_sample_verdict: outcomes.verdict.to_string(),
    })
}
