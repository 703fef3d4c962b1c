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
    use meterveil_shared::aggregate::{group_load, meter_spreads, meter_sums, moments, Z95};
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
            for (j, (kw, lo, hi)) in group_load(&mean, &var, g, &[]).iter().enumerate() {
                let t: f64 = g.iter().map(|&i| truth[(i, j)]).sum();
                let xh: f64 = g.iter().map(|&i| x[(i, j)]).sum();
                let sd = (hi - kw) / Z95;
                plain += usize::from(*lo <= t && t <= *hi);
                inside += usize::from((t - kw).abs() <= Z95 * (sd * sd + fit[j]).sqrt());
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
    let (mut day_err, mut band_err, mut month_err) = (Vec::new(), Vec::new(), Vec::new());
    for i in 0..truth.nrows() {
        let row: Vec<f64> = x.row(i).iter().copied().collect();
        let level = |j: usize| levels.get(i, j);
        let days = meter_sums(&row, &level, p, spreads[i], 900, &day_bucket, n / 96);
        let bands = meter_sums(&row, &level, p, spreads[i], 900, &band_bucket, 2);
        let fit_days = draws.bucket_variances(i, &day_bucket, n / 96);
        let fit_bands = draws.bucket_variances(i, &band_bucket, 2);
        for (d, (e, v)) in days.iter().enumerate() {
            let t: f64 = (d * 96..(d + 1) * 96).map(|j| truth[(i, j)]).sum();
            days_plain += usize::from((t - e).abs() <= Z95 * v.sqrt());
            days_in += usize::from((t - e).abs() <= Z95 * (v + fit_days[d]).sqrt());
            days_n += 1;
            day_err.push((e - t).abs() / t.max(1e-9));
        }
        for (b, (e, v)) in bands.iter().enumerate() {
            let t: f64 = (0..n).filter(|&j| usize::from(peak(j)) == b).map(|j| truth[(i, j)]).sum();
            bands_plain += usize::from((t - e).abs() <= Z95 * v.sqrt());
            bands_in += usize::from((t - e).abs() <= Z95 * (v + fit_bands[b]).sqrt());
            bands_n += 1;
            band_err.push((e - t).abs() / t.max(1e-9));
        }
        let t: f64 = truth.row(i).sum();
        month_err.push((bands[0].0 + bands[1].0 - t).abs() / t.max(1e-9));
    }
    cov.days = share(days_in, days_n);
    cov.bands = share(bands_in, bands_n);
    if std::env::var("MV_VARIANTS").is_ok() {
        use meterveil_shared::aggregate::Spread;
        // Per cell: truth, estimate, V, φV, V+off, ρ factor, fit.
        let mut cells: [Vec<[f64; 7]>; 2] = Default::default();
        for i in 0..truth.nrows() {
            let row: Vec<f64> = x.row(i).iter().copied().collect();
            let level = |j: usize| levels.get(i, j);
            let s = spreads[i];
            let plain = Spread { dispersion: 1.0, day_offset: 0.0, day_correlation: 0.0, ..s };
            let phi = Spread { day_offset: 0.0, day_correlation: 0.0, ..s };
            let off = Spread { dispersion: 1.0, day_correlation: 0.0, ..s };
            for (k, (bucket, count, span)) in
                [(&day_bucket, n / 96, 1.0), (&band_bucket, 2, (n / 96) as f64)].into_iter().enumerate()
            {
                let v0 = meter_sums(&row, &level, p, plain, 900, bucket, count);
                let v1 = meter_sums(&row, &level, p, phi, 900, bucket, count);
                let v2 = meter_sums(&row, &level, p, off, 900, bucket, count);
                let fit = draws.bucket_variances(i, bucket, count);
                for c in 0..count {
                    let t: f64 = (0..n).filter(|&j| bucket[j] == Some(c)).map(|j| truth[(i, j)]).sum();
                    let rho = 1.0 + s.day_correlation * (span - 1.0);
                    cells[k].push([t, v0[c].0, v0[c].1, v1[c].1, v2[c].1, rho, fit[c]]);
                }
            }
        }
        let combos: [(&str, fn(&[f64; 7]) -> f64); 7] = [
            ("current", |c| c[3].max(c[4]) * c[5] + c[6]),
            ("max(A, A0+fit)", |c| (c[3].max(c[4]) * c[5]).max(c[3].max(c[4]) + c[6])),
            ("max(A, phiV+fit)", |c| (c[3].max(c[4]) * c[5]).max(c[3] + c[6])),
            ("max(A, V+fit)", |c| (c[3].max(c[4]) * c[5]).max(c[2] + c[6])),
            ("max(A, fit)", |c| (c[3].max(c[4]) * c[5]).max(c[6])),
            ("max(phiV rho, Voff+fit)", |c| (c[3] * c[5]).max(c[4] + c[6])),
            ("max(phiV rho, Voff, V+fit)", |c| (c[3] * c[5]).max(c[4]).max(c[2] + c[6])),
        ];
        for (label, f) in combos {
            let cov = |k: usize| {
                let inside = cells[k].iter().filter(|c| (c[0] - c[1]).abs() <= Z95 * f(c).sqrt()).count();
                100.0 * inside as f64 / cells[k].len().max(1) as f64
            };
            eprintln!("VARIANT {name} σ {scale} {label}: meter-days {:.1}% bands {:.1}%", cov(0), cov(1));
        }
    }
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
    cov
}
