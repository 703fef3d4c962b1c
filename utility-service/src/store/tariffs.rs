//! Each feeder's tariff calendars, versioned.

use meterveil_shared::FeederId;

use super::{Store, StoreError};

/// One stored calendar: its version, name, the file as given and when.
#[derive(Debug, Clone, serde::Serialize)]
pub struct TariffRecord {
    pub version: i64,
    pub name: String,
    #[serde(skip)]
    pub body: String,
    pub created_at: i64,
}

impl Store {
    /// Stores a checked calendar as the feeder's next version; returns it.
    pub async fn add_tariff(&self, feeder: &FeederId, name: &str, body: &str, now: i64) -> Result<i64, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let last: Option<i64> = sqlx::query_scalar("SELECT MAX(version) FROM tariff_calendars WHERE feeder_id = $1")
            .bind(feeder.as_str())
            .fetch_one(&mut *tx)
            .await?;
        let version = last.unwrap_or(0) + 1;
        sqlx::query(
            "INSERT INTO tariff_calendars (feeder_id, version, name, body, created_at) VALUES ($1, $2, $3, $4, $5)",
        )
        .bind(feeder.as_str())
        .bind(version)
        .bind(name)
        .bind(body)
        .bind(now)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(version)
    }

    /// The feeder's calendars, oldest first.
    pub async fn tariffs(&self, feeder: &FeederId) -> Result<Vec<TariffRecord>, StoreError> {
        let rows: Vec<(i64, String, String, i64)> = sqlx::query_as(
            "SELECT version, name, body, created_at FROM tariff_calendars WHERE feeder_id = $1 ORDER BY version",
        )
        .bind(feeder.as_str())
        .fetch_all(&self.pool)
        .await?;
        Ok(rows
            .into_iter()
            .map(|(version, name, body, created_at)| TariffRecord { version, name, body, created_at })
            .collect())
    }
}
