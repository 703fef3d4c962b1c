//! Speed of the recovery iteration and of a full fit (a benchmark, not a test).
//!
//! `cargo bench -p meterveil-shared --bench recovery_speed -- M N RANK [fit]`
//! prints one JSON line: seconds per iteration (median of 5 after one warm-up),
//! the full-fit wall time when asked, and the peak resident memory up to the end
//! of the fit (the fit plus this program's own truth matrix) relative to one
//! dense f64 M×N matrix. bench/iteration_speed.sh runs it beside the numpy
//! reference and prints the ratio.

use std::time::Instant;

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::solver::one_iteration;
use meterveil_shared::recovery::{recover, LevelMatrix, RankChoice, RecoveryParams};
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};

fn peak_rss_bytes() -> Option<f64> {
    let s = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = s.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb * 1024.0)
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let num = |i: usize, d: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(d);
    let (m, n, r) = (num(0, 2000), num(1, 2880), num(2, 50));
    let full_fit = args.iter().any(|a| a == "fit");
    let p = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 0.3,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .expect("profile");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
    // A planted rank-r population with daily shapes, 5% missing.
    let a = DMatrix::<f64>::from_fn(m, r, |_, _| rng.random_range(0.0..1.0));
    let b = DMatrix::<f64>::from_fn(r, n, |k, j| {
        let t = (j % 96) as f64 / 96.0 * std::f64::consts::TAU;
        (1.0 + (t * (k % 7 + 1) as f64 + k as f64).sin()) * 2.0 / r as f64
    });
    let truth = &a * &b;
    drop((a, b));
    let mut levels = LevelMatrix::missing(m, n);
    for j in 0..n {
        for i in 0..m {
            if !rng.random_bool(0.05) {
                levels.set(i, j, Some(dither_and_quantize(&p, truth[(i, j)], &mut rng)));
            }
        }
    }
    let mut fit = serde_json::Value::Null;
    if full_fit {
        let params = RecoveryParams { rank: RankChoice::Fixed(r), alpha_kw: 15.0, ..Default::default() }
            .check()
            .expect("params");
        let t0 = Instant::now();
        let rec = recover(
            &levels,
            &p,
            &[],
            DayLayout { window_start: 1_700_006_400, interval_s: 900 },
            &params,
            &mut |_, _| {},
        )
        .expect("recover");
        let secs = t0.elapsed().as_secs_f64();
        fit = serde_json::json!({
            "wall_s": secs,
            "iterations": rec.diagnostics.iterations,
            "stop": rec.diagnostics.stop,
            "nrmse": (&rec.x - &truth).norm() / truth.norm(),
        });
    }
    // Peak so far: the fit plus this program's truth matrix and levels.
    let fit_peak = peak_rss_bytes();
    let x = truth.map(|v| (v * 0.9).clamp(0.0, 15.0));
    let x_prev = truth.map(|v| (v * 0.85).clamp(0.0, 15.0));
    let mut times = Vec::new();
    for _ in 0..6 {
        let t0 = Instant::now();
        // As in the fit's steady state: r + 10 columns, no extra subspace round.
        let (out, _) = one_iteration(&levels, &p, &x, &x_prev, 2.0, r, 15.0, 10, 0, &mut rng);
        times.push(t0.elapsed().as_secs_f64());
        std::hint::black_box(out);
    }
    times.remove(0);
    times.sort_by(f64::total_cmp);
    let per_iter = times[times.len() / 2];
    let dense = (m * n * 8) as f64;
    println!(
        "{}",
        serde_json::json!({
            "m": m, "n": n, "rank": r,
            "rust_iteration_s": per_iter,
            "fit": fit,
            "peak_rss_over_dense_matrix": fit_peak.map(|b| b / dense),
        })
    );
}
