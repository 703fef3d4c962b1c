//! Recovery jobs and results.

use meterveil_shared::FeederId;
use serde::Serialize;
use sqlx::Row;

use super::Store;
use super::StoreError;
use crate::settlement::Advance;

#[derive(Debug, Clone, Serialize)]
pub struct JobRecord {
    pub job_id: String,
    pub feeder_id: String,
    pub window_start: i64,
    pub window_end: i64,
    pub params: serde_json::Value,
    pub profile_version: Option<i64>,
    pub state: String,
    pub progress: f64,
    pub message: String,
    pub created_at: i64,
    pub started_at: Option<i64>,
    pub finished_at: Option<i64>,
    pub diagnostics: Option<serde_json::Value>,
    pub error: Option<String>,
}

pub use crate::records::RecoveredRow;

/// A test's fail point: when `METERVEIL_TEST_PAUSE_RESULT_WRITE` names a file,
/// a job's result write creates it after its first chunk of rows and then
/// pauses for 60 s inside its transaction, so that the test can kill the
/// process in the middle of the write. Unset (always, outside tests), nothing happens.
async fn pause_for_a_test_kill() {
    if let Some(path) = std::env::var_os("METERVEIL_TEST_PAUSE_RESULT_WRITE") {
        if std::fs::write(&path, b"paused in the result write").is_ok() {
            tokio::time::sleep(std::time::Duration::from_secs(60)).await;
        }
    }
}

impl Store {
    pub async fn create_job(&self, id: &str, spec: &crate::jobspec::RecoverSpec, now: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(
            "INSERT INTO recovery_jobs (job_id, feeder_id, window_start, window_end, params, state, created_at) VALUES ($1, $2, $3, $4, $5, 'queued', $6)",
        )
        .bind(id)
        .bind(spec.feeder_id.as_str())
        .bind(spec.from)
        .bind(spec.to)
        .bind(serde_json::to_string(spec).map_err(anyhow::Error::from)?)
        .bind(now)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// Stores all results and marks the job done in one transaction; with
    /// `run` (a settlement run's id and its day's figures as JSON), freezes
    /// those figures into the run in the same transaction.
    pub async fn finish_job(
        &self,
        id: &str,
        profile_version: u32,
        rows: &[RecoveredRow],
        diagnostics: &serde_json::Value,
        run: Option<(&str, &str)>,
        now: i64,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        // Only the lease holder may finish: a worker whose lease ran out (and whose
        // job another worker took over) or whose job was cancelled writes nothing.
        let held = sqlx::query(
            "UPDATE recovery_jobs SET state = 'done', progress = 1, message = 'done', profile_version = $1, diagnostics = $2, finished_at = $3
             WHERE job_id = $4 AND state = 'running' AND (worker IS NULL OR worker = $5)",
        )
        .bind(i64::from(profile_version))
        .bind(diagnostics.to_string())
        .bind(now)
        .bind(id)
        .bind(&self.worker_id)
        .execute(&mut *tx)
        .await?;
        if held.rows_affected() != 1 {
            return Err(StoreError::Conflict(meterveil_shared::FieldError::new(
                "job_id",
                format!("job {id} is no longer held by this worker; its results were discarded"),
            )));
        }
        for (k, chunk) in rows.chunks(700).enumerate() {
            if k == 1 {
                pause_for_a_test_kill().await;
            }
            let sql = super::values_sql(
                self.backend,
                "INSERT INTO recovered_intervals (job_id, meter_id, interval_start, estimate_kw, flag, band_low_kw, band_high_kw)",
                chunk.len(),
                7,
                "",
            );
            let mut q = sqlx::query(&sql);
            for r in chunk {
                q = q
                    .bind(id)
                    .bind(r.meter_id.as_str())
                    .bind(r.interval_start)
                    .bind(r.kw)
                    .bind(r.flag)
                    .bind(r.kw_low)
                    .bind(r.kw_high);
            }
            q.execute(&mut *tx).await?;
        }
        if let Some((run_id, days)) = run {
            sqlx::query("UPDATE settlement_runs SET days = $1 WHERE run_id = $2 AND job_id = $3 AND days IS NULL")
                .bind(days)
                .bind(run_id)
                .bind(id)
                .execute(&mut *tx)
                .await?;
        }
        tx.commit().await?;
        Ok(())
    }

    pub async fn job(&self, id: &str) -> Result<Option<JobRecord>, StoreError> {
        let r =
            sqlx::query("SELECT * FROM recovery_jobs WHERE job_id = $1").bind(id).fetch_optional(&self.pool).await?;
        r.as_ref().map(job_from_row).transpose()
    }

    pub async fn job_rows(&self, id: &str, meter: Option<&str>) -> Result<Vec<RecoveredRow>, StoreError> {
        // Two statements, so that one meter's rows are a seek on the key (job_id, meter_id, …).
        const COLUMNS: &str = "SELECT meter_id, interval_start, estimate_kw, flag, band_low_kw, band_high_kw \
                               FROM recovered_intervals WHERE job_id = $1";
        let rows = match meter {
            Some(m) => {
                sqlx::query(&format!("{COLUMNS} AND meter_id = $2 ORDER BY interval_start"))
                    .bind(id)
                    .bind(m)
                    .fetch_all(&self.pool)
                    .await?
            }
            None => {
                sqlx::query(&format!("{COLUMNS} ORDER BY meter_id, interval_start"))
                    .bind(id)
                    .fetch_all(&self.pool)
                    .await?
            }
        };
        rows.iter()
            .map(|r| {
                let flag: String = r.try_get(3)?;
                Ok(RecoveredRow {
                    meter_id: r.try_get(0)?,
                    interval_start: r.try_get(1)?,
                    kw: r.try_get(2)?,
                    flag: match flag.as_str() {
                        "derived" => "derived",
                        "corrected" => "corrected",
                        "atypical" => "atypical",
                        _ => "estimated",
                    },
                    kw_low: r.try_get(4)?,
                    kw_high: r.try_get(5)?,
                })
            })
            .collect()
    }

    /// One meter's levels in [from, to) as (interval_start, level), in time order.
    pub async fn meter_levels_between(&self, meter: &str, from: i64, to: i64) -> Result<Vec<(i64, u8)>, StoreError> {
        let rows: Vec<(i64, i64)> = sqlx::query_as(
            "SELECT interval_start, level FROM readings WHERE meter_id = $1 AND interval_start >= $2 AND interval_start < $3
             ORDER BY interval_start",
        )
        .bind(meter)
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows.into_iter().map(|(t, l)| (t, l as u8)).collect())
    }

    /// First and last interval start of a feeder's stored readings.
    pub async fn feeder_span(&self, feeder: &FeederId) -> Result<Option<(i64, i64)>, StoreError> {
        let r: (Option<i64>, Option<i64>) = sqlx::query_as(
            "SELECT MIN(r.interval_start), MAX(r.interval_start) FROM readings r JOIN meters m ON m.meter_id = r.meter_id
             WHERE m.feeder_id = $1",
        )
        .bind(feeder.as_str())
        .fetch_one(&self.pool)
        .await?;
        Ok(r.0.zip(r.1))
    }

    /// Levels of a feeder in [from, to) as (meter, interval_start, level, version).
    pub async fn feeder_levels_between(
        &self,
        feeder: &FeederId,
        from: i64,
        to: i64,
    ) -> Result<Vec<(String, i64, u8, u32)>, StoreError> {
        let rows = sqlx::query(
            "SELECT r.meter_id, r.interval_start, r.level, r.profile_version
             FROM readings r JOIN meters m ON m.meter_id = r.meter_id
             WHERE m.feeder_id = $1 AND r.interval_start >= $2 AND r.interval_start < $3",
        )
        .bind(feeder.as_str())
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?;
        rows.iter()
            .map(|r| Ok((r.try_get(0)?, r.try_get(1)?, r.try_get::<i64, _>(2)? as u8, r.try_get::<i64, _>(3)? as u32)))
            .collect()
    }

    /// Register advances of a feeder's meters whose periods lie within [from, to],
    /// ordered by meter and time.
    pub async fn feeder_registers_between(
        &self,
        feeder: &FeederId,
        from: i64,
        to: i64,
    ) -> Result<Vec<Advance>, StoreError> {
        let rows: Vec<(String, i64, i64, i64)> = sqlx::query_as(
            "SELECT g.meter_id, g.period_start, g.read_at, g.wh FROM register_advances g
             JOIN meters m ON m.meter_id = g.meter_id
             WHERE m.feeder_id = $1 AND g.period_start >= $2 AND g.read_at <= $3 ORDER BY g.meter_id, g.read_at",
        )
        .bind(feeder.as_str())
        .bind(from)
        .bind(to)
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|(meter_id, period_start, read_at, wh)| Advance { meter_id, period_start, read_at, wh })
            .collect())
    }
}

/// A `recovery_jobs` row (`SELECT *`) as a record.
pub(super) fn job_from_row(r: &sqlx::any::AnyRow) -> Result<JobRecord, StoreError> {
    let json = |s: Option<String>| s.and_then(|s| serde_json::from_str(&s).ok());
    Ok(JobRecord {
        job_id: r.try_get("job_id")?,
        feeder_id: r.try_get("feeder_id")?,
        window_start: r.try_get("window_start")?,
        window_end: r.try_get("window_end")?,
        params: json(r.try_get("params")?).unwrap_or(serde_json::Value::Null),
        profile_version: r.try_get("profile_version")?,
        state: r.try_get("state")?,
        progress: r.try_get("progress")?,
        message: r.try_get("message")?,
        created_at: r.try_get("created_at")?,
        started_at: r.try_get("started_at")?,
        finished_at: r.try_get("finished_at")?,
        diagnostics: json(r.try_get("diagnostics")?),
        error: r.try_get("error")?,
    })
}

impl Store {
    /// Stores a recovery's band model (`shared::bootstrap::StoredBands` as
    /// JSON); a second write for the same job replaces the first (a retried
    /// attempt).
    pub async fn put_bands(&self, job_id: &str, body: &str) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        sqlx::query("DELETE FROM recovery_bands WHERE job_id = $1").bind(job_id).execute(&mut *tx).await?;
        sqlx::query("INSERT INTO recovery_bands (job_id, body) VALUES ($1, $2)")
            .bind(job_id)
            .bind(body)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(())
    }

    /// A recovery's band model, if it stored one.
    pub async fn bands(&self, job_id: &str) -> Result<Option<String>, StoreError> {
        Ok(sqlx::query_scalar("SELECT body FROM recovery_bands WHERE job_id = $1")
            .bind(job_id)
            .fetch_optional(&self.pool)
            .await?)
    }
}
