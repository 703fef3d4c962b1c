//! Quillmarsh, an invented market town of four feeders, for demos and tests.
//!
//! Load shapes are built from daily routines (wake, leave, cook, sleep), weather
//! (a December-like temperature series drives electric heating), weekly rhythm
//! (weekends, a bakery closed on Mondays) and random appliance events. Values are
//! average kW per interval. Everything here is invented; no real household's data
//! is used. Generation is seeded so a demo is repeatable; the dither applied later
//! is not.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, LogNormal, Normal, Poisson};
use serde::Serialize;

/// Quillmarsh keeps British time (an invented town, a real zone with DST).
pub const TIME_ZONE: &str = "Europe/London";

/// Service limit used by the demo, kW: the largest average power any Quillmarsh
/// meter draws (the bakery's ovens plus its shop).
pub const TOWN_ALPHA_KW: f64 = 15.0;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Kind {
    Commuter,
    HomeWorker,
    NightShift,
    ElectricHeating,
    EvCharging,
    SmallShop,
    Bakery,
    Farm,
}

impl Kind {
    pub const ALL: [Kind; 8] = [
        Kind::Commuter,
        Kind::HomeWorker,
        Kind::NightShift,
        Kind::ElectricHeating,
        Kind::EvCharging,
        Kind::SmallShop,
        Kind::Bakery,
        Kind::Farm,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Commuter => "commuter",
            Kind::HomeWorker => "home_worker",
            Kind::NightShift => "night_shift",
            Kind::ElectricHeating => "electric_heating",
            Kind::EvCharging => "ev_charging",
            Kind::SmallShop => "small_shop",
            Kind::Bakery => "bakery",
            Kind::Farm => "farm",
        }
    }

    fn is_household(self) -> bool {
        !matches!(self, Kind::SmallShop | Kind::Bakery | Kind::Farm)
    }
}

/// One meter of the town and the habits that shape its load.
#[derive(Debug, Clone)]
pub struct Household {
    pub meter_id: String,
    pub feeder_id: String,
    pub kind: Kind,
    /// Always-on load (fridge, standby), kW.
    base_kw: f64,
    /// Overall size of this home's usage relative to its kind.
    scale: f64,
    /// Usual wake-up hour on working days.
    wake_h: f64,
    /// Usual evening meal hour.
    dinner_h: f64,
    seed: u64,
}

/// Feeder plan: which kinds of customer a feeder serves, in what proportion.
struct FeederPlan {
    id: &'static str,
    name: &'static str,
    /// Weights per [`Kind::ALL`] entry.
    mix: [f64; 8],
}

const FEEDERS: [FeederPlan; 4] = [
    FeederPlan { id: "QM-CHAPEL-ROW", name: "Chapel Row terraces", mix: [0.45, 0.2, 0.1, 0.15, 0.1, 0.0, 0.0, 0.0] },
    FeederPlan { id: "QM-MILLPOND", name: "Millpond estate", mix: [0.3, 0.25, 0.05, 0.1, 0.3, 0.0, 0.0, 0.0] },
    FeederPlan {
        id: "QM-FERRY-LANE",
        name: "Ferry Lane high street",
        mix: [0.25, 0.1, 0.15, 0.1, 0.05, 0.25, 0.1, 0.0],
    },
    FeederPlan { id: "QM-UPPER-FIELDS", name: "Upper Fields rural", mix: [0.2, 0.15, 0.0, 0.35, 0.05, 0.0, 0.0, 0.25] },
];

#[derive(Debug, Clone)]
pub struct Feeder {
    pub feeder_id: String,
    pub name: String,
}

/// The simulated town: its feeders, meters and weather over a window of days.
#[derive(Debug, Clone)]
pub struct Town {
    pub name: &'static str,
    pub feeders: Vec<Feeder>,
    pub households: Vec<Household>,
    /// First simulated day, UTC midnight epoch seconds.
    pub start_day: i64,
    pub days: u32,
    /// Daily mean outdoor temperature, °C.
    temperature_c: Vec<f64>,
}

impl Town {
    /// Builds a town of `meters` meters spread over four feeders, for `days` days
    /// starting at UTC midnight `start_day`.
    pub fn new(meters: usize, days: u32, start_day: i64, seed: u64) -> Self {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let per_feeder = meters.div_ceil(FEEDERS.len());
        let mut households = Vec::with_capacity(meters);
        'outer: for plan in &FEEDERS {
            let total: f64 = plan.mix.iter().sum();
            // Deterministic apportionment of kinds, so every kind on a feeder appears.
            let mut counts: Vec<usize> =
                plan.mix.iter().map(|w| (w / total * per_feeder as f64).floor() as usize).collect();
            let mut short = per_feeder - counts.iter().sum::<usize>();
            for (i, w) in plan.mix.iter().enumerate().cycle() {
                if short == 0 {
                    break;
                }
                if *w > 0.0 {
                    counts[i] += 1;
                    short -= 1;
                }
            }
            let short_id = plan.id.trim_start_matches("QM-");
            let mut n = 0;
            for (k, &c) in Kind::ALL.iter().zip(&counts) {
                for _ in 0..c {
                    if households.len() == meters {
                        break 'outer;
                    }
                    n += 1;
                    households.push(Household::new(format!("QM-{short_id}-{n:04}"), plan.id, *k, &mut rng));
                }
            }
        }
        let temp_noise = Normal::new(0.0, 2.0).expect("valid normal");
        let temperature_c = (0..days)
            .map(|d| 4.0 + 3.0 * (2.0 * std::f64::consts::PI * f64::from(d) / 28.0).sin() + temp_noise.sample(&mut rng))
            .collect();
        Self {
            name: "Quillmarsh",
            feeders: FEEDERS.iter().map(|p| Feeder { feeder_id: p.id.into(), name: p.name.into() }).collect(),
            households,
            start_day,
            days,
            temperature_c,
        }
    }

    /// The meter's load for day `d` (0-based), one value per 15-minute interval, kW.
    pub fn day_load(&self, h: &Household, d: u32) -> [f64; 96] {
        let day_epoch = self.start_day + i64::from(d) * 86_400;
        let weekday = meterveil_shared::domain::utc_weekday(day_epoch);
        let temp = self.temperature_c.get(d as usize).copied().unwrap_or(5.0);
        h.day_load(d, weekday, temp)
    }
}

/// Smooth bump of `height` kW centred at `center` hours with width `width` hours.
fn bump(t: f64, center: f64, width: f64, height: f64) -> f64 {
    let z = (t - center) / width;
    height * (-0.5 * z * z).exp()
}

fn block(t: f64, from: f64, to: f64, kw: f64) -> f64 {
    if t >= from && t < to {
        kw
    } else {
        0.0
    }
}

impl Household {
    fn new(meter_id: String, feeder_id: &str, kind: Kind, rng: &mut ChaCha8Rng) -> Self {
        let size = LogNormal::new(0.0, 0.25).expect("valid lognormal");
        Self {
            meter_id,
            feeder_id: feeder_id.into(),
            kind,
            base_kw: rng.random_range(0.08..0.3),
            scale: size.sample(rng),
            wake_h: rng.random_range(5.8..7.6),
            dinner_h: rng.random_range(17.8..19.8),
            seed: rng.random(),
        }
    }

    fn day_load(&self, d: u32, weekday: u32, temp_c: f64) -> [f64; 96] {
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed ^ (u64::from(d) << 32) ^ 0x9e37_79b9);
        let weekend = weekday >= 5;
        let jitter = Normal::new(0.0, 0.35).expect("valid normal");
        let wake = if weekend { self.wake_h + 1.5 } else { self.wake_h } + jitter.sample(&mut rng);
        let dinner = self.dinner_h + jitter.sample(&mut rng);
        let amp = self.scale * LogNormal::new(0.0, 0.15).expect("valid lognormal").sample(&mut rng);
        let away_all_day = self.kind.is_household() && rng.random_bool(0.04);
        let cold = ((16.0 - temp_c) / 10.0).max(0.0);
        let ev_charge = match self.kind {
            Kind::EvCharging if rng.random_bool(if weekend { 0.3 } else { 0.55 }) => {
                Some((rng.random_range(18.5..22.5), rng.random_range(2.0..4.0)))
            }
            _ => None,
        };
        let mut out = [0.0; 96];
        for (i, v) in out.iter_mut().enumerate() {
            let t = (i as f64 + 0.5) / 4.0;
            let routine = if away_all_day { 0.0 } else { self.routine(t, wake, dinner, weekday, weekend, cold) };
            let mut kw = self.base_kw + amp * routine;
            if let Some((start, hours)) = ev_charge {
                // Charging wraps past midnight into the next morning's first hours only
                // within this day; the remainder is dropped for simplicity.
                kw += block(t, start, start + hours, 7.0);
            }
            *v = kw;
        }
        if !away_all_day {
            self.add_events(&mut out, &mut rng, wake, dinner);
        }
        let noise = Normal::new(1.0, 0.08).expect("valid normal");
        for v in &mut out {
            *v = (*v * noise.sample(&mut rng)).clamp(0.0, TOWN_ALPHA_KW);
        }
        out
    }

    /// Routine load in kW (before scaling) at hour `t`.
    fn routine(&self, t: f64, wake: f64, dinner: f64, weekday: u32, weekend: bool, cold: f64) -> f64 {
        let home_evening = bump(t, dinner, 0.6, 1.4) + block(t, dinner + 0.5, 23.0, 0.35);
        let morning = bump(t, wake + 0.4, 0.35, 1.1);
        match self.kind {
            Kind::Commuter | Kind::EvCharging => {
                let day = if weekend { block(t, wake, 22.0, 0.35) + bump(t, 12.5, 0.6, 0.8) } else { 0.0 };
                morning + home_evening + day
            }
            Kind::HomeWorker => morning + home_evening + block(t, wake + 1.0, 17.5, 0.45) + bump(t, 12.7, 0.4, 0.9),
            Kind::NightShift => {
                // Back from the night shift at dawn, asleep until mid-afternoon, out at night.
                bump(t, 6.8, 0.4, 0.9) + block(t, 14.5, 21.0, 0.4) + bump(t, 17.0, 0.6, 1.3)
            }
            Kind::ElectricHeating => {
                let storage = block(t, 0.0, 7.0, 2.2 * cold);
                let direct = (bump(t, wake + 0.5, 0.8, 1.2) + bump(t, dinner + 1.0, 1.5, 1.0)) * cold;
                morning + home_evening + storage + direct
            }
            Kind::SmallShop => {
                let open = weekday < 6 && (8.0..18.0).contains(&t);
                0.9 + if open { 2.2 + bump(t, 13.0, 2.0, 0.6) } else { 0.0 }
            }
            Kind::Bakery => {
                if weekday == 0 {
                    0.5
                } else {
                    block(t, 2.5, 9.0, 8.5) + block(t, 7.0, 14.0, 1.8) + 0.5
                }
            }
            Kind::Farm => {
                let milking = bump(t, 5.8, 0.6, 5.5) + bump(t, 16.5, 0.6, 5.5);
                1.0 + milking + block(t, 7.0, 19.0, 0.7) + block(t, 0.0, 6.0, 1.2 * cold)
            }
        }
    }

    /// Appliance events: kettles, ovens, washing machines: short steps of known size.
    fn add_events(&self, out: &mut [f64; 96], rng: &mut ChaCha8Rng, wake: f64, dinner: f64) {
        if !self.kind.is_household() {
            return;
        }
        let slot = |h: f64| ((h * 4.0).floor() as i64).clamp(0, 95) as usize;
        let kettles = Poisson::new(1.5).expect("valid poisson").sample(rng) as usize;
        for _ in 0..kettles {
            let h = rng.random_range(wake..(dinner + 3.0).min(23.5).max(wake + 0.5));
            out[slot(h)] += 2.0;
        }
        if rng.random_bool(0.3) {
            let s = slot(dinner - 1.0);
            for v in out.iter_mut().skip(s).take(3) {
                *v += 3.0;
            }
        }
        if rng.random_bool(0.25) {
            let s = slot(rng.random_range(9.0..20.0));
            for v in out.iter_mut().skip(s).take(4) {
                *v += 2.0;
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn town_has_every_kind_on_its_feeders_and_plausible_loads() {
        let town = Town::new(400, 7, 1_700_006_400, 1);
        assert_eq!(town.households.len(), 400);
        for k in Kind::ALL {
            assert!(town.households.iter().any(|h| h.kind == k), "{k:?} missing");
        }
        let mut daily = Vec::new();
        for h in &town.households {
            for d in 0..7 {
                let l = town.day_load(h, d);
                assert!(l.iter().all(|v| (0.0..=TOWN_ALPHA_KW).contains(v)));
                daily.push((h.kind, l.iter().sum::<f64>() / 4.0));
            }
        }
        // Daily energy of a household is typically 5-15 kWh (from memory of
        // published national averages, e.g. about 2,700 kWh a year); the bakery far more.
        let mean = |k: Kind| {
            let v: Vec<f64> = daily.iter().filter(|(kk, _)| *kk == k).map(|(_, e)| *e).collect();
            v.iter().sum::<f64>() / v.len() as f64
        };
        assert!((3.0..20.0).contains(&mean(Kind::Commuter)), "commuter {}", mean(Kind::Commuter));
        assert!(mean(Kind::Bakery) > 3.0 * mean(Kind::Commuter));
        assert!(mean(Kind::EvCharging) > mean(Kind::Commuter));
    }
}
