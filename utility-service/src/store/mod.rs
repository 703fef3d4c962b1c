//! Storage behind one type. SQL lives here and nowhere else.
//!
//! SQLite is the embedded default: one file, WAL journal, `synchronous = FULL`, so
//! an acknowledged batch survives power loss. Writes go through one async mutex:
//! SQLite has a single writer anyway, and queuing in-process avoids `SQLITE_BUSY`
//! on lock upgrades.

use std::str::FromStr;
use std::time::Duration;

use anyhow::Context;
use meterveil_shared::wire::AckWire;
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId, FieldError, MeterId, ProfileVersion};
use sqlx::sqlite::{SqliteConnectOptions, SqliteJournalMode, SqlitePoolOptions, SqliteSynchronous};
use sqlx::{QueryBuilder, Row, Sqlite, SqlitePool};
use tokio::sync::Mutex;

use crate::error::ApiError;
use crate::ingest::ValidatedBatch;

pub mod analyses;
pub mod gateways;
pub mod queue;

pub mod recoveries;

/// Rows per multi-row INSERT; 1000 rows of 5 values stays far below SQLite's
/// 32766 bound on statement parameters.
const INSERT_CHUNK: usize = 1000;

#[derive(Debug, Clone)]
pub struct ProfileRecord {
    pub feeder_id: FeederId,
    pub version: ProfileVersion,
    /// UTC epoch seconds of publication.
    pub created_at: i64,
    pub profile: DitherProfile,
    pub in_use: bool,
}

impl ProfileRecord {
    pub fn to_wire(&self) -> meterveil_shared::wire::ProfileRecordWire {
        meterveil_shared::wire::ProfileRecordWire {
            feeder_id: self.feeder_id.to_string(),
            version: self.version.0,
            created_at: self.created_at,
            profile: self.profile.to_spec(),
        }
    }
}

#[derive(Debug, Clone, PartialEq, Eq)]
pub struct StoredBatch {
    pub body_sha256: String,
    pub ack: AckWire,
}

/// What happened to a batch at commit.
#[derive(Debug)]
pub enum CommitOutcome {
    Stored(AckWire),
    /// The batch id was stored before (possibly by a concurrent request).
    AlreadyStored(StoredBatch),
}

#[derive(Debug, Clone, serde::Serialize)]
pub struct FeederSummary {
    pub feeder_id: String,
    pub name: String,
    pub meters: i64,
    pub readings: i64,
    pub register_reads: i64,
    pub current_profile: Option<meterveil_shared::wire::ProfileRecordWire>,
}

#[derive(Clone)]
pub struct Store {
    pool: SqlitePool,
    writer: std::sync::Arc<Mutex<()>>,
    /// Identifies this process as a job worker in lease columns.
    worker_id: String,
}

impl Store {
    /// Opens (creating if missing) the database at `url` (`sqlite:PATH` or a path)
    /// and applies the migrations in `migrations/sqlite`.
    pub async fn open(url: &str) -> anyhow::Result<Self> {
        let url = if url.starts_with("sqlite:") { url.to_owned() } else { format!("sqlite:{url}") };
        let opts = SqliteConnectOptions::from_str(&url)
            .with_context(|| format!("DATABASE_URL {url:?} is not a SQLite URL"))?
            .create_if_missing(true)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Full)
            .foreign_keys(true)
            .busy_timeout(Duration::from_secs(10));
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            .connect_with(opts)
            .await
            .with_context(|| format!("opening database {url}"))?;
        sqlx::migrate!("../migrations/sqlite").run(&pool).await.context("applying migrations")?;
        let worker_id = {
            use rand::Rng;
            format!("w-{}-{:08x}", std::process::id(), rand::rng().random::<u32>())
        };
        Ok(Self { pool, writer: std::sync::Arc::new(Mutex::new(())), worker_id })
    }

    pub fn pool(&self) -> &SqlitePool {
        &self.pool
    }

    /// Registers a feeder. Returns false when it already existed (same id).
    pub async fn create_feeder(&self, id: &FeederId, name: &str, time_zone: &str, now: i64) -> Result<bool, ApiError> {
        let _w = self.writer.lock().await;
        let r =
            sqlx::query("INSERT OR IGNORE INTO feeders (feeder_id, name, time_zone, created_at) VALUES (?, ?, ?, ?)")
                .bind(id.as_str())
                .bind(name)
                .bind(time_zone)
                .bind(now)
                .execute(&self.pool)
                .await?;
        Ok(r.rows_affected() == 1)
    }

    /// The feeder's IANA time zone name, or None when it is not registered.
    pub async fn feeder_time_zone(&self, id: &FeederId) -> Result<Option<String>, ApiError> {
        Ok(sqlx::query_scalar("SELECT time_zone FROM feeders WHERE feeder_id = ?")
            .bind(id.as_str())
            .fetch_optional(&self.pool)
            .await?)
    }

    pub async fn feeder_exists(&self, id: &FeederId) -> Result<bool, ApiError> {
        let row = sqlx::query("SELECT 1 FROM feeders WHERE feeder_id = ?")
            .bind(id.as_str())
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.is_some())
    }

    /// Registers meters on a feeder. Meters already on this feeder are counted, not
    /// an error; a meter registered on another feeder is a 409 and nothing is added.
    pub async fn add_meters(&self, feeder: &FeederId, ids: &[MeterId], now: i64) -> Result<(u64, u64), ApiError> {
        let _w = self.writer.lock().await;
        let mut tx = self.pool.begin().await?;
        let mut added = 0;
        for (i, id) in ids.iter().enumerate() {
            let existing: Option<String> = sqlx::query_scalar("SELECT feeder_id FROM meters WHERE meter_id = ?")
                .bind(id.as_str())
                .fetch_optional(&mut *tx)
                .await?;
            match existing {
                Some(f) if f == feeder.as_str() => {}
                Some(f) => {
                    return Err(ApiError::Conflict(FieldError::new(
                        format!("meter_ids[{i}]"),
                        format!("meter {id} is already registered on feeder {f}"),
                    )))
                }
                None => {
                    sqlx::query("INSERT INTO meters (meter_id, feeder_id, created_at) VALUES (?, ?, ?)")
                        .bind(id.as_str())
                        .bind(feeder.as_str())
                        .bind(now)
                        .execute(&mut *tx)
                        .await?;
                    added += 1;
                }
            }
        }
        tx.commit().await?;
        Ok((added, ids.len() as u64 - added))
    }

    /// The subset of `ids` registered on `feeder`.
    pub async fn meters_of(&self, feeder: &FeederId) -> Result<Vec<String>, ApiError> {
        Ok(sqlx::query_scalar("SELECT meter_id FROM meters WHERE feeder_id = ? ORDER BY meter_id")
            .bind(feeder.as_str())
            .fetch_all(&self.pool)
            .await?)
    }

    /// All versions of a feeder's profile, oldest first.
    pub async fn profiles(&self, feeder: &FeederId) -> Result<Vec<ProfileRecord>, ApiError> {
        let rows = sqlx::query(
            "SELECT version, noise, scale_kw, boundaries_kw, interval_s, send_registers, created_at, in_use
             FROM dither_profiles WHERE feeder_id = ? ORDER BY version",
        )
        .bind(feeder.as_str())
        .fetch_all(&self.pool)
        .await?;
        rows.into_iter().map(|r| profile_from_row(feeder, &r)).collect()
    }

    pub async fn current_profile(&self, feeder: &FeederId) -> Result<Option<ProfileRecord>, ApiError> {
        Ok(self.profiles(feeder).await?.pop())
    }

    /// Publishes `profile` as the feeder's next version.
    pub async fn publish_profile(
        &self,
        feeder: &FeederId,
        profile: &DitherProfile,
        now: i64,
    ) -> Result<ProfileRecord, ApiError> {
        let _w = self.writer.lock().await;
        let mut tx = self.pool.begin().await?;
        let next = insert_profile(&mut tx, feeder, profile, now).await?;
        tx.commit().await?;
        Ok(ProfileRecord {
            feeder_id: feeder.clone(),
            version: ProfileVersion(next as u32),
            created_at: now,
            profile: profile.clone(),
            in_use: false,
        })
    }

    /// Replaces a version that no reading has used yet. A used version is immutable (409).
    pub async fn replace_unused_profile(
        &self,
        feeder: &FeederId,
        version: ProfileVersion,
        profile: &DitherProfile,
    ) -> Result<(), ApiError> {
        let _w = self.writer.lock().await;
        let spec = profile.to_spec();
        let in_use: Option<bool> =
            sqlx::query_scalar("SELECT in_use FROM dither_profiles WHERE feeder_id = ? AND version = ?")
                .bind(feeder.as_str())
                .bind(i64::from(version.0))
                .fetch_optional(&self.pool)
                .await?;
        match in_use {
            None => Err(ApiError::NotFound(FieldError::new(
                "version",
                format!("feeder {feeder} has no profile {version}"),
            ))),
            Some(true) => Err(ApiError::Conflict(FieldError::new(
                "version",
                format!("profile {version} of feeder {feeder} has been used by readings and is immutable; publish a new version instead"),
            ))),
            Some(false) => {
                sqlx::query(
                    "UPDATE dither_profiles SET noise = ?, scale_kw = ?, boundaries_kw = ?, interval_s = ?, send_registers = ?
                     WHERE feeder_id = ? AND version = ? AND in_use = 0",
                )
                .bind(&spec.noise)
                .bind(spec.scale_kw)
                .bind(serde_json::to_string(&spec.boundaries_kw).map_err(anyhow::Error::from)?)
                .bind(i64::from(spec.interval_s))
                .bind(spec.send_registers)
                .bind(feeder.as_str())
                .bind(i64::from(version.0))
                .execute(&self.pool)
                .await?;
                Ok(())
            }
        }
    }

    pub async fn find_batch(&self, batch_id: &str) -> Result<Option<StoredBatch>, ApiError> {
        let row = sqlx::query("SELECT body_sha256, ack FROM ingest_batches WHERE batch_id = ?")
            .bind(batch_id)
            .fetch_optional(&self.pool)
            .await?;
        row.map(|r| stored_batch_from_row(&r)).transpose()
    }

    /// Stores a validated batch atomically: all of its rows or none.
    /// Stores a validated batch in one transaction; with `sequence`, the signed
    /// upload's (gateway, sequence) is recorded in the same transaction, and a
    /// number that is not above the gateway's last accepted one is refused (409).
    pub async fn commit_batch(
        &self,
        b: &ValidatedBatch,
        sequence: Option<i64>,
        now: i64,
    ) -> Result<CommitOutcome, ApiError> {
        let _w = self.writer.lock().await;
        if let Some(existing) = self.find_batch(&b.batch_id).await? {
            return Ok(CommitOutcome::AlreadyStored(existing));
        }
        let mut tx = self.pool.begin().await?;
        if let Some(seq) = sequence {
            let moved =
                sqlx::query("UPDATE gateways SET last_sequence = ?1 WHERE gateway_id = ?2 AND last_sequence < ?1")
                    .bind(seq)
                    .bind(b.gateway_id.as_str())
                    .execute(&mut *tx)
                    .await?;
            if moved.rows_affected() != 1 {
                return Err(ApiError::Conflict(meterveil_shared::FieldError::new(
                    "x-meterveil-sequence",
                    format!("sequence {seq} is not above the last one this gateway had accepted"),
                )));
            }
            sqlx::query(
                "INSERT INTO gateway_sequences (gateway_id, sequence, body_sha256, batch_id) VALUES (?, ?, ?, ?)",
            )
            .bind(b.gateway_id.as_str())
            .bind(seq)
            .bind(&b.body_sha256)
            .bind(&b.batch_id)
            .execute(&mut *tx)
            .await?;
        }
        let mut stored_readings = 0;
        for chunk in b.readings.chunks(INSERT_CHUNK) {
            let mut qb: QueryBuilder<Sqlite> = QueryBuilder::new(
                "INSERT OR IGNORE INTO readings (meter_id, interval_start, level, profile_version, batch_id) ",
            );
            qb.push_values(chunk, |mut row, r| {
                row.push_bind(r.meter_id.as_str())
                    .push_bind(r.interval_start)
                    .push_bind(i64::from(r.level))
                    .push_bind(i64::from(r.profile_version))
                    .push_bind(&b.batch_id);
            });
            stored_readings += qb.build().execute(&mut *tx).await?.rows_affected();
        }
        let mut stored_registers = 0;
        for chunk in b.registers.chunks(INSERT_CHUNK) {
            let mut qb: QueryBuilder<Sqlite> =
                QueryBuilder::new("INSERT OR IGNORE INTO register_reads (meter_id, read_at, wh_total, batch_id) ");
            qb.push_values(chunk, |mut row, r| {
                // wh_total was checked to fit an i64 during validation.
                row.push_bind(r.meter_id.as_str())
                    .push_bind(r.read_at)
                    .push_bind(r.wh_total as i64)
                    .push_bind(&b.batch_id);
            });
            stored_registers += qb.build().execute(&mut *tx).await?.rows_affected();
        }
        for v in &b.versions_used {
            sqlx::query("UPDATE dither_profiles SET in_use = 1 WHERE feeder_id = ? AND version = ? AND in_use = 0")
                .bind(b.feeder_id.as_str())
                .bind(i64::from(*v))
                .execute(&mut *tx)
                .await?;
        }
        let ack = AckWire {
            batch_id: b.batch_id.clone(),
            stored_readings,
            duplicate_readings: b.readings.len() as u64 - stored_readings,
            stored_registers,
            duplicate_registers: b.registers.len() as u64 - stored_registers,
        };
        sqlx::query(
            "INSERT INTO ingest_batches (batch_id, gateway_id, feeder_id, body_sha256, received_at, ack) VALUES (?, ?, ?, ?, ?, ?)",
        )
        .bind(&b.batch_id)
        .bind(b.gateway_id.as_str())
        .bind(b.feeder_id.as_str())
        .bind(&b.body_sha256)
        .bind(now)
        .bind(serde_json::to_string(&ack).map_err(anyhow::Error::from)?)
        .execute(&mut *tx)
        .await?;
        tx.commit().await?;
        Ok(CommitOutcome::Stored(ack))
    }

    pub async fn feeder_summaries(&self) -> Result<Vec<FeederSummary>, ApiError> {
        let rows = sqlx::query(
            "SELECT f.feeder_id, f.name,
                    (SELECT COUNT(*) FROM meters m WHERE m.feeder_id = f.feeder_id),
                    (SELECT COUNT(*) FROM readings r JOIN meters m ON m.meter_id = r.meter_id WHERE m.feeder_id = f.feeder_id),
                    (SELECT COUNT(*) FROM register_reads g JOIN meters m ON m.meter_id = g.meter_id WHERE m.feeder_id = f.feeder_id)
             FROM feeders f ORDER BY f.feeder_id",
        )
        .fetch_all(&self.pool)
        .await?;
        let mut out = Vec::with_capacity(rows.len());
        for r in rows {
            let feeder_id: String = r.try_get(0)?;
            let fid = FeederId::parse(&feeder_id).map_err(|e| anyhow::anyhow!("stored feeder id: {e}"))?;
            out.push(FeederSummary {
                current_profile: self.current_profile(&fid).await?.map(|p| p.to_wire()),
                feeder_id,
                name: r.try_get(1)?,
                meters: r.try_get(2)?,
                readings: r.try_get(3)?,
                register_reads: r.try_get(4)?,
            });
        }
        Ok(out)
    }

    /// Every stored level of a feeder as (meter_id, interval_start, level, profile_version),
    /// ordered by meter and time.
    pub async fn feeder_levels(&self, feeder: &FeederId) -> Result<Vec<(String, i64, u8, u32)>, ApiError> {
        let rows = sqlx::query(
            "SELECT r.meter_id, r.interval_start, r.level, r.profile_version
             FROM readings r JOIN meters m ON m.meter_id = r.meter_id
             WHERE m.feeder_id = ? ORDER BY r.meter_id, r.interval_start",
        )
        .bind(feeder.as_str())
        .fetch_all(&self.pool)
        .await?;
        rows.iter()
            .map(|r| Ok((r.try_get(0)?, r.try_get(1)?, r.try_get::<i64, _>(2)? as u8, r.try_get::<i64, _>(3)? as u32)))
            .collect()
    }

    /// Names of every column of every table, for the audit that no raw value is stored.
    pub async fn schema_columns(&self) -> Result<Vec<(String, String, String)>, ApiError> {
        let tables: Vec<String> =
            sqlx::query_scalar("SELECT name FROM sqlite_master WHERE type = 'table' AND name NOT LIKE 'sqlite_%' AND name NOT LIKE '_sqlx%'")
                .fetch_all(&self.pool)
                .await?;
        let mut out = Vec::new();
        for t in tables {
            let rows =
                sqlx::query(&format!("SELECT name, type FROM pragma_table_info('{t}')")).fetch_all(&self.pool).await?;
            for r in rows {
                out.push((t.clone(), r.try_get(0)?, r.try_get(1)?));
            }
        }
        Ok(out)
    }
}

fn profile_from_row(feeder: &FeederId, r: &sqlx::sqlite::SqliteRow) -> Result<ProfileRecord, ApiError> {
    let boundaries: String = r.try_get("boundaries_kw")?;
    let spec = DitherProfileSpec {
        noise: r.try_get("noise")?,
        scale_kw: r.try_get("scale_kw")?,
        boundaries_kw: serde_json::from_str(&boundaries).map_err(anyhow::Error::from)?,
        interval_s: r.try_get::<i64, _>("interval_s")? as u32,
        send_registers: r.try_get("send_registers")?,
    };
    let profile = DitherProfile::try_from(spec).map_err(|e| anyhow::anyhow!("stored profile is invalid: {e}"))?;
    Ok(ProfileRecord {
        feeder_id: feeder.clone(),
        version: ProfileVersion(r.try_get::<i64, _>("version")? as u32),
        created_at: r.try_get("created_at")?,
        profile,
        in_use: r.try_get("in_use")?,
    })
}

fn stored_batch_from_row(r: &sqlx::sqlite::SqliteRow) -> Result<StoredBatch, ApiError> {
    let ack: String = r.try_get("ack")?;
    Ok(StoredBatch {
        body_sha256: r.try_get("body_sha256")?,
        ack: serde_json::from_str(&ack).map_err(anyhow::Error::from)?,
    })
}

/// Inserts `profile` as the feeder's next version inside `tx`; returns the version.
pub(crate) async fn insert_profile(
    tx: &mut sqlx::Transaction<'_, Sqlite>,
    feeder: &FeederId,
    profile: &DitherProfile,
    now: i64,
) -> Result<i64, ApiError> {
    let next: i64 = sqlx::query_scalar("SELECT COALESCE(MAX(version), 0) + 1 FROM dither_profiles WHERE feeder_id = ?")
        .bind(feeder.as_str())
        .fetch_one(&mut **tx)
        .await?;
    let spec = profile.to_spec();
    sqlx::query(
        "INSERT INTO dither_profiles (feeder_id, version, noise, scale_kw, boundaries_kw, interval_s, send_registers, created_at)
         VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
    )
    .bind(feeder.as_str())
    .bind(next)
    .bind(&spec.noise)
    .bind(spec.scale_kw)
    .bind(serde_json::to_string(&spec.boundaries_kw).map_err(anyhow::Error::from)?)
    .bind(i64::from(spec.interval_s))
    .bind(spec.send_registers)
    .bind(now)
    .execute(&mut **tx)
    .await?;
    Ok(next)
}
