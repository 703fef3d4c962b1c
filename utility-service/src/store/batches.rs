//! Ingest batches stored in groups: the state a group of uploads is checked
//! against, read with a few statements for the whole group, and the group's rows
//! written in one transaction with multi-row statements.
//!
//! Every write is conditional (`ON CONFLICT DO NOTHING`, `last_sequence <`,
//! `key_generation =`) and its row count is checked, so a group that raced with
//! another writer (a second process on the same database) is rolled back whole
//! and the caller retries its uploads one by one.

use meterveil_shared::wire::AckWire;
use meterveil_shared::FeederId;
use sqlx::{AnyConnection, Connection, Row};

use super::StoreError;
use super::INSERT_CHUNK;
use super::{placeholders, profile_from_row, stored_batch_from_row, values_sql, Store};
use crate::ingest::ValidatedBatch;

/// Ids per `IN (…)` list.
const IN_CHUNK: usize = 500;

pub use crate::records::GroupState;

/// What a group names, for [`Store::group_state`].
#[derive(Debug, Default)]
pub struct GroupKeys<'a> {
    pub gateways: Vec<&'a str>,
    pub sequences: Vec<(&'a str, i64)>,
    pub batch_ids: Vec<&'a str>,
    pub feeders: Vec<&'a str>,
    pub meters: Vec<&'a str>,
}

/// A validated batch ready to be written, with the signed upload's sequence
/// number and the key generation its signature was checked with.
#[derive(Debug)]
pub struct Accepted {
    pub batch: ValidatedBatch,
    pub sequence: i64,
    pub key_generation: i64,
}

impl Store {
    /// Reads what `keys` names; ids that are not stored are simply absent.
    pub async fn group_state(&self, conn: &mut AnyConnection, keys: &GroupKeys<'_>) -> Result<GroupState, StoreError> {
        let mut st = GroupState::default();
        for chunk in keys.gateways.chunks(IN_CHUNK) {
            let sql = format!(
                "SELECT gateway_id, feeder_id, key_generation, last_sequence FROM gateways WHERE gateway_id IN ({})",
                placeholders(1, chunk.len())
            );
            let mut q = sqlx::query_as::<_, (String, String, i64, i64)>(&sql).persistent(chunk.len() == IN_CHUNK);
            for id in chunk {
                q = q.bind(*id);
            }
            for (g, f, k, s) in q.fetch_all(&mut *conn).await? {
                st.gateways.insert(g, (f, k, s));
            }
        }
        for chunk in keys.sequences.chunks(IN_CHUNK) {
            let sql = values_sql(
                self.backend,
                "SELECT gateway_id, sequence, body_sha256, batch_id FROM gateway_sequences \
                 WHERE (gateway_id, sequence) IN (",
                chunk.len(),
                2,
                ")",
            );
            let mut q = sqlx::query_as::<_, (String, i64, String, String)>(&sql).persistent(chunk.len() == IN_CHUNK);
            for (g, s) in chunk {
                q = q.bind(*g).bind(*s);
            }
            for (g, s, h, b) in q.fetch_all(&mut *conn).await? {
                st.sequences.insert((g, s), (h, b));
            }
        }
        for chunk in keys.batch_ids.chunks(IN_CHUNK) {
            let sql = format!(
                "SELECT batch_id, body_sha256, ack FROM ingest_batches WHERE batch_id IN ({})",
                placeholders(1, chunk.len())
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == IN_CHUNK);
            for id in chunk {
                q = q.bind(*id);
            }
            for r in q.fetch_all(&mut *conn).await? {
                st.batches.insert(r.try_get("batch_id")?, stored_batch_from_row(&r)?);
            }
        }
        for chunk in keys.feeders.chunks(IN_CHUNK) {
            let sql = format!(
                "SELECT feeder_id, version, noise, scale_kw, boundaries_kw, interval_s, send_registers, register_period, created_at, in_use,
                 published_by, first_used_at FROM dither_profiles WHERE feeder_id IN ({}) ORDER BY feeder_id, version",
                placeholders(1, chunk.len())
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == IN_CHUNK);
            for id in chunk {
                q = q.bind(*id);
            }
            for r in q.fetch_all(&mut *conn).await? {
                let id: String = r.try_get("feeder_id")?;
                let feeder = FeederId::parse(&id).map_err(|e| anyhow::anyhow!("stored feeder id: {e}"))?;
                let rec = profile_from_row(&feeder, &r)?;
                st.profiles.entry(id).or_default().push(rec);
            }
        }
        for chunk in keys.meters.chunks(IN_CHUNK) {
            let sql =
                format!("SELECT meter_id, feeder_id FROM meters WHERE meter_id IN ({})", placeholders(1, chunk.len()));
            let mut q = sqlx::query_as::<_, (String, String)>(&sql).persistent(chunk.len() == IN_CHUNK);
            for id in chunk {
                q = q.bind(*id);
            }
            st.meter_feeders.extend(q.fetch_all(&mut *conn).await?);
        }
        Ok(st)
    }

    /// Writes every batch of `group` in one transaction and returns their
    /// acknowledgements, in order. `Ok(None)`: another writer got in first (a
    /// sequence number, key rotation or batch id moved, or, in a group of more
    /// than one, a reading was already stored, so the per-batch counts are not
    /// known); nothing was written and each batch should be retried alone, where
    /// the stored state then decides it.
    pub async fn write_group(
        &self,
        conn: &mut AnyConnection,
        group: &[Accepted],
        now: i64,
    ) -> Result<Option<Vec<AckWire>>, StoreError> {
        if group.is_empty() {
            return Ok(Some(Vec::new()));
        }
        let _w = self.write_lock().await;
        let mut tx = conn.begin().await?;
        let (readings, stored_readings) = self.insert_readings(&mut tx, group).await?;
        let (registers, stored_registers) = self.insert_registers(&mut tx, group).await?;
        if group.len() > 1 && (stored_readings != readings || stored_registers != registers) {
            tx.rollback().await?;
            return Ok(None);
        }
        if !self.advance_sequences(&mut tx, group).await? {
            tx.rollback().await?;
            return Ok(None);
        }
        mark_versions_in_use(&mut tx, group, now).await?;
        let acks = acks_for(group, stored_readings, stored_registers);
        if !self.insert_batches(&mut tx, group, &acks, now).await? {
            tx.rollback().await?;
            return Ok(None);
        }
        tx.commit().await?;
        Ok(Some(acks))
    }

    /// Inserts the group's readings; returns (readings, rows stored).
    async fn insert_readings(&self, tx: &mut AnyConnection, group: &[Accepted]) -> Result<(u64, u64), StoreError> {
        let readings: Vec<_> =
            group.iter().flat_map(|a| a.batch.readings.iter().map(move |r| (r, a.batch.batch_id.as_str()))).collect();
        let mut stored = 0;
        for chunk in readings.chunks(INSERT_CHUNK) {
            let sql = values_sql(
                self.backend,
                "INSERT INTO readings (meter_id, interval_start, level, profile_version, batch_id)",
                chunk.len(),
                5,
                "ON CONFLICT DO NOTHING",
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == INSERT_CHUNK);
            for (r, batch_id) in chunk {
                q = q
                    .bind(r.meter_id.as_str())
                    .bind(r.interval_start)
                    .bind(i64::from(r.level))
                    .bind(i64::from(r.profile_version))
                    .bind(*batch_id);
            }
            stored += q.execute(&mut *tx).await?.rows_affected();
        }
        Ok((readings.len() as u64, stored))
    }

    /// Inserts the group's register advances; returns (advances, rows stored).
    async fn insert_registers(&self, tx: &mut AnyConnection, group: &[Accepted]) -> Result<(u64, u64), StoreError> {
        let registers: Vec<_> =
            group.iter().flat_map(|a| a.batch.registers.iter().map(move |r| (r, a.batch.batch_id.as_str()))).collect();
        let mut stored = 0;
        for chunk in registers.chunks(INSERT_CHUNK) {
            let sql = values_sql(
                self.backend,
                "INSERT INTO register_advances (meter_id, period_start, read_at, wh, batch_id)",
                chunk.len(),
                5,
                "ON CONFLICT DO NOTHING",
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == INSERT_CHUNK);
            for (r, batch_id) in chunk {
                // wh was checked to fit an i64 during validation.
                q = q.bind(r.meter_id.as_str()).bind(r.period_start).bind(r.read_at).bind(r.wh as i64).bind(*batch_id);
            }
            stored += q.execute(&mut *tx).await?.rows_affected();
        }
        Ok((registers.len() as u64, stored))
    }

    /// Moves each gateway's last sequence forward and records the sequence;
    /// false when another writer got there first (the group is rolled back).
    async fn advance_sequences(&self, tx: &mut AnyConnection, group: &[Accepted]) -> Result<bool, StoreError> {
        // Each gateway appears at most once in a group (the committer sees to it).
        let mut moved = 0;
        for chunk in group.chunks(INSERT_CHUNK) {
            let sql = values_sql(
                self.backend,
                "WITH v (gid, seq, gen) AS (",
                chunk.len(),
                3,
                ") UPDATE gateways SET last_sequence = v.seq FROM v
                 WHERE gateways.gateway_id = v.gid AND gateways.key_generation = v.gen
                   AND gateways.last_sequence < v.seq",
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == INSERT_CHUNK);
            for a in chunk {
                q = q.bind(a.batch.gateway_id.as_str()).bind(a.sequence).bind(a.key_generation);
            }
            moved += q.execute(&mut *tx).await?.rows_affected();
        }
        let mut recorded = 0;
        for chunk in group.chunks(INSERT_CHUNK) {
            let sql = values_sql(
                self.backend,
                "INSERT INTO gateway_sequences (gateway_id, sequence, body_sha256, batch_id)",
                chunk.len(),
                4,
                "ON CONFLICT DO NOTHING",
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == INSERT_CHUNK);
            for a in chunk {
                let b = &a.batch;
                q = q.bind(b.gateway_id.as_str()).bind(a.sequence).bind(&b.body_sha256).bind(&b.batch_id);
            }
            recorded += q.execute(&mut *tx).await?.rows_affected();
        }
        Ok(moved == group.len() as u64 && recorded == group.len() as u64)
    }

    /// Records each batch with its acknowledgement; false when one was
    /// recorded by another writer first.
    async fn insert_batches(
        &self,
        tx: &mut AnyConnection,
        group: &[Accepted],
        acks: &[AckWire],
        now: i64,
    ) -> Result<bool, StoreError> {
        let mut inserted = 0;
        for (chunk, chunk_acks) in group.chunks(INSERT_CHUNK).zip(acks.chunks(INSERT_CHUNK)) {
            let sql = values_sql(
                self.backend,
                "INSERT INTO ingest_batches (batch_id, gateway_id, feeder_id, body_sha256, received_at, ack)",
                chunk.len(),
                6,
                "ON CONFLICT DO NOTHING",
            );
            let mut q = sqlx::query(&sql).persistent(chunk.len() == INSERT_CHUNK);
            for (a, ack) in chunk.iter().zip(chunk_acks) {
                let b = &a.batch;
                q = q
                    .bind(b.batch_id.as_str())
                    .bind(b.gateway_id.as_str())
                    .bind(b.feeder_id.as_str())
                    .bind(b.body_sha256.as_str())
                    .bind(now)
                    .bind(serde_json::to_string(ack).map_err(anyhow::Error::from)?);
            }
            inserted += q.execute(&mut *tx).await?.rows_affected();
        }
        Ok(inserted == group.len() as u64)
    }
}

/// Marks the profile versions the group's readings used for the first time.
async fn mark_versions_in_use(tx: &mut AnyConnection, group: &[Accepted], now: i64) -> Result<(), StoreError> {
    let mut first_use: Vec<(&str, u32)> = group
        .iter()
        .flat_map(|a| a.batch.versions_used.iter().map(move |v| (a.batch.feeder_id.as_str(), *v)))
        .collect();
    first_use.sort_unstable();
    first_use.dedup();
    for (feeder, v) in first_use {
        sqlx::query(
            "UPDATE dither_profiles SET in_use = 1, first_used_at = $3 WHERE feeder_id = $1 AND version = $2 AND in_use = 0",
        )
        .bind(feeder)
        .bind(i64::from(v))
        .bind(now)
            .execute(&mut *tx)
            .await?;
    }
    Ok(())
}

/// Each batch's acknowledgement. Alone, a batch's own counts are exact; in a
/// larger group every row was new (checked before).
fn acks_for(group: &[Accepted], stored_readings: u64, stored_registers: u64) -> Vec<AckWire> {
    group
        .iter()
        .map(|a| {
            let b = &a.batch;
            let (r, g) = if group.len() == 1 {
                (stored_readings, stored_registers)
            } else {
                (b.readings.len() as u64, b.registers.len() as u64)
            };
            AckWire {
                batch_id: b.batch_id.clone(),
                stored_readings: r,
                duplicate_readings: b.readings.len() as u64 - r,
                stored_registers: g,
                duplicate_registers: b.registers.len() as u64 - g,
            }
        })
        .collect()
}
