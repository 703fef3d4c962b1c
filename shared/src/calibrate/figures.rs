//! The utility's figures a calibration scores: the errors of the aggregates a
//! utility uses (group loads per interval, energy per tariff band and billing
//! period), beside the daily-energy and interval errors of `crate::audit`.

use nalgebra::DMatrix;
use rand::seq::SliceRandom;
use rand::SeedableRng;

use crate::recovery::outage::DayLayout;
use crate::tariff::TariffCalendar;

/// A band cell whose true energy is below this share of the median cell's is
/// left out of the band-energy error: a relative error of a near-empty cell (a
/// night band of a vacant week) says nothing about settlement.
const SMALL_CELL: f64 = 0.05;

/// Disjoint groups of `size` meters out of `m`, drawn by `seed`; the leftover
/// meters join no group.
pub fn groups(m: usize, size: usize, seed: u64) -> Vec<Vec<usize>> {
    let mut order: Vec<usize> = (0..m).collect();
    order.shuffle(&mut rand_chacha::ChaCha8Rng::seed_from_u64(seed));
    order.chunks_exact(size.max(1)).map(<[usize]>::to_vec).collect()
}

/// nRMSE of the groups' loads per interval, pooled over groups and intervals:
/// √(Σ (Σ_g x − Σ_g t)²) / √(Σ (Σ_g t)²). NaN without a group.
pub fn group_nrmse(x: &DMatrix<f64>, truth: &DMatrix<f64>, groups: &[Vec<usize>]) -> f64 {
    let (mut err, mut norm) = (0.0, 0.0);
    for g in groups {
        for j in 0..truth.ncols() {
            let (e, t) = g.iter().fold((0.0, 0.0), |s, &i| (s.0 + x[(i, j)], s.1 + truth[(i, j)]));
            err += (e - t) * (e - t);
            norm += t * t;
        }
    }
    if groups.is_empty() || norm <= 0.0 {
        return f64::NAN;
    }
    (err / norm).sqrt()
}

/// Median over cells (meter, billing period, band) of |E_x − E_t| / E_t, where
/// the cells are what the window holds of each period (a period cut by the
/// window's ends counts as its part); cells under 5% of the median cell's true
/// energy are left out. NaN when no cell remains.
pub fn median_band_energy_error(
    x: &DMatrix<f64>,
    truth: &DMatrix<f64>,
    calendar: &TariffCalendar,
    layout: DayLayout,
) -> f64 {
    let n = truth.ncols();
    let step = i64::from(layout.interval_s);
    // Cell index per interval: (period, band) numbered in order of appearance.
    let mut keys: Vec<(chrono::NaiveDate, usize)> = Vec::new();
    let cell: Vec<usize> = (0..n)
        .map(|j| {
            let t = layout.window_start + j as i64 * step;
            let key = (calendar.period_at(t), calendar.band_at(t));
            keys.iter().position(|k| *k == key).unwrap_or_else(|| {
                keys.push(key);
                keys.len() - 1
            })
        })
        .collect();
    let mut pairs = Vec::with_capacity(truth.nrows() * keys.len());
    for i in 0..truth.nrows() {
        let mut sums = vec![(0.0, 0.0); keys.len()];
        for (j, &c) in cell.iter().enumerate() {
            sums[c].0 += x[(i, j)];
            sums[c].1 += truth[(i, j)];
        }
        pairs.extend(sums);
    }
    let mut truths: Vec<f64> = pairs.iter().map(|p| p.1).collect();
    truths.sort_by(f64::total_cmp);
    let Some(&median) = truths.get(truths.len() / 2) else {
        return f64::NAN;
    };
    let mut errs: Vec<f64> =
        pairs.iter().filter(|(_, t)| *t > SMALL_CELL * median && *t > 0.0).map(|(e, t)| (e - t).abs() / t).collect();
    errs.sort_by(f64::total_cmp);
    errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN)
}

#[cfg(test)]
mod tests {
    use super::*;

    const DAY_NIGHT: &str = r#"{"name": "two-rate", "time_zone": "UTC", "billing_day": 1,
      "bands": [
        {"band": "day", "days": ["mon","tue","wed","thu","fri","sat","sun","holiday"], "from": "07:00", "to": "23:00"},
        {"band": "night", "days": ["mon","tue","wed","thu","fri","sat","sun","holiday"], "from": "23:00", "to": "07:00"}
      ]}"#;

    #[test]
    fn group_nrmse_pools_groups_and_cancels_opposite_errors() {
        let truth = DMatrix::from_element(4, 3, 1.0);
        let mut x = truth.clone();
        // Meter 0 over by 0.5, meter 1 under by 0.5: their group's load is exact.
        x.row_mut(0).add_scalar_mut(0.5);
        x.row_mut(1).add_scalar_mut(-0.5);
        assert!(group_nrmse(&x, &truth, &[vec![0, 1]]).abs() < 1e-12);
        // Alone, meter 0 is 50% off.
        assert!((group_nrmse(&x, &truth, &[vec![0]]) - 0.5).abs() < 1e-12);
        // Groups are disjoint, sized, and every meter is drawn at most once.
        let g = groups(103, 10, 3);
        assert_eq!(g.len(), 10);
        let mut all: Vec<usize> = g.concat();
        all.sort_unstable();
        all.dedup();
        assert_eq!(all.len(), 100);
        assert!(group_nrmse(&x, &truth, &[]).is_nan());
    }

    #[test]
    fn band_errors_are_per_meter_period_and_band() {
        let cal = TariffCalendar::parse(DAY_NIGHT).unwrap();
        // Two days of quarter-hours from 2023-01-30 (a period starts on 02-01).
        let layout = DayLayout { window_start: 1_675_036_800, interval_s: 900 };
        let truth = DMatrix::from_element(3, 96 * 4, 1.0);
        let mut x = truth.clone();
        // Meter 0 reads 10% high in the day band only; the others are exact.
        for j in 0..96 * 4 {
            let h = (j % 96) / 4;
            if (7..23).contains(&h) {
                x[(0, j)] = 1.1;
            }
        }
        // Cells: 3 meters × 2 periods × 2 bands; two of the 12 are 10% off.
        let e = median_band_energy_error(&x, &truth, &cal, layout);
        assert!(e.abs() < 1e-12, "{e}");
        for i in 1..3 {
            x.row_mut(i).scale_mut(1.2);
        }
        let e = median_band_energy_error(&x, &truth, &cal, layout);
        assert!((e - 0.2).abs() < 1e-9, "{e}");
    }
}
