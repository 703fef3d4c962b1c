//! Provisioned gateways and their accepted sequence numbers.

use meterveil_shared::FeederId;

use super::Store;
use super::StoreError;

#[derive(Debug, Clone)]
pub struct GatewayRecord {
    pub gateway_id: String,
    pub feeder_id: String,
    pub key_generation: i64,
    pub last_sequence: i64,
}

impl Store {
    /// Provisions a gateway on a feeder, or rotates an existing one's key (and
    /// moves it to `feeder`). Returns the new key generation.
    pub async fn provision_gateway(&self, id: &str, feeder: &FeederId, now: i64) -> Result<i64, StoreError> {
        let _w = self.write_lock().await;
        let generation: i64 = sqlx::query_scalar(
            "INSERT INTO gateways (gateway_id, feeder_id, key_generation, created_at) VALUES ($1, $2, 1, $3)
             ON CONFLICT (gateway_id) DO UPDATE SET key_generation = gateways.key_generation + 1, feeder_id = $2
             RETURNING key_generation",
        )
        .bind(id)
        .bind(feeder.as_str())
        .bind(now)
        .fetch_one(&self.pool)
        .await?;
        Ok(generation)
    }

    pub async fn gateway(&self, id: &str) -> Result<Option<GatewayRecord>, StoreError> {
        let r: Option<(String, String, i64, i64)> = sqlx::query_as(
            "SELECT gateway_id, feeder_id, key_generation, last_sequence FROM gateways WHERE gateway_id = $1",
        )
        .bind(id)
        .fetch_optional(&self.pool)
        .await?;
        Ok(r.map(|(gateway_id, feeder_id, key_generation, last_sequence)| GatewayRecord {
            gateway_id,
            feeder_id,
            key_generation,
            last_sequence,
        }))
    }

    /// The body hash and batch id an accepted sequence number carried.
    pub async fn sequence_record(&self, gateway: &str, sequence: i64) -> Result<Option<(String, String)>, StoreError> {
        Ok(sqlx::query_as(
            "SELECT body_sha256, batch_id FROM gateway_sequences WHERE gateway_id = $1 AND sequence = $2",
        )
        .bind(gateway)
        .bind(sequence)
        .fetch_optional(&self.pool)
        .await?)
    }
}
