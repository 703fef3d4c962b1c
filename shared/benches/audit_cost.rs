//! Cost of the privacy audit per captured meter-month (a benchmark, not a test).
//!
//! `cargo bench -p meterveil-shared --bench audit_cost -- [METERS] [CAPTURED]`
//! runs the bootstrap audit of a planted household feeder (28 days, σ 1.0 kW,
//! 3 levels, no curves) twice in the same process: with every strategy and the
//! thresholds tuned on two other households (the audit as shipped), and as a
//! reference with only the strategies the audit had before the whole-event
//! attackers (posterior mean, captured low rank, the day foldings and their
//! combination) and no tuning meters. Prints one JSON line with the wall
//! times (median of 3), the attack's share, and the ratios.

use std::time::Instant;

use meterveil_shared::audit::{bootstrap, AuditConfig, Feeder, Strategy};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::RankChoice;
use meterveil_shared::{DitherProfile, DitherProfileSpec};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};

fn median(mut v: Vec<f64>) -> f64 {
    v.sort_by(f64::total_cmp);
    v[v.len() / 2]
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let num = |i: usize, d: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(d);
    let (m, captured) = (num(0, 300), num(1, 1));
    let layout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };
    let n = 96 * 28;
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
    // Households: a morning and an evening bump of their own size and timing, daily noise.
    let x = DMatrix::from_fn(m, n, |_, _| 0.0).map_with_location(|i, j, _| {
        let h = (j % 96) as f64 / 4.0;
        let a = 0.3 + 0.4 * ((i * 7919) % 13) as f64 / 13.0;
        let bump = |c: f64, w: f64| (-(h - c) * (h - c) / (2.0 * w * w)).exp();
        a * (1.0 + 1.5 * bump(7.5 + (i % 3) as f64 * 0.5, 1.0) + 2.5 * bump(19.0, 2.0))
    });
    let x = x.map(|v| v * rng.random_range(0.8..1.2));
    let p = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 1.0,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .expect("profile");
    let feeder = Feeder { base: &x, profile: &p, layout, uploads: None };
    let rows: Vec<usize> = (0..captured).map(|c| c * (m / captured.max(1))).collect();
    let base_cfg = AuditConfig {
        utility_rank: RankChoice::Fixed(10),
        curve_days: vec![],
        curve_captured: vec![],
        ..Default::default()
    };
    let reference = AuditConfig {
        strategies: vec![
            Strategy::PosteriorMean,
            Strategy::CapturedLowRank,
            Strategy::DayFolding,
            Strategy::JointDayFolding,
            Strategy::FoldedWithReadings,
        ],
        tuning_meters: 0,
        ..base_cfg.clone()
    };
    let time = |cfg: &AuditConfig| -> (f64, f64) {
        let (mut total, mut attack) = (Vec::new(), Vec::new());
        for _ in 0..3 {
            let mut marks: Vec<(String, Instant)> = Vec::new();
            let t0 = Instant::now();
            bootstrap(&feeder, &rows, cfg, &mut |stage, _| marks.push((stage.to_owned(), Instant::now())))
                .expect("audit");
            let end = Instant::now();
            // From "attackers on the captured meters" to "curves": the attackers and the tuning.
            let at = |s: &str| marks.iter().find(|m| m.0.starts_with(s)).map(|m| m.1);
            let a = at("attackers").zip(at("curves")).map_or(0.0, |(a, b)| (b - a).as_secs_f64());
            total.push((end - t0).as_secs_f64());
            attack.push(a);
        }
        (median(total), median(attack))
    };
    let (ref_total, ref_attack) = time(&reference);
    let (new_total, new_attack) = time(&base_cfg);
    let meter_months = captured as f64 * 28.0 / 30.4;
    println!(
        "{}",
        serde_json::json!({
            "meters": m, "captured": captured, "days": 28,
            "reference_audit_s": ref_total, "audit_s": new_total, "audit_ratio": new_total / ref_total,
            "reference_attack_s_per_meter_month": ref_attack / meter_months,
            "attack_s_per_meter_month": new_attack / meter_months,
            "attack_ratio": new_attack / ref_attack,
        })
    );
}
