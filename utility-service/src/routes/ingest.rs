use axum::body::{Body, Bytes};
use axum::extract::State;
use axum::routing::post;
use axum::{Json, Router};
use meterveil_shared::wire::AckWire;
use meterveil_shared::FieldError;

use super::{now_s, AppState};
use crate::error::ApiError;
use crate::ingest::{body_sha256, check_header, parse_batch, validate, IngestContext};
use crate::store::CommitOutcome;

pub fn router() -> Router<AppState> {
    Router::new().route("/v1/ingest/batches", post(ingest_batch))
}

/// Reads the body up to the configured limit.
async fn read_limited(body: Body, limit: usize) -> Result<Bytes, ApiError> {
    axum::body::to_bytes(body, limit).await.map_err(|_| {
        ApiError::TooLarge(FieldError::new(
            "body",
            format!("is larger than the {limit}-byte limit; send smaller batches"),
        ))
    })
}

async fn ingest_batch(State(s): State<AppState>, body: Body) -> Result<Json<AckWire>, ApiError> {
    let result = ingest(&s, body).await;
    match &result {
        Ok(_) => {}
        Err(e) => {
            s.metrics.batch("rejected");
            tracing::info!(status = %e.status(), error = %e, "batch rejected");
        }
    }
    result.map(Json)
}

async fn ingest(s: &AppState, body: Body) -> Result<AckWire, ApiError> {
    let bytes = read_limited(body, s.config.body_limit_bytes).await?;
    let hash = body_sha256(&bytes);
    let batch = parse_batch(&bytes)?;
    let n_readings = batch.readings.len() as u64;
    let outcome = async {
        let header = check_header(&batch)?;
        if let Some(prev) = s.store.find_batch(header.batch_id.as_str()).await? {
            return replay(s, prev, &hash);
        }
        if !s.store.feeder_exists(&header.feeder_id).await? {
            return Err(ApiError::invalid("feeder_id", format!("feeder {} is not registered", header.feeder_id)));
        }
        let profiles = s.store.profiles(&header.feeder_id).await?;
        let mut ids: Vec<&str> = batch
            .readings
            .iter()
            .map(|r| r.meter_id.as_str())
            .chain(batch.registers.iter().map(|g| g.meter_id.as_str()))
            .collect();
        ids.sort_unstable();
        ids.dedup();
        let known = s.store.known_meters(&header.feeder_id, &ids).await?;
        let ctx = IngestContext {
            profiles: &profiles,
            known_meters: &known,
            now: now_s(),
            clock_tolerance_s: s.config.clock_tolerance_s,
            stale_grace_s: s.config.stale_grace_s,
        };
        let valid = validate(header, batch.clone(), hash.clone(), &ctx)?;
        match s.store.commit_batch(&valid, ctx.now).await? {
            CommitOutcome::Stored(ack) => {
                s.metrics.batch("stored");
                s.metrics.readings_stored.inc_by(ack.stored_readings);
                s.metrics.readings_duplicate.inc_by(ack.duplicate_readings);
                s.metrics.registers_stored.inc_by(ack.stored_registers);
                Ok(ack)
            }
            CommitOutcome::AlreadyStored(prev) => replay(s, prev, &hash),
        }
    }
    .await;
    if outcome.is_err() {
        s.metrics.readings_rejected.inc_by(n_readings);
    }
    outcome
}

/// A batch id seen before: the same body gets the same acknowledgement, a different one a 409.
fn replay(s: &AppState, prev: crate::store::StoredBatch, hash: &str) -> Result<AckWire, ApiError> {
    if prev.body_sha256 == hash {
        s.metrics.batch("replayed");
        Ok(prev.ack)
    } else {
        Err(ApiError::Conflict(FieldError::new(
            "batch_id",
            format!(
                "batch {} was already stored with a different body; a batch id may not be reused",
                prev.ack.batch_id
            ),
        )))
    }
}
