//! The cost of the next day's recovery: a cold fit of the trailing window
//! (automatic rank) against a fit warm-started from the previous window's
//! estimates (a benchmark, not a test; `shared/tests/recovery_rolling.rs`
//! checks the accuracy on outside populations).
//!
//! `cargo bench -p meterveil-shared --bench rolling_fit -- M DAYS`
//! prints one JSON line: both fits' wall time and iterations, their ratio, and
//! both fits' nRMSE against the planted truth.

use std::time::Instant;

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, recover_from, LevelMatrix, RecoveryParams, WarmStart};
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};

const DAY: usize = 96;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let num = |i: usize, d: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(d);
    let (m, days) = (num(0, 2000), num(1, 28));
    let p = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 0.3,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .expect("profile");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    // Six daily shapes mixed per meter, each day scaled by its own weather
    // factor and each reading by a household's own noise, over days + 1 days.
    let r = 6;
    let n = (days + 1) * DAY;
    let weights = DMatrix::<f64>::from_fn(m, r, |_, _| rng.random_range(0.0..1.0));
    let weather: Vec<f64> = (0..=days).map(|_| rng.random_range(0.8..1.2)).collect();
    let shapes = DMatrix::<f64>::from_fn(r, n, |k, j| {
        let t = (j % DAY) as f64 / DAY as f64 * std::f64::consts::TAU;
        weather[j / DAY] * (1.0 + (t * (k % 3 + 1) as f64 + k as f64).sin()) * 0.5
    });
    let truth = (&weights * &shapes).map(|v| (v * rng.random_range(0.7..1.3)).clamp(0.0, 15.0));
    let mut levels = LevelMatrix::missing(m, n);
    for j in 0..n {
        for i in 0..m {
            if !rng.random_bool(0.05) {
                levels.set(i, j, Some(dither_and_quantize(&p, truth[(i, j)], &mut rng)));
            }
        }
    }
    let window = |first: usize| {
        let mut w = LevelMatrix::missing(m, days * DAY);
        for j in 0..days * DAY {
            for i in 0..m {
                w.set(i, j, levels.get(i, j + first * DAY));
            }
        }
        w
    };
    let layout = |first: usize| DayLayout { window_start: 1_700_006_400 + 86_400 * first as i64, interval_s: 900 };
    let params = RecoveryParams { alpha_kw: 15.0, ..Default::default() }.check().expect("params");
    let prev = recover(&window(0), &p, &[], layout(0), &params, &mut |_, _| {}).expect("previous day");
    let next = window(1);
    let t0 = Instant::now();
    let cold = recover(&next, &p, &[], layout(1), &params, &mut |_, _| {}).expect("cold");
    let cold_s = t0.elapsed().as_secs_f64();
    let t0 = Instant::now();
    let start = WarmStart::shifted(&prev.x, prev.diagnostics.rank, DAY, 7 * DAY);
    let warm = recover_from(&next, &p, &[], layout(1), &params, Some(&start), &mut |_, _| {}).expect("warm");
    let warm_s = t0.elapsed().as_secs_f64();
    let t1 = truth.columns(DAY, days * DAY).clone_owned();
    let nrmse = |x: &DMatrix<f64>| (x - &t1).norm() / t1.norm();
    println!(
        "{}",
        serde_json::json!({
            "meters": m, "days": days,
            "cold": {"wall_s": cold_s, "rank": cold.diagnostics.rank,
                     "iterations": cold.diagnostics.search_iterations + cold.diagnostics.iterations,
                     "nrmse": nrmse(&cold.x)},
            "warm": {"wall_s": warm_s, "rank": warm.diagnostics.rank, "iterations": warm.diagnostics.iterations,
                     "nrmse": nrmse(&warm.x)},
            "cold_over_warm_wall": cold_s / warm_s,
            "meter_days_per_second_warm": (m * days) as f64 / warm_s,
        })
    );
}
