//! Recovery on planted low-rank populations (truth known exactly), over shapes
//! that include 1×1, tall, wide, rank-deficient, all-missing rows and columns.

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::solver::{conditional_means, level_counts, Flag};
use meterveil_shared::recovery::table::LikelihoodTable;
use meterveil_shared::recovery::{recover, LevelMatrix, RankChoice, RecoveryParams, SumConstraint};
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

fn profile(s: f64, b: &[f64]) -> DitherProfile {
    DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: s,
        boundaries_kw: b.to_vec(),
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .unwrap()
}

/// Non-negative rank-r matrix with daily-shape-like columns, values mostly 0..4 kW.
fn planted(m: usize, n: usize, r: usize, rng: &mut ChaCha8Rng) -> DMatrix<f64> {
    let a = DMatrix::<f64>::from_fn(m, r, |_, _| rng.random_range(0.0..1.0));
    let b = DMatrix::<f64>::from_fn(r, n, |k, j| {
        let t = (j % 96) as f64 / 96.0 * std::f64::consts::TAU;
        (1.0 + (t * (k as f64 + 1.0) + k as f64).sin()) * 1.6 / r as f64 * 1.5
    });
    a * b
}

fn quantize(x: &DMatrix<f64>, p: &DitherProfile, missing: f64, rng: &mut ChaCha8Rng) -> LevelMatrix {
    let mut l = LevelMatrix::missing(x.nrows(), x.ncols());
    for j in 0..x.ncols() {
        for i in 0..x.nrows() {
            if !rng.random_bool(missing) {
                l.set(i, j, Some(dither_and_quantize(p, x[(i, j)], rng)));
            }
        }
    }
    l
}

fn nrmse(a: &DMatrix<f64>, truth: &DMatrix<f64>) -> f64 {
    (a - truth).norm() / truth.norm()
}

const LAYOUT: DayLayout = DayLayout { window_start: 1_700_006_400, interval_s: 900 };

#[test]
fn beats_per_entry_conditional_means_on_a_planted_population() {
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let p = profile(0.3, &[1.0, 2.0]);
    let truth = planted(300, 96 * 7, 4, &mut rng);
    let levels = quantize(&truth, &p, 0.05, &mut rng);
    let params = RecoveryParams { rank: RankChoice::Fixed(4), alpha_kw: 6.0, ..Default::default() }.check().unwrap();
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let table = LikelihoodTable::new(&p, -1.0, 7.0);
    let cm = conditional_means(&table, 6.0, &level_counts(&levels, 3));
    let base = DMatrix::from_fn(300, 96 * 7, |i, j| levels.get(i, j).map_or(1.0, |l| cm[usize::from(l)]));
    let e = nrmse(&rec.x, &truth);
    let eb = nrmse(&base, &truth);
    eprintln!("planted 300x672 r4: recovery nRMSE {e:.3}, per-entry conditional means {eb:.3}, {:?}", rec.diagnostics);
    assert!(e < 0.5 * eb, "{e} vs {eb}");
    assert!(rec.diagnostics.iterations > 1);
    // Flags: missing entries are estimated, the others derived (none corrupt here, few flagged).
    let est = (0..300 * 672).filter(|&k| rec.flags[k] == Flag::Estimated).count();
    assert_eq!(est, 300 * 672 - levels.observed());
    assert!(rec.diagnostics.corrected < levels.observed() / 200, "{}", rec.diagnostics.corrected);
}

#[test]
fn automatic_rank_finds_the_planted_rank() {
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    let p = profile(0.3, &[1.0, 2.0]);
    let truth = planted(200, 96 * 5, 3, &mut rng);
    let levels = quantize(&truth, &p, 0.05, &mut rng);
    let params = RecoveryParams { rank: RankChoice::Auto(vec![1, 3, 8, 20]), alpha_kw: 6.0, ..Default::default() }
        .check()
        .unwrap();
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    eprintln!("rank scores {:?}", rec.diagnostics.rank_scores);
    assert_eq!(rec.diagnostics.rank, 3);
}

#[test]
fn register_sums_hold_exactly() {
    let mut rng = ChaCha8Rng::seed_from_u64(3);
    let p = profile(0.3, &[1.0, 2.0]);
    let truth = planted(50, 96 * 3, 3, &mut rng);
    let levels = quantize(&truth, &p, 0.05, &mut rng);
    let mut cons = Vec::new();
    for i in 0..50 {
        for d in 0..3 {
            let cols = d * 96..(d + 1) * 96;
            let sum: f64 = cols.clone().map(|j| truth[(i, j)]).sum();
            cons.push(SumConstraint { row: i, cols, sum_kw: sum });
        }
    }
    let params = RecoveryParams { rank: RankChoice::Fixed(3), alpha_kw: 6.0, ..Default::default() }.check().unwrap();
    let free = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let rec = recover(&levels, &p, &cons, LAYOUT, &params, &mut |_, _| {}).unwrap();
    for c in &cons {
        let got: f64 = c.cols.clone().map(|j| rec.x[(c.row, j)]).sum();
        // 1 Wh = 0.004 kW-quarter-hours; require far better.
        assert!((got - c.sum_kw).abs() * 250.0 < 0.01, "row {} {:?}: {got} vs {}", c.row, c.cols, c.sum_kw);
    }
    assert!(nrmse(&rec.x, &truth) <= nrmse(&free.x, &truth) + 1e-3);
}

#[test]
fn odd_shapes_do_not_panic() {
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    let p = profile(0.3, &[1.0, 2.0]);
    let params = RecoveryParams {
        rank: RankChoice::Auto(vec![1, 2, 5]),
        alpha_kw: 6.0,
        max_iterations: 40,
        ..Default::default()
    }
    .check()
    .unwrap();
    for &(m, n, r) in &[(1, 1, 1), (1, 200, 1), (200, 1, 1), (60, 96, 2), (96, 60, 10)] {
        let truth = planted(m, n, r, &mut rng);
        let mut levels = quantize(&truth, &p, 0.1, &mut rng);
        if m > 2 && n > 2 {
            for j in 0..n {
                levels.set(0, j, None); // an all-missing row
            }
            for i in 0..m {
                levels.set(i, 1, None); // an all-missing column
            }
        }
        let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
        assert_eq!(rec.x.shape(), (m, n));
        assert!(rec.x.iter().all(|v| v.is_finite() && (0.0..=6.0).contains(v)), "{m}x{n}");
        assert!(rec.std_kw.iter().all(|v| !v.is_nan()));
    }
    let empty = LevelMatrix::missing(0, 5);
    assert_eq!(recover(&empty, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap().x.shape(), (0, 5));
    let none = LevelMatrix::missing(4, 5);
    let rec = recover(&none, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    assert!(rec.flags.iter().all(|f| *f == Flag::Estimated));
    let mut bad = LevelMatrix::missing(2, 2);
    bad.set(0, 0, Some(9));
    assert_eq!(recover(&bad, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap_err().field, "level");
}

#[test]
fn replaced_levels_are_flagged_corrected() {
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let p = profile(0.3, &[1.0, 2.0]);
    let truth = planted(200, 96 * 5, 3, &mut rng);
    let mut levels = quantize(&truth, &p, 0.05, &mut rng);
    let params = RecoveryParams { rank: RankChoice::Fixed(3), alpha_kw: 6.0, ..Default::default() }.check().unwrap();
    let clean = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let mut replaced = Vec::new();
    for j in 0..levels.cols() {
        for i in 0..levels.rows() {
            if let Some(l) = levels.get(i, j) {
                if rng.random_bool(0.01) {
                    let new = (l + rng.random_range(1..3u8)) % 3;
                    levels.set(i, j, Some(new));
                    replaced.push((i, j));
                }
            }
        }
    }
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let flagged = replaced.iter().filter(|&&(i, j)| rec.flag(i, j) == Flag::Corrected).count();
    let (e0, e1) = (nrmse(&clean.x, &truth), nrmse(&rec.x, &truth));
    eprintln!(
        "corrupted: {} replaced, {flagged} flagged, {} flagged in all; nRMSE {e0:.4} -> {e1:.4}",
        replaced.len(),
        rec.diagnostics.corrected
    );
    assert!(e1 - e0 < 0.02);
}
