//! The privacy audit on BDEW test populations (package demandlib, see
//! tests/reference/bdew_profiles.py): it must not be blind to what a single
//! captured meter reveals under weak dither, and the strongest attacker it
//! reports must dominate every strategy it ran.

mod common;

use common::*;
use meterveil_shared::audit::{bootstrap, AuditConfig, AuditReport, Feeder};
use meterveil_shared::recovery::outage::DayLayout;
use meterveil_shared::recovery::RankChoice;
use meterveil_shared::DitherProfile;
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 };

fn check_strongest(r: &AuditReport) {
    assert!(r.strategies.iter().any(|s| s.strategy == "day_folding"));
    let f1 = r.strongest.event_f1.expect("bootstrap scores events");
    for s in &r.strategies {
        assert!(
            r.strongest.nrmse <= s.nrmse,
            "{} nRMSE {} beats the strongest {}",
            s.strategy,
            s.nrmse,
            r.strongest.nrmse
        );
        assert!(r.strongest.habit_nrmse <= s.habit_nrmse);
        assert!(r.strongest.daily_energy_error <= s.daily_energy_error);
        assert!(f1 >= s.events.as_ref().expect("events").f1, "{} event F1 beats the strongest", s.strategy);
    }
}

fn summary(label: &str, r: &AuditReport) {
    eprintln!(
        "{label}: strongest event F1 {:.3} ({}, threshold {:?} {:?}, tuned elsewhere {:?}, precision {:.2}, recall {:.2}; {} events), strongest nRMSE {:.3} ({}); utility nRMSE {:.3}, event F1 {:.3}; MI {:.3} bits of {:.2}, LDP epsilon {:.1} over [0, 15] kW",
        r.strongest.event_f1.unwrap_or(0.0), r.strongest.strategy, r.strongest.event_threshold, r.strongest.event_threshold_unit, r.strongest.event_f1_tuned_elsewhere,
        r.strongest.event_precision.unwrap_or(0.0), r.strongest.event_recall.unwrap_or(0.0), r.events_injected,
        r.strongest.nrmse, r.strongest.nrmse_strategy, r.utility.nrmse, r.utility.event_f1.unwrap_or(0.0),
        r.mechanism.mutual_information_bits, r.mechanism.level_bits, r.mechanism.ldp_epsilon
    );
    for s in &r.strategies {
        let e = s.events.as_ref().expect("events");
        eprintln!(
            "    {:<22} nRMSE {:.3}  energy {:.3}  F1 {:.3} at {} {} (tuned elsewhere {:.3}; at 1 kW {:.3})",
            s.strategy,
            s.nrmse,
            s.daily_energy_error,
            e.f1,
            e.best_threshold,
            e.threshold_unit,
            e.f1_tuned_elsewhere.unwrap_or(f64::NAN),
            e.f1_at_documented_threshold.unwrap_or(f64::NAN)
        );
        let kinds: Vec<String> = e.by_kind.iter().map(|k| format!("{} {:.2}", k.kind, k.f1)).collect();
        eprintln!("        per kind: {}", kinds.join(", "));
    }
}

fn base(m: usize) -> DMatrix<f64> {
    let (_, shapes) = bdew_shapes(28);
    // Households only (H0): the audit's question is about homes.
    let h0: Vec<_> = shapes.into_iter().filter(|s| s.0 == "H0").collect();
    population(&h0, m, 15.0, &mut ChaCha8Rng::seed_from_u64(60)).0
}

fn feeder<'a>(x: &'a DMatrix<f64>, p: &'a DitherProfile) -> Feeder<'a> {
    Feeder { base: x, profile: p, layout: LAYOUT, uploads: None }
}

fn cfg() -> AuditConfig {
    // A fixed utility rank keeps the test quick; the service's jobs choose it by held-out likelihood.
    AuditConfig { utility_rank: RankChoice::Fixed(10), curve_captured: vec![1, 2, 5], ..Default::default() }
}

#[test]
fn weak_dither_reveals_events_of_one_meter_and_strong_dither_hides_them() {
    let x = base(200);
    let weak = DitherProfile::try_from(meterveil_shared::DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 0.1,
        boundaries_kw: vec![0.5, 1.0, 1.5, 2.0, 3.0, 4.5, 6.5],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })
    .unwrap();
    let strong = gaussian_profile(1.0, &[1.0, 2.0]);
    let w = bootstrap(&feeder(&x, &weak), &[0], &cfg(), &mut |_, _| {}).unwrap();
    let s = bootstrap(&feeder(&x, &strong), &[0], &cfg(), &mut |_, _| {}).unwrap();
    summary("weak dither (σ 0.1 kW, 8 levels), one captured meter, 28 days", &w);
    summary("strong dither (σ 1.0 kW, 3 levels), one captured meter, 28 days", &s);
    check_strongest(&w);
    check_strongest(&s);
    let (fw, fs) = (w.strongest.event_f1.unwrap(), s.strongest.event_f1.unwrap());
    // DEVELOPERS.md states 0.98 (weak) and 0.57 (strong, the whole-event attackers).
    assert!((fw - 0.98).abs() <= 0.03, "weak dither: strongest event F1 {fw}");
    assert!((fs - 0.57).abs() <= 0.05, "strong dither: strongest event F1 {fs}");
    // Under strong dither the attackers that read whole events (their likelihood
    // over an event's duration, or a run of top-level readings) are the
    // strongest, clearly above every per-interval strategy: without them the
    // audit would understate the eavesdropper.
    let whole_event = ["event_posterior", "template_glr", "top_level_runs"];
    assert!(whole_event.contains(&s.strongest.strategy.as_str()), "{}", s.strongest.strategy);
    let runner_up = s
        .strategies
        .iter()
        .filter(|x| !whole_event.contains(&x.strategy.as_str()))
        .map(|x| x.events.as_ref().expect("events").f1)
        .fold(0.0, f64::max);
    assert!(fs >= runner_up + 0.15, "whole-event attackers {fs} vs the best per-interval strategy {runner_up}");
    // The figure at thresholds tuned on two other simulated households is lower
    // or equal, never above the best-threshold figure.
    let tuned = s.strongest.event_f1_tuned_elsewhere.expect("tuned on other households");
    assert!(tuned <= fs + 1e-12 && tuned >= fs - 0.2, "tuned elsewhere {tuned} vs {fs}");
    assert!(fs <= fw - 0.2, "strong dither F1 {fs} is not clearly below weak {fw}");
    assert!(w.mechanism.mutual_information_bits > s.mechanism.mutual_information_bits);
    assert_eq!(w.curve_days.len(), 4);
}

#[test]
fn utility_error_falls_with_population_while_the_attackers_does_not() {
    let p = gaussian_profile(0.3, &[1.0, 2.0]);
    let captured: Vec<usize> = (0..5).collect();
    let mut rows = Vec::new();
    for m in [40, 160, 640] {
        let x = base(m);
        let r = bootstrap(&feeder(&x, &p), &captured, &AuditConfig { curve_days: vec![], ..cfg() }, &mut |_, _| {})
            .unwrap();
        check_strongest(&r);
        let (uh, ah) = (r.utility.habit_nrmse.unwrap(), r.strongest.habit_nrmse.unwrap());
        eprintln!(
            "population {m}: on the 5 captured meters' habitual profiles the utility's nRMSE is {uh:.3} (against the truth with events {:.3}); the strongest 5-meter attacker's {ah:.3} (with events {:.3}, {}), event F1 {:.3}",
            r.utility.nrmse, r.strongest.nrmse, r.strongest.nrmse_strategy, r.strongest.event_f1.unwrap()
        );
        rows.push((uh, ah));
    }
    assert!(rows[2].0 < rows[0].0 - 0.01, "utility error does not fall: {rows:?}");
    // The captured meters' events and levels are drawn first, so the attacker sees
    // exactly the same data whatever the population: its error cannot move.
    assert!((rows[2].1 - rows[0].1).abs() < 1e-9, "{rows:?}");
}
