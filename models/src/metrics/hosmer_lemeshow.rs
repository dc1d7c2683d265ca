//! The Hosmer-Lemeshow goodness-of-fit test and the chi-square survival function it needs.
//!
//! Hosmer and Lemeshow (1980), "Goodness of fit tests for the multiple logistic regression model",
//! Communications in Statistics A9: sort the cases by predicted probability, cut them into `g` groups, and compare
//! observed with expected counts of both classes, `C = sum_k (O1_k - E1_k)^2 / E1_k + (O0_k - E0_k)^2 / E0_k`,
//! with `E1_k` the sum of the group's probabilities and `E0_k = n_k - E1_k` summed as `1 - p`. Under the model,
//! `C` is roughly chi-square with `g - 2` degrees of freedom.
//!
//! How the groups are cut has no single standard; both rules in use are offered, see [`HlGrouping`].

use super::quantile::{quantile_edges_sorted, right_closed_bin, sorted_copy};
use super::{all_probabilities, paired, split_sizes, Labels, MetricsError};

/// How the cases are cut into groups.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HlGrouping {
    /// By rank: sort by predicted probability (a stable sort, so tied probabilities keep row order), then cut into
    /// `g` consecutive groups of near-equal size, the first `n mod g` groups one case larger. Tied probabilities
    /// may be split across two groups. Needs `3 <= g <= n`.
    ByRank(usize),
    /// By quantile cut points: edges at the `k / g` sample quantiles (linear interpolation, as `np.percentile`),
    /// groups `(e_{k-1}, e_k]` as in [`calibration_table`](super::calibration_table()), so tied probabilities
    /// always share a group; groups left empty by ties are dropped and the degrees of freedom are the number of
    /// non-empty groups minus 2. Needs `g >= 3` and at least 3 non-empty groups.
    ByQuantile(usize),
}

/// One group of the Hosmer-Lemeshow table.
#[derive(Debug, Clone, PartialEq)]
pub struct HlGroup {
    /// Number of cases.
    pub count: usize,
    /// Observed positives `O1`.
    pub observed_positive: usize,
    /// Expected positives `E1`, the sum of the predicted probabilities.
    pub expected_positive: f64,
    /// Expected negatives `E0`, the sum of `1 - p`.
    pub expected_negative: f64,
    /// Smallest predicted probability in the group.
    pub min_probability: f64,
    /// Largest predicted probability in the group.
    pub max_probability: f64,
}

/// Result of the Hosmer-Lemeshow test.
#[derive(Debug, Clone, PartialEq)]
pub struct HosmerLemeshow {
    /// The statistic `C`.
    pub statistic: f64,
    /// Degrees of freedom, the number of groups minus 2.
    pub degrees_of_freedom: usize,
    /// `P(chi2_df > C)`, from [`chi2_sf`].
    pub p_value: f64,
    /// The groups, in increasing predicted probability.
    pub groups: Vec<HlGroup>,
}

/// Hosmer-Lemeshow test of probability forecasts against 0/1 outcomes.
///
/// Errors: empty input, length mismatch, a probability outside [0, 1], a label other than 0/1, a bad group
/// count, fewer than 3 non-empty groups, or a group whose expected count of a class is 0 (all its probabilities 0,
/// or all 1), where the statistic is undefined.
pub fn hosmer_lemeshow<L: Labels + ?Sized>(
    probabilities: &[f64],
    labels: &L,
    grouping: HlGrouping,
) -> Result<HosmerLemeshow, MetricsError> {
    let y = paired("probabilities", probabilities, labels)?;
    all_probabilities("probabilities", probabilities)?;
    let n = probabilities.len();
    let members: Vec<Vec<usize>> = match grouping {
        HlGrouping::ByRank(g) => {
            if g < 3 || g > n {
                return Err(MetricsError::BadBinCount {
                    what: "number of groups",
                    got: g,
                    min: 3,
                    max: Some(n),
                });
            }
            let mut order: Vec<usize> = (0..n).collect();
            order.sort_by(|&a, &b| probabilities[a].total_cmp(&probabilities[b]));
            let mut start = 0;
            split_sizes(n, g)
                .into_iter()
                .map(|size| {
                    let group = order[start..start + size].to_vec();
                    start += size;
                    group
                })
                .collect()
        }
        HlGrouping::ByQuantile(g) => {
            if g < 3 {
                return Err(MetricsError::BadBinCount {
                    what: "number of groups",
                    got: g,
                    min: 3,
                    max: None,
                });
            }
            let edges = quantile_edges_sorted(&sorted_copy(probabilities), g);
            let mut groups = vec![Vec::new(); g];
            for (i, &p) in probabilities.iter().enumerate() {
                groups[right_closed_bin(&edges[1..g], p)].push(i);
            }
            groups.retain(|m| !m.is_empty());
            if groups.len() < 3 {
                return Err(MetricsError::BadBinCount {
                    what: "number of non-empty groups",
                    got: groups.len(),
                    min: 3,
                    max: None,
                });
            }
            groups
        }
    };
    let mut statistic = 0.0;
    let mut groups = Vec::with_capacity(members.len());
    for (k, rows) in members.iter().enumerate() {
        let (mut e1, mut e0, mut o1) = (0.0, 0.0, 0usize);
        let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
        for &i in rows {
            let p = probabilities[i];
            e1 += p;
            e0 += 1.0 - p;
            o1 += usize::from(y[i]);
            lo = lo.min(p);
            hi = hi.max(p);
        }
        if e1 == 0.0 {
            return Err(MetricsError::ZeroExpected { group: k, class: 1 });
        }
        if e0 == 0.0 {
            return Err(MetricsError::ZeroExpected { group: k, class: 0 });
        }
        let o0 = (rows.len() - o1) as f64;
        statistic += (o1 as f64 - e1).powi(2) / e1 + (o0 - e0).powi(2) / e0;
        groups.push(HlGroup {
            count: rows.len(),
            observed_positive: o1,
            expected_positive: e1,
            expected_negative: e0,
            min_probability: lo,
            max_probability: hi,
        });
    }
    let degrees_of_freedom = groups.len() - 2;
    let p_value = chi2_sf(statistic, degrees_of_freedom as f64)?;
    Ok(HosmerLemeshow {
        statistic,
        degrees_of_freedom,
        p_value,
        groups,
    })
}

/// Survival function of the chi-square distribution, `P(X > x)` for `df` degrees of freedom: the regularized
/// upper incomplete gamma function `Q(df / 2, x / 2)`. Reference: `scipy.stats.chi2.sf`.
///
/// `Q` is evaluated by its power series (as `1 - P`) for `x < a + 1` and by its continued fraction (modified
/// Lentz) otherwise, where it is small and needs relative accuracy (Press et al., "Numerical Recipes", 3rd ed.,
/// section 6.2; Abramowitz and Stegun 6.5.29 and 6.5.31). Errors: `df` not finite and positive, `x` NaN.
pub fn chi2_sf(x: f64, df: f64) -> Result<f64, MetricsError> {
    if !(df.is_finite() && df > 0.0) {
        return Err(MetricsError::BadParameter {
            name: "degrees of freedom",
            value: df,
            reason: "must be finite and positive",
        });
    }
    if x.is_nan() {
        return Err(MetricsError::BadParameter {
            name: "chi-square value",
            value: x,
            reason: "must not be NaN",
        });
    }
    Ok(gamma_q(df / 2.0, x / 2.0))
}

/// Regularized upper incomplete gamma `Q(a, x)` for `a > 0`.
fn gamma_q(a: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    if x == f64::INFINITY {
        return 0.0;
    }
    let log_prefactor = -x + a * x.ln() - ln_gamma(a);
    if x < a + 1.0 {
        // P(a, x) = e^-x x^a / Gamma(a) * sum_n x^n / (a (a+1) ... (a+n)).
        let (mut term, mut sum, mut ap) = (1.0 / a, 1.0 / a, a);
        for _ in 0..10_000 {
            ap += 1.0;
            term *= x / ap;
            sum += term;
            if term.abs() < sum.abs() * f64::EPSILON {
                break;
            }
        }
        1.0 - sum * log_prefactor.exp()
    } else {
        // Q(a, x) = e^-x x^a / Gamma(a) * 1 / (x + 1 - a - 1 (1 - a) / (x + 3 - a - 2 (2 - a) / (x + 5 - a - ...))).
        const TINY: f64 = 1e-300;
        let mut b = x + 1.0 - a;
        let mut c = 1.0 / TINY;
        let mut d = 1.0 / b;
        let mut h = d;
        for i in 1..10_000 {
            let an = -(i as f64) * (i as f64 - a);
            b += 2.0;
            d = an * d + b;
            if d.abs() < TINY {
                d = TINY;
            }
            c = b + an / c;
            if c.abs() < TINY {
                c = TINY;
            }
            d = 1.0 / d;
            let delta = d * c;
            h *= delta;
            if (delta - 1.0).abs() < f64::EPSILON {
                break;
            }
        }
        log_prefactor.exp() * h
    }
}

/// `ln Gamma(x)` for `x > 0` by the Lanczos approximation with `g = 7` and nine coefficients (relative error near
/// 1e-15; Lanczos 1964, "A precision approximation of the gamma function", SIAM J. Numerical Analysis B1).
pub(crate) fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        // Reflection: Gamma(x) Gamma(1 - x) = pi / sin(pi x).
        return (std::f64::consts::PI / (std::f64::consts::PI * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut acc = C[0];
    for (i, &c) in C.iter().enumerate().skip(1) {
        acc += c / (x + i as f64);
    }
    let t = x + G + 0.5;
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + acc.ln()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn chi2_sf_closed_forms() {
        // df = 2: Q(1, x/2) = e^(-x/2) exactly. df = 1: P(X > x) = erfc(sqrt(x/2)); at x = 3.841458820694124
        // (the 95% point, scipy.stats.chi2.ppf(0.95, 1), SciPy 1.17.1) the tail is 0.05.
        for x in [0.1, 1.0, 5.0, 30.0, 200.0] {
            let want = (-x / 2.0f64).exp();
            assert!(
                (chi2_sf(x, 2.0).unwrap() / want - 1.0).abs() < 1e-12,
                "x = {x}"
            );
        }
        assert!((chi2_sf(3.841458820694124, 1.0).unwrap() - 0.05).abs() < 1e-12);
        assert_eq!(chi2_sf(0.0, 4.0).unwrap(), 1.0);
        assert!(chi2_sf(1.0, 0.0).is_err());
    }

    #[test]
    fn ln_gamma_at_integers_and_half() {
        // ln Gamma(n) = ln (n-1)!, Gamma(1/2) = sqrt(pi).
        assert!((ln_gamma(5.0) - 24f64.ln()).abs() < 1e-13);
        assert!((ln_gamma(0.5) - std::f64::consts::PI.sqrt().ln()).abs() < 1e-13);
        assert!((ln_gamma(11.0) - 3_628_800f64.ln()).abs() < 1e-12);
    }

    #[test]
    fn hand_computed_three_groups() {
        // Six cases, three rank groups of two (already sorted):
        // g0: p 0.1, 0.2, y 0, 0 -> E1 0.3, E0 1.7, O1 0, O0 2: 0.09/0.3 + 0.09/1.7
        // g1: p 0.4, 0.6, y 1, 0 -> E1 1.0, E0 1.0, O1 1, O0 1: 0
        // g2: p 0.8, 0.9, y 1, 0 -> E1 1.7, E0 0.3, O1 1, O0 1: 0.49/1.7 + 0.49/0.3
        let p = [0.1, 0.2, 0.4, 0.6, 0.8, 0.9];
        let y = [0u8, 0, 1, 0, 1, 0];
        let hl = hosmer_lemeshow(&p, &y, HlGrouping::ByRank(3)).unwrap();
        let want = 0.09 / 0.3 + 0.09 / 1.7 + 0.49 / 1.7 + 0.49 / 0.3;
        assert!((hl.statistic - want).abs() < 1e-12);
        assert_eq!(hl.degrees_of_freedom, 1);
        assert_eq!(
            hl.groups.iter().map(|g| g.count).collect::<Vec<_>>(),
            vec![2, 2, 2]
        );
    }

    #[test]
    fn refuses_groups_that_cannot_be_formed() {
        let p = [0.1, 0.2, 0.3];
        let y = [0u8, 1, 0];
        assert!(matches!(
            hosmer_lemeshow(&p, &y, HlGrouping::ByRank(2)),
            Err(MetricsError::BadBinCount { .. })
        ));
        assert!(matches!(
            hosmer_lemeshow(&p, &y, HlGrouping::ByRank(4)),
            Err(MetricsError::BadBinCount { .. })
        ));
        // All ties: quantile cut points collapse to one non-empty group.
        assert!(matches!(
            hosmer_lemeshow(&[0.5; 6], &[0u8, 1, 0, 1, 0, 1], HlGrouping::ByQuantile(3)),
            Err(MetricsError::BadBinCount { got: 1, .. })
        ));
        assert_eq!(
            hosmer_lemeshow(&[0.0, 0.5, 0.6], &y, HlGrouping::ByRank(3)),
            Err(MetricsError::ZeroExpected { group: 0, class: 1 })
        );
    }
}
