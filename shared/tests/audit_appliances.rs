//! What an eavesdropper holding one meter learns about which appliances, scored
//! on real appliance use rather than injected events: CREST households (the
//! CREST domestic demand model, Richardson et al., Energy and Buildings 42, 2010,
//! through the package richardsonpy; see tests/reference/populations.py), whose
//! per-appliance 1-minute truth gives every switch-on. An event is a switch-on
//! whose 15-minute mean power exceeds 1 kW (its mean power times the share of an
//! interval it fills); its class comes from the generator's appliance map
//! (kettle, cooking, washing and drying, dishwasher, water heating, other).
//!
//! The attacker runs every audit strategy on each household's own levels alone,
//! with the documented event mix as its templates (it does not know the CREST
//! appliances). Counts are pooled over the households per strategy and
//! threshold; the strongest is the best pooled F1. Per class, the F1 pairs that
//! class's recall with the strategy's overall precision, and the figure is the
//! best over strategies. README's privacy section quotes this table.

mod common;

use common::*;
use meterveil_shared::audit::{attack, score_detector, standard_event_mix, Attacker, EventCounts, Strategy};
use meterveil_shared::recovery::outage::DayLayout;
use nalgebra::DMatrix;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use std::collections::BTreeMap;

const LAYOUT: DayLayout = DayLayout { window_start: 1_673_222_400, interval_s: 900 }; // 2023-01-09T00:00Z
const HOUSEHOLDS: usize = 100;

fn f1(p: f64, r: f64) -> f64 {
    if p + r == 0.0 {
        0.0
    } else {
        2.0 * p * r / (p + r)
    }
}

/// Per class (index of APPLIANCE_CLASSES): events, and the best F1 over strategies.
struct Setting {
    strongest: (String, f64),
    classes: Vec<(usize, f64, f64)>, // events, recall, F1 of the best strategy for the class
}

fn run(pop: &ReferencePopulation, sigma: f64) -> Setting {
    let p = gaussian_profile(sigma, &[1.0, 2.0]);
    let mix = standard_event_mix();
    let who = Attacker { mix: &mix, strategies: &Strategy::ALL, alpha: 15.0 };
    let n = pop.x.ncols();
    let mut pooled: BTreeMap<&'static str, Vec<EventCounts>> = BTreeMap::new();
    let mut rng = ChaCha8Rng::seed_from_u64(90 + (sigma * 10.0) as u64);
    for h in 0..HOUSEHOLDS {
        let x = DMatrix::from_fn(1, n, |_, j| pop.x[(h, j)]);
        let levels = quantize(&x, &p, 0.0, &mut rng);
        let events = crest_events(pop, h, 1.0);
        for r in attack(&levels, &p, &[], LAYOUT, &who).expect("attack") {
            let counts = score_detector(&r.x, &r.detector, &events, LAYOUT);
            let slot = pooled.entry(r.strategy).or_insert_with(|| vec![EventCounts::default(); counts.len()]);
            for (a, c) in slot.iter_mut().zip(&counts) {
                a.add(c);
            }
        }
    }
    let best_of = |c: &[EventCounts]| c.iter().map(EventCounts::f1).fold(0.0, f64::max);
    let strongest =
        pooled.iter().map(|(s, c)| (s.to_string(), best_of(c))).max_by(|a, b| a.1.total_cmp(&b.1)).expect("strategies");
    let classes = (0..APPLIANCE_CLASSES.len())
        .map(|k| {
            let mut best = (0usize, 0.0f64, 0.0f64);
            for counts in pooled.values() {
                // Each strategy at its own best threshold overall.
                let c = counts.iter().max_by(|a, b| a.f1().total_cmp(&b.f1())).expect("grid");
                let kc = c.kinds.get(k).copied().unwrap_or_default();
                let recall = if kc.events == 0 { 0.0 } else { kc.found as f64 / kc.events as f64 };
                let score = f1(c.precision(), recall);
                if score >= best.2 {
                    best = (kc.events, recall, score);
                }
            }
            best
        })
        .collect();
    Setting { strongest, classes }
}

#[test]
fn appliance_classes_visible_to_one_captured_meter() {
    let pop = ReferencePopulation::load("crest", 1, 300, 28);
    let sigmas = [0.3, 0.6, 1.0];
    let settings: Vec<Setting> = sigmas.iter().map(|s| run(&pop, *s)).collect();
    eprintln!(
        "CREST households ({HOUSEHOLDS}, 28 days), one captured meter each, 3 levels at 1 and 2 kW; events are switch-ons above 1 kW (15-minute mean)"
    );
    eprintln!("| appliance class | events | F1 at σ 0.3 kW | σ 0.6 kW | σ 1.0 kW |");
    for (k, name) in APPLIANCE_CLASSES.iter().enumerate() {
        if settings[0].classes[k].0 == 0 {
            // Water heating: the generator leaves CREST's heating appliances out.
            eprintln!("| {name} | 0 | – | – | – |");
            continue;
        }
        let cells: Vec<String> =
            settings.iter().map(|s| format!("{:.2} (recall {:.2})", s.classes[k].2, s.classes[k].1)).collect();
        eprintln!("| {name} | {} | {} |", settings[0].classes[k].0, cells.join(" | "));
    }
    let all: Vec<String> = settings.iter().map(|s| format!("{:.2} ({})", s.strongest.1, s.strongest.0)).collect();
    eprintln!("| all events | | {} |", all.join(" | "));
    // README states these (within 0.03; the draws are seeded).
    let stated = [0.77, 0.74, 0.62];
    for (s, want) in settings.iter().zip(stated) {
        assert!((s.strongest.1 - want).abs() <= 0.03, "all events: {} vs README {want}", s.strongest.1);
    }
    // Long large loads stay visible under the strongest dither tried: washing and
    // drying at σ 1.0 kW (README: 0.79), while cooking falls to 0.56.
    let washing = APPLIANCE_CLASSES.iter().position(|c| *c == "washing and drying").unwrap();
    let cooking = APPLIANCE_CLASSES.iter().position(|c| *c == "cooking").unwrap();
    assert!((settings[2].classes[washing].2 - 0.79).abs() <= 0.03, "{}", settings[2].classes[washing].2);
    assert!((settings[2].classes[cooking].2 - 0.56).abs() <= 0.03, "{}", settings[2].classes[cooking].2);
    // Stronger dither hides more: the strongest figure falls with σ.
    assert!(settings[0].strongest.1 > settings[2].strongest.1 + 0.05);
}
