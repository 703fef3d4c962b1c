//! The cost of the bands' bootstrap (`shared::bootstrap`) beside the recovery
//! it checks: a cold fit (automatic rank), each meter's spread, then the
//! bootstrap's refits (a benchmark, not a test; the coverage the bootstrap
//! buys is measured on outside populations in `shared/tests/recovery_independent.rs`
//! and `recovery_bdew.rs`).
//!
//! `cargo bench -p meterveil-shared --bench bands_bootstrap -- M DAYS DRAWS`
//! (default 2000 28 8) prints one JSON line: the wall time of each stage, the
//! bootstrap's time as a ratio of the fit's, and the stored band model's size.

use std::time::Instant;

use meterveil_shared::aggregate::meter_spreads;
use meterveil_shared::bootstrap::{fit_draws, Fit, StoredBands};
use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::{recover, LevelMatrix, RecoveryParams};
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};

const DAY: usize = 96;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let num = |i: usize, d: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(d);
    let (m, days, draws) = (num(0, 2000), num(1, 28), num(2, 8));
    let p = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 1.0,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .expect("profile");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    // A planted population for cost only: six daily shapes mixed per meter,
    // each day scaled by a weather factor, each reading by its own noise.
    let (r, n) = (6, days * DAY);
    let weights = DMatrix::<f64>::from_fn(m, r, |_, _| rng.random_range(0.0..1.0));
    let weather: Vec<f64> = (0..days).map(|_| rng.random_range(0.8..1.2)).collect();
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
    let layout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };
    let params = RecoveryParams::default().check().expect("params");
    let t0 = Instant::now();
    let rec = recover(&levels, &p, &[], layout, &params, &mut |_, _| {}).expect("fit");
    let fit_s = t0.elapsed().as_secs_f64();
    let t1 = Instant::now();
    let spreads = meter_spreads(&rec.x, &levels, &p, 900);
    let spreads_s = t1.elapsed().as_secs_f64();
    let t2 = Instant::now();
    let fit = Fit {
        x: &rec.x,
        rank: rec.diagnostics.rank,
        levels: &levels,
        profile: &p,
        constraints: &[],
        layout,
        spreads: &spreads,
        params: &params,
    };
    let out = fit_draws(&fit, draws, &mut rng).expect("bootstrap");
    let draws_s = t2.elapsed().as_secs_f64();
    let names: Vec<String> = (0..m).map(|i| format!("m{i:05}")).collect();
    let stored = serde_json::to_string(&StoredBands::new(names, &spreads, &out)).expect("json");
    println!(
        "{}",
        serde_json::json!({
            "meters": m, "days": days, "draws": draws, "rank": rec.diagnostics.rank,
            "fit_s": fit_s, "spreads_s": spreads_s, "bootstrap_s": draws_s,
            "bootstrap_over_fit": draws_s / fit_s, "spreads_over_fit": spreads_s / fit_s,
            "stored_bytes": stored.len(), "stored_bytes_per_meter_day": stored.len() as f64 / (m * days) as f64,
        })
    );
}
