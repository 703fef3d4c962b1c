//! Each meter's energy per tariff band and billing period, and per day, with
//! 95% bands (`shared::aggregate::meter_sums`). Where a register read covers a
//! day, the day's cells are conditioned on it: their total equals the read
//! exactly and its split keeps the uncertainty.

use std::collections::BTreeMap;

use chrono::NaiveDate;
use nalgebra::DMatrix;

use crate::aggregate::{meter_sums_with_fit, Spread, Z95};
use crate::bootstrap::FitDraws;
use crate::recovery::{LevelMatrix, SumConstraint};
use crate::tariff::TariffCalendar;
use crate::DitherProfile;

/// The levels a recovery was fitted to, where its window starts (UTC epoch
/// seconds) and its interval length.
#[derive(Clone, Copy)]
pub struct Fitted<'a> {
    pub x: &'a DMatrix<f64>,
    pub levels: &'a LevelMatrix,
    pub start: i64,
    pub interval_s: u32,
    /// The bootstrap of the fit (`shared::bootstrap`): the variance the
    /// fit's own error adds to each sum. Empty: the profile taken as known.
    pub draws: &'a FitDraws,
}

/// One sum of one meter: its label (a day, or a billing period's first day
/// and a band), energy in kWh with its 95% band, intervals and whether a
/// register read fixed it.
#[derive(Debug, Clone, PartialEq)]
pub struct EnergyCell {
    pub meter: usize,
    pub label: (NaiveDate, usize),
    pub kwh: f64,
    pub kwh_low: f64,
    pub kwh_high: f64,
    pub intervals: usize,
    pub registered: bool,
}

/// Means and variances of a meter's cells after the register reads: each
/// read's cells shifted in proportion to their variance so that they sum to
/// it (the gaussian conditional).
fn reconcile(cells: &mut [(f64, f64)], reads: &[(Vec<usize>, f64)]) {
    for (members, total) in reads {
        let (sum, var): (f64, f64) = members.iter().map(|&c| cells[c]).fold((0.0, 0.0), |a, b| (a.0 + b.0, a.1 + b.1));
        for &c in members {
            let (m, v) = cells[c];
            cells[c] = if var > 1e-12 {
                (m + v / var * (total - sum), (v - v * v / var).max(0.0))
            } else if sum > 1e-12 {
                (m * total / sum, 0.0)
            } else {
                (total / members.len() as f64, 0.0)
            };
        }
    }
}

/// Every meter's sums over the cells `label_of` gives each interval (`None`:
/// in none), reconciled to the register reads.
pub fn meter_energies(
    f: Fitted<'_>,
    profile: &DitherProfile,
    spreads: &[Spread],
    constraints: &[SumConstraint],
    label_of: &dyn Fn(i64) -> Option<(NaiveDate, usize)>,
) -> Vec<EnergyCell> {
    let (x, n) = (f.x, f.x.ncols());
    let hours = f64::from(f.interval_s) / 3600.0;
    let labels: Vec<Option<(NaiveDate, usize)>> =
        (0..n).map(|j| label_of(f.start + j as i64 * i64::from(f.interval_s))).collect();
    let mut out = Vec::new();
    for (i, &spread) in spreads.iter().enumerate().take(x.nrows()) {
        // A cell is (register read or none, label): a read's intervals never
        // share a cell with intervals outside it.
        let mut segment: Vec<Option<usize>> = vec![None; n];
        let reads: Vec<&SumConstraint> = constraints.iter().filter(|c| c.row == i).collect();
        for (k, c) in reads.iter().enumerate() {
            c.cols.clone().filter(|&j| j < n).for_each(|j| segment[j] = Some(k));
        }
        let mut keys: BTreeMap<(Option<usize>, (NaiveDate, usize)), usize> = BTreeMap::new();
        let bucket: Vec<Option<usize>> = (0..n)
            .map(|j| {
                let label = labels[j]?;
                let next = keys.len();
                Some(*keys.entry((segment[j], label)).or_insert(next))
            })
            .collect();
        let row: Vec<f64> = x.row(i).iter().copied().collect();
        let level = |j: usize| f.levels.get(i, j);
        let fit = f.draws.bucket_variances(i, &bucket, keys.len());
        let mut cells = meter_sums_with_fit(&row, &level, profile, spread, f.interval_s, &bucket, &fit);
        let read_cells: Vec<(Vec<usize>, f64)> = reads
            .iter()
            .enumerate()
            .map(|(k, c)| (keys.iter().filter(|(key, _)| key.0 == Some(k)).map(|(_, &b)| b).collect(), c.sum_kw))
            .collect();
        reconcile(&mut cells, &read_cells);
        let mut merged: BTreeMap<(NaiveDate, usize), (f64, f64, usize, bool)> = BTreeMap::new();
        for (&(seg, label), &b) in &keys {
            let count = bucket.iter().filter(|&&x| x == Some(b)).count();
            let e = merged.entry(label).or_insert((0.0, 0.0, 0, true));
            e.0 += cells[b].0;
            e.1 += cells[b].1;
            e.2 += count;
            e.3 &= seg.is_some();
        }
        for (label, (mean, var, intervals, registered)) in merged {
            let sd = var.sqrt();
            out.push(EnergyCell {
                meter: i,
                label,
                kwh: mean * hours,
                kwh_low: (mean - Z95 * sd).max(0.0) * hours,
                kwh_high: (mean + Z95 * sd) * hours,
                intervals,
                registered,
            });
        }
    }
    out
}

/// Each interval's (billing period's first day, band) under `calendar`.
pub fn band_label(calendar: &TariffCalendar) -> impl Fn(i64) -> Option<(NaiveDate, usize)> + '_ {
    |t| Some((calendar.period_at(t), calendar.band_at(t)))
}

/// Each interval's day in `zone` (else UTC).
pub fn day_label(zone: Option<chrono_tz::Tz>) -> impl Fn(i64) -> Option<(NaiveDate, usize)> {
    move |t| {
        let utc = chrono::DateTime::from_timestamp(t, 0)?;
        let day = match zone {
            Some(z) => utc.with_timezone(&z).date_naive(),
            None => utc.date_naive(),
        };
        Some((day, 0))
    }
}

#[cfg(test)]
mod tests {
    use super::reconcile;

    #[test]
    fn a_read_fixes_the_total_and_keeps_the_split_uncertain() {
        let mut cells = vec![(10.0, 4.0), (5.0, 1.0), (7.0, 2.0)];
        reconcile(&mut cells, &[(vec![0, 1], 20.0)]);
        assert!((cells[0].0 + cells[1].0 - 20.0).abs() < 1e-12, "{cells:?}");
        // The shortfall of 5 goes 4:1 by variance; both variances shrink equally (4·1/5).
        assert!((cells[0].0 - 14.0).abs() < 1e-12 && (cells[1].0 - 6.0).abs() < 1e-12, "{cells:?}");
        assert!((cells[0].1 - 0.8).abs() < 1e-12 && (cells[1].1 - 0.8).abs() < 1e-12, "{cells:?}");
        assert_eq!(cells[2], (7.0, 2.0));
    }
}
