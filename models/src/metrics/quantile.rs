//! Sample quantiles with linear interpolation and the equal-width and equal-count bin edges built from them.
//!
//! The quantile is Hyndman and Fan's (1996) definition 7, "Sample quantiles in statistical packages", The American
//! Statistician 50: the value at virtual index `(n - 1) q` of the sorted sample, interpolated linearly. The
//! arithmetic follows NumPy's `np.percentile(..., method="linear")` operation for operation, so that edges (and
//! with them bin memberships) agree bit for bit with `sklearn.calibration.calibration_curve(strategy="quantile")`.

/// The `q`-quantile (`q` in [0, 1]) of an already sorted, non-empty, finite sample.
///
/// The interpolation `a + (b - a) g` is evaluated as `b - (b - a)(1 - g)` when `g >= 0.5`, as NumPy does, so the
/// result is exact at both ends and monotone in `q`.
pub fn quantile_sorted(sorted: &[f64], q: f64) -> f64 {
    quantile_by(sorted.len(), q, |i| sorted[i])
}

/// The order statistics [`quantile_sorted`] reads for level `q` of a sorted sample of `n` values (one or two
/// positions), so that a caller streaming the sample in order can keep only those.
pub fn quantile_positions(n: usize, q: f64) -> [usize; 2] {
    let last = n.saturating_sub(1);
    let virtual_index = (last as f64) * q;
    if virtual_index >= last as f64 {
        return [last, last];
    }
    if virtual_index <= 0.0 {
        return [0, 0];
    }
    let i = virtual_index.floor() as usize;
    [i, i + 1]
}

/// [`quantile_sorted`] of a sorted sample of `n` values read through `at(index)`; only the positions
/// [`quantile_positions`] names are read.
pub fn quantile_by(n: usize, q: f64, at: impl Fn(usize) -> f64) -> f64 {
    let last = n.saturating_sub(1);
    let virtual_index = (last as f64) * q;
    if virtual_index >= last as f64 {
        return at(last);
    }
    if virtual_index <= 0.0 {
        return at(0);
    }
    let below = virtual_index.floor();
    // `below` is in [0, n - 2] here, so the cast is exact and the index in range.
    let i = below as usize;
    let gamma = virtual_index - below;
    let (a, b) = (at(i), at(i + 1));
    let diff = b - a;
    if gamma >= 0.5 {
        b - diff * (1.0 - gamma)
    } else {
        a + diff * gamma
    }
}

/// The `i`-th of `n + 1` equally spaced points on [0, 1], computed as `np.linspace(0, 1, n + 1)` does
/// (`i * (1 / n)`, the last point set to exactly 1), so that e.g. the fourth of ten edges is
/// 0.30000000000000004, not 0.3. This decides on which side of an edge a probability of exactly 0.3 falls.
pub fn linspace_unit(i: usize, n: usize) -> f64 {
    if i >= n {
        1.0
    } else {
        (i as f64) * (1.0 / n as f64)
    }
}

/// The `n + 1` equal-count edges of a sorted sample: the quantiles at levels `linspace_unit(i, n)`, passed
/// through a percent scale and back (`* 100 / 100`) as `np.percentile(x, np.linspace(0, 1, n + 1) * 100)` does.
pub fn quantile_edges_sorted(sorted: &[f64], n: usize) -> Vec<f64> {
    (0..=n)
        .map(|i| quantile_sorted(sorted, linspace_unit(i, n) * 100.0 / 100.0))
        .collect()
}

/// A sorted copy of `xs`; callers have already refused NaN, so the order is total.
pub(crate) fn sorted_copy(xs: &[f64]) -> Vec<f64> {
    let mut v = xs.to_vec();
    v.sort_by(f64::total_cmp);
    v
}

/// Index of the bin of `x` for interior edges `inner` with bins `(e_{k-1}, e_k]`, the first open below and the
/// last open above; this is `np.searchsorted(inner, x, side="left")`.
pub fn right_closed_bin(inner: &[f64], x: f64) -> usize {
    inner.partition_point(|&e| e < x)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantile_interpolates_between_order_statistics() {
        // Hand-computed: sorted [1, 2, 4, 8]; q = 0.5 -> virtual index 1.5 -> 2 + 0.5 * (4 - 2) = 3.
        let s = [1.0, 2.0, 4.0, 8.0];
        assert_eq!(quantile_sorted(&s, 0.5), 3.0);
        assert_eq!(quantile_sorted(&s, 0.0), 1.0);
        assert_eq!(quantile_sorted(&s, 1.0), 8.0);
        // q = 0.25 -> virtual index 0.75 -> 1 + 0.75 * (2 - 1) = 1.75.
        assert_eq!(quantile_sorted(&s, 0.25), 1.75);
        assert_eq!(quantile_sorted(&[5.0], 0.3), 5.0);
    }

    #[test]
    fn linspace_edges_carry_numpy_rounding() {
        assert_eq!(linspace_unit(3, 10), 0.30000000000000004);
        assert_eq!(linspace_unit(10, 10), 1.0);
        assert_eq!(linspace_unit(0, 10), 0.0);
    }

    #[test]
    fn right_closed_bins() {
        let inner = [0.25, 0.5];
        assert_eq!(right_closed_bin(&inner, 0.25), 0);
        assert_eq!(right_closed_bin(&inner, 0.2500001), 1);
        assert_eq!(right_closed_bin(&inner, 0.5), 1);
        assert_eq!(right_closed_bin(&inner, 0.9), 2);
        assert_eq!(right_closed_bin(&inner, -7.0), 0);
    }
}
