//! Aggregates of a recovery against the truth: group loads, meter-days and
//! band energies with their 95% bands (`shared::aggregate`), their errors and
//! the measured coverage of the bands. Days of 96 quarter-hours from the
//! window's start.

use meterveil_shared::bootstrap::{fit_draws, Fit, FitDraws};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{LevelMatrix, Recovery, SumConstraint, ValidRecoveryParams};
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Coverage of the 95% bands (`shared::aggregate`), each the share of true
/// sums inside their band.
#[derive(Debug, Clone, Copy, Default)]
pub struct Coverage {
    /// Group loads per interval, random disjoint groups of 10 and of 50 meters.
    pub groups: [f64; 2],
    /// Each meter's energy per day.
    pub days: f64,
    /// Each meter's energy per time-of-use band over the window (07:00-23:00
    /// and the rest, by the window's clock).
    pub bands: f64,
}

/// The bootstrap of a recovery (`shared::bootstrap`, its default draws), seeded.
pub fn draws_of(
    rec: &Recovery,
    levels: &LevelMatrix,
    p: &DitherProfile,
    constraints: &[SumConstraint],
    layout: DayLayout,
    params: &ValidRecoveryParams,
) -> FitDraws {
    let spreads = meterveil_shared::aggregate::meter_spreads(&rec.x, levels, p, layout.interval_s);
    let t0 = std::time::Instant::now();
    let fit = Fit {
        x: &rec.x,
        rank: rec.diagnostics.rank,
        levels,
        profile: p,
        constraints,
        layout,
        spreads: &spreads,
        params,
    };
    let out = fit_draws(&fit, meterveil_shared::bootstrap::DEFAULT_DRAWS, &mut ChaCha8Rng::seed_from_u64(11)).unwrap();
    eprintln!("bootstrap: {} refits in {:.1} s", out.shifts.len(), t0.elapsed().as_secs_f64());
    out
}

/// Group loads, meter-day and band energies with 95% bands: their errors and
/// the measured coverage of their bands, with the fit's variance from `draws`
/// added (and, printed beside, without it).
pub fn aggregates(
    name: &str,
    scale: f64,
    truth: &DMatrix<f64>,
    x: &DMatrix<f64>,
    levels: &LevelMatrix,
    p: &DitherProfile,
    draws: &FitDraws,
) -> Coverage {
    use meterveil_shared::aggregate::{group_load, meter_spreads, meter_sums, meter_sums_with_fit, moments, Z95};
    use rand::seq::SliceRandom;
    let spreads = meter_spreads(x, levels, p, 900);
    eprintln!("{name} σ {scale}: day correlation {:.4}", spreads[0].day_correlation);
    let taus: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let (mean, var) = moments(x, levels, p, &taus);
    let mut order: Vec<usize> = (0..truth.nrows()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(7));
    let mut cov = Coverage::default();
    let share = |inside: usize, total: usize| inside as f64 / total.max(1) as f64;
    for (slot, size) in [10usize, 50].into_iter().enumerate() {
        let (mut inside, mut plain, mut total) = (0usize, 0usize, 0usize);
        let (mut err_post, mut err_xhat, mut norm) = (0.0, 0.0, 0.0);
        for g in order.chunks_exact(size) {
            let fit = draws.group_variances(g, truth.ncols());
            let without = group_load(&mean, &var, g, &[]);
            for (j, (kw, lo, hi)) in group_load(&mean, &var, g, &fit).iter().enumerate() {
                let t: f64 = g.iter().map(|&i| truth[(i, j)]).sum();
                let xh: f64 = g.iter().map(|&i| x[(i, j)]).sum();
                // The band's lower end is floored at 0: coverage is of the band as served.
                plain += usize::from(without[j].1 <= t && t <= without[j].2);
                inside += usize::from(*lo <= t && t <= *hi);
                total += 1;
                err_post += (kw - t).powi(2);
                err_xhat += (xh - t).powi(2);
                norm += t * t;
            }
        }
        cov.groups[slot] = share(inside, total);
        eprintln!(
            "{name} σ {scale}: groups of {size}: group-load nRMSE {:.1}% (recovered profile {:.1}%), 95% band coverage {:.1}% (without the fit's variance {:.1}%)",
            100.0 * (err_post / norm).sqrt(),
            100.0 * (err_xhat / norm).sqrt(),
            100.0 * cov.groups[slot],
            100.0 * share(plain, total)
        );
    }
    // Sums of one meter: each day (buckets 0..DAYS) and each band (DAYS, DAYS + 1).
    let n = truth.ncols();
    let peak = |j: usize| (28..92).contains(&(j % 96));
    let day_bucket: Vec<Option<usize>> = (0..n).map(|j| Some(j / 96)).collect();
    let band_bucket: Vec<Option<usize>> = (0..n).map(|j| Some(usize::from(peak(j)))).collect();
    let (mut days_in, mut bands_in, mut days_n, mut bands_n) = (0, 0, 0, 0);
    let (mut days_plain, mut bands_plain) = (0, 0);
    // The sums of the recovered intervals per meter-day: what settlement
    // reported before it took the levels' estimate (`e` below).
    let mut summed_err = Vec::new();
    // Meter-days whose band is under 1% of their estimate either way, and of those the truth inside.
    let (mut narrow, mut narrow_in) = (0usize, 0usize);
    let (mut day_err, mut band_err, mut month_err) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..truth.nrows() {
        let row: Vec<f64> = x.row(i).iter().copied().collect();
        let level = |j: usize| levels.get(i, j);
        let days_plain_sums = meter_sums(&row, &level, p, spreads[i], 900, &day_bucket, n / 96);
        let bands_plain_sums = meter_sums(&row, &level, p, spreads[i], 900, &band_bucket, 2);
        let fit_days = draws.bucket_variances(i, &day_bucket, n / 96);
        let fit_bands = draws.bucket_variances(i, &band_bucket, 2);
        let days = meter_sums_with_fit(&row, &level, p, spreads[i], 900, &day_bucket, &fit_days);
        let bands = meter_sums_with_fit(&row, &level, p, spreads[i], 900, &band_bucket, &fit_bands);
        for (d, (e, v)) in days.iter().enumerate() {
            let t: f64 = (d * 96..(d + 1) * 96).map(|j| truth[(i, j)]).sum();
            days_plain += usize::from((t - e).abs() <= Z95 * days_plain_sums[d].1.sqrt());
            days_in += usize::from((t - e).abs() <= Z95 * v.sqrt());
            let summed: f64 = (d * 96..(d + 1) * 96).map(|j| x[(i, j)]).sum();
            summed_err.push((summed - t).abs() / t.max(1e-9));
            if Z95 * v.sqrt() < 0.01 * e {
                narrow += 1;
                narrow_in += usize::from((t - e).abs() <= Z95 * v.sqrt());
            }
            days_n += 1;
            day_err.push((e - t).abs() / t.max(1e-9));
        }
        for (b, (e, v)) in bands.iter().enumerate() {
            let t: f64 = (0..n).filter(|&j| usize::from(peak(j)) == b).map(|j| truth[(i, j)]).sum();
            bands_plain += usize::from((t - e).abs() <= Z95 * bands_plain_sums[b].1.sqrt());
            bands_in += usize::from((t - e).abs() <= Z95 * v.sqrt());
            bands_n += 1;
            band_err.push((e - t).abs() / t.max(1e-9));
        }
        let t: f64 = truth.row(i).sum();
        month_err.push((bands[0].0 + bands[1].0 - t).abs() / t.max(1e-9));
    }
    cov.days = share(days_in, days_n);
    cov.bands = share(bands_in, bands_n);
    let med = |mut v: Vec<f64>| {
        v.sort_by(f64::total_cmp);
        (100.0 * v[v.len() / 2], 100.0 * v[v.len() * 9 / 10])
    };
    let (dm, dp) = med(day_err);
    let (bm, bp) = med(band_err);
    let (mm, mp) = med(month_err);
    eprintln!(
        "{name} σ {scale}: meter-days error median {dm:.1}% p90 {dp:.1}%, coverage {:.1}% (without the fit's variance {:.1}%); band energies error median {bm:.1}% p90 {bp:.1}%, coverage {:.1}% (without {:.1}%); meter 28-day energy median {mm:.1}% p90 {mp:.1}%",
        100.0 * cov.days,
        100.0 * share(days_plain, days_n),
        100.0 * cov.bands,
        100.0 * share(bands_plain, bands_n)
    );
    let (sm, sp) = med(summed_err);
    eprintln!(
        "{name} σ {scale}: meter-days as sums of the recovered intervals: error median {sm:.1}% p90 {sp:.1}%; bands under ±1% of the estimate: {:.2}% of meter-days, {narrow_in} of {narrow} covered",
        100.0 * share(narrow, days_n)
    );
    // Settlement takes the levels' estimate of a meter-day for this.
    assert!(
        dm < sm,
        "{name} σ {scale}: the levels' estimate of meter-days ({dm:.1}%) no closer than the recovered sums ({sm:.1}%)"
    );
    cov
}
