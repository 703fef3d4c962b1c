//! Groups of meters an operator names, for group loads.

use meterveil_shared::{FieldError, MeterId};

use super::{Store, StoreError};

/// At most this many meters in one group.
pub const MAX_GROUP_METERS: usize = 100_000;

impl Store {
    /// Replaces a group's members. Every meter must be registered; a meter
    /// that is not, or is named twice, fails the whole definition with its
    /// position, and nothing is changed.
    pub async fn define_group(&self, name: &str, meters: &[MeterId], now: i64) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let mut seen = std::collections::HashSet::new();
        for (i, m) in meters.iter().enumerate() {
            let known = sqlx::query("SELECT 1 FROM meters WHERE meter_id = $1")
                .bind(m.as_str())
                .fetch_optional(&mut *tx)
                .await?
                .is_some();
            let field = format!("meters[{i}]");
            if !known {
                return Err(StoreError::NotFound(FieldError::new(field, format!("meter {m} is not registered"))));
            }
            if !seen.insert(m.as_str()) {
                return Err(StoreError::Conflict(FieldError::new(field, format!("meter {m} is named twice"))));
            }
        }
        sqlx::query("DELETE FROM meter_groups WHERE group_name = $1").bind(name).execute(&mut *tx).await?;
        for m in meters {
            sqlx::query("INSERT INTO meter_groups (group_name, meter_id, defined_at) VALUES ($1, $2, $3)")
                .bind(name)
                .bind(m.as_str())
                .bind(now)
                .execute(&mut *tx)
                .await?;
        }
        tx.commit().await?;
        Ok(())
    }

    /// A group's members, in order; empty when no such group.
    pub async fn group_members(&self, name: &str) -> Result<Vec<String>, StoreError> {
        Ok(sqlx::query_scalar("SELECT meter_id FROM meter_groups WHERE group_name = $1 ORDER BY meter_id")
            .bind(name)
            .fetch_all(&self.pool)
            .await?)
    }
}
