//! From raw reading to level: the only place a raw value is looked at.
//!
//! Per meter it also keeps the gateway's cumulative register, when the profile
//! sends register reads. A read at UTC midnight M is the energy of every interval
//! before M that this gateway forwarded, exactly (to 1 Wh). So the difference of
//! two consecutive reads equals the sum of the forwarded intervals between them,
//! whatever gaps the meter had: that is the constraint settlement can rely on.

use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::{DitherProfile, MeterId};
use rand::Rng;

use crate::source::RawReading;

/// The per-meter state that survives restarts (persisted in the outbox).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct MeterState {
    /// Latest interval start accepted; older or equal readings are skipped, so a
    /// reading is never dithered twice (two independent levels of one reading
    /// would let anyone average the dither away).
    pub last_interval_start: Option<i64>,
    pub register: Option<RegisterState>,
}

#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct RegisterState {
    /// Cumulative energy of forwarded intervals, milli-Wh.
    pub total_mwh: u64,
    /// The latest midnight a read was emitted for.
    pub last_read_at: Option<i64>,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LevelOut {
    pub meter_id: MeterId,
    pub interval_start: i64,
    pub level: u8,
    pub profile_version: u32,
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RegisterOut {
    pub meter_id: MeterId,
    pub read_at: i64,
    pub wh_total: u64,
}

/// What one reading produced.
#[derive(Debug, Default)]
pub struct Step {
    pub level: Option<LevelOut>,
    pub registers: Vec<RegisterOut>,
}

/// Dithers, quantizes and advances the meter's state by one reading.
pub fn step(
    state: &mut MeterState,
    reading: &RawReading,
    profile: &DitherProfile,
    version: u32,
    rng: &mut impl Rng,
) -> Step {
    if state.last_interval_start.is_some_and(|last| reading.interval_start <= last) {
        return Step::default();
    }
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
    if !profile.send_registers() {
        state.register = None;
        return out;
    }
    let len = profile.interval();
    let day = reading.interval_start - reading.interval_start.rem_euclid(86_400);
    let reg = state.register.get_or_insert_with(RegisterState::default);
    let read = |reg: &RegisterState, at: i64| RegisterOut {
        meter_id: reading.meter_id.clone(),
        read_at: at,
        wh_total: reg.total_mwh / 1000,
    };
    if reg.last_read_at.is_none_or(|last| last < day) {
        out.registers.push(read(reg, day));
        reg.last_read_at = Some(day);
    }
    // Whole milli-Wh: at most 0.5 mWh rounding per interval, far below the 1 Wh
    // resolution of the reads.
    reg.total_mwh += (reading.kw * len.hours() * 1.0e6).round() as u64;
    let end = reading.interval_start + i64::from(len.seconds());
    if end == day + 86_400 {
        out.registers.push(read(reg, end));
        reg.last_read_at = Some(end);
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
        assert!(step(&mut st, &reading(DAY0, 1.0), &p, 1, &mut rng).level.is_some());
        assert!(step(&mut st, &reading(DAY0, 1.0), &p, 1, &mut rng).level.is_none());
        assert!(step(&mut st, &reading(DAY0 - 900, 1.0), &p, 1, &mut rng).level.is_none());
        assert!(st.register.is_none());
    }

    #[test]
    fn consecutive_reads_bracket_the_forwarded_energy() {
        let p = profile(true);
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2);
        let mut st = MeterState::default();
        let mut reads = Vec::new();
        let mut day_wh = [0.0f64; 4];
        // Two full days, then a day with one interval missing, then a full day.
        for d in 0..4i64 {
            for i in 0..96i64 {
                if d == 2 && i == 50 {
                    continue;
                }
                let kw = 0.2 + 0.013 * ((i * 7 + d) % 17) as f64;
                day_wh[d as usize] += kw * 250.0;
                reads.extend(step(&mut st, &reading(DAY0 + d * 86_400 + i * 900, kw), &p, 1, &mut rng).registers);
            }
        }
        let at: Vec<i64> = reads.iter().map(|r| (r.read_at - DAY0) / 86_400).collect();
        assert_eq!(at, vec![0, 1, 2, 3, 4], "one read per midnight, none twice");
        for d in 0..4 {
            let got = (reads[d + 1].wh_total - reads[d].wh_total) as f64;
            assert!((got - day_wh[d]).abs() < 1.0, "day {d}: {got} vs {}", day_wh[d]);
        }
        // A meter first seen mid-day starts its register at that day's midnight.
        let mut st = MeterState::default();
        let r = step(&mut st, &reading(DAY0 + 40 * 900, 1.0), &p, 1, &mut rng).registers;
        assert_eq!(r, vec![RegisterOut { meter_id: MeterId::parse("m").unwrap(), read_at: DAY0, wh_total: 0 }]);
    }
}
