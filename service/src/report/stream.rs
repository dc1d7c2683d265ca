//! The report built in bounded memory: each section is computed from passes over rows the store streams in an
//! order the database sorts ([`Store::scan`]), never from the range loaded at once.
//!
//! Every figure is the one [`section`](super::section) computes from the loaded rows, with the same arithmetic in
//! the same order where it can be, so the two agree to the last bit or to rounding (`tests/report_stream.rs`
//! checks every figure within 1e-9 relative on both backends). Passes per section, and what each figure holds:
//!
//! | pass | figures | held |
//! |---|---|---|
//! | written order, every prediction | counts, means, PSI counts, class histograms, log-loss and Brier sums, equal-width calibration bins, operating points per served rule ([`operating::Tally`]), "now"; writes the base-rate EM's inputs and the calibration tests' pairs to spills | counters and sums; 10 to 20 bins; per distinct served rule (a handful) 4 counts or one pair of counts per band |
//! | written order, pairs | within-bin terms of the Brier decomposition (with the bin means) | the bin means |
//! | log-odds ascending, ties latest first | AUC and KS over groups of tied scores in exact integers; gains deciles (read backwards) | one tie group's counts |
//! | probability ascending, ties in written order | Hosmer-Lemeshow groups by rank; order statistics of equal-count edges | 10 groups; 2 values per edge |
//! | written order, pairs (equal-count bins only) | the calibration table on the edges | the bins |
//! | the spill of every prediction, once per EM iteration | base-rate EM (Saerens, Latinne and Decaestecker 2002), `fit::estimate_prior_by` | [`Spill`]: up to 65,536 values in memory, beyond that a temporary file (8 bytes a prediction, 3 values) read 64 KiB at a time |
//! | the spill of the pairs, a few dozen times | Spiegelhalter's z (once), Cox's logistic recalibration (both Newton fits read the pairs 2 to 4 times a step: `monitor::logistic_recalibration_by`) | the same kind of spill (24 bytes a pair on disk) |
//! | follow-up grouped by time in the database ([`Store::follow_up`]) | eventual positive rate (Kaplan-Meier) | the Kaplan-Meier steps: one per distinct delay of a positive within the horizon |
//! | immature window: follow-up of the matured predictions grouped in the database; probability order (equal-count bins only); one written-order pass | the window's eventual figures (`monitor::eventual_figures_by`) and the matured figures beside them | the Kaplan-Meier steps of the matured predictions and, per step and calibration bin, one count (twice: bins and merged strata) |
//!
//! So what grows with the range is only on disk (the spills) or in the database (its sorts); in memory, only the
//! Kaplan-Meier steps grow, with the number of distinct delays of positive outcomes (at most one per positive; at
//! one-second resolution, at most the horizon in seconds), and the immature window holds `steps x bins` counts.
//! The store holds one fetch batch (`scan::FETCH_ROWS` rows on PostgreSQL; SQLite's cursor and page cache).

use std::collections::BTreeMap;
use std::io::{BufWriter, Read, Seek, SeekFrom, Write};

use probity_models::fit::{estimate_prior_by, EmOptions};
use probity_models::link::sigmoid;

use probity_models::metrics::quantile::{
    linspace_unit, quantile_by, quantile_positions, right_closed_bin,
};
use probity_models::metrics::{
    brier_score, chi2_sf, gains_lift, hosmer_lemeshow, ks_statistic, log_loss_from_log_odds,
    log_loss_term_pm1, psi_from_fractions, roc_auc, BinStrategy, EmptyBinRule, HlGrouping,
    MetricsError,
};
use probity_models::monitor::{eventual_figures_by, KaplanMeierSteps, ScoredCase};

use super::{
    calibration_tests, immature, keep, operating, BaseRates, Calibration, CalibrationBin,
    Decomposition, Gains, HosmerLemeshow, Psi, Report, SeriesKey, SeriesReport, GAINS_GROUPS,
    HISTOGRAM_BINS, HL_GROUPS, PSI_FLOOR,
};
use crate::store::{
    FollowUpGroup, ReportFilter, ScanOrder, ScanRow, SeriesScan, Store, StoreError,
};

/// Values written once and read back in order as often as needed: what an iterative statistic (the base-rate EM)
/// passes over more than once. Up to [`Spill::IN_MEMORY`] values stay in memory (a fixed cap); beyond that all of
/// them go to a temporary file, kept off the heap.
pub struct Spill {
    mem: Vec<f64>,
    file: Option<BufWriter<std::fs::File>>,
    len: usize,
}

impl Spill {
    /// Values kept in memory before the spill moves to a file (512 KiB).
    pub const IN_MEMORY: usize = 1 << 16;

    /// An empty spill (its file, when it needs one, in the system's temporary directory, removed when dropped).
    pub fn new() -> Result<Spill, StoreError> {
        Ok(Spill {
            mem: Vec::new(),
            file: None,
            len: 0,
        })
    }

    /// Appends one value.
    pub fn push(&mut self, v: f64) -> Result<(), StoreError> {
        self.len += 1;
        if self.file.is_none() && self.mem.len() < Spill::IN_MEMORY {
            self.mem.push(v);
            return Ok(());
        }
        if self.file.is_none() {
            let mut file = BufWriter::new(tempfile::tempfile().map_err(StoreError::Spill)?);
            for m in &self.mem {
                file.write_all(&m.to_le_bytes())
                    .map_err(StoreError::Spill)?;
            }
            self.mem = Vec::new();
            self.file = Some(file);
        }
        match self.file.as_mut() {
            Some(f) => f.write_all(&v.to_le_bytes()).map_err(StoreError::Spill),
            None => Ok(()),
        }
    }

    /// Values written.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether nothing was written.
    pub fn is_empty(&self) -> bool {
        self.len == 0
    }

    /// A reader from the first value, when the values are in a file.
    fn reader(&mut self) -> Result<Option<SpillReader>, StoreError> {
        let Some(file) = self.file.as_mut() else {
            return Ok(None);
        };
        file.flush().map_err(StoreError::Spill)?;
        let mut f = file.get_ref().try_clone().map_err(StoreError::Spill)?;
        f.seek(SeekFrom::Start(0)).map_err(StoreError::Spill)?;
        Ok(Some(SpillReader {
            file: f,
            buf: vec![0u8; 1 << 16],
            at: 0,
            filled: 0,
        }))
    }

    /// Puts the write position back at the end after a pass.
    fn rewind_end(&mut self) -> Result<(), StoreError> {
        if let Some(file) = self.file.as_mut() {
            file.get_mut()
                .seek(SeekFrom::End(0))
                .map_err(StoreError::Spill)?;
        }
        Ok(())
    }

    /// Calls `each` on every value in the order written.
    pub fn pass(&mut self, mut each: impl FnMut(f64)) -> Result<(), StoreError> {
        match self.reader()? {
            None => self.mem.iter().for_each(|&v| each(v)),
            Some(mut r) => {
                for _ in 0..self.len {
                    each(r.next()?);
                }
            }
        }
        self.rewind_end()
    }
}

/// Reads a spill file 64 KiB at a time.
struct SpillReader {
    file: std::fs::File,
    buf: Vec<u8>,
    at: usize,
    filled: usize,
}

impl SpillReader {
    fn next(&mut self) -> Result<f64, StoreError> {
        if self.at + 8 > self.filled {
            let rest = self.filled - self.at;
            self.buf.copy_within(self.at..self.filled, 0);
            let mut filled = rest;
            while filled < 8 {
                let got = self
                    .file
                    .read(&mut self.buf[filled..])
                    .map_err(StoreError::Spill)?;
                if got == 0 {
                    return Err(StoreError::Spill(std::io::Error::new(
                        std::io::ErrorKind::UnexpectedEof,
                        "report working file ended early",
                    )));
                }
                filled += got;
            }
            self.at = 0;
            self.filled = filled;
        }
        let mut b = [0u8; 8];
        b.copy_from_slice(&self.buf[self.at..self.at + 8]);
        self.at += 8;
        Ok(f64::from_le_bytes(b))
    }
}

/// The report of `filter`, streamed (see the module documentation); the figures of
/// [`build_binned`](super::build_binned).
pub fn build(
    store: &mut dyn Store,
    filter: &ReportFilter,
    configured: &BTreeMap<String, f64>,
    bins: BinStrategy,
    horizons: &super::Horizons,
) -> Result<Report, StoreError> {
    let mut series = Vec::new();
    for (route, model, version, role) in store.series(filter)? {
        let info = store.model_version(&model, &version)?;
        let rates = BaseRates {
            configured: configured.get(&route).copied(),
            model: info.as_ref().map(|i| i.base_rate),
        };
        let reference = info.and_then(|i| i.reference);
        let scan = SeriesScan {
            from_ms: filter.from_ms,
            to_ms: filter.to_ms,
            route: &route,
            model: &model,
            version: &version,
            role: &role,
        };
        let horizon = horizons.of(&route);
        let section = section(store, &scan, reference.as_ref(), rates, (bins, horizon))?;
        series.push(section);
    }
    super::features::add(store, filter, &mut series)?;
    Ok(Report {
        from_ms: filter.from_ms,
        to_ms: filter.to_ms,
        route: filter.route.clone(),
        model: filter.model.clone(),
        version: filter.version.clone(),
        outcomes: store.outcome_counts()?,
        series,
    })
}

/// Sizes of `groups` consecutive groups of `n` ordered cases, the first `n mod groups` one larger (as the metrics
/// cut them).
fn split_sizes(n: usize, groups: usize) -> Vec<usize> {
    let (base, extra) = (n / groups, n % groups);
    (0..groups).map(|k| base + usize::from(k < extra)).collect()
}

/// The group of position `i` among groups of `sizes`.
struct Groups {
    ends: Vec<usize>,
}

impl Groups {
    fn new(sizes: &[usize]) -> Groups {
        let mut end = 0;
        Groups {
            ends: sizes
                .iter()
                .map(|s| {
                    end += s;
                    end
                })
                .collect(),
        }
    }
    fn of(&self, i: usize) -> usize {
        self.ends.partition_point(|&e| e <= i)
    }
}

/// Counts and sums of one calibration bin.
#[derive(Debug, Clone, Copy, Default)]
struct Bin {
    count: usize,
    positives: usize,
    sum: f64,
}

/// The figures of one series, from passes over the store.
pub fn section(
    store: &mut dyn Store,
    scan: &SeriesScan<'_>,
    reference: Option<&crate::store::Reference>,
    rates: BaseRates,
    (bins, horizon_ms): (BinStrategy, Option<i64>),
) -> Result<SeriesReport, StoreError> {
    let mut notes = Vec::new();
    let nbins = match bins {
        BinStrategy::Uniform(n) | BinStrategy::Quantile(n) => n,
    };
    // Pass 1: written order, every prediction.
    let mut rows = 0usize;
    let mut sum_all_p = 0.0f64;
    let mut psi_actual = reference.map(|r| vec![0u64; r.fractions.len()]);
    let (mut n, mut positives, mut by_maturity, mut corrected) = (0usize, 0usize, 0usize, 0usize);
    let (mut sum_p, mut sum_loss, mut sum_sq) = (0.0f64, 0.0f64, 0.0f64);
    let mut histogram_negative = vec![0u64; HISTOGRAM_BINS];
    let mut histogram_positive = vec![0u64; HISTOGRAM_BINS];
    let uniform_inner: Vec<f64> = (1..nbins).map(|i| linspace_unit(i, nbins)).collect();
    let mut uniform = vec![Bin::default(); nbins];
    let mut last_prior: Option<Option<f64>> = None;
    let mut now_ms = i64::MIN;
    // The EM's inputs need the latest row's prior, known only at the end: keep (p, log-odds, prior) per row.
    let mut em_p = Spill::new()?;
    let mut em_h = Spill::new()?;
    let mut em_prior = Spill::new()?;
    let mut pair_spill = Spill::new()?;
    let mut operating_tally = operating::Tally::default();
    store.scan(scan, ScanOrder::Written, false, &mut |r: &ScanRow| {
        rows += 1;
        sum_all_p += r.probability;
        if let (Some(actual), Some(reference)) = (psi_actual.as_mut(), reference) {
            if let Some(c) = actual
                .get_mut(reference.bin_of(reference.value_of(r.probability, r.adjusted_log_odds)))
            {
                *c += 1;
            }
        }
        last_prior = Some(r.served_prior);
        now_ms = now_ms.max(r.time_ms.max(r.outcome_received_ms.unwrap_or(i64::MIN)));
        em_p.push(r.probability)?;
        em_h.push(r.adjusted_log_odds)?;
        em_prior.push(r.served_prior.unwrap_or(f64::NAN))?;
        operating_tally.add(&r.served_decision, r.time_ms, r.probability, r.label);
        if let Some(y) = r.label {
            pair_spill.push(r.probability)?;
            pair_spill.push(r.adjusted_log_odds)?;
            pair_spill.push(f64::from(u8::from(y)))?;
            n += 1;
            positives += usize::from(y);
            by_maturity += usize::from(r.by_maturity);
            corrected += usize::from(r.corrected);
            sum_p += r.probability;
            sum_loss += log_loss_term_pm1(r.adjusted_log_odds, y);
            let d = r.probability - f64::from(u8::from(y));
            sum_sq += d * d;
            let bin = ((r.probability * HISTOGRAM_BINS as f64) as usize).min(HISTOGRAM_BINS - 1);
            if y {
                histogram_positive[bin] += 1;
            } else {
                histogram_negative[bin] += 1;
            }
            let b = &mut uniform[right_closed_bin(&uniform_inner, r.probability)];
            b.count += 1;
            b.positives += usize::from(y);
            b.sum += r.probability;
        }
        Ok(())
    })?;
    let negatives = n - positives;

    // Ranking: final log-odds ascending, ties latest first.
    let gains_sizes = split_sizes(n, GAINS_GROUPS.max(1));
    let gains_groups = Groups::new(&gains_sizes);
    let mut gains_positives = vec![0usize; GAINS_GROUPS];
    let mut twice_u: u128 = 0;
    let mut negatives_below: u128 = 0;
    let (mut k1, mut k0, mut ks_best) = (0usize, 0usize, 0.0f64);
    let mut tie: Option<(f64, u128, u128)> = None;
    let (n1, n0) = (positives as f64, negatives as f64);
    let mut close_tie = |tie: &mut Option<(f64, u128, u128)>| {
        if let Some((_, pos, neg)) = tie.take() {
            twice_u += 2 * pos * negatives_below + pos * neg;
            negatives_below += neg;
            k1 += pos as usize;
            k0 += neg as usize;
            ks_best = ks_best.max((k1 as f64 / n1 - k0 as f64 / n0).abs());
        }
    };
    if n > 0 {
        let mut i = 0usize;
        store.scan(scan, ScanOrder::LogOdds, true, &mut |r: &ScanRow| {
            let y = r.label == Some(true);
            let h = r.adjusted_log_odds;
            match &mut tie {
                Some((v, pos, neg)) if *v == h => {
                    *pos += u128::from(y);
                    *neg += u128::from(!y);
                }
                _ => {
                    close_tie(&mut tie);
                    tie = Some((h, u128::from(y), u128::from(!y)));
                }
            }
            // Position in the descending order.
            if y && n >= GAINS_GROUPS {
                gains_positives[gains_groups.of(n - 1 - i)] += 1;
            }
            i += 1;
            Ok(())
        })?;
        close_tie(&mut tie);
    }

    // Probability ascending, ties in written order: Hosmer-Lemeshow groups and quantile edges.
    let hl_groups = Groups::new(&split_sizes(n, HL_GROUPS));
    let mut hl = vec![(0.0f64, 0.0f64, 0usize, 0usize); HL_GROUPS];
    let quantile_levels: Vec<f64> = (0..=nbins)
        .map(|i| linspace_unit(i, nbins) * 100.0 / 100.0)
        .collect();
    let mut wanted: BTreeMap<usize, f64> = BTreeMap::new();
    if matches!(bins, BinStrategy::Quantile(_)) && n > 0 {
        for &q in &quantile_levels {
            for i in quantile_positions(n, q) {
                wanted.insert(i, f64::NAN);
            }
        }
    }
    if n >= HL_GROUPS.max(3) || !wanted.is_empty() {
        let mut i = 0usize;
        store.scan(scan, ScanOrder::Probability, true, &mut |r: &ScanRow| {
            let p = r.probability;
            if let Some(v) = wanted.get_mut(&i) {
                *v = p;
            }
            if n >= HL_GROUPS {
                let g = &mut hl[hl_groups.of(i)];
                g.0 += p;
                g.1 += 1.0 - p;
                g.2 += usize::from(r.label == Some(true));
                g.3 += 1;
            }
            i += 1;
            Ok(())
        })?;
    }

    // Calibration bins: the equal-width ones are done; equal-count ones need a written-order pass with the edges.
    let (edges, table_bins) = match bins {
        BinStrategy::Uniform(_) => (
            (0..=nbins)
                .map(|i| linspace_unit(i, nbins))
                .collect::<Vec<f64>>(),
            uniform,
        ),
        BinStrategy::Quantile(_) if n > 0 => {
            let edges: Vec<f64> = quantile_levels
                .iter()
                .map(|&q| quantile_by(n, q, |i| wanted.get(&i).copied().unwrap_or(f64::NAN)))
                .collect();
            let inner = edges[1..nbins].to_vec();
            let mut table = vec![Bin::default(); nbins];
            store.scan(scan, ScanOrder::Written, true, &mut |r: &ScanRow| {
                let b = &mut table[right_closed_bin(&inner, r.probability)];
                b.count += 1;
                b.positives += usize::from(r.label == Some(true));
                b.sum += r.probability;
                Ok(())
            })?;
            (edges, table)
        }
        BinStrategy::Quantile(_) => (Vec::new(), Vec::new()),
    };
    // Within-bin terms of the decomposition: a second written-order pass with the bin means.
    let total = n as f64;
    let mean_f: Vec<f64> = table_bins
        .iter()
        .map(|b| {
            if b.count > 0 {
                b.sum / b.count as f64
            } else {
                0.0
            }
        })
        .collect();
    let mean_o: Vec<f64> = table_bins
        .iter()
        .map(|b| {
            if b.count > 0 {
                b.positives as f64 / b.count as f64
            } else {
                0.0
            }
        })
        .collect();
    let (mut wbv, mut wbc) = (0.0f64, 0.0f64);
    if n > 0 && nbins > 0 {
        let inner = edges[1..nbins].to_vec();
        store.scan(scan, ScanOrder::Written, true, &mut |r: &ScanRow| {
            let k = right_closed_bin(&inner, r.probability);
            let df = r.probability - mean_f[k];
            wbv += df * df;
            wbc += (f64::from(u8::from(r.label == Some(true))) - mean_o[k]) * df;
            Ok(())
        })?;
    }

    // The figures, with the notes in the order the loaded computation writes them.
    let tiny_y: Vec<bool> = if n == 0 {
        Vec::new()
    } else {
        vec![positives > 0]
    };
    let tiny_x: Vec<f64> = vec![0.5; tiny_y.len()];
    let one_class = n == 0 || positives == 0 || negatives == 0;
    let log_loss = if n == 0 {
        keep(
            &mut notes,
            "log-loss",
            log_loss_from_log_odds(&[], &[false; 0]),
        )
    } else {
        Some(sum_loss / total)
    };
    let brier = if n == 0 {
        keep(&mut notes, "Brier", brier_score(&[], &[false; 0]))
    } else {
        Some(sum_sq / total)
    };
    let roc = if one_class {
        keep(&mut notes, "AUC", roc_auc(&tiny_x, &tiny_y))
    } else {
        Some(twice_u as f64 / (2.0 * positives as f64 * negatives as f64))
    };
    let ks = if one_class {
        keep(&mut notes, "KS", ks_statistic(&tiny_x, &tiny_y))
    } else {
        Some(ks_best)
    };
    let decomposition = (n > 0 && nbins > 0).then(|| {
        let base_rate = table_bins.iter().map(|b| b.positives as f64).sum::<f64>() / total;
        let (mut rel, mut res) = (0.0, 0.0);
        for k in 0..nbins {
            let c = table_bins[k].count as f64;
            rel += c * (mean_f[k] - mean_o[k]).powi(2);
            res += c * (mean_o[k] - base_rate).powi(2);
        }
        Decomposition {
            reliability: rel / total,
            resolution: res / total,
            uncertainty: base_rate * (1.0 - base_rate),
            within_bin_variance: wbv / total,
            within_bin_covariance: 2.0 * wbc / total,
        }
    });
    let calibration = (n > 0 && nbins > 0).then(|| {
        let (mut ece, mut mce) = (0.0f64, 0.0f64);
        let mut out = Vec::new();
        for (k, b) in table_bins.iter().enumerate().filter(|(_, b)| b.count > 0) {
            let c = b.count as f64;
            let mean_predicted = b.sum / c;
            let fraction_positive = b.positives as f64 / c;
            let gap = (mean_predicted - fraction_positive).abs();
            ece += c / total * gap;
            mce = mce.max(gap);
            out.push(CalibrationBin {
                lower: edges[k],
                upper: edges[k + 1],
                count: b.count,
                positives: b.positives,
                mean_predicted,
                fraction_positive,
            });
        }
        Calibration {
            bins: out,
            ece,
            mce,
        }
    });
    let hl = if n < HL_GROUPS {
        // The loaded computation's refusal (too few pairs for the groups), on as many placeholder pairs.
        let p = vec![0.5; n];
        let y = vec![false; n];
        keep(
            &mut notes,
            "Hosmer-Lemeshow",
            hosmer_lemeshow(&p, &y, HlGrouping::ByRank(HL_GROUPS)).map(|t| HosmerLemeshow {
                statistic: t.statistic,
                degrees_of_freedom: t.degrees_of_freedom,
                p_value: t.p_value,
            }),
        )
    } else {
        let mut statistic = 0.0;
        let mut failed = None;
        for (k, &(e1, e0, o1, count)) in hl.iter().enumerate() {
            if e1 == 0.0 {
                failed = Some(MetricsError::ZeroExpected { group: k, class: 1 });
                break;
            }
            if e0 == 0.0 {
                failed = Some(MetricsError::ZeroExpected { group: k, class: 0 });
                break;
            }
            let o0 = (count - o1) as f64;
            statistic += (o1 as f64 - e1).powi(2) / e1 + (o0 - e0).powi(2) / e0;
        }
        let result = match failed {
            Some(e) => Err(e),
            None => {
                let degrees_of_freedom = HL_GROUPS - 2;
                chi2_sf(statistic, degrees_of_freedom as f64).map(|p_value| HosmerLemeshow {
                    statistic,
                    degrees_of_freedom,
                    p_value,
                })
            }
        };
        keep(&mut notes, "Hosmer-Lemeshow", result)
    };
    let gains = if n >= GAINS_GROUPS {
        if positives == 0 {
            let p = vec![0.5; GAINS_GROUPS];
            let y = vec![false; GAINS_GROUPS];
            keep(&mut notes, "gains", gains_lift(&p, &y, GAINS_GROUPS));
            Vec::new()
        } else {
            let overall_rate = positives as f64 / total;
            let (mut cum_n, mut cum_pos) = (0usize, 0usize);
            gains_sizes
                .iter()
                .zip(&gains_positives)
                .enumerate()
                .map(|(group, (&size, &pos))| {
                    cum_n += size;
                    cum_pos += pos;
                    Gains {
                        group,
                        count: size,
                        positives: pos,
                        cumulative_gain: cum_pos as f64 / positives as f64,
                        lift: (pos as f64 / size as f64) / overall_rate,
                        cumulative_lift: (cum_pos as f64 / cum_n as f64) / overall_rate,
                    }
                })
                .collect()
        }
    } else {
        notes.push(format!(
            "gains: {n} pairs, fewer than the {GAINS_GROUPS} groups"
        ));
        Vec::new()
    };
    let psi = match (reference, psi_actual) {
        (Some(r), Some(actual)) => {
            match psi_from_fractions(&r.fractions, &actual, EmptyBinRule::Floor(PSI_FLOOR)) {
                Ok(value) => Some(Psi {
                    value,
                    on: r.on.clone(),
                    rule: format!("shares below {PSI_FLOOR} floored to {PSI_FLOOR}"),
                    expected: r.fractions.clone(),
                    actual,
                }),
                Err(e) => {
                    notes.push(format!("PSI: {e}"));
                    None
                }
            }
        }
        _ => {
            notes.push("PSI: the model file has no reference distribution".into());
            None
        }
    };

    // The base-rate EM over every prediction on one prior, from the spilled inputs.
    let latest = last_prior.flatten();
    let common = latest.or(rates.served());
    let (rates, em_rates) = match common {
        None => (rates, rates),
        Some(common) => {
            let logit = |q: f64| (q / (1.0 - q)).ln();
            let served = rates.served();
            // Each row's probability on the common prior, as `on_one_prior` computes it; logits spilled.
            let mut moved = 0usize;
            let mut shifted = Spill::new()?;
            // Walk the three spills together.
            Walk {
                p: &mut em_p,
                h: &mut em_h,
                prior: &mut em_prior,
            }
            .walk(|p, h, prior| {
                let own = if prior.is_nan() { served } else { Some(prior) };
                let value = match own {
                    Some(own) if own != common => {
                        moved += 1;
                        let h = h - logit(own) + logit(common);
                        1.0 / (1.0 + (-h).exp())
                    }
                    _ => p,
                };
                shifted.push(probity_models::link::logit(value))
            })?;
            if moved > 0 {
                notes.push(super::moved_note(moved, rows, common));
            }
            let rates = super::rates_on(rates, latest, common);
            em_p = shifted;
            (rates, rates)
        }
    };
    let base_rate_estimate = match em_rates.served() {
        None => {
            notes.push(
                "base-rate estimate: neither a configured nor the model's base rate is known"
                    .into(),
            );
            None
        }
        Some(served) => {
            let len = em_p.len();
            let mut failure = None;
            let result = if common.is_none() {
                Err(probity_models::fit::FitError::Empty)
            } else {
                estimate_prior_by(served, EmOptions::default(), |shift| {
                    let mut sum = 0.0f64;
                    if let Err(e) = em_p.pass(|hi| sum += sigmoid(hi + shift)) {
                        failure = Some(e);
                        return f64::NAN;
                    }
                    sum / len as f64
                })
            };
            if let Some(e) = failure {
                return Err(e);
            }
            match result {
                Ok(e) => {
                    if !e.converged {
                        notes.push(format!(
                            "base-rate estimate: EM stopped at its {} iteration cap before converging",
                            e.iterations
                        ));
                    }
                    Some(e.prior)
                }
                Err(e) => {
                    notes.push(format!("base-rate estimate: {e}"));
                    None
                }
            }
        }
    };
    // The calibration tests, over the pairs spilled by the first pass (probability, log-odds, label), read again
    // at every Newton step of the recalibration fit.
    let mut failure: Option<StoreError> = None;
    let calibration_tests = calibration_tests::compute_by(
        n,
        |each| {
            if failure.is_some() {
                return;
            }
            let mut triple = [0.0f64; 3];
            let mut k = 0usize;
            if let Err(e) = pair_spill.pass(|v| {
                triple[k] = v;
                k += 1;
                if k == 3 {
                    each(triple[0], triple[1], triple[2] != 0.0);
                    k = 0;
                }
            }) {
                failure = Some(e);
            }
        },
        &mut notes,
    );
    if let Some(e) = failure {
        return Err(e);
    }
    drop(pair_spill);
    let eventual_positive_rate = eventual(store, scan, rows, now_ms, &mut notes)?;
    let immature_window = window(store, scan, rows, now_ms, bins, horizon_ms)?;
    let operating_points = operating_tally.finish(&mut notes);
    let mean = |s: f64, k: usize| (k > 0).then(|| s / k as f64);
    let (route, model, version, role): SeriesKey = (
        scan.route.to_string(),
        scan.model.to_string(),
        scan.version.to_string(),
        scan.role.to_string(),
    );
    Ok(SeriesReport {
        route,
        model,
        version,
        role,
        predictions: rows,
        with_outcome: n,
        immature: rows - n,
        settled_by_maturity: by_maturity,
        corrected,
        mean_probability: mean(sum_all_p, rows).unwrap_or(0.0),
        predicted_base_rate: mean(sum_p, n),
        observed_base_rate: (n > 0).then(|| positives as f64 / n as f64),
        configured_base_rate: rates.configured,
        served_base_rate: rates.served(),
        base_rate_estimate,
        log_loss,
        brier,
        brier_decomposition: decomposition,
        roc_auc: roc,
        ks,
        calibration,
        hosmer_lemeshow: hl,
        gains,
        psi,
        histogram_negative,
        histogram_positive,
        notes,
        calibration_tests,
        eventual_positive_rate,
        immature_window,
        operating_points,
        // Filled for the whole report from the store's hourly counts (`features::add`), as the loaded report does.
        features: Vec::new(),
    })
}

/// The immature window of a series of `rows` predictions whose latest prediction or receipt is `now_ms`, from
/// passes over the store (as [`immature::window`] on the loaded rows): the delay reference from the matured
/// predictions' follow-up grouped in the database, the window's quantile edges (equal-count bins) from a pass in
/// probability order, then one written-order pass that feeds the window's predictions to
/// `monitor::eventual_figures_by` and adds the matured figures. Held: the Kaplan-Meier steps and, per calibration
/// bin and step, a count.
fn window(
    store: &mut dyn Store,
    scan: &SeriesScan<'_>,
    rows: usize,
    now_ms: i64,
    bins: BinStrategy,
    horizon_ms: Option<i64>,
) -> Result<immature::ImmatureWindow, StoreError> {
    let unknown = |reason: String| Ok(immature::ImmatureWindow::Unknown { reason });
    if rows == 0 {
        return unknown("no predictions".into());
    }
    let floor = immature::at_risk_floor(rows);
    let (horizon_ms, horizon_from) = match horizon_ms {
        Some(h) => (h, "the route's maturity period".to_string()),
        None => {
            let oldest = if rows < floor {
                None
            } else {
                store.nth_oldest(scan, (floor - 1) as u64)?
            };
            match oldest {
                Some(t) => (
                    now_ms - t,
                    format!(
                        "the follow-up of the oldest {floor} predictions (no maturity period given)"
                    ),
                ),
                None => {
                    return unknown(format!(
                        "{rows} predictions, fewer than the {floor} the horizon rule needs"
                    ))
                }
            }
        }
    };
    if horizon_ms <= 0 {
        return unknown("the horizon is not positive".into());
    }
    let days = |ms: i64| ms as f64 / 86_400_000.0;
    // Matured: at least the horizon old, `time_ms <= now_ms - horizon_ms`.
    let cut = now_ms.saturating_sub(horizon_ms).saturating_add(1);
    let old_scan = SeriesScan {
        to_ms: Some(scan.to_ms.map_or(cut, |t| t.min(cut))),
        ..scan.clone()
    };
    let mut groups: Vec<FollowUpGroup> = Vec::new();
    store.follow_up(&old_scan, now_ms, horizon_ms, &mut |g: &FollowUpGroup| {
        groups.push(*g);
        Ok(())
    })?;
    let old: usize = groups
        .iter()
        .map(|g| usize::try_from(g.count).unwrap_or(0))
        .sum();
    let young = rows - old.min(rows);
    if young == 0 {
        return unknown(format!(
            "no prediction is younger than the {:.1}-day horizon: every outcome is in",
            days(horizon_ms)
        ));
    }
    if old == 0 {
        return unknown(format!(
            "no prediction in the range is at least the {:.1}-day horizon old, so no delay has been seen in full; \
             report over a range that also holds older predictions",
            days(horizon_ms)
        ));
    }
    let mut steps = KaplanMeierSteps::new(old, horizon_ms as f64);
    for g in &groups {
        steps.push(
            g.time_ms as f64,
            usize::try_from(g.events).unwrap_or(0),
            usize::try_from(g.count).unwrap_or(0),
        );
    }
    drop(groups);
    let km = steps.finish();
    if km.positives == 0 {
        return unknown(format!(
            "none of the {old} matured predictions had a positive within the horizon, so the delay of positives is \
             unknown"
        ));
    }
    let is_young = |t: i64| now_ms - t < horizon_ms;
    let edges: Vec<f64> = match bins {
        BinStrategy::Uniform(n) => (0..=n).map(|i| linspace_unit(i, n)).collect(),
        BinStrategy::Quantile(n) => {
            let levels: Vec<f64> = (0..=n)
                .map(|i| linspace_unit(i, n) * 100.0 / 100.0)
                .collect();
            let mut wanted: BTreeMap<usize, f64> = levels
                .iter()
                .flat_map(|&q| quantile_positions(young, q))
                .map(|i| (i, f64::NAN))
                .collect();
            let mut i = 0usize;
            store.scan(scan, ScanOrder::Probability, false, &mut |r: &ScanRow| {
                if is_young(r.time_ms) {
                    if let Some(v) = wanted.get_mut(&i) {
                        *v = r.probability;
                    }
                    i += 1;
                }
                Ok(())
            })?;
            levels
                .iter()
                .map(|&q| quantile_by(young, q, |i| wanted.get(&i).copied().unwrap_or(f64::NAN)))
                .collect()
        }
    };
    let mut sums = immature::WindowSums::new(&edges);
    let mut failure: Option<StoreError> = None;
    let mut cases = 0usize;
    let figures = eventual_figures_by(&km, &edges, immature::LEVEL, |each| {
        let result = store.scan(scan, ScanOrder::Written, false, &mut |r: &ScanRow| {
            let delay = match (r.label, r.outcome_received_ms) {
                (Some(true), Some(received)) => Some((received - r.time_ms).max(0)),
                _ => None,
            };
            let positive = delay.is_some_and(|d| d <= horizon_ms);
            if is_young(r.time_ms) {
                cases += 1;
                each(ScoredCase {
                    age: (now_ms - r.time_ms) as f64,
                    log_odds: r.adjusted_log_odds,
                    probability: r.probability,
                    positive,
                });
                sums.young(r.adjusted_log_odds, r.probability, positive);
            } else {
                sums.matured(r.probability, r.adjusted_log_odds, positive);
            }
            Ok(())
        });
        if let Err(e) = result {
            failure = Some(e);
        }
    });
    if let Some(e) = failure {
        return Err(e);
    }
    Ok(immature::assemble(
        (now_ms, horizon_ms, horizon_from),
        figures,
        cases,
        &sums,
    ))
}

/// Three spills of the same length read in step.
struct Walk<'a> {
    p: &'a mut Spill,
    h: &'a mut Spill,
    prior: &'a mut Spill,
}

impl Walk<'_> {
    /// Calls `each(p, h, prior)` for every row in written order.
    fn walk(
        &mut self,
        mut each: impl FnMut(f64, f64, f64) -> Result<(), StoreError>,
    ) -> Result<(), StoreError> {
        let len = self.p.len;
        match (self.p.reader()?, self.h.reader()?, self.prior.reader()?) {
            (Some(mut p), Some(mut h), Some(mut prior)) => {
                for _ in 0..len {
                    each(p.next()?, h.next()?, prior.next()?)?;
                }
            }
            _ => {
                for ((&p, &h), &prior) in self.p.mem.iter().zip(&self.h.mem).zip(&self.prior.mem) {
                    each(p, h, prior)?;
                }
            }
        }
        self.p.rewind_end()?;
        self.h.rewind_end()?;
        self.prior.rewind_end()
    }
}

/// The eventual positive rate of a series of `rows` predictions whose latest prediction or receipt is `now_ms`,
/// from the follow-up the store groups (as [`immature::compute`] on the loaded rows).
fn eventual(
    store: &mut dyn Store,
    scan: &SeriesScan<'_>,
    rows: usize,
    now_ms: i64,
    notes: &mut Vec<String>,
) -> Result<Option<immature::EventualRate>, StoreError> {
    if rows == 0 {
        return Ok(None);
    }
    let floor = immature::at_risk_floor(rows);
    if rows < floor {
        notes.push(format!(
            "eventual positive rate: {rows} predictions, fewer than the {floor} the estimate needs"
        ));
        return Ok(None);
    }
    let Some(oldest) = store.nth_oldest(scan, (floor - 1) as u64)? else {
        return Ok(None);
    };
    let horizon_ms = now_ms - oldest;
    if horizon_ms <= 0 {
        notes.push(format!(
            "eventual positive rate: the oldest {floor} predictions have no follow-up yet"
        ));
        return Ok(None);
    }
    let mut steps = KaplanMeierSteps::new(rows, horizon_ms as f64);
    store.follow_up(scan, now_ms, horizon_ms, &mut |g: &FollowUpGroup| {
        steps.push(
            g.time_ms as f64,
            usize::try_from(g.events).unwrap_or(0),
            usize::try_from(g.count).unwrap_or(0),
        );
        Ok(())
    })?;
    Ok(immature::of_fit(
        Ok(steps.finish()),
        now_ms,
        horizon_ms,
        notes,
    ))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_spill_past_its_memory_cap_reads_back_every_value_in_order_each_pass() {
        let n = Spill::IN_MEMORY + 12_345;
        let mut s = Spill::new().unwrap();
        for i in 0..n {
            s.push(i as f64 * 0.5 - 7.0).unwrap();
        }
        for _ in 0..2 {
            let mut i = 0usize;
            s.pass(|v| {
                assert_eq!(v, i as f64 * 0.5 - 7.0);
                i += 1;
            })
            .unwrap();
            assert_eq!(i, n);
        }
        // Three spills read in step.
        let (mut p, mut h, mut prior) = (
            Spill::new().unwrap(),
            Spill::new().unwrap(),
            Spill::new().unwrap(),
        );
        for i in 0..n {
            p.push(i as f64).unwrap();
            h.push(-(i as f64)).unwrap();
            prior.push(f64::NAN).unwrap();
        }
        let mut k = 0usize;
        Walk {
            p: &mut p,
            h: &mut h,
            prior: &mut prior,
        }
        .walk(|a, b, c| {
            assert_eq!((a, b), (k as f64, -(k as f64)));
            assert!(c.is_nan());
            k += 1;
            Ok(())
        })
        .unwrap();
        assert_eq!(k, n);
    }
}
