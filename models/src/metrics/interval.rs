//! Confidence intervals for a binomial proportion: the share of positives in one calibration bin.
//!
//! The Wilson score interval (Wilson 1927, "Probable inference, the law of succession, and statistical inference",
//! JASA 22(158)) keeps inside [0, 1] and does not collapse to a point at 0 or n positives, which matters at fraud
//! base rates where most bins have no positive at all.

/// The two-sided 95% normal quantile, z such that P(|Z| <= z) = 0.95 (to the digits of f64).
pub const Z_95: f64 = 1.959_963_984_540_054;

/// The Wilson score interval for `positives` out of `n` at normal quantile `z`; `None` for `n = 0`, `positives > n`
/// or a `z` that is not finite and positive.
pub fn wilson_interval(positives: u64, n: u64, z: f64) -> Option<(f64, f64)> {
    if n == 0 || positives > n || !(z.is_finite() && z > 0.0) {
        return None;
    }
    let n = n as f64;
    let p = positives as f64 / n;
    let z2 = z * z;
    let denominator = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denominator;
    let half = z / denominator * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    Some(((centre - half).max(0.0), (centre + half).min(1.0)))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn edge_cases() {
        assert_eq!(wilson_interval(0, 0, Z_95), None);
        assert_eq!(wilson_interval(3, 2, Z_95), None);
        assert_eq!(wilson_interval(1, 2, f64::NAN), None);
        // No positives: the lower end is exactly 0 and the upper end is z^2 / (n + z^2) (the formula at p = 0).
        let (lo, hi) = wilson_interval(0, 50, Z_95).unwrap();
        assert_eq!(lo, 0.0);
        assert!((hi - Z_95 * Z_95 / (50.0 + Z_95 * Z_95)).abs() < 1e-15);
        // Symmetric about 1/2 under positives <-> negatives.
        let (a, b) = wilson_interval(7, 40, Z_95).unwrap();
        let (c, d) = wilson_interval(33, 40, Z_95).unwrap();
        assert!((a - (1.0 - d)).abs() < 1e-15 && (b - (1.0 - c)).abs() < 1e-15);
    }
}
