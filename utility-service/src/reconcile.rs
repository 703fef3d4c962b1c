//! What a later settlement run of a day keeps of the earlier one.
//!
//! A refit of a window moves every meter-day a little even when nothing about
//! it changed: the likelihood of coarse, dithered levels is flat in places,
//! and other days of the window may have gained readings. A settled figure
//! must not move for that. So each run records, per meter, a fingerprint of the
//! day's inputs (its stored levels, the profile version, and the register
//! advances whose periods touch the day), and a later run carries the earlier
//! run's intervals and energy forward for every meter whose fingerprint is
//! unchanged. Only a meter-day whose own inputs changed is settled anew.

use std::collections::HashMap;

use serde::Deserialize;
use sha2::{Digest, Sha256};

use meterveil_shared::recovery::LevelMatrix;

use crate::records::RecoveredRow;
use crate::settlement::{Advance, DailyEnergy};

/// A fingerprint of one meter-day's inputs (16 hex digits of a SHA-256).
pub fn day_inputs(
    levels: &LevelMatrix,
    row: usize,
    cols: std::ops::Range<usize>,
    version: u32,
    reads: &[&Advance],
) -> String {
    let mut h = Sha256::new();
    h.update(version.to_le_bytes());
    for j in cols {
        h.update([levels.get(row, j).unwrap_or(u8::MAX)]);
    }
    for a in reads {
        h.update(a.period_start.to_le_bytes());
        h.update(a.read_at.to_le_bytes());
        h.update(a.wh.to_le_bytes());
    }
    hex::encode(&h.finalize()[..8])
}

/// The register advances of `meter` whose periods overlap [day, day + 1 day).
pub fn reads_touching<'a>(reads: &'a [Advance], meter: &str, day: i64) -> Vec<&'a Advance> {
    reads.iter().filter(|a| a.meter_id == meter && a.period_start < day + 86_400 && a.read_at > day).collect()
}

/// A run's frozen figures: each meter-day with the fingerprint of its inputs.
pub fn frozen_json(days: &[DailyEnergy], inputs: &HashMap<String, String>) -> serde_json::Result<String> {
    let mut out = Vec::with_capacity(days.len());
    for d in days {
        let mut v = serde_json::to_value(d)?;
        if let Some(f) = inputs.get(&d.meter_id) {
            v["inputs"] = f.as_str().into();
        }
        out.push(v);
    }
    serde_json::to_string(&out)
}

#[derive(Deserialize)]
struct Fingerprint {
    meter_id: String,
    #[serde(default)]
    inputs: Option<String>,
}

/// The fingerprints recorded in a run's frozen figures, by meter.
pub fn frozen_inputs(json: &str) -> serde_json::Result<HashMap<String, String>> {
    let rows: Vec<Fingerprint> = serde_json::from_str(json)?;
    Ok(rows.into_iter().filter_map(|f| Some((f.meter_id, f.inputs?))).collect())
}

/// Replaces, in this run's rows (`out`, ordered by meter and time), the day's
/// rows of every meter in `keep` with the earlier run's (`earlier`, the
/// earlier run's rows of that day). Returns, per carried meter, how far the
/// refit alone had moved its day's energy (relative to the earlier energy).
pub fn carry_forward(out: &mut [RecoveredRow], earlier: &[RecoveredRow], keep: &[String], day: i64) -> Vec<f64> {
    let before: HashMap<(&str, i64), &RecoveredRow> =
        earlier.iter().map(|r| ((r.meter_id.as_str(), r.interval_start), r)).collect();
    let mut moves = Vec::new();
    for meter in keep {
        let (mut refit, mut kept, mut n) = (0.0, 0.0, 0usize);
        for r in out.iter_mut().filter(|r| &r.meter_id == meter && (day..day + 86_400).contains(&r.interval_start)) {
            if let Some(e) = before.get(&(meter.as_str(), r.interval_start)) {
                refit += r.kw;
                kept += e.kw;
                n += 1;
                r.kw = e.kw;
                r.flag = e.flag;
                r.kw_low = e.kw_low;
                r.kw_high = e.kw_high;
            }
        }
        if n > 0 {
            moves.push(((refit - kept) / kept.abs().max(1e-9)).abs());
        }
    }
    moves
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(m: &str, t: i64, kw: f64) -> RecoveredRow {
        RecoveredRow { meter_id: m.into(), interval_start: t, kw, flag: "derived", kw_low: kw - 0.1, kw_high: kw + 0.1 }
    }

    #[test]
    fn fingerprints_change_with_a_level_a_read_or_the_profile_and_carried_days_keep_their_rows() {
        let mut levels = LevelMatrix::missing(2, 4);
        levels.set(0, 1, Some(2));
        let read = Advance { meter_id: "a".into(), period_start: 0, read_at: 86_400, wh: 5000 };
        let reads = vec![read.clone()];
        let base = day_inputs(&levels, 0, 0..4, 1, &reads_touching(&reads, "a", 0));
        assert_eq!(base, day_inputs(&levels, 0, 0..4, 1, &reads_touching(&reads, "a", 0)));
        assert_ne!(base, day_inputs(&levels, 0, 0..4, 2, &reads_touching(&reads, "a", 0)), "profile version");
        assert_ne!(base, day_inputs(&levels, 0, 0..4, 1, &[]), "register read");
        assert!(reads_touching(&reads, "a", 86_400).is_empty() && reads_touching(&reads, "b", 0).is_empty());
        levels.set(0, 3, Some(0));
        assert_ne!(base, day_inputs(&levels, 0, 0..4, 1, &reads_touching(&reads, "a", 0)), "a late reading");

        let day = 86_400;
        let mut out = vec![row("a", day, 1.0), row("a", day + 900, 3.0), row("b", day, 2.0)];
        let earlier = vec![row("a", day, 1.5), row("a", day + 900, 2.5), row("b", day, 9.0)];
        let moves = carry_forward(&mut out, &earlier, &["a".to_owned()], day);
        assert_eq!(out.iter().map(|r| r.kw).collect::<Vec<_>>(), vec![1.5, 2.5, 2.0]);
        assert_eq!(moves, vec![0.0]);

        let d = crate::settlement::daily(&[row("a", 0, 1.0)], &[], 86_400, &Default::default());
        let json = frozen_json(&d, &HashMap::from([("a".to_owned(), base.clone())])).expect("json");
        assert_eq!(frozen_inputs(&json).expect("parse"), HashMap::from([("a".to_owned(), base)]));
        let back: Vec<DailyEnergy> = serde_json::from_str(&json).expect("figures");
        assert_eq!(back, d);
    }
}
