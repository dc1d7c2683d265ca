//! Tail probabilities beside the statistics: the asymptotic Kolmogorov distribution for the two-sample KS
//! statistic, and Student's t for small-sample paired tests.
//!
//! - [`kolmogorov_sf`]: `Q(x) = P(K > x)` of the limiting Kolmogorov distribution (Kolmogorov 1933; Smirnov 1948,
//!   "Table for estimating the goodness of fit of empirical distributions", Annals of Mathematical Statistics 19),
//!   `Q(x) = 2 sum_{k>=1} (-1)^(k-1) exp(-2 k^2 x^2)`, and for small `x` through its other series
//!   `1 - Q(x) = sqrt(2 pi) / x sum_{k>=1} exp(-(2k-1)^2 pi^2 / (8 x^2))`. Reference: `scipy.special.kolmogorov`.
//! - [`ks_p_value`]: the two-sided p-value of a two-sample KS statistic `D` from `m` and `n` cases,
//!   `Q(sqrt(m n / (m + n)) D)` (the asymptotic rule; SciPy's `ks_2samp` uses it with `method="asymp"` through the
//!   one-sample distribution, which differs for small samples, so the reference here is `scipy.special.kolmogorov`).
//! - [`student_t_two_sided_p`]: `P(|T| >= |t|)` for Student's t with `df` degrees of freedom,
//!   `I_{df / (df + t^2)}(df / 2, 1 / 2)` with the regularized incomplete beta function evaluated by its continued
//!   fraction (modified Lentz). Reference: `2 * scipy.stats.t.sf(abs(t), df)`.

use super::hosmer_lemeshow::ln_gamma;
use super::MetricsError;

/// `P(K > x)` of the limiting Kolmogorov distribution; 1 for `x <= 0`.
pub fn kolmogorov_sf(x: f64) -> f64 {
    if x.is_nan() {
        return f64::NAN;
    }
    if x <= 0.0 {
        return 1.0;
    }
    if x < 1.0 {
        // Theta-function form converges fast for small x.
        let pi2 = std::f64::consts::PI * std::f64::consts::PI;
        let mut cdf = 0.0;
        for k in 1..=50 {
            let odd = (2 * k - 1) as f64;
            let term = (-odd * odd * pi2 / (8.0 * x * x)).exp();
            cdf += term;
            if term < 1e-300 {
                break;
            }
        }
        let cdf = (2.0 * std::f64::consts::PI).sqrt() / x * cdf;
        (1.0 - cdf).clamp(0.0, 1.0)
    } else {
        let mut sf = 0.0;
        for k in 1..=100 {
            let kf = k as f64;
            let term = (-2.0 * kf * kf * x * x).exp();
            sf += if k % 2 == 1 { term } else { -term };
            if term < 1e-300 * sf.abs().max(1e-300) || term == 0.0 {
                break;
            }
        }
        (2.0 * sf).clamp(0.0, 1.0)
    }
}

/// Two-sided asymptotic p-value of a two-sample KS statistic `d` from samples of sizes `m` and `n`.
///
/// Errors: `d` outside [0, 1] or an empty sample.
pub fn ks_p_value(d: f64, m: usize, n: usize) -> Result<f64, MetricsError> {
    if !(0.0..=1.0).contains(&d) {
        return Err(MetricsError::BadParameter {
            name: "KS statistic",
            value: d,
            reason: "must lie in [0, 1]",
        });
    }
    if m == 0 || n == 0 {
        return Err(MetricsError::Empty { what: "KS sample" });
    }
    let (m, n) = (m as f64, n as f64);
    Ok(kolmogorov_sf((m * n / (m + n)).sqrt() * d))
}

/// `P(|T| >= |t|)` for Student's t with `df > 0` degrees of freedom.
///
/// Errors: `df` not finite and positive, `t` NaN.
pub fn student_t_two_sided_p(t: f64, df: f64) -> Result<f64, MetricsError> {
    if !(df.is_finite() && df > 0.0) {
        return Err(MetricsError::BadParameter {
            name: "degrees of freedom",
            value: df,
            reason: "must be finite and positive",
        });
    }
    if t.is_nan() {
        return Err(MetricsError::BadParameter {
            name: "t",
            value: t,
            reason: "must not be NaN",
        });
    }
    if t.is_infinite() {
        return Ok(0.0);
    }
    let x = df / (df + t * t);
    Ok(incomplete_beta(0.5 * df, 0.5, x).clamp(0.0, 1.0))
}

/// The regularized incomplete beta function `I_x(a, b)` for `a, b > 0`, `0 <= x <= 1`.
fn incomplete_beta(a: f64, b: f64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let ln_front = ln_gamma(a + b) - ln_gamma(a) - ln_gamma(b) + a * x.ln() + b * (1.0 - x).ln();
    // The continued fraction converges fast for x < (a + 1) / (a + b + 2); otherwise use the symmetry.
    if x < (a + 1.0) / (a + b + 2.0) {
        ln_front.exp() * beta_fraction(a, b, x) / a
    } else {
        1.0 - ln_front.exp() * beta_fraction(b, a, 1.0 - x) / b
    }
}

/// The continued fraction of the incomplete beta function by the modified Lentz method.
fn beta_fraction(a: f64, b: f64, x: f64) -> f64 {
    const TINY: f64 = 1e-300;
    const EPS: f64 = 1e-16;
    let (qab, qap, qam) = (a + b, a + 1.0, a - 1.0);
    let mut c = 1.0;
    let mut d = 1.0 - qab * x / qap;
    if d.abs() < TINY {
        d = TINY;
    }
    d = 1.0 / d;
    let mut h = d;
    for m in 1..=10_000 {
        let m = f64::from(m);
        let m2 = 2.0 * m;
        let aa = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 + aa * d;
        if d.abs() < TINY {
            d = TINY;
        }
        c = 1.0 + aa / c;
        if c.abs() < TINY {
            c = TINY;
        }
        d = 1.0 / d;
        h *= d * c;
        let aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 + aa * d;
        if d.abs() < TINY {
            d = TINY;
        }
        c = 1.0 + aa / c;
        if c.abs() < TINY {
            c = TINY;
        }
        d = 1.0 / d;
        let del = d * c;
        h *= del;
        if (del - 1.0).abs() < EPS {
            break;
        }
    }
    h
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn student_t_closed_forms() {
        // df = 1 is the Cauchy distribution: P(|T| >= t) = 1 - 2 atan(t) / pi (closed form).
        for t in [0.3, 1.0, 2.5, 40.0] {
            let want = 1.0 - 2.0 * f64::atan(t) / std::f64::consts::PI;
            assert!((student_t_two_sided_p(t, 1.0).unwrap() - want).abs() < 1e-13);
        }
        // df = 2: P(|T| >= t) = 1 - t / sqrt(2 + t^2) (closed form).
        for t in [0.1f64, 1.7, 9.0] {
            let want = 1.0 - t / (2.0 + t * t).sqrt();
            assert!((student_t_two_sided_p(t, 2.0).unwrap() - want).abs() < 1e-13);
        }
        assert_eq!(student_t_two_sided_p(0.0, 5.0).unwrap(), 1.0);
        assert!(student_t_two_sided_p(1.0, 0.0).is_err());
    }

    #[test]
    fn kolmogorov_series_meet() {
        // Both series are evaluated on either side of x = 1; they must agree there.
        let below = {
            let pi2 = std::f64::consts::PI.powi(2);
            let s: f64 = (1..=50)
                .map(|k| (-((2 * k - 1) as f64).powi(2) * pi2 / 8.0).exp())
                .sum();
            1.0 - (2.0 * std::f64::consts::PI).sqrt() * s
        };
        assert!((kolmogorov_sf(1.0) - below).abs() < 1e-14);
        // Q(x) = 0.05 at x = 1.3581 (the familiar 5% critical value of the Kolmogorov distribution; from memory).
        assert!((kolmogorov_sf(1.3581) - 0.05).abs() < 1e-4);
        assert_eq!(kolmogorov_sf(0.0), 1.0);
    }
}
