//! Unpenalised logistic regression with one to three columns plus an intercept, by Newton's method (iteratively
//! reweighted least squares) with a backtracking line search.
//!
//! The loss is the cross-entropy with targets `t_i` in [0, 1]: `sum_i t_i softplus(-z_i) + (1 - t_i) softplus(z_i)`,
//! `z_i = x_i . w + c`; its gradient is `sum_i (sigmoid(z_i) - t_i) x_i` and its Hessian
//! `sum_i sigmoid(z_i)(1 - sigmoid(z_i)) x_i x_i^T` (e.g. Hastie, Tibshirani and Friedman, "The Elements of
//! Statistical Learning", section 4.4.1). The loss is convex, so a Newton step with Armijo backtracking reaches the
//! minimum; the iteration runs until the step is at rounding level, to full `f64` precision rather than to an
//! optimiser's tolerance.
//!
//! Each column is divided by its largest magnitude before fitting and the coefficients are scaled back after.
//! Newton's method is invariant to this, so the answer is the same; it only keeps the Hessian well conditioned
//! (scikit-learn's sigmoid fit rescales for the same reason when the scores reach 30 in magnitude).

use crate::link::{sigmoid, softplus};

/// Iteration cap; a fit that is not done by then is diverging (separable data) or badly conditioned.
pub const MAX_ITERATIONS: usize = 200;

/// Why the Newton iteration stopped without an answer.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum NewtonFailure {
    /// The Hessian was singular (a column constant or collinear with another).
    Singular,
    /// The iteration cap was reached.
    NotConverged(usize),
}

/// Fits `columns` (each as long as `targets`) plus an intercept; returns the column coefficients followed by the
/// intercept. `start` is the intercept to start from (all column coefficients start at 0).
pub fn fit_logistic(
    columns: &[&[f64]],
    targets: &[f64],
    start: f64,
) -> Result<Vec<f64>, NewtonFailure> {
    let k = columns.len();
    let mut x = vec![0.0; k];
    fit_logistic_by(k, start, |each| {
        for (i, &t) in targets.iter().enumerate() {
            for (j, col) in columns.iter().enumerate() {
                x[j] = col[i];
            }
            each(&x, t);
        }
    })
}

/// What a pass over the rows calls for each row: its columns and its target.
pub type RowVisitor<'a> = &'a mut dyn FnMut(&[f64], f64);

/// [`fit_logistic`] over rows it does not hold: `pass(each)` calls `each(columns, target)` for every row (`k`
/// columns, unscaled), in the same order at every call (a pass over a file or a database cursor). The arithmetic
/// is [`fit_logistic`]'s, which uses it, so the result is the same on the same rows in that order. The rows are
/// read once for the scales, once per loss evaluation and once per Newton step.
pub fn fit_logistic_by(
    k: usize,
    start: f64,
    mut pass: impl FnMut(&mut dyn FnMut(&[f64], f64)),
) -> Result<Vec<f64>, NewtonFailure> {
    let d = k + 1;
    let mut largest = vec![0.0f64; k];
    pass(&mut |row: &[f64], _| {
        for (m, v) in largest.iter_mut().zip(row) {
            *m = m.max(v.abs());
        }
    });
    let scales: Vec<f64> = largest
        .into_iter()
        .map(|m| if m > 0.0 { m } else { 1.0 })
        .collect();
    let scaled_row = |row: &[f64], out: &mut [f64]| {
        for j in 0..k {
            out[j] = row[j] / scales[j];
        }
        out[k] = 1.0;
    };
    let mut x = vec![0.0; d];
    let mut loss = |pass: &mut dyn FnMut(RowVisitor<'_>), w: &[f64]| -> f64 {
        let mut total = 0.0;
        pass(&mut |row: &[f64], t: f64| {
            scaled_row(row, &mut x);
            let z = dot(&x, w);
            total += t * softplus(-z) + (1.0 - t) * softplus(z);
        });
        total
    };

    let mut w = vec![0.0; d];
    w[k] = start;
    let mut current = loss(&mut pass, &w);
    let mut x = vec![0.0; d];
    for _ in 0..MAX_ITERATIONS {
        let mut grad = vec![0.0; d];
        let mut hess = vec![0.0; d * d];
        pass(&mut |row: &[f64], t: f64| {
            scaled_row(row, &mut x);
            let p = sigmoid(dot(&x, &w));
            let r = p - t;
            let v = p * (1.0 - p);
            for a in 0..d {
                grad[a] += r * x[a];
                for b in 0..d {
                    hess[a * d + b] += v * x[a] * x[b];
                }
            }
        });
        let step = solve(&mut hess, &grad, d).ok_or(NewtonFailure::Singular)?;
        // Backtracking line search: halve the step until the loss does not rise.
        let mut alpha = 1.0;
        let mut accepted = false;
        let mut trial = w.clone();
        for _ in 0..60 {
            for a in 0..d {
                trial[a] = w[a] - alpha * step[a];
            }
            let value = loss(&mut pass, &trial);
            // Near the minimum the loss changes by less than its own rounding, so a full Newton step that leaves
            // it equal to within rounding is taken: there the step, not the loss, measures progress.
            let rounding = 64.0 * f64::EPSILON * current.abs().max(1.0);
            if value <= current || (alpha == 1.0 && value <= current + rounding) {
                current = value;
                accepted = true;
                break;
            }
            alpha *= 0.5;
        }
        let size = step.iter().fold(0.0f64, |m, s| m.max(s.abs())) * alpha;
        let scale = 1.0 + w.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        if accepted {
            w.clone_from(&trial);
        }
        // Done when the step is at rounding level, or when no step lowers the loss any more (we are at the
        // minimum to within the loss's own rounding).
        if !accepted || size <= 1e-13 * scale {
            return Ok(unscale(w, &scales));
        }
    }
    Err(NewtonFailure::NotConverged(MAX_ITERATIONS))
}

fn unscale(mut w: Vec<f64>, scales: &[f64]) -> Vec<f64> {
    for (wj, s) in w.iter_mut().zip(scales) {
        *wj /= s;
    }
    w
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Solves `H s = g` for a small symmetric positive definite `H` (row-major, `d x d`) by Gaussian elimination with
/// partial pivoting; `None` when a pivot vanishes relative to the matrix's size.
fn solve(h: &mut [f64], g: &[f64], d: usize) -> Option<Vec<f64>> {
    let norm = h.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    if !norm.is_finite() || norm <= 0.0 {
        return None;
    }
    let mut rhs = g.to_vec();
    for col in 0..d {
        let pivot =
            (col..d).max_by(|&a, &b| h[a * d + col].abs().total_cmp(&h[b * d + col].abs()))?;
        if h[pivot * d + col].abs() <= 1e-14 * norm {
            return None;
        }
        if pivot != col {
            for j in 0..d {
                h.swap(col * d + j, pivot * d + j);
            }
            rhs.swap(col, pivot);
        }
        for r in col + 1..d {
            let f = h[r * d + col] / h[col * d + col];
            for j in col..d {
                h[r * d + j] -= f * h[col * d + j];
            }
            rhs[r] -= f * rhs[col];
        }
    }
    let mut s = vec![0.0; d];
    for r in (0..d).rev() {
        let mut acc = rhs[r];
        for j in r + 1..d {
            acc -= h[r * d + j] * s[j];
        }
        s[r] = acc / h[r * d + r];
    }
    Some(s)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn recovers_known_coefficients_from_expected_targets() {
        // With targets equal to the model's own probabilities the minimum is exactly the generating coefficients
        // (the gradient sum (p - t) x vanishes there).
        let x1: Vec<f64> = (0..50).map(|i| (i as f64 - 25.0) / 7.0).collect();
        let x2: Vec<f64> = (0..50)
            .map(|i| ((i * 37) % 50) as f64 / 10.0 - 2.0)
            .collect();
        let t: Vec<f64> = x1
            .iter()
            .zip(&x2)
            .map(|(a, b)| sigmoid(0.8 * a - 1.3 * b + 0.4))
            .collect();
        let w = fit_logistic(&[&x1, &x2], &t, 0.0).unwrap();
        for (got, want) in w.iter().zip([0.8, -1.3, 0.4]) {
            assert!((got - want).abs() < 1e-10, "{w:?}");
        }
    }

    #[test]
    fn collinear_columns_are_singular() {
        let x: Vec<f64> = (0..10).map(f64::from).collect();
        let t: Vec<f64> = (0..10)
            .map(|i| if i % 3 == 0 { 1.0 } else { 0.0 })
            .collect();
        assert_eq!(
            fit_logistic(&[&x, &x], &t, 0.0),
            Err(NewtonFailure::Singular)
        );
    }
}
