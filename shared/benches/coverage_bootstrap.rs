//! An experiment, run as a benchmark: bands calibrated by a parametric
//! bootstrap, measured against the truth of populations the team did not
//! design (`tests/reference/populations.py`, the mixed 500-meter feeder).
//! `cargo bench -p meterveil-shared --bench coverage_bootstrap -- [DRAWS]`
//! (default 8; needs the reference venv in `METERVEIL_PYTHON`, about 7 minutes
//! on 2 cores). Not used by the service yet: README "Group loads and their
//! bands" reports what it measured.
//!
//! The bands of `shared::aggregate` sum each meter's own variance and miss
//! the error the fit shares across meters and days. The bootstrap asks the
//! fit how wrong it is where the truth is known: it draws loads from the
//! fitted model (the recovered profile plus each meter's spread, block
//! offsets included), dithers and quantizes them as a gateway would, refits
//! warm-started from the fit, and measures how far each aggregate's estimate
//! lands from that drawn truth in units of its own band's standard deviation.
//! The 95th percentile of those distances, pooled over all aggregates of one
//! kind, replaces 1.96 as the band's half-width in standard deviations.

#[path = "../tests/common/mod.rs"]
mod common;

use common::*;
use meterveil_shared::aggregate::{group_load, meter_spreads, meter_sums, moments, Spread, Z95};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, recover_from, LevelMatrix, RankChoice, RecoveryParams, WarmStart};
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

const ALPHA: f64 = 15.0;
const DAYS: usize = 28;
const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };
const KINDS: [&str; 4] = ["groups of 10", "groups of 50", "meter-days", "band energies"];

/// Each aggregate of one recovery as (estimate, standard deviation, truth),
/// per kind: group loads per interval of random disjoint groups of 10 and 50,
/// each meter's daily energies and its energy in two time-of-use bands.
fn points(
    truth: &DMatrix<f64>,
    x: &DMatrix<f64>,
    levels: &LevelMatrix,
    p: &DitherProfile,
) -> [Vec<(f64, f64, f64)>; 4] {
    let spreads = meter_spreads(x, levels, p, 900);
    let taus: Vec<f64> = spreads.iter().map(|s| s.shared.hypot(s.own)).collect();
    let (mean, var) = moments(x, levels, p, &taus);
    let mut order: Vec<usize> = (0..truth.nrows()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(7));
    let mut out: [Vec<(f64, f64, f64)>; 4] = Default::default();
    for (slot, size) in [10usize, 50].into_iter().enumerate() {
        for g in order.chunks_exact(size) {
            for (j, (kw, lo, hi)) in group_load(&mean, &var, g, &[]).iter().enumerate() {
                let t: f64 = g.iter().map(|&i| truth[(i, j)]).sum();
                out[slot].push((*kw, (hi - lo) / (2.0 * Z95), t));
            }
        }
    }
    let n = truth.ncols();
    let peak = |j: usize| (28..92).contains(&(j % 96));
    let day_bucket: Vec<Option<usize>> = (0..n).map(|j| Some(j / 96)).collect();
    let band_bucket: Vec<Option<usize>> = (0..n).map(|j| Some(usize::from(peak(j)))).collect();
    for i in 0..truth.nrows() {
        let row: Vec<f64> = x.row(i).iter().copied().collect();
        let level = |j: usize| levels.get(i, j);
        for (d, (e, v)) in meter_sums(&row, &level, p, spreads[i], 900, &day_bucket, n / 96).iter().enumerate() {
            let t: f64 = (d * 96..(d + 1) * 96).map(|j| truth[(i, j)]).sum();
            out[2].push((*e, v.sqrt(), t));
        }
        for (b, (e, v)) in meter_sums(&row, &level, p, spreads[i], 900, &band_bucket, 2).iter().enumerate() {
            let t: f64 = (0..n).filter(|&j| usize::from(peak(j)) == b).map(|j| truth[(i, j)]).sum();
            out[3].push((*e, v.sqrt(), t));
        }
    }
    out
}

/// Loads drawn from the fitted model: the recovered profile plus each meter's
/// spread (an offset per 4-hour block and one per interval), floored at 0.
fn drawn_truth(x: &DMatrix<f64>, spreads: &[Spread], rng: &mut ChaCha8Rng) -> DMatrix<f64> {
    let mut t = x.clone();
    for i in 0..x.nrows() {
        let mut offset = 0.0;
        for j in 0..x.ncols() {
            if j % 16 == 0 {
                let z: f64 = StandardNormal.sample(rng);
                offset = spreads[i].shared * z;
            }
            let z: f64 = StandardNormal.sample(rng);
            t[(i, j)] = (x[(i, j)] + offset + spreads[i].own * z).clamp(0.0, ALPHA);
        }
    }
    t
}

/// Coverage of each kind's band at half-width `k` standard deviations.
fn coverage(pts: &[(f64, f64, f64)], k: f64) -> f64 {
    pts.iter().filter(|(e, s, t)| (e - t).abs() <= k * s).count() as f64 / pts.len().max(1) as f64
}

/// Per kind: the coverage of the bands as they are, the bootstrap's
/// half-width (in standard deviations) and the coverage at that width.
fn calibrate(name: &str, truth: &DMatrix<f64>, scale: f64, draws: usize) -> [(f64, f64, f64); 4] {
    let p = gaussian_profile(scale, &[1.0, 2.0]);
    let mut rng = ChaCha8Rng::seed_from_u64(40 + (scale * 10.0) as u64);
    let levels = quantize(truth, &p, 0.05, &mut rng);
    let params = RecoveryParams { alpha_kw: ALPHA, ..Default::default() }.check().expect("params");
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).expect("fit");
    let real = points(truth, &rec.x, &levels, &p);
    let spreads = meter_spreads(&rec.x, &levels, &p, 900);
    let rank = rec.diagnostics.rank;
    let fixed =
        RecoveryParams { alpha_kw: ALPHA, rank: RankChoice::Fixed(rank), ..Default::default() }.check().expect("p");
    let mut distances: [Vec<f64>; 4] = Default::default();
    let t0 = std::time::Instant::now();
    for _ in 0..draws {
        let t = drawn_truth(&rec.x, &spreads, &mut rng);
        let lv = quantize(&t, &p, 0.05, &mut rng);
        let warm = WarmStart { x: rec.x.clone(), rank };
        let again = recover_from(&lv, &p, &[], LAYOUT, &fixed, Some(&warm), &mut |_, _| {}).expect("refit");
        for (k, pts) in points(&t, &again.x, &lv, &p).iter().enumerate() {
            distances[k].extend(pts.iter().map(|(e, s, t)| (e - t).abs() / s.max(1e-9)));
        }
    }
    let mut out = [(0.0, 0.0, 0.0); 4];
    for k in 0..4 {
        let width = quantile(&distances[k], 0.95);
        out[k] = (coverage(&real[k], Z95), width, coverage(&real[k], width));
        let flat = real[k].iter().filter(|p| p.1 < 1e-6).count() as f64 / real[k].len().max(1) as f64;
        println!(
            "{name} σ {scale} kW, {}: coverage as fitted {:.1}%; bootstrap half-width {width:.2} sd (fitted 1.96); coverage then {:.1}%; {:.1}% of the fit's bands have zero width",
            KINDS[k],
            100.0 * out[k].0,
            100.0 * out[k].2,
            100.0 * flat
        );
    }
    println!("{name} σ {scale} kW: {draws} refits in {:.1} s", t0.elapsed().as_secs_f64());
    out
}

fn main() {
    let draws = std::env::args().skip(1).find(|a| !a.starts_with("--")).and_then(|a| a.parse().ok()).unwrap_or(8);
    let pop = ReferencePopulation::load("mixed", 1, 500, DAYS);
    for scale in [1.0, 0.3] {
        calibrate("mixed 500", &pop.x, scale, draws);
    }
}
