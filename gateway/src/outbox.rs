//! The durable outbox: a transactional queue of levels waiting for upload.
//!
//! Rows are claimed into a batch with a stable id, uploaded, and deleted only
//! after the service acknowledged that batch. A crash between upload and delete
//! re-sends the same batch id with the same body, which the service answers with
//! the same acknowledgement.

use std::collections::HashMap;
use std::path::Path;
use std::str::FromStr;
use std::time::Duration;

use anyhow::Context;
use meterveil_shared::wire::{BatchWire, ProfileRecordWire, ReadingWire, RegisterWire};
use meterveil_shared::MeterId;
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use sqlx::{QueryBuilder, Row, Sqlite, SqlitePool};

use crate::pipeline::{LevelOut, MeterState, RegisterOut};

const CHUNK: usize = 1000;

#[derive(Clone)]
pub struct Outbox {
    pool: SqlitePool,
}

/// A claimed batch: its rows in a fixed order, so every retry sends the same body.
#[derive(Debug, Clone)]
pub struct ClaimedBatch {
    pub batch_id: String,
    /// The gateway's sequence number for this upload (the same on every retry).
    pub sequence: i64,
    pub attempts: i64,
    pub readings: Vec<ReadingWire>,
    pub registers: Vec<RegisterWire>,
}

impl ClaimedBatch {
    pub fn to_wire(&self, gateway_id: &str, feeder_id: &str) -> BatchWire {
        BatchWire {
            batch_id: self.batch_id.clone(),
            gateway_id: gateway_id.to_owned(),
            feeder_id: feeder_id.to_owned(),
            readings: self.readings.clone(),
            registers: self.registers.clone(),
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct OutboxCounts {
    pub pending_levels: i64,
    pub pending_registers: i64,
    pub open_batches: i64,
    pub refused_batches: i64,
}

fn now_s() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0)
}

impl Outbox {
    /// Opens or creates the outbox file with WAL and `synchronous = FULL`.
    /// Deleted rows are overwritten (`secure_delete`), and on opening the WAL is
    /// checkpointed and truncated, so no older page image (of an upgraded
    /// outbox's energy totals, say) outlives the rows that held it.
    pub async fn open(path: &Path) -> anyhow::Result<Self> {
        let opts = SqliteConnectOptions::from_str(&format!("sqlite:{}", path.display()))
            .with_context(|| format!("outbox path {}", path.display()))?
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Full)
            .pragma("secure_delete", "ON")
            .busy_timeout(Duration::from_secs(10));
        // One connection: the pipeline and the uploader take turns, which is all
        // a single SQLite writer allows anyway.
        let pool = SqlitePoolOptions::new()
            .max_connections(1)
            .connect_with(opts)
            .await
            .with_context(|| format!("opening outbox {}", path.display()))?;
        sqlx::migrate!("../migrations/outbox").run(&pool).await.context("outbox migrations")?;
        sqlx::query("VACUUM").execute(&pool).await.context("outbox vacuum")?;
        sqlx::query("PRAGMA wal_checkpoint(TRUNCATE)").execute(&pool).await.context("outbox checkpoint")?;
        Ok(Self { pool })
    }

    pub fn pool(&self) -> &SqlitePool {
        &self.pool
    }

    /// Loads the persisted state of these meters (absent meters get a fresh state).
    pub async fn meter_states(&self, ids: &[&MeterId]) -> anyhow::Result<HashMap<MeterId, MeterState>> {
        let mut out = HashMap::new();
        for chunk in ids.chunks(CHUNK) {
            let mut qb: QueryBuilder<Sqlite> =
                QueryBuilder::new("SELECT meter_id, last_interval_start FROM meter_state WHERE meter_id IN (");
            let mut sep = qb.separated(", ");
            for id in chunk {
                sep.push_bind(id.as_str());
            }
            sep.push_unseparated(")");
            for r in qb.build().fetch_all(&self.pool).await? {
                let id: String = r.try_get(0)?;
                // The register period's running count is not stored: after a
                // restart the interrupted period gets no read.
                let state = MeterState { last_interval_start: Some(r.try_get(1)?), register: None };
                out.insert(MeterId::parse(&id).context("stored meter id")?, state);
            }
        }
        Ok(out)
    }

    /// Queues levels and register reads, saves meter states and the source
    /// position, all in one transaction.
    pub async fn enqueue(
        &self,
        levels: &[LevelOut],
        registers: &[RegisterOut],
        states: &HashMap<MeterId, MeterState>,
        source_position: Option<(&str, i64)>,
    ) -> anyhow::Result<()> {
        let mut tx = self.pool.begin().await?;
        for chunk in levels.chunks(CHUNK) {
            let mut qb: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT OR IGNORE INTO pending_levels (meter_id, interval_start, level, profile_version) ",
            );
            qb.push_values(chunk, |mut b, l| {
                b.push_bind(l.meter_id.as_str())
                    .push_bind(l.interval_start)
                    .push_bind(i64::from(l.level))
                    .push_bind(i64::from(l.profile_version));
            });
            qb.build().execute(&mut *tx).await?;
        }
        for chunk in registers.chunks(CHUNK) {
            let mut qb: QueryBuilder<Sqlite> =
                QueryBuilder::new("INSERT OR IGNORE INTO pending_registers (meter_id, period_start, read_at, wh) ");
            qb.push_values(chunk, |mut b, g| {
                b.push_bind(g.meter_id.as_str())
                    .push_bind(g.period_start)
                    .push_bind(g.read_at)
                    .push_bind(i64::try_from(g.wh).unwrap_or(i64::MAX));
            });
            qb.build().execute(&mut *tx).await?;
        }
        let rows: Vec<(&MeterId, &MeterState)> =
            states.iter().filter(|(_, s)| s.last_interval_start.is_some()).collect();
        for chunk in rows.chunks(CHUNK) {
            let mut qb: QueryBuilder<Sqlite> =
                QueryBuilder::new("INSERT OR REPLACE INTO meter_state (meter_id, last_interval_start) ");
            qb.push_values(chunk, |mut b, (id, s)| {
                b.push_bind(id.as_str()).push_bind(s.last_interval_start);
            });
            qb.build().execute(&mut *tx).await?;
        }
        if let Some((source, pos)) = source_position {
            sqlx::query("INSERT OR REPLACE INTO source_progress (source, position) VALUES (?, ?)")
                .bind(source)
                .bind(pos)
                .execute(&mut *tx)
                .await?;
        }
        tx.commit().await?;
        Ok(())
    }

    pub async fn source_position(&self, source: &str) -> anyhow::Result<i64> {
        let pos: Option<i64> = sqlx::query_scalar("SELECT position FROM source_progress WHERE source = ?")
            .bind(source)
            .fetch_optional(&self.pool)
            .await?;
        Ok(pos.unwrap_or(0))
    }

    /// The oldest open batch, or a new one made of up to `max_rows` unclaimed
    /// readings (and up to `max_rows` register reads). `None` when nothing waits.
    pub async fn claim(&self, max_rows: usize) -> anyhow::Result<Option<ClaimedBatch>> {
        let mut tx = self.pool.begin().await?;
        let open: Option<(String, i64, Option<i64>)> =
            sqlx::query_as("SELECT batch_id, attempts, sequence FROM open_batches ORDER BY created_at, rowid LIMIT 1")
                .fetch_optional(&mut *tx)
                .await?;
        let (batch_id, attempts, sequence) = match open {
            Some((id, attempts, Some(seq))) => (id, attempts, seq),
            Some((id, attempts, None)) => {
                // A batch opened before sequence numbers existed.
                let seq = next_sequence(&mut tx).await?;
                sqlx::query("UPDATE open_batches SET sequence = ? WHERE batch_id = ?")
                    .bind(seq)
                    .bind(&id)
                    .execute(&mut *tx)
                    .await?;
                (id, attempts, seq)
            }
            None => {
                let id = uuid::Uuid::new_v4().to_string();
                let limit = max_rows as i64;
                let n = sqlx::query(
                    "UPDATE pending_levels SET batch_id = ?1 WHERE rowid IN
                     (SELECT rowid FROM pending_levels WHERE batch_id IS NULL ORDER BY rowid LIMIT ?2)",
                )
                .bind(&id)
                .bind(limit)
                .execute(&mut *tx)
                .await?
                .rows_affected();
                let g = sqlx::query(
                    "UPDATE pending_registers SET batch_id = ?1 WHERE rowid IN
                     (SELECT rowid FROM pending_registers WHERE batch_id IS NULL ORDER BY rowid LIMIT ?2)",
                )
                .bind(&id)
                .bind(limit)
                .execute(&mut *tx)
                .await?
                .rows_affected();
                if n + g == 0 {
                    return Ok(None);
                }
                let seq = next_sequence(&mut tx).await?;
                sqlx::query("INSERT INTO open_batches (batch_id, created_at, sequence) VALUES (?, ?, ?)")
                    .bind(&id)
                    .bind(now_s())
                    .bind(seq)
                    .execute(&mut *tx)
                    .await?;
                (id, 0, seq)
            }
        };
        let (readings, registers) = batch_rows(&mut tx, &batch_id).await?;
        tx.commit().await?;
        Ok(Some(ClaimedBatch { batch_id, sequence, attempts, readings, registers }))
    }

    /// The service acknowledged the batch: its rows may go.
    pub async fn acknowledge(&self, batch_id: &str) -> anyhow::Result<()> {
        let mut tx = self.pool.begin().await?;
        for table in ["pending_levels", "pending_registers"] {
            sqlx::query(&format!("DELETE FROM {table} WHERE batch_id = ?")).bind(batch_id).execute(&mut *tx).await?;
        }
        sqlx::query("DELETE FROM open_batches WHERE batch_id = ?").bind(batch_id).execute(&mut *tx).await?;
        tx.commit().await?;
        Ok(())
    }

    pub async fn record_failure(&self, batch_id: &str, error: &str) -> anyhow::Result<()> {
        sqlx::query("UPDATE open_batches SET attempts = attempts + 1, last_error = ? WHERE batch_id = ?")
            .bind(error)
            .bind(batch_id)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    /// The service refused the batch for good: keep its body and reason, free the queue.
    pub async fn refuse(&self, batch: &BatchWire, status: u16, reason: &str) -> anyhow::Result<()> {
        let mut tx = self.pool.begin().await?;
        sqlx::query(
            "INSERT OR REPLACE INTO refused_batches (batch_id, status, reason, body, refused_at) VALUES (?, ?, ?, ?, ?)",
        )
        .bind(&batch.batch_id)
        .bind(i64::from(status))
        .bind(reason)
        .bind(serde_json::to_string(batch)?)
        .bind(now_s())
        .execute(&mut *tx)
        .await?;
        for table in ["pending_levels", "pending_registers"] {
            sqlx::query(&format!("DELETE FROM {table} WHERE batch_id = ?"))
                .bind(&batch.batch_id)
                .execute(&mut *tx)
                .await?;
        }
        sqlx::query("DELETE FROM open_batches WHERE batch_id = ?").bind(&batch.batch_id).execute(&mut *tx).await?;
        tx.commit().await?;
        Ok(())
    }

    pub async fn counts(&self) -> anyhow::Result<OutboxCounts> {
        let one = |sql: &'static str| async move { sqlx::query_scalar::<_, i64>(sql).fetch_one(&self.pool).await };
        Ok(OutboxCounts {
            pending_levels: one("SELECT COUNT(*) FROM pending_levels").await?,
            pending_registers: one("SELECT COUNT(*) FROM pending_registers").await?,
            open_batches: one("SELECT COUNT(*) FROM open_batches").await?,
            refused_batches: one("SELECT COUNT(*) FROM refused_batches").await?,
        })
    }

    pub async fn cache_profile(&self, rec: &ProfileRecordWire) -> anyhow::Result<()> {
        sqlx::query("INSERT OR REPLACE INTO profile_cache (feeder_id, record) VALUES (?, ?)")
            .bind(&rec.feeder_id)
            .bind(serde_json::to_string(rec)?)
            .execute(&self.pool)
            .await?;
        Ok(())
    }

    pub async fn cached_profile(&self, feeder_id: &str) -> anyhow::Result<Option<ProfileRecordWire>> {
        let rec: Option<String> = sqlx::query_scalar("SELECT record FROM profile_cache WHERE feeder_id = ?")
            .bind(feeder_id)
            .fetch_optional(&self.pool)
            .await?;
        rec.map(|r| serde_json::from_str(&r).context("cached profile")).transpose()
    }
}

/// Takes the gateway's next upload sequence number inside `tx`.
async fn next_sequence(tx: &mut sqlx::Transaction<'_, sqlx::Sqlite>) -> anyhow::Result<i64> {
    Ok(sqlx::query_scalar("UPDATE upload_sequence SET last = last + 1 WHERE id = 1 RETURNING last")
        .fetch_one(&mut **tx)
        .await?)
}

/// The readings and register advances a batch holds, in upload order.
async fn batch_rows(
    tx: &mut sqlx::SqliteConnection,
    batch_id: &str,
) -> anyhow::Result<(Vec<ReadingWire>, Vec<RegisterWire>)> {
    let readings = sqlx::query(
        "SELECT meter_id, interval_start, level, profile_version FROM pending_levels
             WHERE batch_id = ? ORDER BY meter_id, interval_start",
    )
    .bind(batch_id)
    .fetch_all(&mut *tx)
    .await?
    .iter()
    .map(|r| {
        Ok(ReadingWire {
            meter_id: r.try_get(0)?,
            interval_start: r.try_get(1)?,
            level: r.try_get::<i64, _>(2)? as u8,
            profile_version: r.try_get::<i64, _>(3)? as u32,
        })
    })
    .collect::<Result<Vec<_>, sqlx::Error>>()?;
    let registers = sqlx::query(
        "SELECT meter_id, period_start, read_at, wh FROM pending_registers WHERE batch_id = ?
             ORDER BY meter_id, read_at",
    )
    .bind(batch_id)
    .fetch_all(&mut *tx)
    .await?
    .iter()
    .map(|r| {
        Ok(RegisterWire {
            meter_id: r.try_get(0)?,
            period_start: r.try_get(1)?,
            read_at: r.try_get(2)?,
            wh: r.try_get::<i64, _>(3)? as u64,
        })
    })
    .collect::<Result<Vec<_>, sqlx::Error>>()?;
    Ok((readings, registers))
}
