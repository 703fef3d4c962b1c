//! Why the 95% bands miss where they miss: the measurements behind README's
//! "Group loads and their bands" on the two populations whose coverage lies
//! outside 90-98%. Too slow for CI (four more fits of 300-1400 meters and
//! three bootstraps), so ignored; run by hand, each asserting the figures
//! README states:
//!
//! `cargo test --release -p meterveil-shared --test bands_diagnosis -- --ignored --nocapture`
//!
//! Sources, versions pinned in tests/reference/requirements.txt (and printed
//! by `recovery_bdew.rs` and `recovery_independent.rs`):
//! - BDEW (standard load profiles from demandlib, as in `recovery_bdew.rs`):
//!   readings at the top level are censored, and the fit is biased low there.
//! - CREST households (richardsonpy, as in `recovery_independent.rs`): the
//!   bootstrap's refits drift, and the drift counted as error over-widens the
//!   bands at σ 0.3 kW but is needed at σ 1.0 kW. At σ 0.3 kW the draws (the
//!   profile plus a gaussian spread) read above the lowest level far more
//!   often than the meters do.

mod common;

use common::aggregates::{aggregates, draws_of};
use common::*;
use meterveil_shared::aggregate::{meter_spreads, moments, Z95};
use meterveil_shared::bootstrap::FitDraws;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, LevelMatrix, RankChoice, Recovery, RecoveryParams, ValidRecoveryParams};
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 }; // 2023-01-09T00:00Z

fn near(what: &str, got: f64, readme: f64, tol: f64) {
    assert!((got - readme).abs() <= tol, "{what}: {got:.4}, README states {readme}");
}

struct Fitted {
    levels: LevelMatrix,
    p: DitherProfile,
    rec: Recovery,
    params: ValidRecoveryParams,
}

fn fit(truth: &DMatrix<f64>, scale: f64, bounds: &[f64], rng: &mut ChaCha8Rng, rank: RankChoice) -> Fitted {
    let p = gaussian_profile(scale, bounds);
    let levels = quantize(truth, &p, 0.05, rng);
    let params = RecoveryParams { rank, alpha_kw: 15.0, ..Default::default() }.check().unwrap();
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    Fitted { levels, p, rec, params }
}

/// Per level, the mean error (kW) of the estimate given the level
/// (`aggregate::moments`) over the readings at that level; and the estimates'
/// error over all readings as a share of the true energy.
fn bias_by_level(truth: &DMatrix<f64>, f: &Fitted) -> (Vec<f64>, f64) {
    let spreads = meter_spreads(&f.rec.x, &f.levels, &f.p, 900);
    let taus: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let (mean, _) = moments(&f.rec.x, &f.levels, &f.p, &taus);
    let k = f.p.boundaries_kw().len() + 1;
    let (mut sum, mut count, mut all) = (vec![0.0; k], vec![0usize; k], 0.0);
    for i in 0..truth.nrows() {
        for j in 0..truth.ncols() {
            let e = mean[(i, j)] - truth[(i, j)];
            if let Some(l) = f.levels.get(i, j) {
                sum[l as usize] += e;
                count[l as usize] += 1;
                all += e;
            }
        }
    }
    let per: Vec<f64> = sum.iter().zip(&count).map(|(s, c)| s / (*c).max(1) as f64).collect();
    eprintln!("readings per level {count:?}, mean error given the level (kW) {per:.3?}");
    (per, all / truth.sum())
}

#[test]
#[ignore]
fn bdew_top_level_readings_are_censored() {
    let (_, shapes) = bdew_shapes(28);
    let mut rng = ChaCha8Rng::seed_from_u64(20);
    let (truth, _) = population(&shapes, 1400, 15.0, &mut rng);
    // The rank the automatic choice settles on here (`recovery_bdew.rs`).
    let three = fit(&truth, 0.3, &[1.0, 2.0], &mut rng.clone(), RankChoice::Fixed(20));
    let (per, all) = bias_by_level(&truth, &three);
    eprintln!("boundaries 1 and 2 kW: estimates' error {:.2}% of energy", 100.0 * all);
    near("error given the top level (kW)", per[2], -0.19, 0.02);
    near("share of energy", all, -0.023, 0.002);
    // A third boundary at 4 kW: fewer readings censored, and those far fewer.
    let four = fit(&truth, 0.3, &[1.0, 2.0, 4.0], &mut rng, RankChoice::Fixed(20));
    let (per4, all4) = bias_by_level(&truth, &four);
    eprintln!("boundaries 1, 2 and 4 kW: estimates' error {:.2}% of energy", 100.0 * all4);
    near("error given the level 2-4 kW (kW)", per4[2], -0.064, 0.01);
    near("error given the top level, 4 levels (kW)", per4[3], -0.49, 0.03);
    near("share of energy, 4 levels", all4, -0.012, 0.002);
    let draws = draws_of(&four.rec, &four.levels, &four.p, &[], LAYOUT, &four.params);
    let c = aggregates("BDEW 1400, boundaries 1, 2 and 4 kW", 0.3, &truth, &four.rec.x, &four.levels, &four.p, &draws);
    near("groups of 10, 4 levels", c.groups[0], 0.889, 0.015);
    near("groups of 50, 4 levels", c.groups[1], 0.873, 0.015);
    near("meter-days, 4 levels", c.days, 0.938, 0.015);
    near("band energies, 4 levels", c.bands, 0.911, 0.015);
}

/// Per group size, over every interval of random disjoint groups: the
/// coverage of the bands as served (the draws' mean square of their summed
/// shifts, drift included), the coverage with the draws' sample variance
/// instead (drift left out), and the drift's share of the mean square.
fn drift(truth: &DMatrix<f64>, f: &Fitted, draws: &FitDraws) -> Vec<(f64, f64, f64)> {
    let spreads = meter_spreads(&f.rec.x, &f.levels, &f.p, 900);
    let taus: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let (mean, var) = moments(&f.rec.x, &f.levels, &f.p, &taus);
    let mut order: Vec<usize> = (0..truth.nrows()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(7));
    let d = draws.shifts.len() as f64;
    let mut out = Vec::new();
    for size in [10usize, 50] {
        let (mut served, mut sample, mut total, mut drift2, mut square) = (0usize, 0usize, 0usize, 0.0, 0.0);
        for g in order.chunks_exact(size) {
            // Per draw, the group's summed shift at every interval.
            let sums: Vec<Vec<f64>> = draws
                .shifts
                .iter()
                .map(|lr| {
                    let us: Vec<f64> =
                        (0..lr.rank()).map(|c| g.iter().map(|&i| lr.u[(i, c)]).sum::<f64>() * lr.s[c]).collect();
                    (0..truth.ncols()).map(|j| (0..lr.rank()).map(|c| us[c] * lr.v[(j, c)]).sum()).collect()
                })
                .collect();
            for j in 0..truth.ncols() {
                let kw: f64 = g.iter().map(|&i| mean[(i, j)]).sum();
                let t: f64 = g.iter().map(|&i| truth[(i, j)]).sum();
                let v: f64 = g.iter().map(|&i| var[(i, j)]).sum();
                let m = sums.iter().map(|s| s[j]).sum::<f64>() / d;
                let sq = sums.iter().map(|s| s[j] * s[j]).sum::<f64>() / d;
                let sv = (sq - m * m) * d / (d - 1.0);
                served += usize::from((kw - t).abs() <= Z95 * (v + sq).sqrt());
                sample += usize::from((kw - t).abs() <= Z95 * (v + sv).sqrt());
                total += 1;
                drift2 += m * m;
                square += sq;
            }
        }
        let row = (served as f64 / total as f64, sample as f64 / total as f64, drift2 / square);
        eprintln!(
            "groups of {size}: coverage as served {:.1}%, with the draws' sample variance {:.1}%; drift {:.0}% of the mean square",
            100.0 * row.0,
            100.0 * row.1,
            100.0 * row.2
        );
        out.push(row);
    }
    out
}

/// Share of readings above the lowest level: as read, as the fit alone
/// predicts (the recovered profile plus dither), and in loads drawn as the
/// bootstrap draws them (the profile plus each meter's spread, gaussian,
/// one offset per 4-hour block), one seeded draw.
fn upper_shares(f: &Fitted) -> (f64, f64, f64) {
    use meterveil_shared::mechanism::{dither_and_quantize, level_probability};
    use rand_distr::{Distribution, StandardNormal};
    let spreads = meter_spreads(&f.rec.x, &f.levels, &f.p, 900);
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let (mut read, mut model, mut drawn, mut n) = (0usize, 0.0, 0usize, 0usize);
    for (i, sp) in spreads.iter().enumerate() {
        let mut offset = 0.0;
        for j in 0..f.rec.x.ncols() {
            if j % 16 == 0 {
                let z: f64 = StandardNormal.sample(&mut rng);
                offset = sp.shared * z;
            }
            let z: f64 = StandardNormal.sample(&mut rng);
            let load = f.rec.x[(i, j)] + offset + sp.own * z;
            if let Some(l) = f.levels.get(i, j) {
                read += usize::from(l > 0);
                model += 1.0 - level_probability(&f.p, 0, f.rec.x[(i, j)]);
                drawn += usize::from(dither_and_quantize(&f.p, load, &mut rng) > 0);
                n += 1;
            }
        }
    }
    let n = n as f64;
    (read as f64 / n, model / n, drawn as f64 / n)
}

#[test]
#[ignore]
fn household_refits_drift() {
    let pop = ReferencePopulation::load("crest", 1, 300, 28);
    // README's figures for groups of 10 and 50: (as served, with the sample
    // variance); and the shares of readings above the lowest level (as read,
    // as the fit predicts, as the bootstrap draws).
    for (scale, readme, shares) in [
        (0.3, [(0.984, 0.969), (0.988, 0.948)], [0.123, 0.085, 0.224]),
        (1.0, [(0.901, 0.890), (0.930, 0.902)], [0.282, 0.299, 0.311]),
    ] {
        let mut rng = ChaCha8Rng::seed_from_u64(40 + (scale * 10.0) as u64);
        let f = fit(&pop.x, scale, &[1.0, 2.0], &mut rng, RankChoice::Auto(vec![2, 5, 10, 20, 40]));
        let draws = draws_of(&f.rec, &f.levels, &f.p, &[], LAYOUT, &f.params);
        let (read, model, drawn) = upper_shares(&f);
        eprintln!(
            "CREST 300 σ {scale}: readings above the lowest level {:.1}% as read, {:.1}% as the fit predicts, {:.1}% as the bootstrap draws",
            100.0 * read,
            100.0 * model,
            100.0 * drawn
        );
        for ((what, got), stated) in
            ["as read", "as the fit predicts", "as drawn"].iter().zip([read, model, drawn]).zip(shares)
        {
            near(&format!("share above the lowest level {what}"), got, stated, 0.005);
        }
        for ((served, sample, _), (want_served, want_sample)) in drift(&pop.x, &f, &draws).into_iter().zip(readme) {
            near("coverage as served", served, want_served, 0.015);
            near("coverage with the sample variance", sample, want_sample, 0.015);
        }
    }
}
