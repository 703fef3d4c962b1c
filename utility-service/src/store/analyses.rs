//! Analysis jobs (clustering, audit, calibration) and their stored results.

use serde::Serialize;
use sqlx::{Any, Row};

use super::Store;
use super::StoreError;

#[derive(Debug, Clone, Serialize)]
pub struct AnalysisRecord {
    pub job_id: String,
    pub kind: String,
    pub params: serde_json::Value,
    pub state: String,
    pub progress: f64,
    pub message: String,
    pub created_at: i64,
    pub started_at: Option<i64>,
    pub finished_at: Option<i64>,
    pub result: Option<serde_json::Value>,
    pub error: Option<String>,
}

/// One customer's cluster as stored and served.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Assignment {
    pub meter_id: String,
    pub feeder_id: String,
    pub cluster: i64,
    pub confidence: f64,
}

impl Store {
    pub async fn create_analysis(
        &self,
        id: &str,
        spec: &crate::jobspec::JobSpec,
        feeder: Option<&str>,
        now: i64,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(
            "INSERT INTO analysis_jobs (job_id, kind, feeder_id, params, state, created_at) VALUES ($1, $2, $3, $4, 'queued', $5)",
        )
        .bind(id)
        .bind(spec.kind())
        .bind(feeder)
        .bind(spec.params().to_string())
        .bind(now)
        .execute(&self.pool)
        .await?;
        Ok(())
    }

    /// Stores the result (and any cluster assignments) and marks the job done in
    /// one transaction.
    pub async fn finish_analysis(
        &self,
        id: &str,
        result: &serde_json::Value,
        assignments: &[Assignment],
        now: i64,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        Self::take_done(&mut tx, id, result, &self.worker_id, now).await?;
        for chunk in assignments.chunks(800) {
            let sql = super::values_sql(
                self.backend,
                "INSERT INTO cluster_assignments (job_id, meter_id, feeder_id, cluster, confidence)",
                chunk.len(),
                5,
                "",
            );
            let mut q = sqlx::query(&sql);
            for a in chunk {
                q = q
                    .bind(id)
                    .bind(a.meter_id.as_str())
                    .bind(a.feeder_id.as_str())
                    .bind(a.cluster)
                    .bind(a.confidence.clamp(0.0, 1.0));
            }
            q.execute(&mut *tx).await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// Marks the job done with its result if this worker still holds it.
    async fn take_done(
        tx: &mut sqlx::Transaction<'_, Any>,
        id: &str,
        result: &serde_json::Value,
        worker: &str,
        now: i64,
    ) -> Result<(), StoreError> {
        let held = sqlx::query(
            "UPDATE analysis_jobs SET state = 'done', progress = 1, message = 'done', result = $1, finished_at = $2
             WHERE job_id = $3 AND state = 'running' AND (worker IS NULL OR worker = $4)",
        )
        .bind(result.to_string())
        .bind(now)
        .bind(id)
        .bind(worker)
        .execute(&mut **tx)
        .await?;
        if held.rows_affected() != 1 {
            return Err(StoreError::Conflict(meterveil_shared::FieldError::new(
                "job_id",
                format!("job {id} is no longer held by this worker; its results were discarded"),
            )));
        }
        Ok(())
    }

    /// Marks a calibration done and, when asked, publishes its recommended
    /// profile as the feeder's next version, in one transaction. Returns the version.
    pub async fn finish_calibration(
        &self,
        id: &str,
        result: &serde_json::Value,
        publish: Option<(&meterveil_shared::FeederId, &meterveil_shared::DitherProfile)>,
        now: i64,
    ) -> Result<Option<i64>, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let version = match publish {
            Some((f, p)) => {
                let by = format!("calibration {id} (published when it finished)");
                Some(super::insert_profile(self.backend, &mut tx, f, p, (now, &by)).await?)
            }
            None => None,
        };
        let mut result = result.clone();
        result["published_version"] = version.into();
        Self::take_done(&mut tx, id, &result, &self.worker_id, now).await?;
        tx.commit().await?;
        Ok(version)
    }

    pub async fn analysis(&self, id: &str) -> Result<Option<AnalysisRecord>, StoreError> {
        let r =
            sqlx::query("SELECT * FROM analysis_jobs WHERE job_id = $1").bind(id).fetch_optional(&self.pool).await?;
        r.as_ref().map(analysis_from_row).transpose()
    }

    pub async fn assignments(&self, id: &str) -> Result<Vec<Assignment>, StoreError> {
        let rows = sqlx::query(
            "SELECT meter_id, feeder_id, cluster, confidence FROM cluster_assignments WHERE job_id = $1 ORDER BY meter_id",
        )
        .bind(id)
        .fetch_all(&self.pool)
        .await?;
        rows.iter()
            .map(|r| {
                Ok(Assignment {
                    meter_id: r.try_get(0)?,
                    feeder_id: r.try_get(1)?,
                    cluster: r.try_get(2)?,
                    confidence: r.try_get(3)?,
                })
            })
            .collect()
    }
}

/// An `analysis_jobs` row (`SELECT *`) as a record.
pub(super) fn analysis_from_row(r: &sqlx::any::AnyRow) -> Result<AnalysisRecord, StoreError> {
    let json = |s: Option<String>| s.and_then(|s| serde_json::from_str(&s).ok());
    Ok(AnalysisRecord {
        job_id: r.try_get("job_id")?,
        kind: r.try_get("kind")?,
        params: json(r.try_get("params")?).unwrap_or(serde_json::Value::Null),
        state: r.try_get("state")?,
        progress: r.try_get("progress")?,
        message: r.try_get("message")?,
        created_at: r.try_get("created_at")?,
        started_at: r.try_get("started_at")?,
        finished_at: r.try_get("finished_at")?,
        result: json(r.try_get("result")?),
        error: r.try_get("error")?,
    })
}
