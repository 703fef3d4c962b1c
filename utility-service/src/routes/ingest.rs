use std::collections::HashMap;
use std::sync::Mutex;
use std::time::Instant;

use axum::body::{Body, Bytes};
use axum::extract::State;
use axum::http::HeaderMap;
use axum::routing::post;
use axum::{Json, Router};
use meterveil_shared::auth::{
    derive_gateway_key, signing_text, verify, HEADER_GATEWAY, HEADER_SEQUENCE, HEADER_SIGNATURE, HEADER_TIMESTAMP,
};
use meterveil_shared::wire::{AckWire, BatchWire};
use meterveil_shared::FieldError;

use super::{now_s, AppState};
use crate::committer::{Committed, Upload};
use crate::error::ApiError;
use crate::ingest::{check_header, sequence_reused, BatchHeader, KEY_MISMATCH};
use meterveil_shared::auth::body_sha256;

pub fn router() -> Router<AppState> {
    // Bodies may come gzip-compressed; the size limit applies to the decompressed
    // stream, so a small compressed bomb is refused like a large body (413).
    Router::new()
        .route(
            "/v1/ingest/batches",
            post(ingest_batch).layer(tower_http::decompression::RequestDecompressionLayer::new()),
        )
        .route("/v1/gateways", post(provision))
}

const INGEST_PATH: &str = "/v1/ingest/batches";

/// Token buckets per gateway: (tokens, last refill).
#[derive(Default)]
pub struct Buckets(Mutex<HashMap<String, (f64, Instant)>>);

impl Buckets {
    /// Takes one token, or says how many seconds until one is available.
    fn take(&self, gateway: &str, rate: f64, burst: f64) -> Result<(), u64> {
        let Ok(mut m) = self.0.lock() else { return Ok(()) };
        let now = Instant::now();
        let (tokens, last) = m.entry(gateway.to_owned()).or_insert((burst, now));
        *tokens = (*tokens + now.duration_since(*last).as_secs_f64() * rate).min(burst);
        *last = now;
        if *tokens >= 1.0 {
            *tokens -= 1.0;
            Ok(())
        } else {
            Err(((1.0 - *tokens) / rate.max(1e-9)).ceil() as u64)
        }
    }
}

/// A signed upload whose signature checked out.
struct Signed {
    gateway_id: String,
    feeder_id: String,
    key_generation: i64,
    sequence: i64,
}

fn header<'a>(h: &'a HeaderMap, name: &str) -> Result<&'a str, ApiError> {
    h.get(name).and_then(|v| v.to_str().ok()).ok_or_else(|| {
        ApiError::Unauthorized(FieldError::new(name, "is missing: uploads must be signed by a provisioned gateway"))
    })
}

async fn authenticate(s: &AppState, h: &HeaderMap, body_hash: &str) -> Result<Signed, ApiError> {
    let gateway = header(h, HEADER_GATEWAY)?;
    let sequence: i64 = header(h, HEADER_SEQUENCE)?
        .parse()
        .ok()
        .filter(|n| *n > 0)
        .ok_or_else(|| ApiError::Unauthorized(FieldError::new(HEADER_SEQUENCE, "must be a positive integer")))?;
    let timestamp: i64 = header(h, HEADER_TIMESTAMP)?
        .parse()
        .map_err(|_| ApiError::Unauthorized(FieldError::new(HEADER_TIMESTAMP, "must be UTC epoch seconds")))?;
    let signature = header(h, HEADER_SIGNATURE)?;
    let Some(rec) = s.store.gateway(gateway).await? else {
        return Err(ApiError::Unauthorized(FieldError::new(
            HEADER_GATEWAY,
            format!("gateway {gateway} is not provisioned"),
        )));
    };
    let key = derive_gateway_key(s.config.gateway_master_key.expose().as_bytes(), gateway, rec.key_generation);
    let text = signing_text("POST", INGEST_PATH, gateway, sequence as u64, timestamp, body_hash);
    if !verify(&key, &text, signature) {
        return Err(ApiError::Unauthorized(FieldError::new(HEADER_SIGNATURE, KEY_MISMATCH)));
    }
    let now = now_s();
    if (timestamp - now).abs() > s.config.signature_window_s {
        return Err(ApiError::Unauthorized(FieldError::new(
            HEADER_TIMESTAMP,
            format!(
                "{timestamp} is more than {} s from the service's clock ({now}); set the gateway's clock",
                s.config.signature_window_s
            ),
        )));
    }
    Ok(Signed { gateway_id: rec.gateway_id, feeder_id: rec.feeder_id, key_generation: rec.key_generation, sequence })
}

#[derive(serde::Deserialize)]
#[serde(deny_unknown_fields)]
struct ProvisionWire {
    gateway_id: String,
    feeder_id: String,
}

/// Provisions a gateway (or rotates its key); the secret is shown only here, once.
async fn provision(
    _: super::Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(axum::http::StatusCode, Json<serde_json::Value>), ApiError> {
    let w: ProvisionWire = super::parse_json(&body)?;
    let gw = meterveil_shared::GatewayId::parse(&w.gateway_id).map_err(ApiError::Invalid)?;
    let feeder = meterveil_shared::FeederId::parse(&w.feeder_id).map_err(ApiError::Invalid)?;
    if !s.store.feeder_exists(&feeder).await? {
        return Err(ApiError::invalid("feeder_id", format!("feeder {feeder} is not registered")));
    }
    let generation = s.store.provision_gateway(gw.as_str(), &feeder, now_s()).await?;
    let key = derive_gateway_key(s.config.gateway_master_key.expose().as_bytes(), gw.as_str(), generation);
    tracing::info!(gateway = %gw, feeder = %feeder, generation, "gateway provisioned");
    Ok((
        axum::http::StatusCode::CREATED,
        Json(serde_json::json!({
            "gateway_id": gw.as_str(), "feeder_id": feeder.as_str(), "key_generation": generation,
            "secret": hex::encode(key),
            "note": "shown once: store it in the gateway's configuration; provisioning again rotates it",
        })),
    ))
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

async fn ingest_batch(State(s): State<AppState>, headers: HeaderMap, body: Body) -> Result<Json<AckWire>, ApiError> {
    let result = ingest(&s, &headers, body).await;
    match &result {
        Ok(_) => {}
        Err(e) => {
            s.metrics.batch("rejected");
            tracing::info!(status = %e.status(), error = %e, "batch rejected");
        }
    }
    result.map(Json)
}

async fn ingest(s: &AppState, headers: &HeaderMap, body: Body) -> Result<AckWire, ApiError> {
    let bytes = read_limited(body, s.config.body_limit_bytes).await?;
    let hash = body_sha256(&bytes);
    let signed = authenticate(s, headers, &hash).await?;
    s.buckets.take(&signed.gateway_id, s.config.gateway_batches_per_s, s.config.gateway_burst).map_err(|wait| {
        ApiError::TooMany(
            FieldError::new(
                HEADER_GATEWAY,
                format!("gateway {} is over its upload rate; retry in {wait} s", signed.gateway_id),
            ),
            wait,
        )
    })?;
    let (header, batch) = match parse_signed(&bytes, &signed) {
        Ok(parsed) => parsed,
        // A sequence number used before outranks what is wrong with this body.
        Err(e) => return earlier_sequence(s, &signed, &hash).await?.ok_or(e),
    };
    let n_readings = batch.readings.len() as u64;
    let upload = Upload {
        gateway_id: signed.gateway_id,
        key_generation: signed.key_generation,
        sequence: signed.sequence,
        body_sha256: hash.clone(),
        header,
        batch,
    };
    let outcome = match s.committer.submit(upload).await {
        Ok(Committed::Stored(ack)) => {
            s.metrics.batch("stored");
            s.metrics.readings_stored.inc_by(ack.stored_readings);
            s.metrics.readings_duplicate.inc_by(ack.duplicate_readings);
            s.metrics.registers_stored.inc_by(ack.stored_registers);
            Ok(ack)
        }
        Ok(Committed::Earlier(prev)) => replay(s, prev, &hash),
        Err(e) => Err(e.into()),
    };
    if outcome.is_err() {
        s.metrics.readings_rejected.inc_by(n_readings);
    }
    outcome
}

/// Parses the body and checks that it names the signing gateway and its feeder.
fn parse_signed(bytes: &[u8], signed: &Signed) -> Result<(BatchHeader, BatchWire), ApiError> {
    let batch: BatchWire = super::parse_json(bytes)?;
    let header = check_header(&batch)?;
    if header.gateway_id.as_str() != signed.gateway_id {
        return Err(ApiError::Forbidden(FieldError::new(
            "gateway_id",
            format!("the batch names gateway {} but is signed by {}", header.gateway_id, signed.gateway_id),
        )));
    }
    if header.feeder_id.as_str() != signed.feeder_id {
        return Err(ApiError::Forbidden(FieldError::new(
            "feeder_id",
            format!("gateway {} serves feeder {}, not {}", signed.gateway_id, signed.feeder_id, header.feeder_id),
        )));
    }
    Ok((header, batch))
}

/// For a body that will be refused: the answer its sequence number already has
/// (the stored acknowledgement, or a 409 for another body), if it was used before.
async fn earlier_sequence(s: &AppState, signed: &Signed, hash: &str) -> Result<Option<AckWire>, ApiError> {
    let Some((prev_hash, batch_id)) = s.store.sequence_record(&signed.gateway_id, signed.sequence).await? else {
        return Ok(None);
    };
    if prev_hash != hash {
        return Err(sequence_reused(signed.sequence, &batch_id).into());
    }
    match s.store.find_batch(&batch_id).await? {
        Some(prev) => replay(s, prev, hash).map(Some),
        None => Ok(None),
    }
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
