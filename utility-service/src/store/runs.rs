//! Settlement schedules and runs: a run is made together with its recovery
//! job, once per (feeder, day, kind), and its settled figures are frozen when
//! the job finishes (`finish_job`).

use meterveil_shared::FeederId;
use serde::Serialize;
use sqlx::Row;

use super::{Store, StoreError};
use crate::jobspec::RecoverSpec;
use crate::schedule::Schedule;

/// A settlement run, with its job's state.
#[derive(Debug, Clone, Serialize)]
pub struct RunRecord {
    pub run_id: String,
    pub feeder_id: String,
    /// UTC epoch second of the settled day's start, and its date.
    pub day_start: i64,
    pub day: String,
    pub kind: String,
    /// 1 for the day's first run, then 2, 3, … in the order they were made.
    pub version: i64,
    pub job_id: String,
    /// `completeness`, `deadline`, `schedule` or `operator`.
    pub started_by: String,
    pub due_at: i64,
    pub created_at: i64,
    /// The recovery job's state; the run's figures exist once it is `done`.
    pub state: String,
    #[serde(skip)]
    pub days: Option<String>,
}

const RUN_SQL: &str = "SELECT r.run_id, r.feeder_id, r.day_start, r.kind, r.version, r.job_id, r.started_by, r.due_at,
        r.created_at, r.days, j.state FROM settlement_runs r JOIN recovery_jobs j ON j.job_id = r.job_id";

fn run_from_row(r: &sqlx::any::AnyRow) -> Result<RunRecord, StoreError> {
    let day_start: i64 = r.try_get("day_start")?;
    Ok(RunRecord {
        run_id: r.try_get("run_id")?,
        feeder_id: r.try_get("feeder_id")?,
        day_start,
        day: crate::schedule::day_name(day_start),
        kind: r.try_get("kind")?,
        version: r.try_get("version")?,
        job_id: r.try_get("job_id")?,
        started_by: r.try_get("started_by")?,
        due_at: r.try_get("due_at")?,
        created_at: r.try_get("created_at")?,
        state: r.try_get("state")?,
        days: r.try_get("days")?,
    })
}

/// A run to make: its identity, what started it and its recovery.
pub struct NewRun<'a> {
    pub run_id: &'a str,
    pub job_id: &'a str,
    pub kind: &'a str,
    pub day_start: i64,
    pub started_by: &'a str,
    pub due_at: i64,
    pub spec: &'a RecoverSpec,
}

impl Store {
    pub async fn put_schedule(&self, feeder: &FeederId, s: &Schedule, now: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let body = serde_json::to_string(s).map_err(anyhow::Error::from)?;
        sqlx::query(
            "INSERT INTO settlement_schedules (feeder_id, body, updated_at) VALUES ($1, $2, $3)
             ON CONFLICT (feeder_id) DO UPDATE SET body = $2, updated_at = $3",
        )
        .bind(feeder.as_str())
        .bind(body)
        .bind(now)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// A feeder's schedule, if it has one.
    pub async fn schedule(&self, feeder: &FeederId) -> Result<Option<Schedule>, StoreError> {
        let body: Option<String> = sqlx::query_scalar("SELECT body FROM settlement_schedules WHERE feeder_id = $1")
            .bind(feeder.as_str())
            .fetch_optional(&self.pool)
            .await?;
        body.map(|b| serde_json::from_str(&b).map_err(|e| anyhow::anyhow!("stored schedule of {feeder}: {e}").into()))
            .transpose()
    }

    /// Every feeder's schedule (feeders without one are left out).
    pub async fn schedules(&self) -> Result<Vec<(FeederId, Schedule)>, StoreError> {
        let rows: Vec<(String, String)> =
            sqlx::query_as("SELECT feeder_id, body FROM settlement_schedules ORDER BY feeder_id")
                .fetch_all(&self.pool)
                .await?;
        rows.into_iter()
            .map(|(f, b)| {
                let id = FeederId::parse(&f).map_err(|e| anyhow::anyhow!("stored schedule of {f}: {e}"))?;
                let s = serde_json::from_str(&b).map_err(|e| anyhow::anyhow!("stored schedule of {f}: {e}"))?;
                Ok((id, s))
            })
            .collect()
    }

    /// Makes the run and queues its recovery in one transaction; false (and
    /// nothing stored) when the day already has a run of this kind. The
    /// version is the day's next number, taken under the feeder's lock.
    pub async fn create_run(&self, feeder: &FeederId, run: &NewRun<'_>, now: i64) -> Result<Option<i64>, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        Self::lock_feeder(self.backend, &mut tx, feeder).await?;
        let made: Option<i64> = sqlx::query_scalar(
            "SELECT version FROM settlement_runs WHERE feeder_id = $1 AND day_start = $2 AND kind = $3",
        )
        .bind(feeder.as_str())
        .bind(run.day_start)
        .bind(run.kind)
        .fetch_optional(&mut *tx)
        .await?;
        if made.is_some() {
            return Ok(None);
        }
        let version: i64 = sqlx::query_scalar(
            "SELECT COALESCE(MAX(version), 0) + 1 FROM settlement_runs WHERE feeder_id = $1 AND day_start = $2",
        )
        .bind(feeder.as_str())
        .bind(run.day_start)
        .fetch_one(&mut *tx)
        .await?;
        sqlx::query(
            "INSERT INTO recovery_jobs (job_id, feeder_id, window_start, window_end, params, state, created_at)
             VALUES ($1, $2, $3, $4, $5, 'queued', $6)",
        )
        .bind(run.job_id)
        .bind(feeder.as_str())
        .bind(run.spec.from)
        .bind(run.spec.to)
        .bind(serde_json::to_string(run.spec).map_err(anyhow::Error::from)?)
        .bind(now)
        .execute(&mut *tx)
        .await?;
        sqlx::query(
            "INSERT INTO settlement_runs (run_id, feeder_id, day_start, kind, version, job_id, started_by, due_at, created_at)
             VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9)",
        )
        .bind(run.run_id)
        .bind(feeder.as_str())
        .bind(run.day_start)
        .bind(run.kind)
        .bind(version)
        .bind(run.job_id)
        .bind(run.started_by)
        .bind(run.due_at)
        .bind(now)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(Some(version))
    }

    /// A feeder's runs of the days in [from, to), by day and version.
    pub async fn runs(&self, feeder: &FeederId, from: i64, to: i64) -> Result<Vec<RunRecord>, StoreError> {
        let rows = sqlx::query(&format!(
            "{RUN_SQL} WHERE r.feeder_id = $1 AND r.day_start >= $2 AND r.day_start < $3 ORDER BY r.day_start, r.version"
        ))
        .bind(feeder.as_str())
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?;
        rows.iter().map(run_from_row).collect()
    }

    /// One run of a feeder's day by kind.
    pub async fn run(&self, feeder: &FeederId, day_start: i64, kind: &str) -> Result<Option<RunRecord>, StoreError> {
        let r = sqlx::query(&format!("{RUN_SQL} WHERE r.feeder_id = $1 AND r.day_start = $2 AND r.kind = $3"))
            .bind(feeder.as_str())
            .bind(day_start)
            .bind(kind)
            .fetch_optional(&self.pool)
            .await?;
        r.as_ref().map(run_from_row).transpose()
    }

    /// Stored readings of a feeder per UTC day in [from, to), as (day start, count).
    pub async fn readings_per_day(&self, feeder: &FeederId, from: i64, to: i64) -> Result<Vec<(i64, i64)>, StoreError> {
        Ok(sqlx::query_as(
            "SELECT r.interval_start - (r.interval_start % 86400) AS d, COUNT(*) FROM readings r
             JOIN meters m ON m.meter_id = r.meter_id
             WHERE m.feeder_id = $1 AND r.interval_start >= $2 AND r.interval_start < $3 GROUP BY d ORDER BY d",
        )
        .bind(feeder.as_str())
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?)
    }

    /// The newest finished run of each day in [from, to), oldest day first,
    /// as (day start, job): where a rolling settlement run starts from.
    pub async fn latest_runs_between(
        &self,
        feeder: &FeederId,
        from: i64,
        to: i64,
    ) -> Result<Vec<(i64, String)>, StoreError> {
        Ok(sqlx::query_as(
            "SELECT r.day_start, r.job_id FROM settlement_runs r
             WHERE r.feeder_id = $1 AND r.day_start >= $2 AND r.day_start < $3 AND r.days IS NOT NULL
             AND r.version = (SELECT MAX(q.version) FROM settlement_runs q
                              WHERE q.feeder_id = r.feeder_id AND q.day_start = r.day_start AND q.days IS NOT NULL)
             ORDER BY r.day_start",
        )
        .bind(feeder.as_str())
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?)
    }

    /// The newest finished run of a feeder's day: its job and frozen figures.
    pub async fn previous_run_of_day(
        &self,
        feeder: &FeederId,
        day_start: i64,
    ) -> Result<Option<(String, String)>, StoreError> {
        Ok(sqlx::query_as(
            "SELECT r.job_id, r.days FROM settlement_runs r JOIN recovery_jobs j ON j.job_id = r.job_id
             WHERE r.feeder_id = $1 AND r.day_start = $2 AND j.state = 'done' AND r.days IS NOT NULL
             ORDER BY r.version DESC LIMIT 1",
        )
        .bind(feeder.as_str())
        .bind(day_start)
        .fetch_optional(&self.pool)
        .await?)
    }
}
