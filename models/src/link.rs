//! Stable link functions between probability and log-odds.
//!
//! log-odds `h = ln(p / (1 - p))`, `p = 1 / (1 + e^-h)`; with half log-odds `F = h / 2`
//! (Friedman, Hastie and Tibshirani 2000, "Additive logistic regression: a statistical view of boosting").

/// `ln(1 + e^x)` without overflow for large `x` and without losing the tiny value for very negative `x`.
pub fn softplus(x: f64) -> f64 {
    if x.is_nan() {
        return f64::NAN;
    }
    x.max(0.0) + (-x.abs()).exp().ln_1p()
}

/// The logistic function `1 / (1 + e^-h)`, evaluated on the side that cannot overflow.
/// Returns exactly 0 or 1 only where the true value rounds there in `f64`.
pub fn sigmoid(h: f64) -> f64 {
    if h >= 0.0 {
        1.0 / (1.0 + (-h).exp())
    } else {
        let e = h.exp();
        e / (1.0 + e)
    }
}

/// `ln(p / (1 - p))`; infinite at 0 and 1, NaN outside [0, 1].
pub fn logit(p: f64) -> f64 {
    p.ln() - (-p).ln_1p()
}

/// `ln sigmoid(h) = -softplus(-h)`, the log of the probability of a positive, exact at any `h`.
pub fn log_sigmoid(h: f64) -> f64 {
    -softplus(-h)
}
