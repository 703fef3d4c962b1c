//! Storage behind one type. SQL lives here and nowhere else.
//!
//! Two backends, chosen by the database URL, run the same statements through
//! sqlx's `Any` driver (placeholders are written `$N`, which both accept):
//! - SQLite, the embedded default: one file, WAL journal, `synchronous = FULL`, so
//!   an acknowledged batch survives power loss. Writes go through one async mutex:
//!   SQLite has a single writer anyway, and queuing in-process avoids `SQLITE_BUSY`
//!   on lock upgrades.
//! - PostgreSQL (`postgres://…`): writers run concurrently; the few statements
//!   whose correctness depends on serialisation take row locks instead
//!   (`FOR UPDATE`, and `FOR UPDATE SKIP LOCKED` when workers claim jobs), so
//!   several service and worker processes can share one database.

use std::time::Duration;

use anyhow::Context;
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId, FieldError, MeterId, ProfileVersion};
use sqlx::any::{AnyPoolOptions, AnyRow};
use sqlx::{Any, AnyPool, Executor, Row};
use tokio::sync::{Mutex, MutexGuard};

/// What the store can fail with. The HTTP status of each is decided in
/// `error.rs` (the one place errors meet HTTP); background work reports them as
/// its failure message.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    /// The row asked for does not exist.
    #[error("{0}")]
    NotFound(FieldError),
    /// The write conflicts with stored state (a reused id, a profile in use).
    #[error("{0}")]
    Conflict(FieldError),
    /// The database failed or refused the statement.
    #[error(transparent)]
    Database(#[from] sqlx::Error),
    /// Anything else (a stored value that does not decode, a migration).
    #[error(transparent)]
    Other(#[from] anyhow::Error),
}

pub mod analyses;
pub mod batches;
pub mod gateways;
pub mod groups;
pub mod history;
pub mod overview;
pub mod queue;
pub mod sessions;
pub mod tariffs;

pub mod recoveries;
pub mod runs;

/// Rows per multi-row INSERT; 1000 rows of 5 values stays far below SQLite's
/// 32766 and PostgreSQL's 65535 bounds on statement parameters.
const INSERT_CHUNK: usize = 1000;

/// Which database a store runs on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Backend {
    Sqlite,
    Postgres,
}

impl Backend {
    /// The backend a database URL names: `postgres://` or `postgresql://` is
    /// PostgreSQL; `sqlite:PATH` or a plain path is SQLite.
    pub fn of_url(url: &str) -> Self {
        if url.starts_with("postgres://") || url.starts_with("postgresql://") {
            Backend::Postgres
        } else {
            Backend::Sqlite
        }
    }
}

/// `INSERT … VALUES ($1, …), (…), …` for `rows` rows of `cols` values, then
/// `suffix`. On SQLite the placeholders are plain `?`: SQLite looks up a numbered
/// parameter's name by a linear scan, which made binding a 5,000-value statement
/// quadratic (10% of the ingest path's CPU in a profile).
pub(crate) fn values_sql(backend: Backend, prefix: &str, rows: usize, cols: usize, suffix: &str) -> String {
    use std::fmt::Write;
    let mut sql = String::with_capacity(prefix.len() + suffix.len() + rows * cols * 6 + 8);
    sql.push_str(prefix);
    sql.push_str(" VALUES ");
    for r in 0..rows {
        sql.push_str(if r == 0 { "(" } else { ", (" });
        for c in 0..cols {
            let sep = if c == 0 { "" } else { ", " };
            let _ = match backend {
                Backend::Sqlite => write!(sql, "{sep}?"),
                Backend::Postgres => write!(sql, "{sep}${}", r * cols + c + 1),
            };
        }
        sql.push(')');
    }
    sql.push(' ');
    sql.push_str(suffix);
    sql
}

/// `$from, $from+1, …` for `n` placeholders (an `IN (…)` list).
pub(crate) fn placeholders(from: usize, n: usize) -> String {
    (from..from + n).map(|i| format!("${i}")).collect::<Vec<_>>().join(", ")
}
pub use crate::records::{ProfileRecord, StoredBatch};

#[derive(Debug, Clone, serde::Serialize)]
pub struct FeederSummary {
    pub feeder_id: String,
    pub name: String,
    pub meters: i64,
    pub readings: i64,
    pub register_reads: i64,
    pub current_profile: Option<meterveil_shared::wire::ProfileRecordWire>,
    /// The feeder's IANA time zone.
    pub time_zone: String,
}

#[derive(Clone)]
pub struct Store {
    pool: AnyPool,
    backend: Backend,
    /// SQLite only: serialises writers within this process.
    writer: Option<std::sync::Arc<Mutex<()>>>,
    /// Identifies this process as a job worker in lease columns.
    worker_id: String,
}

impl Store {
    /// Opens the database at `url` and applies its backend's migrations
    /// (`migrations/sqlite` or `migrations/postgres`). SQLite: `sqlite:PATH` or a
    /// plain path, created if missing. PostgreSQL: `postgres://user@host:port/db`;
    /// the database must exist.
    pub async fn open(url: &str) -> anyhow::Result<Self> {
        sqlx::any::install_default_drivers();
        let backend = Backend::of_url(url);
        let (url, pool) = match backend {
            Backend::Sqlite => {
                let mut url = if url.starts_with("sqlite:") { url.to_owned() } else { format!("sqlite:{url}") };
                if !url.contains('?') && !url.contains(":memory:") {
                    url.push_str("?mode=rwc");
                }
                // One connection is the ingest committer's, held for its lifetime.
                let pool = AnyPoolOptions::new()
                    .max_connections(5)
                    .after_connect(|conn, _| {
                        Box::pin(async move {
                            conn.execute(
                                "PRAGMA journal_mode = WAL; PRAGMA synchronous = FULL; \
                                 PRAGMA foreign_keys = ON; PRAGMA busy_timeout = 10000;",
                            )
                            .await?;
                            Ok(())
                        })
                    })
                    .connect(&url)
                    .await
                    .with_context(|| format!("opening SQLite database {url}"))?;
                sqlx::migrate!("../migrations/sqlite").run(&pool).await.context("applying migrations")?;
                (url, pool)
            }
            Backend::Postgres => {
                let pool = AnyPoolOptions::new()
                    .max_connections(8)
                    .acquire_timeout(Duration::from_secs(30))
                    .connect(url)
                    .await
                    .with_context(|| format!("opening PostgreSQL database {}", redact_url(url)))?;
                sqlx::migrate!("../migrations/postgres").run(&pool).await.context("applying migrations")?;
                (url.to_owned(), pool)
            }
        };
        tracing::debug!(backend = ?backend, url = %redact_url(&url), "store opened");
        let worker_id = {
            use rand::Rng;
            format!("w-{}-{:08x}", std::process::id(), rand::rng().random::<u32>())
        };
        let writer = (backend == Backend::Sqlite).then(|| std::sync::Arc::new(Mutex::new(())));
        Ok(Self { pool, backend, writer, worker_id })
    }

    pub fn pool(&self) -> &AnyPool {
        &self.pool
    }

    pub fn backend(&self) -> Backend {
        self.backend
    }

    /// Held across a write: the process-wide writer lock on SQLite, nothing on
    /// PostgreSQL (which serialises by row locks).
    async fn write_lock(&self) -> Option<MutexGuard<'_, ()>> {
        match &self.writer {
            Some(m) => Some(m.lock().await),
            None => None,
        }
    }

    /// On PostgreSQL, locks the feeder's row until `tx` ends, so statements that
    /// read-then-write per feeder (the next profile version) do not race. SQLite's
    /// writer lock already serialises them.
    pub(crate) async fn lock_feeder(
        backend: Backend,
        tx: &mut sqlx::Transaction<'_, Any>,
        feeder: &FeederId,
    ) -> Result<(), StoreError> {
        if backend == Backend::Postgres {
            sqlx::query("SELECT feeder_id FROM feeders WHERE feeder_id = $1 FOR UPDATE")
                .bind(feeder.as_str())
                .fetch_optional(&mut **tx)
                .await?;
        }
        Ok(())
    }

    /// Registers a feeder. Returns false when it already existed (same id).
    pub async fn create_feeder(
        &self,
        id: &FeederId,
        name: &str,
        time_zone: &str,
        now: i64,
    ) -> Result<bool, StoreError> {
        let _w = self.write_lock().await;
        let r =
            sqlx::query("INSERT INTO feeders (feeder_id, name, time_zone, created_at) VALUES ($1, $2, $3, $4) ON CONFLICT DO NOTHING")
                .bind(id.as_str())
                .bind(name)
                .bind(time_zone)
                .bind(now)
                .execute(&self.pool)
                .await?;
        Ok(r.rows_affected() == 1)
    }

    /// The feeder's IANA time zone name, or None when it is not registered.
    pub async fn feeder_time_zone(&self, id: &FeederId) -> Result<Option<String>, StoreError> {
        Ok(sqlx::query_scalar("SELECT time_zone FROM feeders WHERE feeder_id = $1")
            .bind(id.as_str())
            .fetch_optional(&self.pool)
            .await?)
    }

    pub async fn feeder_exists(&self, id: &FeederId) -> Result<bool, StoreError> {
        let row = sqlx::query("SELECT 1 FROM feeders WHERE feeder_id = $1")
            .bind(id.as_str())
            .fetch_optional(&self.pool)
            .await?;
        Ok(row.is_some())
    }

    /// Registers meters on a feeder. Meters already on this feeder are counted, not
    /// an error; a meter registered on another feeder is a 409 and nothing is added.
    pub async fn add_meters(&self, feeder: &FeederId, ids: &[MeterId], now: i64) -> Result<(u64, u64), StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let mut added = 0;
        for (i, id) in ids.iter().enumerate() {
            let existing: Option<String> = sqlx::query_scalar("SELECT feeder_id FROM meters WHERE meter_id = $1")
                .bind(id.as_str())
                .fetch_optional(&mut *tx)
                .await?;
            match existing {
                Some(f) if f == feeder.as_str() => {}
                Some(f) => {
                    return Err(StoreError::Conflict(FieldError::new(
                        format!("meter_ids[{i}]"),
                        format!("meter {id} is already registered on feeder {f}"),
                    )))
                }
                None => {
                    sqlx::query("INSERT INTO meters (meter_id, feeder_id, created_at) VALUES ($1, $2, $3)")
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
    pub async fn meters_of(&self, feeder: &FeederId) -> Result<Vec<String>, StoreError> {
        Ok(sqlx::query_scalar("SELECT meter_id FROM meters WHERE feeder_id = $1 ORDER BY meter_id")
            .bind(feeder.as_str())
            .fetch_all(&self.pool)
            .await?)
    }

    /// All versions of a feeder's profile, oldest first.
    pub async fn profiles(&self, feeder: &FeederId) -> Result<Vec<ProfileRecord>, StoreError> {
        let rows = sqlx::query(
            "SELECT version, noise, scale_kw, boundaries_kw, interval_s, send_registers, register_period, created_at, in_use,
             published_by, first_used_at FROM dither_profiles WHERE feeder_id = $1 ORDER BY version",
        )
        .bind(feeder.as_str())
        .fetch_all(&self.pool)
        .await?;
        rows.into_iter().map(|r| profile_from_row(feeder, &r)).collect()
    }

    pub async fn current_profile(&self, feeder: &FeederId) -> Result<Option<ProfileRecord>, StoreError> {
        Ok(self.profiles(feeder).await?.pop())
    }

    /// Publishes `profile` as the feeder's next version (through the HTTP API).
    pub async fn publish_profile(
        &self,
        feeder: &FeederId,
        profile: &DitherProfile,
        now: i64,
    ) -> Result<ProfileRecord, StoreError> {
        let _w = self.write_lock().await;
        let mut tx = self.pool.begin().await?;
        let next = insert_profile(self.backend, &mut tx, feeder, profile, (now, PUBLISHED_BY_API)).await?;
        tx.commit().await?;
        Ok(ProfileRecord {
            feeder_id: feeder.clone(),
            version: ProfileVersion(next as u32),
            created_at: now,
            profile: profile.clone(),
            in_use: false,
            published_by: PUBLISHED_BY_API.into(),
            first_used_at: None,
        })
    }

    /// Replaces a version that no reading has used yet. A used version is immutable (409).
    pub async fn replace_unused_profile(
        &self,
        feeder: &FeederId,
        version: ProfileVersion,
        profile: &DitherProfile,
    ) -> Result<(), StoreError> {
        let _w = self.write_lock().await;
        let spec = profile.to_spec();
        let in_use: Option<i64> =
            sqlx::query_scalar("SELECT in_use FROM dither_profiles WHERE feeder_id = $1 AND version = $2")
                .bind(feeder.as_str())
                .bind(i64::from(version.0))
                .fetch_optional(&self.pool)
                .await?;
        let in_use = in_use.map(|v| v != 0);
        match in_use {
            None => Err(StoreError::NotFound(FieldError::new(
                "version",
                format!("feeder {feeder} has no profile {version}"),
            ))),
            Some(true) => Err(StoreError::Conflict(FieldError::new(
                "version",
                format!("profile {version} of feeder {feeder} has been used by readings and is immutable; publish a new version instead"),
            ))),
            Some(false) => {
                sqlx::query(
                    "UPDATE dither_profiles SET noise = $1, scale_kw = $2, boundaries_kw = $3, interval_s = $4, send_registers = $5,
                     register_period = $8 WHERE feeder_id = $6 AND version = $7 AND in_use = 0",
                )
                .bind(&spec.noise)
                .bind(spec.scale_kw)
                .bind(serde_json::to_string(&spec.boundaries_kw).map_err(anyhow::Error::from)?)
                .bind(i64::from(spec.interval_s))
                .bind(i64::from(spec.send_registers))
                .bind(feeder.as_str())
                .bind(i64::from(version.0))
                .bind(spec.register_period.clone().unwrap_or_else(|| "none".into()))
                .execute(&self.pool)
                .await?;
                Ok(())
            }
        }
    }

    pub async fn find_batch(&self, batch_id: &str) -> Result<Option<StoredBatch>, StoreError> {
        let row = sqlx::query("SELECT body_sha256, ack FROM ingest_batches WHERE batch_id = $1")
            .bind(batch_id)
            .fetch_optional(&self.pool)
            .await?;
        row.map(|r| stored_batch_from_row(&r)).transpose()
    }

    /// Every feeder with its header (see `feeder_headers`) and its stored
    /// reading and register counts: the counts grow with the data, so the
    /// dashboard does not use this.
    pub async fn feeder_summaries(&self) -> Result<Vec<FeederSummary>, StoreError> {
        let mut headers: std::collections::HashMap<String, overview::FeederHeader> =
            self.feeder_headers().await?.into_iter().map(|h| (h.feeder_id.clone(), h)).collect();
        let rows = sqlx::query(
            "SELECT f.feeder_id, f.name,
                    (SELECT COUNT(*) FROM readings r JOIN meters m ON m.meter_id = r.meter_id WHERE m.feeder_id = f.feeder_id),
                    (SELECT COUNT(*) FROM register_advances g JOIN meters m ON m.meter_id = g.meter_id WHERE m.feeder_id = f.feeder_id)
             FROM feeders f ORDER BY f.feeder_id",
        )
        .fetch_all(&self.pool)
        .await?;
        let mut out = Vec::with_capacity(rows.len());
        for r in rows {
            let feeder_id: String = r.try_get(0)?;
            // A feeder registered between the two reads has no header yet: listed next time.
            let Some(h) = headers.remove(&feeder_id) else { continue };
            out.push(FeederSummary {
                feeder_id,
                name: r.try_get(1)?,
                meters: h.meters,
                readings: r.try_get(2)?,
                register_reads: r.try_get(3)?,
                current_profile: h.current_profile,
                time_zone: h.time_zone,
            });
        }
        Ok(out)
    }

    /// Names of every column of every table, for the audit that no raw value is stored.
    pub async fn schema_columns(&self) -> Result<Vec<(String, String, String)>, StoreError> {
        if self.backend == Backend::Postgres {
            let rows: Vec<(String, String, String)> = sqlx::query_as(
                "SELECT table_name::text, column_name::text, data_type::text FROM information_schema.columns
                 WHERE table_schema = current_schema() AND table_name NOT LIKE '\\_sqlx%'
                 ORDER BY table_name, ordinal_position",
            )
            .fetch_all(&self.pool)
            .await?;
            return Ok(rows);
        }
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

fn profile_from_row(feeder: &FeederId, r: &AnyRow) -> Result<ProfileRecord, StoreError> {
    let boundaries: String = r.try_get("boundaries_kw")?;
    let spec = DitherProfileSpec {
        noise: r.try_get("noise")?,
        scale_kw: r.try_get("scale_kw")?,
        boundaries_kw: serde_json::from_str(&boundaries).map_err(anyhow::Error::from)?,
        interval_s: r.try_get::<i64, _>("interval_s")? as u32,
        send_registers: r.try_get::<i64, _>("send_registers")? != 0,
        register_period: Some(r.try_get("register_period")?),
    };
    let profile = DitherProfile::try_from(spec).map_err(|e| anyhow::anyhow!("stored profile is invalid: {e}"))?;
    Ok(ProfileRecord {
        feeder_id: feeder.clone(),
        version: ProfileVersion(r.try_get::<i64, _>("version")? as u32),
        created_at: r.try_get("created_at")?,
        profile,
        in_use: r.try_get::<i64, _>("in_use")? != 0,
        published_by: r.try_get("published_by")?,
        first_used_at: r.try_get("first_used_at")?,
    })
}

fn stored_batch_from_row(r: &AnyRow) -> Result<StoredBatch, StoreError> {
    let ack: String = r.try_get("ack")?;
    Ok(StoredBatch {
        body_sha256: r.try_get("body_sha256")?,
        ack: serde_json::from_str(&ack).map_err(anyhow::Error::from)?,
    })
}

/// Inserts `profile` as the feeder's next version inside `tx`; returns the version.
/// Who published a version through the HTTP API (the operator token names no one).
pub const PUBLISHED_BY_API: &str = "operator (HTTP API)";

pub(crate) async fn insert_profile(
    backend: Backend,
    tx: &mut sqlx::Transaction<'_, Any>,
    feeder: &FeederId,
    profile: &DitherProfile,
    (now, by): (i64, &str),
) -> Result<i64, StoreError> {
    Store::lock_feeder(backend, tx, feeder).await?;
    let next: i64 =
        sqlx::query_scalar("SELECT COALESCE(MAX(version), 0) + 1 FROM dither_profiles WHERE feeder_id = $1")
            .bind(feeder.as_str())
            .fetch_one(&mut **tx)
            .await?;
    let spec = profile.to_spec();
    sqlx::query(
        "INSERT INTO dither_profiles (feeder_id, version, noise, scale_kw, boundaries_kw, interval_s, send_registers, created_at, register_period, published_by)
         VALUES ($1, $2, $3, $4, $5, $6, $7, $8, $9, $10)",
    )
    .bind(feeder.as_str())
    .bind(next)
    .bind(&spec.noise)
    .bind(spec.scale_kw)
    .bind(serde_json::to_string(&spec.boundaries_kw).map_err(anyhow::Error::from)?)
    .bind(i64::from(spec.interval_s))
    .bind(i64::from(spec.send_registers))
    .bind(now)
    .bind(profile.register_period().as_str())
    .bind(by)
    .execute(&mut **tx)
    .await?;
    Ok(next)
}

/// The URL with any password replaced, for messages and logs.
pub fn redact_url(url: &str) -> String {
    match (url.find("://"), url.rfind('@')) {
        (Some(s), Some(at)) if at > s => {
            let cred = &url[s + 3..at];
            match cred.find(':') {
                Some(c) => format!("{}{}:***{}", &url[..s + 3], &cred[..c], &url[at..]),
                None => url.to_owned(),
            }
        }
        _ => url.to_owned(),
    }
}
