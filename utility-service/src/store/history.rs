//! What the dashboard's feeder page reads: a feeder's finished recoveries and
//! analyses, newest first, and the actions operators took on it.

use sqlx::Row;

use super::analyses::{analysis_from_row, AnalysisRecord};
use super::recoveries::{job_from_row, JobRecord};
use super::{Store, StoreError};

/// One recorded dashboard action.
#[derive(Debug, Clone)]
pub struct ActionLine {
    pub at: i64,
    pub who: String,
    pub action: String,
    pub detail: String,
}

impl Store {
    /// The feeder's newest `limit` finished recoveries (done or failed).
    pub async fn feeder_recoveries(&self, feeder: &str, limit: i64) -> Result<Vec<JobRecord>, StoreError> {
        let rows = sqlx::query(
            "SELECT * FROM recovery_jobs WHERE feeder_id = $1 AND state IN ('done', 'failed')
             ORDER BY finished_at DESC, job_id DESC LIMIT $2",
        )
        .bind(feeder)
        .bind(limit)
        .fetch_all(&self.pool)
        .await?;
        rows.iter().map(job_from_row).collect()
    }

    /// The feeder's newest `limit` finished analyses of `kind` (done or failed).
    pub async fn feeder_analyses(
        &self,
        feeder: &str,
        kind: &str,
        limit: i64,
    ) -> Result<Vec<AnalysisRecord>, StoreError> {
        let rows = sqlx::query(
            "SELECT * FROM analysis_jobs WHERE feeder_id = $1 AND kind = $2 AND state IN ('done', 'failed')
             ORDER BY finished_at DESC, job_id DESC LIMIT $3",
        )
        .bind(feeder)
        .bind(kind)
        .bind(limit)
        .fetch_all(&self.pool)
        .await?;
        rows.iter().map(analysis_from_row).collect()
    }

    /// The profile version each of the feeder's recoveries used.
    pub async fn recovery_versions(&self, feeder: &str) -> Result<Vec<(String, Option<i64>)>, StoreError> {
        let rows = sqlx::query("SELECT job_id, profile_version FROM recovery_jobs WHERE feeder_id = $1")
            .bind(feeder)
            .fetch_all(&self.pool)
            .await?;
        rows.iter().map(|r| Ok((r.try_get("job_id")?, r.try_get("profile_version")?))).collect()
    }

    /// The newest `limit` actions whose details name `needle` (a feeder id).
    pub async fn actions_naming(&self, needle: &str, limit: i64) -> Result<Vec<ActionLine>, StoreError> {
        let rows = sqlx::query(
            "SELECT at, operator_name, action, detail FROM dashboard_actions WHERE detail LIKE $1 ORDER BY at DESC LIMIT $2",
        )
        .bind(format!("%{needle}%"))
        .bind(limit)
        .fetch_all(&self.pool)
        .await?;
        rows.iter()
            .map(|r| {
                Ok(ActionLine {
                    at: r.try_get("at")?,
                    who: r.try_get("operator_name")?,
                    action: r.try_get("action")?,
                    detail: r.try_get("detail")?,
                })
            })
            .collect()
    }
}
