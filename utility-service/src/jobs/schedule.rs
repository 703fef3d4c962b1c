//! The settlement scheduler: makes each scheduled feeder's due runs
//! ([`crate::schedule`]) as ordinary recovery jobs in the queue. It keeps no
//! state of its own: every tick looks at the days still owed a run, so a tick
//! after an outage makes everything that fell due meanwhile, and a run is made
//! once however many processes tick (the store makes each (feeder, day, kind)
//! once, under the feeder's lock).

use std::time::Duration;

use meterveil_shared::FeederId;
use serde::Serialize;

use super::WorkContext;
use crate::jobspec::{RankSetting, RecoverSpec, SettledDay};
use crate::schedule::Schedule;
use crate::store::runs::NewRun;

const DAY: i64 = 86_400;

/// A run a tick (or an operator) made.
#[derive(Debug, Clone, Serialize)]
pub struct Made {
    pub feeder_id: String,
    pub day_start: i64,
    pub kind: String,
    pub version: i64,
    pub run_id: String,
    pub job_id: String,
    pub started_by: String,
    pub due_at: i64,
}

/// Makes the runs due at `now` on every scheduled feeder this process serves
/// (all, or its shard); a feeder whose tick fails is logged and skipped.
pub async fn tick(s: &WorkContext, now: i64) -> anyhow::Result<Vec<Made>> {
    let mut made = Vec::new();
    for (feeder, schedule) in s.store.schedules().await? {
        if s.config.job_feeders.as_ref().is_some_and(|f| !f.iter().any(|x| x == feeder.as_str())) {
            continue;
        }
        match tick_feeder(s, &feeder, &schedule, now).await {
            Ok(m) => made.extend(m),
            Err(e) => tracing::warn!(feeder = %feeder, error = %format!("{e:#}"), "settlement schedule tick failed"),
        }
    }
    if !made.is_empty() {
        tracing::info!(runs = made.len(), "settlement runs made");
        s.wake.notify_one();
    }
    Ok(made)
}

async fn tick_feeder(s: &WorkContext, feeder: &FeederId, schedule: &Schedule, now: i64) -> anyhow::Result<Vec<Made>> {
    let days = schedule.days_to_consider(now);
    if days.is_empty() {
        return Ok(Vec::new());
    }
    let (from, to) = (days.start * DAY, days.end * DAY);
    let runs = s.store.runs(feeder, from, to).await?;
    let kinds = std::iter::once(crate::schedule::INITIAL).chain(schedule.later_runs.iter().map(|r| r.kind.as_str()));
    let kinds: Vec<&str> = kinds.collect();
    let owed: Vec<i64> = days
        .map(|d| d * DAY)
        .filter(|d| kinds.iter().any(|k| !runs.iter().any(|r| r.day_start == *d && r.kind == *k)))
        .collect();
    let Some(&first_owed) = owed.first() else { return Ok(Vec::new()) };
    let tz = feeder_tz(s, feeder).await?;
    let Some(profile) = s.store.current_profile(feeder).await? else { return Ok(Vec::new()) };
    let per_day =
        (DAY / i64::from(profile.profile.interval().seconds())) * s.store.meters_of(feeder).await?.len() as i64;
    let counts = s.store.readings_per_day(feeder, first_owed, to).await?;
    let mut made = Vec::new();
    for day in owed {
        let kinds: Vec<&str> = runs.iter().filter(|r| r.day_start == day).map(|r| r.kind.as_str()).collect();
        let stored = counts.iter().find(|c| c.0 == day).map_or(0, |c| c.1);
        let completeness = stored as f64 / per_day.max(1) as f64;
        for due in schedule.due(tz, day, completeness, stored > 0, &kinds, now) {
            let m = make_run(s, feeder, schedule.window_days, day, &due.kind, due.started_by, due.due_at, now).await?;
            made.extend(m);
        }
    }
    Ok(made)
}

/// Makes one run and queues its recovery over the `window_days` ending with
/// the day (from the feeder's first reading at the earliest, and from the
/// first whole day of the settled day's profile version); `None` when the
/// day already has a run of this kind.
#[allow(clippy::too_many_arguments)]
pub async fn make_run(
    s: &WorkContext,
    feeder: &FeederId,
    window_days: u32,
    day_start: i64,
    kind: &str,
    started_by: &str,
    due_at: i64,
    now: i64,
) -> anyhow::Result<Option<Made>> {
    let first = s.store.feeder_span(feeder).await?.map_or(day_start, |(f, _)| f - f.rem_euclid(DAY));
    let from = (day_start - (i64::from(window_days) - 1) * DAY).max(first).min(day_start);
    // A fit holds one profile version: after a new one, the window starts with it.
    let levels = s.store.feeder_levels_between(feeder, from, day_start + DAY).await?;
    let from = crate::schedule::one_version_start(&levels, from, day_start);
    let run_id = super::new_job_id("run");
    let job_id = super::new_job_id("rec");
    let spec = RecoverSpec {
        feeder_id: feeder.clone(),
        from,
        to: day_start + DAY,
        rank: RankSetting::AUTO,
        alpha_kw: meterveil_shared::recovery::DEFAULT_ALPHA_KW,
        warm_from: None,
        settles: Some(SettledDay { run_id: run_id.clone(), day_start }),
        // A run's figures are its meter-days, frozen from its estimates with
        // their bands; without the bootstrap those covered 83-84% of BDEW's
        // meter-days, with it 89-90% (README "Group loads and their bands").
        band_draws: meterveil_shared::bootstrap::DEFAULT_DRAWS as u32,
    };
    let run = NewRun { run_id: &run_id, job_id: &job_id, kind, day_start, started_by, due_at, spec: &spec };
    let Some(version) = s.store.create_run(feeder, &run, now).await? else { return Ok(None) };
    tracing::info!(feeder = %feeder, day = day_start, kind, version, started_by, run = %run_id, "settlement run made");
    Ok(Some(Made {
        feeder_id: feeder.to_string(),
        day_start,
        kind: kind.to_owned(),
        version,
        run_id,
        job_id,
        started_by: started_by.to_owned(),
        due_at,
    }))
}

async fn feeder_tz(s: &WorkContext, feeder: &FeederId) -> anyhow::Result<chrono_tz::Tz> {
    let name = s.store.feeder_time_zone(feeder).await?.unwrap_or_else(|| "UTC".into());
    name.parse().map_err(|_| anyhow::anyhow!("feeder {feeder} has an unknown time zone {name:?}"))
}

/// Ticks every `schedule_every_s` seconds until the task is aborted.
pub async fn run(s: WorkContext) {
    loop {
        if let Err(e) = tick(&s, s.clock.now()).await {
            tracing::warn!(error = %format!("{e:#}"), "settlement schedule tick failed");
        }
        tokio::time::sleep(Duration::from_secs(s.config.schedule_every_s.max(1))).await;
    }
}
