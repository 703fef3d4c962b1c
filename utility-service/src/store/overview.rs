//! What the dashboard's feeder overview reads: each feeder's latest finished
//! recovery and analyses, and its targets.

use sqlx::Row;

use super::analyses::AnalysisRecord;
use super::recoveries::JobRecord;
use super::{Store, StoreError};

/// What the dashboard lists about a feeder: nothing that grows with its
/// stored readings, so that the pages stay quick at utility size.
#[derive(Debug, Clone)]
pub struct FeederHeader {
    pub feeder_id: String,
    pub meters: i64,
    /// The feeder's IANA time zone.
    pub time_zone: String,
    pub current_profile: Option<meterveil_shared::wire::ProfileRecordWire>,
}

/// A feeder's privacy and accuracy targets.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FeederTargets {
    pub event_f1_max: f64,
    pub daily_energy_error_max: f64,
}

impl Store {
    /// Every feeder with its meter count, zone and current profile.
    pub async fn feeder_headers(&self) -> Result<Vec<FeederHeader>, StoreError> {
        let rows = sqlx::query(
            "SELECT f.feeder_id, f.time_zone, (SELECT COUNT(*) FROM meters m WHERE m.feeder_id = f.feeder_id)
             FROM feeders f ORDER BY f.feeder_id",
        )
        .fetch_all(&self.pool)
        .await?;
        let mut out = Vec::with_capacity(rows.len());
        for r in rows {
            let feeder_id: String = r.try_get(0)?;
            let tz: Option<String> = r.try_get(1)?;
            let tz = tz.unwrap_or_else(|| "UTC".into());
            let id =
                meterveil_shared::FeederId::parse(&feeder_id).map_err(|e| anyhow::anyhow!("stored feeder id: {e}"))?;
            out.push(FeederHeader {
                current_profile: self.current_profile(&id).await?.map(|p| p.to_wire(&tz)),
                meters: r.try_get(2)?,
                time_zone: tz,
                feeder_id,
            });
        }
        Ok(out)
    }

    /// The start of the feeder's newest stored interval: one index seek per meter.
    pub async fn newest_reading(&self, feeder: &str) -> Result<Option<i64>, StoreError> {
        Ok(sqlx::query_scalar(
            "SELECT MAX(newest) FROM (SELECT (SELECT MAX(r.interval_start) FROM readings r WHERE r.meter_id = m.meter_id)
             AS newest FROM meters m WHERE m.feeder_id = $1) AS per_meter",
        )
        .bind(feeder)
        .fetch_one(&self.pool)
        .await?)
    }

    /// How many of the feeder's readings start in (after, upto].
    pub async fn readings_between(&self, feeder: &str, after: i64, upto: i64) -> Result<i64, StoreError> {
        Ok(sqlx::query_scalar(
            "SELECT COUNT(*) FROM readings r JOIN meters m ON m.meter_id = r.meter_id
             WHERE m.feeder_id = $1 AND r.interval_start > $2 AND r.interval_start <= $3",
        )
        .bind(feeder)
        .bind(after)
        .bind(upto)
        .fetch_one(&self.pool)
        .await?)
    }

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
