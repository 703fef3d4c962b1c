//! From raw reading to level: the only place a raw value is looked at.
//!
//! When the profile sends register reads, it also counts each meter's energy
//! over the current register period (a UTC day), in memory only. At the
//! period's end it emits one advance: the exact energy of the intervals this
//! gateway forwarded in that period (to 1 Wh), and only for a period it counted
//! from its start. Nothing else about energy is kept: a crash loses the running
//! count, so the interrupted period has no read, and the service treats it as
//! missing. A crash costs at most one register read per meter, never a level.

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::{DitherProfile, MeterId, Tz};
use rand::Rng;

use crate::source::RawReading;

/// Per-meter state. Only `last_interval_start` survives restarts (in the outbox).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct MeterState {
    /// Latest interval start accepted; older or equal readings are skipped, so a
    /// reading is never dithered twice (two independent levels of one reading
    /// would let anyone average the dither away).
    pub last_interval_start: Option<i64>,
    /// The current register period's running count; memory only, never stored.
    pub register: Option<PeriodCount>,
}

/// The energy forwarded so far in one register period.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct PeriodCount {
    pub period_start: i64,
    mwh: u64,
    readings: u32,
    /// Counted from the period's start: only then is an advance emitted.
    whole: bool,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LevelOut {
    pub meter_id: MeterId,
    pub interval_start: i64,
    pub level: u8,
    pub profile_version: u32,
}

/// A completed period's register advance.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RegisterOut {
    pub meter_id: MeterId,
    pub period_start: i64,
    pub read_at: i64,
    pub wh: u64,
}

/// What one reading produced.
#[derive(Debug, Default)]
pub struct Step {
    pub level: Option<LevelOut>,
    pub registers: Vec<RegisterOut>,
}

/// Dithers, quantizes and advances the meter's state by one reading. `tz` is
/// the feeder's time zone, whose calendar weekly and monthly periods follow.
pub fn step(
    state: &mut MeterState,
    reading: &RawReading,
    profile: &DitherProfile,
    tz: Tz,
    version: u32,
    rng: &mut impl Rng,
) -> Step {
    if state.last_interval_start.is_some_and(|last| reading.interval_start <= last) {
        return Step::default();
    }
    // Counting is whole from a period's start, or from any earlier reading of this process.
    let seen_before = state.last_interval_start.is_some() && state.register.is_some();
    state.last_interval_start = Some(reading.interval_start);
    let level = dither_and_quantize(profile, reading.kw, rng);
    let mut out = Step {
        level: Some(LevelOut {
            meter_id: reading.meter_id.clone(),
            interval_start: reading.interval_start,
            level,
            profile_version: version,
        }),
        registers: Vec::new(),
    };
    let period = |t: i64| profile.register_period().bounds(tz, t);
    let Some((start, end)) = period(reading.interval_start) else {
        state.register = None;
        return out;
    };
    let emit = |c: &PeriodCount, out: &mut Step| {
        if c.whole && c.readings > 0 {
            out.registers.push(RegisterOut {
                meter_id: reading.meter_id.clone(),
                period_start: c.period_start,
                read_at: period(c.period_start).map_or(c.period_start, |p| p.1),
                // Whole milli-Wh per interval: at most 0.5 mWh rounding each, far
                // below the 1 Wh resolution of the advance.
                wh: (c.mwh + 500) / 1000,
            });
        }
    };
    // A period this reading has left behind is complete (its last intervals missing).
    if let Some(c) = state.register.take_if(|c| c.period_start < start) {
        emit(&c, &mut out);
    }
    let c = state.register.get_or_insert(PeriodCount {
        period_start: start,
        mwh: 0,
        readings: 0,
        whole: seen_before || reading.interval_start == start,
    });
    c.mwh += (reading.kw * profile.interval().hours() * 1.0e6).round() as u64;
    c.readings += 1;
    if reading.interval_start + i64::from(profile.interval().seconds()) == end {
        emit(c, &mut out);
        state.register = Some(PeriodCount { period_start: end, mwh: 0, readings: 0, whole: true });
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use meterveil_shared::DitherProfileSpec;
    use rand::SeedableRng;

    fn profile(send_registers: bool) -> DitherProfile {
        DitherProfile::try_from(DitherProfileSpec {
            noise: "gaussian".into(),
            scale_kw: 0.3,
            boundaries_kw: vec![1.0, 2.0],
            interval_s: 900,
            send_registers,
            register_period: None,
        })
        .unwrap()
    }

    fn reading(t: i64, kw: f64) -> RawReading {
        RawReading { meter_id: MeterId::parse("m").unwrap(), interval_start: t, kw }
    }

    const DAY0: i64 = 1_700_006_400; // a UTC midnight

    #[test]
    fn repeats_are_never_dithered_twice() {
        let p = profile(false);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(1);
        let mut st = MeterState::default();
        assert!(step(&mut st, &reading(DAY0, 1.0), &p, Tz::UTC, 1, &mut rng).level.is_some());
        assert!(step(&mut st, &reading(DAY0, 1.0), &p, Tz::UTC, 1, &mut rng).level.is_none());
        assert!(step(&mut st, &reading(DAY0 - 900, 1.0), &p, Tz::UTC, 1, &mut rng).level.is_none());
        assert!(st.register.is_none());
    }

    #[test]
    fn each_whole_period_gets_its_advance_and_an_interrupted_one_none() {
        let p = profile(true);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2);
        // First seen at 10:00 of day 0: that day was not counted from its start.
        let mut st = MeterState::default();
        let mut reads = Vec::new();
        let mut day_wh = [0.0f64; 4];
        for d in 0..4i64 {
            for i in 0..96i64 {
                if (d == 0 && i < 40) || (d == 2 && (i == 50 || i == 95)) {
                    continue; // before the gateway started; two missing intervals of day 2
                }
                let kw = 0.2 + 0.013 * ((i * 7 + d) % 17) as f64;
                day_wh[d as usize] += kw * 250.0;
                reads.extend(
                    step(&mut st, &reading(DAY0 + d * 86_400 + i * 900, kw), &p, Tz::UTC, 1, &mut rng).registers,
                );
            }
        }
        let days: Vec<(i64, i64)> =
            reads.iter().map(|r| ((r.period_start - DAY0) / 86_400, r.read_at - r.period_start)).collect();
        // Day 2 closes when day 3's first reading arrives (its last interval is missing).
        assert_eq!(days, vec![(1, 86_400), (2, 86_400), (3, 86_400)], "one advance per whole day, none for day 0");
        for r in &reads {
            let d = ((r.period_start - DAY0) / 86_400) as usize;
            assert!((r.wh as f64 - day_wh[d]).abs() <= 0.5 + 1e-9, "day {d}: {} vs {}", r.wh, day_wh[d]);
        }
        // After a restart (state reloaded: the interval position only), the
        // interrupted day has no read; the next whole day has one.
        let mut st = MeterState { last_interval_start: Some(DAY0 + 4 * 86_400 + 20 * 900), register: None };
        let mut after = Vec::new();
        for i in 21..96 + 96 {
            after.extend(step(&mut st, &reading(DAY0 + 4 * 86_400 + i * 900, 1.0), &p, Tz::UTC, 1, &mut rng).registers);
        }
        assert_eq!(after.iter().map(|r| (r.period_start - DAY0) / 86_400).collect::<Vec<_>>(), vec![5]);
        assert_eq!(after[0].wh, 24_000);
    }
}
