//! A settlement run's part of a recovery job: the fingerprints of the settled
//! day's inputs before the fit, and after it the figures frozen into the run,
//! carrying forward the day's previous run for every meter whose inputs did
//! not change (`crate::reconcile`).

use std::collections::HashMap;

use meterveil_shared::recovery::LevelMatrix;

use crate::jobspec::{RecoverSpec, SettledDay};
use crate::reconcile::{carry_forward, day_inputs, frozen_inputs, frozen_json, reads_touching};
use crate::settlement::{Advance, DailyEnergy};
use crate::store::recoveries::RecoveredRow;
use crate::store::Store;

const DAY: i64 = 86_400;

/// What the settled day rests on: each meter's fingerprint, and the reads.
pub struct DayInputs {
    fingerprints: HashMap<String, String>,
    reads: Vec<Advance>,
}

/// Fingerprints the settled day of each meter of the window.
pub async fn inputs(
    store: &Store,
    req: &RecoverSpec,
    run: &SettledDay,
    meters: &[String],
    levels: &LevelMatrix,
    version: u32,
    step: i64,
) -> anyhow::Result<DayInputs> {
    let reads = store.feeder_registers_between(&req.feeder_id, req.from, req.to + 1).await?;
    let first = ((run.day_start - req.from) / step) as usize;
    let cols = first..(first + (DAY / step) as usize).min(levels.cols());
    let fingerprints = meters
        .iter()
        .enumerate()
        .map(|(i, m)| {
            let touching = reads_touching(&reads, m, run.day_start);
            (m.clone(), day_inputs(levels, i, cols.clone(), version, &touching))
        })
        .collect();
    Ok(DayInputs { fingerprints, reads })
}

/// The run's figures as JSON, after carrying the day's previous run forward
/// where a meter's inputs are unchanged (its rows in `out` are replaced, and
/// its figures are the earlier run's), each other meter-day at its levels'
/// estimate from `estimates` (this run's fit); adds what was carried to `diag`.
pub async fn freeze(
    store: &Store,
    req: &RecoverSpec,
    run: &SettledDay,
    day: DayInputs,
    (out, estimates): (&mut [RecoveredRow], &crate::settlement::DayEstimates),
    step: i64,
    diag: &mut serde_json::Value,
) -> anyhow::Result<String> {
    let d = run.day_start;
    let mut carried = 0;
    let mut earlier_days: HashMap<String, DailyEnergy> = HashMap::new();
    if let Some((job, figures)) = store.previous_run_of_day(&req.feeder_id, d).await? {
        let earlier = frozen_inputs(&figures)?;
        let keep: Vec<String> =
            day.fingerprints.iter().filter(|(m, f)| earlier.get(*m) == Some(f)).map(|(m, _)| m.clone()).collect();
        let mut rows = store.job_rows(&job, None).await?;
        rows.retain(|r| (d..d + DAY).contains(&r.interval_start));
        let mut moves = carry_forward(out, &rows, &keep, d);
        moves.sort_by(f64::total_cmp);
        carried = moves.len();
        let frozen: Vec<DailyEnergy> = serde_json::from_str(&figures)?;
        earlier_days =
            frozen.into_iter().filter(|f| keep.contains(&f.meter_id)).map(|f| (f.meter_id.clone(), f)).collect();
        diag["carried_from"] = job.into();
        diag["refit_move_median"] = moves.get(moves.len() / 2).copied().into();
        diag["refit_move_max"] = moves.last().copied().into();
    }
    diag["carried_meter_days"] = carried.into();
    let of_day: Vec<RecoveredRow> = out.iter().filter(|r| (d..d + DAY).contains(&r.interval_start)).cloned().collect();
    let mut days = crate::settlement::daily(&of_day, &day.reads, step as u32, estimates);
    anyhow::ensure!(!days.is_empty(), "the window [{}, {}) does not hold the settled day {d}", req.from, req.to);
    // A carried meter-day keeps its earlier figures whole: a refit alone never moves them.
    for f in days.iter_mut() {
        if let Some(e) = earlier_days.remove(&f.meter_id) {
            *f = e;
        }
    }
    Ok(frozen_json(&days, &day.fingerprints)?)
}
