//! Isotonic calibration: the non-decreasing step fit of the labels on the scores by pool-adjacent-violators
//! (Ayer, Brunk, Ewing, Reid and Silverman 1955, Annals of Mathematical Statistics 26; for calibration Zadrozny and
//! Elkan 2002, KDD), stored as points that the engine interpolates linearly and clips outside.
//!
//! [`fit_isotonic`] follows scikit-learn 1.9.1's `IsotonicRegression(out_of_bounds="clip")` as
//! `CalibratedClassifierCV(method="isotonic")` uses it (read in `sklearn/isotonic.py` and `sklearn/_isotonic.pyx`):
//! rows sorted by score, scores closer than 1e-15 to the first of a run merged and their labels averaged
//! (`_make_unique`), pooled by PAV, and interior points dropped where the fitted value equals both neighbours.
//!
//! [`fit_isotonic_strict`] keeps rank order: tied outputs of the step fit would give different scores the same
//! probability. It places one point per pooled block at the block's mean score and its pooled value, and
//! interpolates between them (centred isotonic regression, Oron and Flournoy 2017, "Centered isotonic regression:
//! point and interval estimation for dose-response studies", Statistics in Biopharmaceutical Research 9; from
//! memory). Adjacent blocks of equal value are pooled too, so the values strictly increase. Our choice at the
//! ends, no single source: the first and last segments are extended linearly to the smallest and largest score
//! and the values clamped into [0, 1], so the map is strictly increasing over the whole fitted range except where
//! it reaches 0 or 1.

use super::{check_holdout, FitError, Method};
use crate::calibration::{Calibration, IsotonicInput};

/// Scores closer than this to the first score of a run are treated as ties (`np.finfo(np.float64).resolution`,
/// the rule of scikit-learn's `_make_unique`).
pub const TIE_RESOLUTION: f64 = 1e-15;

/// A pooled block: the mean label `value` over `weight` rows whose scores average `centre`, spanning unique scores
/// `first..=last`.
#[derive(Debug, Clone, PartialEq)]
struct Block {
    value: f64,
    weight: f64,
    score_sum: f64,
    first: usize,
    last: usize,
}

/// Unique scores (ascending), mean label and row count at each, and the sum of the raw scores merged into each.
fn unique_points(h: &[f64], labels: &[bool]) -> (Vec<f64>, Vec<f64>, Vec<f64>, Vec<f64>) {
    let mut order: Vec<usize> = (0..h.len()).collect();
    // Sorted by score, then label, as `np.lexsort((y, X))`.
    order.sort_by(|&i, &j| h[i].total_cmp(&h[j]).then(labels[i].cmp(&labels[j])));
    let (mut xs, mut ys, mut ws, mut ss) = (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let (mut cur_x, mut sum_y, mut w, mut sum_s) = (h[order[0]], 0.0, 0.0, 0.0);
    for &i in &order {
        if h[i] - cur_x >= TIE_RESOLUTION {
            xs.push(cur_x);
            ys.push(sum_y / w);
            ws.push(w);
            ss.push(sum_s);
            (cur_x, sum_y, w, sum_s) = (h[i], 0.0, 0.0, 0.0);
        }
        sum_y += f64::from(u8::from(labels[i]));
        w += 1.0;
        sum_s += h[i];
    }
    xs.push(cur_x);
    ys.push(sum_y / w);
    ws.push(w);
    ss.push(sum_s);
    (xs, ys, ws, ss)
}

/// Pool-adjacent-violators on values `y` with weights `w`; `pool_equal` also pools adjacent blocks of equal value.
fn pav(y: &[f64], w: &[f64], s: &[f64], pool_equal: bool) -> Vec<Block> {
    let mut blocks: Vec<Block> = Vec::with_capacity(y.len());
    for i in 0..y.len() {
        let mut b = Block {
            value: y[i],
            weight: w[i],
            score_sum: s[i],
            first: i,
            last: i,
        };
        while let Some(prev) = blocks.last() {
            let violates = prev.value > b.value || (pool_equal && prev.value == b.value);
            if !violates {
                break;
            }
            let Some(prev) = blocks.pop() else { break };
            let weight = prev.weight + b.weight;
            b = Block {
                value: (prev.value * prev.weight + b.value * b.weight) / weight,
                weight,
                score_sum: prev.score_sum + b.score_sum,
                first: prev.first,
                last: b.last,
            };
        }
        blocks.push(b);
    }
    blocks
}

/// Fits the isotonic step map as scikit-learn does; returns [`Calibration::Isotonic`] on the log-odds.
///
/// Errors: those of [`check_holdout`]. Scores whose labels fall with them give a constant map (two points at the
/// ends of the range, the overall positive share), as scikit-learn's does; [`fit_isotonic_strict`] refuses that.
pub fn fit_isotonic(h: &[f64], y: &[f64]) -> Result<Calibration, FitError> {
    let (labels, _) = check_holdout(h, y)?;
    let (xs, ys, ws, ss) = unique_points(h, &labels);
    let blocks = pav(&ys, &ws, &ss, false);
    let mut fitted = vec![0.0; xs.len()];
    for b in &blocks {
        fitted[b.first..=b.last].fill(b.value);
    }
    // Keep the ends and every point whose value differs from a neighbour's.
    let n = xs.len();
    let (mut x, mut v) = (Vec::new(), Vec::new());
    for i in 0..n {
        let keep = i == 0 || i == n - 1 || fitted[i] != fitted[i - 1] || fitted[i] != fitted[i + 1];
        if keep {
            x.push(xs[i]);
            v.push(fitted[i]);
        }
    }
    Ok(Calibration::Isotonic {
        input: IsotonicInput::LogOdds,
        x,
        y: v,
    })
}

/// Fits the strictly increasing (centred) isotonic map; returns [`Calibration::Isotonic`] on the log-odds.
///
/// Errors: those of [`check_holdout`]; [`FitError::NoPositiveRelation`] when pooling leaves a single block (the
/// labels do not rise with the scores at all).
pub fn fit_isotonic_strict(h: &[f64], y: &[f64]) -> Result<Calibration, FitError> {
    let (labels, _) = check_holdout(h, y)?;
    let (xs, ys, ws, ss) = unique_points(h, &labels);
    let blocks = pav(&ys, &ws, &ss, true);
    if blocks.len() < 2 {
        return Err(FitError::NoPositiveRelation {
            method: Method::IsotonicStrict,
            slope: 0.0,
        });
    }
    let mut x: Vec<f64> = blocks.iter().map(|b| b.score_sum / b.weight).collect();
    let mut v: Vec<f64> = blocks.iter().map(|b| b.value).collect();
    let (lo, hi) = (xs[0], xs[xs.len() - 1]);
    if lo < x[0] {
        let slope = (v[1] - v[0]) / (x[1] - x[0]);
        let at = (v[0] + slope * (lo - x[0])).clamp(0.0, v[0]);
        x.insert(0, lo);
        v.insert(0, at);
    }
    let m2 = x.len();
    if hi > x[m2 - 1] {
        let slope = (v[m2 - 1] - v[m2 - 2]) / (x[m2 - 1] - x[m2 - 2]);
        let at = (v[m2 - 1] + slope * (hi - x[m2 - 1])).clamp(v[m2 - 1], 1.0);
        x.push(hi);
        v.push(at);
    }
    Ok(Calibration::Isotonic {
        input: IsotonicInput::LogOdds,
        x,
        y: v,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parts(c: Calibration) -> (Vec<f64>, Vec<f64>) {
        match c {
            Calibration::Isotonic { x, y, .. } => (x, y),
            other => panic!("{other:?}"),
        }
    }

    #[test]
    fn pav_matches_the_worked_example_of_scikit_learn_docs() {
        // `sklearn.isotonic.isotonic_regression([5, 3, 1, 2, 8, 10, 7, 9, 6, 4])` documents
        // [2.75]*4 + [7.33..]*6 (scikit-learn 1.9.1 docstring).
        let y = [5.0, 3.0, 1.0, 2.0, 8.0, 10.0, 7.0, 9.0, 6.0, 4.0];
        let blocks = pav(&y, &[1.0; 10], &[0.0; 10], false);
        assert_eq!(blocks.len(), 2);
        assert_eq!(blocks[0].value, 2.75);
        assert!((blocks[1].value - 44.0 / 6.0).abs() < 1e-15);
    }

    #[test]
    fn ties_are_averaged_before_pooling() {
        // Two rows at h = 1 with labels 1 and 0 count as one point of value 0.5 and weight 2.
        let h = [0.0, 1.0, 1.0, 2.0];
        let y = [0.0, 1.0, 0.0, 1.0];
        let (x, v) = parts(fit_isotonic(&h, &y).unwrap());
        assert_eq!(x, vec![0.0, 1.0, 2.0]);
        assert_eq!(v, vec![0.0, 0.5, 1.0]);
    }

    #[test]
    fn strict_variant_is_strictly_increasing_inside_and_keeps_rank_order() {
        let h = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0];
        let y = [0.0, 1.0, 0.0, 0.0, 1.0, 0.0, 1.0, 1.0];
        let c = fit_isotonic_strict(&h, &y).unwrap();
        let (x, v) = parts(c.clone());
        // PAV blocks: {0}: 0, {1,2,3}: 1/3, {4,5}: 1/2, {6,7}: 1 -> centres 0, 2, 4.5, 6.5; ends 0 and 7.
        assert_eq!(x, vec![0.0, 2.0, 4.5, 6.5, 7.0]);
        assert_eq!(v[..4], [0.0, 1.0 / 3.0, 0.5, 1.0]);
        assert_eq!(v[4], 1.0);
        let mapped: Vec<f64> = [0.5, 1.0, 2.5, 3.0, 4.0, 5.0, 6.0]
            .iter()
            .map(|&s| c.apply(s))
            .collect();
        assert!(mapped.windows(2).all(|w| w[0] < w[1]), "{mapped:?}");
        // The step fit ties 1, 2 and 3.
        let step = fit_isotonic(&h, &y).unwrap();
        assert_eq!(step.apply(1.0), step.apply(3.0));
    }

    #[test]
    fn decreasing_labels_give_a_constant_step_map_and_a_refused_strict_map() {
        let h = [0.0, 1.0, 2.0, 3.0];
        let y = [1.0, 1.0, 0.0, 0.0];
        let (x, v) = parts(fit_isotonic(&h, &y).unwrap());
        assert_eq!((x, v), (vec![0.0, 3.0], vec![0.5, 0.5]));
        assert!(matches!(
            fit_isotonic_strict(&h, &y),
            Err(FitError::NoPositiveRelation { .. })
        ));
    }
}
