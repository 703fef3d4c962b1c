//! The durable job queue over `recovery_jobs` and `analysis_jobs`: claims with
//! leases, renewals, cancellation and listing. Finishing statements elsewhere
//! check the lease too (`worker = this store's worker id`).

use serde::Serialize;
use sqlx::Row;

use super::Store;
use super::StoreError;

/// The two job tables.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub enum JobTable {
    Recovery,
    Analysis,
}

impl JobTable {
    pub fn name(self) -> &'static str {
        match self {
            JobTable::Recovery => "recovery_jobs",
            JobTable::Analysis => "analysis_jobs",
        }
    }
    pub fn of(job_id: &str) -> Self {
        if job_id.starts_with("rec-") {
            JobTable::Recovery
        } else {
            JobTable::Analysis
        }
    }
}

/// A job this worker now holds.
#[derive(Debug, Clone)]
pub struct Claimed {
    pub table: JobTable,
    pub job_id: String,
    /// What the job is to do, or why its stored spec does not parse.
    pub spec: Result<crate::jobspec::JobSpec, String>,
    pub attempts: i64,
}

/// Both job tables as one, with the columns the job list shows.
const JOBS_SQL: &str =
    "SELECT job_id, 'recover' AS kind, feeder_id, window_start, window_end, state, progress, message,
        attempts, worker, created_at, started_at, finished_at, error FROM recovery_jobs
     UNION ALL
     SELECT job_id, kind, feeder_id, NULL AS window_start, NULL AS window_end, state, progress, message,
        attempts, worker, created_at, started_at, finished_at, error FROM analysis_jobs";

/// Which jobs to list, and which page.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct JobFilter {
    pub feeder_id: Option<String>,
    pub kind: Option<String>,
    pub state: Option<String>,
    pub limit: i64,
    pub offset: i64,
}

impl JobFilter {
    /// ` WHERE …` over the given filters (placeholders from `$first`), and their values.
    fn where_sql(&self, first: usize) -> (String, Vec<String>) {
        let mut terms = Vec::new();
        let mut binds = Vec::new();
        for (col, v) in [("feeder_id", &self.feeder_id), ("kind", &self.kind), ("state", &self.state)] {
            if let Some(v) = v {
                terms.push(format!("{col} = ${}", first + binds.len()));
                binds.push(v.clone());
            }
        }
        let sql = if terms.is_empty() { String::new() } else { format!(" WHERE {}", terms.join(" AND ")) };
        (sql, binds)
    }
}

/// One line of the job list.
#[derive(Debug, Clone, Serialize)]
pub struct JobLine {
    pub job_id: String,
    pub kind: String,
    /// The feeder the job concerns (none for a town-wide clustering).
    pub feeder_id: Option<String>,
    /// Recovery jobs: the window [from, to), UTC epoch seconds.
    pub window: Option<(i64, i64)>,
    pub state: String,
    pub progress: f64,
    pub message: String,
    pub attempts: i64,
    pub worker: Option<String>,
    pub created_at: i64,
    pub started_at: Option<i64>,
    pub finished_at: Option<i64>,
    pub error: Option<String>,
}

impl Store {
    /// Records a running job's progress (only while this worker may hold it).
    pub async fn set_progress(
        &self,
        table: JobTable,
        id: &str,
        progress: f64,
        message: &str,
        now: i64,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(&format!(
            "UPDATE {} SET state = 'running', progress = $1, message = $2, started_at = COALESCE(started_at, $3)
             WHERE job_id = $4 AND state IN ('queued', 'running') AND (worker IS NULL OR worker = $5)",
            table.name()
        ))
        .bind(progress.clamp(0.0, 1.0))
        .bind(message)
        .bind(now)
        .bind(id)
        .bind(&self.worker_id)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// Ends a job as failed with `error` (only while this worker may hold it).
    pub async fn fail(&self, table: JobTable, id: &str, error: &str, now: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(&format!(
            "UPDATE {} SET state = 'failed', error = $1, finished_at = $2
             WHERE job_id = $3 AND state IN ('queued', 'running') AND (worker IS NULL OR worker = $4)",
            table.name()
        ))
        .bind(error)
        .bind(now)
        .bind(id)
        .bind(&self.worker_id)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// This process's worker id (random per opened store).
    pub fn worker_id(&self) -> &str {
        &self.worker_id
    }

    /// Fails jobs whose lease ran out `max_attempts` times, then claims the oldest
    /// queued (or lease-expired) job, recoveries first since analyses build on them.
    /// With `feeders`, only jobs of those feeders are claimed (a worker sharded by
    /// feeder); town-wide analyses are left to workers without a shard.
    pub async fn claim_next(
        &self,
        now: i64,
        lease_s: i64,
        max_attempts: i64,
        feeders: Option<&[String]>,
    ) -> Result<Option<Claimed>, StoreError> {
        let _w = self.write_lock().await;
        for table in [JobTable::Recovery, JobTable::Analysis] {
            let t = table.name();
            sqlx::query(&format!(
                "UPDATE {t} SET state = 'failed', finished_at = $1,
                        error = 'its worker stopped ' || attempts || ' times before finishing (lease expired)'
                 WHERE state = 'running' AND lease_until < $1 AND attempts >= $2"
            ))
            .bind(now)
            .bind(max_attempts)
            .execute(&self.pool)
            .await?;
        }
        for table in [JobTable::Recovery, JobTable::Analysis] {
            let t = table.name();
            let extra = if table == JobTable::Recovery {
                "'recover' AS kind, feeder_id, window_start, window_end"
            } else {
                "kind, feeder_id, NULL AS window_start, NULL AS window_end"
            };
            // PostgreSQL: concurrent workers skip a row another is claiming.
            let lock = if self.backend == super::Backend::Postgres { " FOR UPDATE SKIP LOCKED" } else { "" };
            let shard = match feeders {
                Some(f) if !f.is_empty() => format!(" AND feeder_id IN ({})", super::placeholders(4, f.len())),
                _ => String::new(),
            };
            let sql = format!(
                "UPDATE {t} SET state = 'running', worker = $1, lease_until = $2 + $3, attempts = attempts + 1,
                        started_at = COALESCE(started_at, $2), message = 'claimed'
                 WHERE job_id = (SELECT job_id FROM {t}
                                 WHERE (state = 'queued' OR (state = 'running' AND lease_until < $2)){shard}
                                 ORDER BY created_at, job_id LIMIT 1{lock})
                 RETURNING job_id, params, attempts, {extra}"
            );
            let mut q = sqlx::query(&sql).bind(&self.worker_id).bind(now).bind(lease_s);
            for f in feeders.unwrap_or_default() {
                q = q.bind(f.as_str());
            }
            let row = q.fetch_optional(&self.pool).await?;
            if let Some(r) = row {
                let params: String = r.try_get("params")?;
                let from: Option<i64> = r.try_get("window_start")?;
                let to: Option<i64> = r.try_get("window_end")?;
                let kind: String = r.try_get("kind")?;
                let feeder: Option<String> = r.try_get("feeder_id")?;
                let spec = serde_json::from_str(&params)
                    .map_err(|e| format!("the stored {kind} job's params are not JSON: {e}"))
                    .and_then(|p| crate::jobspec::JobSpec::from_stored(&kind, &p, feeder.as_deref(), from.zip(to)));
                return Ok(Some(Claimed {
                    table,
                    job_id: r.try_get("job_id")?,
                    spec,
                    attempts: r.try_get("attempts")?,
                }));
            }
        }
        Ok(None)
    }

    /// Extends this worker's lease; false when the job is no longer ours (taken
    /// over after our lease ran out, or cancelled).
    pub async fn renew_lease(&self, table: JobTable, id: &str, until: i64) -> Result<bool, StoreError> {
        let _w = self.write_lock().await;
        let r = sqlx::query(&format!(
            "UPDATE {} SET lease_until = $1 WHERE job_id = $2 AND worker = $3 AND state = 'running'",
            table.name()
        ))
        .bind(until)
        .bind(id)
        .bind(&self.worker_id)
        .execute(&self.pool)
        .await?;
        Ok(r.rows_affected() == 1)
    }

    /// Cancels a queued or running job (it ends as failed, "cancelled by the
    /// operator"); false when it had already ended or does not exist.
    pub async fn cancel_job(&self, id: &str, now: i64) -> Result<bool, StoreError> {
        let _w = self.write_lock().await;
        let r = sqlx::query(&format!(
            "UPDATE {} SET state = 'failed', error = 'cancelled by the operator', finished_at = $1
             WHERE job_id = $2 AND state IN ('queued', 'running')",
            JobTable::of(id).name()
        ))
        .bind(now)
        .bind(id)
        .execute(&self.pool)
        .await?;
        Ok(r.rows_affected() == 1)
    }

    /// The most recent jobs of both tables, newest first.
    /// The newest jobs first, `limit` of them.
    pub async fn list_jobs(&self, limit: i64) -> Result<Vec<JobLine>, StoreError> {
        self.find_jobs(&JobFilter { limit, ..JobFilter::default() }).await
    }

    /// Jobs matching `filter`, newest first, one page of them.
    pub async fn find_jobs(&self, filter: &JobFilter) -> Result<Vec<JobLine>, StoreError> {
        let (sql_where, binds) = filter.where_sql(1);
        let n = binds.len();
        let sql = format!(
            "SELECT * FROM ({JOBS_SQL}) j{sql_where} ORDER BY created_at DESC, job_id LIMIT ${} OFFSET ${}",
            n + 1,
            n + 2
        );
        let mut q = sqlx::query(&sql);
        for b in &binds {
            q = q.bind(b.as_str());
        }
        let rows = q.bind(filter.limit.clamp(1, 500)).bind(filter.offset.max(0)).fetch_all(&self.pool).await?;
        rows.iter()
            .map(|r| {
                let from: Option<i64> = r.try_get("window_start")?;
                let to: Option<i64> = r.try_get("window_end")?;
                Ok(JobLine {
                    job_id: r.try_get("job_id")?,
                    kind: r.try_get("kind")?,
                    feeder_id: r.try_get("feeder_id")?,
                    window: from.zip(to),
                    state: r.try_get("state")?,
                    progress: r.try_get("progress")?,
                    message: r.try_get("message")?,
                    attempts: r.try_get("attempts")?,
                    worker: r.try_get("worker")?,
                    created_at: r.try_get("created_at")?,
                    started_at: r.try_get("started_at")?,
                    finished_at: r.try_get("finished_at")?,
                    error: r.try_get("error")?,
                })
            })
            .collect()
    }

    /// How many jobs match `filter` (all pages).
    pub async fn count_jobs(&self, filter: &JobFilter) -> Result<i64, StoreError> {
        let (sql_where, binds) = filter.where_sql(1);
        let sql = format!("SELECT COUNT(*) FROM ({JOBS_SQL}) j{sql_where}");
        let mut q = sqlx::query_scalar(&sql);
        for b in &binds {
            q = q.bind(b.as_str());
        }
        Ok(q.fetch_one(&self.pool).await?)
    }
}
