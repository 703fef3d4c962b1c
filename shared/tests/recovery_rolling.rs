//! Rolling recovery: the next day's trailing window fitted from the previous
//! window's estimates ([`WarmStart`]) against a cold fit of the same window, on
//! the BDEW population (demandlib's standard load profiles) and on the mixed
//! feeder of `tests/reference/populations.py` (CREST households with BDEW
//! commercial and agricultural classes). Windows of 27 days move by one day
//! inside the 28 days the populations hold; gaussian dither σ 0.3 and 1.0 kW,
//! 3 levels at 1 and 2 kW, 5% of readings missing, automatic rank for the cold
//! fits. The work is counted in iterations (the rank search's and the final
//! fit's); the wall-clock ratio is the benchmark's (`recovery_speed -- rolling`).

mod common;

use common::*;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, recover_from, LevelMatrix, RecoveryParams, WarmStart};
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

const ALPHA: f64 = 15.0;
const DAY: usize = 96;
const WINDOW_DAYS: usize = 27;
const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };

fn window(levels: &LevelMatrix, first_day: usize) -> LevelMatrix {
    let mut w = LevelMatrix::missing(levels.rows(), WINDOW_DAYS * DAY);
    for j in 0..WINDOW_DAYS * DAY {
        for i in 0..levels.rows() {
            w.set(i, j, levels.get(i, j + first_day * DAY));
        }
    }
    w
}

/// Per meter and day of two estimates over the same days, |ΔE| / E of the
/// reference; the median and the largest 99th-percentile-style figure.
fn day_moves(a: &DMatrix<f64>, b: &DMatrix<f64>) -> (f64, f64) {
    let mut moves = Vec::new();
    for i in 0..a.nrows() {
        for d in 0..a.ncols() / DAY {
            let (ea, eb): (f64, f64) =
                (d * DAY..(d + 1) * DAY).fold((0.0, 0.0), |s, j| (s.0 + a[(i, j)], s.1 + b[(i, j)]));
            moves.push((ea - eb).abs() / eb.max(1e-3));
        }
    }
    (quantile(&moves, 0.5), quantile(&moves, 0.99))
}

struct Rolled {
    cold_nrmse: f64,
    warm_nrmse: f64,
    cold_daily: f64,
    warm_daily: f64,
    /// Iterations of the cold fit (rank search and final fit) per warm iteration.
    work_ratio: f64,
    /// Median and 99th percentile of |ΔE|/E per meter-day between the earlier
    /// run and the warm run over the days both hold (no new readings there).
    stability: (f64, f64),
}

fn roll(name: &str, truth: &DMatrix<f64>, scale: f64) -> Rolled {
    let p = gaussian_profile(scale, &[1.0, 2.0]);
    let levels = quantize(truth, &p, 0.05, &mut ChaCha8Rng::seed_from_u64(90 + (10.0 * scale) as u64));
    let params = RecoveryParams { alpha_kw: ALPHA, ..Default::default() }.check().unwrap();
    let (day0, day1) = (window(&levels, 0), window(&levels, 1));
    let layout1 = DayLayout { window_start: LAYOUT.window_start + 86_400, ..LAYOUT };
    let prev = recover(&day0, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let cold = recover(&day1, &p, &[], layout1, &params, &mut |_, _| {}).unwrap();
    let start = WarmStart::shifted(&prev.x, prev.diagnostics.rank, DAY, 7 * DAY);
    let warm = recover_from(&day1, &p, &[], layout1, &params, Some(&start), &mut |_, _| {}).unwrap();
    let t1 = truth.columns(DAY, WINDOW_DAYS * DAY).clone_owned();
    let cd = &cold.diagnostics;
    let wd = &warm.diagnostics;
    let r = Rolled {
        cold_nrmse: nrmse(&cold.x, &t1),
        warm_nrmse: nrmse(&warm.x, &t1),
        cold_daily: median_daily_energy_error(&cold.x, &t1, DAY),
        warm_daily: median_daily_energy_error(&warm.x, &t1, DAY),
        work_ratio: (cd.search_iterations + cd.iterations) as f64 / wd.iterations.max(1) as f64,
        stability: day_moves(
            &warm.x.columns(0, (WINDOW_DAYS - 1) * DAY).clone_owned(),
            &prev.x.columns(DAY, (WINDOW_DAYS - 1) * DAY).clone_owned(),
        ),
    };
    eprintln!(
        "{name} σ {scale} kW: cold rank {} {}+{} iterations {:.1} s, nRMSE {:.4}, daily error {:.2}%; \
         warm rank {} {} iterations ({:?}) {:.1} s, nRMSE {:.4}, daily error {:.2}%; work ratio {:.1}, \
         wall ratio {:.1}; days both runs hold move by median {:.2}%, p99 {:.2}%",
        cd.rank,
        cd.search_iterations,
        cd.iterations,
        cd.wall_s,
        r.cold_nrmse,
        100.0 * r.cold_daily,
        wd.rank,
        wd.iterations,
        wd.stop,
        wd.wall_s,
        r.warm_nrmse,
        100.0 * r.warm_daily,
        r.work_ratio,
        cd.wall_s / wd.wall_s.max(1e-9),
        100.0 * r.stability.0,
        100.0 * r.stability.1,
    );
    r
}

/// The tolerances: interval nRMSE within 0.005 and median daily-energy
/// error within 0.2 percentage points of the cold fit, at a fifth of the work;
/// and README's "Rolling recovery" table (warm nRMSE, cold/warm iterations)
/// within 0.01 and 15% (seeded populations and dither: what moves them is a
/// change of the solver).
fn holds(name: &str, r: &Rolled, readme: (f64, f64)) {
    assert!((r.warm_nrmse - readme.0).abs() <= 0.01, "{name}: warm nRMSE {}, README states {}", r.warm_nrmse, readme.0);
    assert!(
        (r.work_ratio / readme.1 - 1.0).abs() <= 0.15,
        "{name}: work ratio {:.1}, README states {}",
        r.work_ratio,
        readme.1
    );
    assert!((r.warm_nrmse - r.cold_nrmse).abs() <= 0.005, "{name}: nRMSE warm {} cold {}", r.warm_nrmse, r.cold_nrmse);
    assert!(
        (r.warm_daily - r.cold_daily).abs() <= 0.002,
        "{name}: daily error warm {} cold {}",
        r.warm_daily,
        r.cold_daily
    );
    assert!(r.work_ratio >= 5.0, "{name}: the warm fit took 1/{:.1} of the cold fit's iterations", r.work_ratio);
}

#[test]
fn rolling_bdew() {
    let (_, shapes) = bdew_shapes(28);
    let (truth, _) = population(&shapes, 1400, ALPHA, &mut ChaCha8Rng::seed_from_u64(3));
    let r = roll("BDEW 1400", &truth, 0.3);
    holds("BDEW 1400 σ 0.3", &r, (0.1545, 9.6));
}

#[test]
fn rolling_mixed_feeder() {
    let pop = ReferencePopulation::load("mixed", 1, 500, 28);
    for (scale, readme) in [(0.3, (0.4678, 6.1)), (1.0, (0.4610, 23.8))] {
        let r = roll("mixed 500", &pop.x, scale);
        holds(&format!("mixed 500 σ {scale}"), &r, readme);
    }
}
