//! What the dashboard's feeder overview reads: each feeder's latest finished
//! recovery and analyses, and its targets.

use sqlx::Row;

use super::analyses::AnalysisRecord;
use super::recoveries::JobRecord;
use super::{Store, StoreError};

/// A feeder's privacy and accuracy targets.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FeederTargets {
    pub event_f1_max: f64,
    pub daily_energy_error_max: f64,
}

impl Store {
    /// The feeder's newest finished recovery.
    pub async fn latest_recovery(&self, feeder: &str) -> Result<Option<JobRecord>, StoreError> {
        let id: Option<String> = sqlx::query_scalar(
            "SELECT job_id FROM recovery_jobs WHERE feeder_id = $1 AND state = 'done'
             ORDER BY finished_at DESC, job_id DESC LIMIT 1",
        )
        .bind(feeder)
        .fetch_optional(&self.pool)
        .await?;
        match id {
            Some(id) => self.job(&id).await,
            None => Ok(None),
        }
    }

    /// The feeder's newest finished analysis of `kind` (`audit`, `calibrate`).
    pub async fn latest_analysis(&self, feeder: &str, kind: &str) -> Result<Option<AnalysisRecord>, StoreError> {
        let id: Option<String> = sqlx::query_scalar(
            "SELECT job_id FROM analysis_jobs WHERE feeder_id = $1 AND kind = $2 AND state = 'done'
             ORDER BY finished_at DESC, job_id DESC LIMIT 1",
        )
        .bind(feeder)
        .bind(kind)
        .fetch_optional(&self.pool)
        .await?;
        match id {
            Some(id) => self.analysis(&id).await,
            None => Ok(None),
        }
    }

    /// Publishes a finished calibration's recommendation as the feeder's next
    /// profile version and marks the calibration published, in one
    /// transaction; `Conflict` when it was published before (by anyone).
    pub async fn publish_recommendation(
        &self,
        calibration: &str,
        feeder: &meterveil_shared::FeederId,
        profile: &meterveil_shared::DitherProfile,
        (now, who): (i64, &str),
    ) -> Result<i64, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let lock = if self.backend == super::Backend::Postgres { " FOR UPDATE" } else { "" };
        let stored: Option<String> =
            sqlx::query_scalar(&format!("SELECT result FROM analysis_jobs WHERE job_id = $1{lock}"))
                .bind(calibration)
                .fetch_optional(&mut *tx)
                .await?
                .flatten();
        let mut result: serde_json::Value =
            stored.and_then(|s| serde_json::from_str(&s).ok()).unwrap_or(serde_json::Value::Null);
        if !result["published_version"].is_null() {
            return Err(StoreError::Conflict(meterveil_shared::FieldError::new(
                "job_id",
                format!("calibration {calibration} was published before, as version {}", result["published_version"]),
            )));
        }
        let by = format!("{who} (dashboard), from calibration {calibration}");
        let version = super::insert_profile(self.backend, &mut tx, feeder, profile, (now, &by)).await?;
        result["published_version"] = version.into();
        sqlx::query("UPDATE analysis_jobs SET result = $1 WHERE job_id = $2")
            .bind(result.to_string())
            .bind(calibration)
            .execute(&mut *tx)
            .await?;
        tx.commit().await?;
        Ok(version)
    }

    pub async fn feeder_targets(&self, feeder: &str) -> Result<Option<FeederTargets>, StoreError> {
        let row = sqlx::query("SELECT event_f1_max, daily_energy_error_max FROM feeder_targets WHERE feeder_id = $1")
            .bind(feeder)
            .fetch_optional(&self.pool)
            .await?;
        Ok(match row {
            Some(r) => Some(FeederTargets {
                event_f1_max: r.try_get("event_f1_max")?,
                daily_energy_error_max: r.try_get("daily_energy_error_max")?,
            }),
            None => None,
        })
    }

    pub async fn set_feeder_targets(&self, feeder: &str, t: FeederTargets, now: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        sqlx::query(
            "INSERT INTO feeder_targets (feeder_id, event_f1_max, daily_energy_error_max, updated_at) VALUES ($1, $2, $3, $4)
             ON CONFLICT (feeder_id) DO UPDATE SET event_f1_max = $2, daily_energy_error_max = $3, updated_at = $4",
        )
        .bind(feeder)
        .bind(t.event_f1_max)
        .bind(t.daily_energy_error_max)
        .bind(now)
        .execute(&self.pool)
        .await?;
        Ok(())
    }
}
