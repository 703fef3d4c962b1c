//! Feeders, their meters and their dither profiles.

use axum::body::Bytes;
use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::routing::{get, post, put};
use axum::{Json, Router};
use meterveil_shared::wire::{NewFeederWire, NewMetersWire, ProfileRecordWire};
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId, FieldError, MeterId, ProfileVersion};
use serde_json::{json, Value};

use super::{now_s, parse_json, AppState, Operator};
use crate::error::ApiError;
use crate::store::FeederSummary;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/feeders", post(create_feeder).get(list_feeders))
        .route("/v1/feeders/{feeder_id}/meters", post(add_meters))
        .route("/v1/feeders/{feeder_id}/profile", get(current_profile))
        .route("/v1/feeders/{feeder_id}/profiles", get(list_profiles).post(publish_profile))
        .route("/v1/feeders/{feeder_id}/profiles/{version}", put(replace_profile))
}

fn feeder_path(raw: &str) -> Result<FeederId, ApiError> {
    FeederId::parse(raw).map_err(ApiError::Invalid)
}

pub(crate) async fn known_feeder(s: &AppState, raw: &str) -> Result<FeederId, ApiError> {
    let id = feeder_path(raw)?;
    if !s.store.feeder_exists(&id).await? {
        return Err(ApiError::NotFound(FieldError::new("feeder_id", format!("feeder {id} is not registered"))));
    }
    Ok(id)
}

fn parse_profile(body: &[u8]) -> Result<DitherProfile, ApiError> {
    let spec: DitherProfileSpec = parse_json(body)?;
    DitherProfile::try_from(spec).map_err(ApiError::Invalid)
}

async fn create_feeder(
    _: Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let req: NewFeederWire = parse_json(&body)?;
    let id = feeder_path(&req.feeder_id)?;
    let tz = req.time_zone.as_deref().unwrap_or("UTC");
    if tz.parse::<chrono_tz::Tz>().is_err() {
        return Err(ApiError::invalid(
            "time_zone",
            format!("{tz:?} is not an IANA time zone name (e.g. \"Europe/London\")"),
        ));
    }
    let created = s.store.create_feeder(&id, &req.name, tz, now_s()).await?;
    let status = if created { StatusCode::CREATED } else { StatusCode::OK };
    Ok((status, Json(json!({ "feeder_id": id, "created": created }))))
}

async fn list_feeders(_: Operator, State(s): State<AppState>) -> Result<Json<Vec<FeederSummary>>, ApiError> {
    Ok(Json(s.store.feeder_summaries().await?))
}

async fn add_meters(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    body: Bytes,
) -> Result<Json<Value>, ApiError> {
    let feeder = known_feeder(&s, &feeder).await?;
    let req: NewMetersWire = parse_json(&body)?;
    if req.meter_ids.is_empty() {
        return Err(ApiError::invalid("meter_ids", "is empty"));
    }
    let ids = req
        .meter_ids
        .iter()
        .enumerate()
        .map(|(i, m)| MeterId::parse_field(&format!("meter_ids[{i}]"), m))
        .collect::<Result<Vec<_>, _>>()
        .map_err(ApiError::Invalid)?;
    let (added, already) = s.store.add_meters(&feeder, &ids, now_s()).await?;
    Ok(Json(json!({ "feeder_id": feeder, "added": added, "already_registered": already })))
}

async fn current_profile(
    State(s): State<AppState>,
    Path(feeder): Path<String>,
) -> Result<Json<ProfileRecordWire>, ApiError> {
    let feeder = known_feeder(&s, &feeder).await?;
    let rec = s.store.current_profile(&feeder).await?.ok_or_else(|| {
        ApiError::NotFound(FieldError::new("profile", format!("feeder {feeder} has no dither profile yet")))
    })?;
    Ok(Json(rec.to_wire(&zone(&s, &feeder).await?)))
}

async fn zone(s: &AppState, feeder: &FeederId) -> Result<String, ApiError> {
    Ok(s.store.feeder_time_zone(feeder).await?.unwrap_or_else(|| "UTC".into()))
}

async fn list_profiles(State(s): State<AppState>, Path(feeder): Path<String>) -> Result<Json<Vec<Value>>, ApiError> {
    let feeder = known_feeder(&s, &feeder).await?;
    let recs = s.store.profiles(&feeder).await?;
    let tz = zone(&s, &feeder).await?;
    Ok(Json(recs.iter().map(|r| json!({ "record": r.to_wire(&tz), "in_use": r.in_use })).collect()))
}

async fn publish_profile(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    body: Bytes,
) -> Result<(StatusCode, Json<ProfileRecordWire>), ApiError> {
    let feeder = known_feeder(&s, &feeder).await?;
    let profile = parse_profile(&body)?;
    let rec = s.store.publish_profile(&feeder, &profile, now_s()).await?;
    tracing::info!(feeder = %feeder, version = rec.version.0, profile = %profile.describe(), "profile published");
    Ok((StatusCode::CREATED, Json(rec.to_wire(&zone(&s, &feeder).await?))))
}

async fn replace_profile(
    _: Operator,
    State(s): State<AppState>,
    Path((feeder, version)): Path<(String, String)>,
    body: Bytes,
) -> Result<Json<Value>, ApiError> {
    let feeder = known_feeder(&s, &feeder).await?;
    let version: u32 = version
        .trim_start_matches('v')
        .parse()
        .map_err(|_| ApiError::invalid("version", format!("{version:?} is not a version number")))?;
    let profile = parse_profile(&body)?;
    s.store.replace_unused_profile(&feeder, ProfileVersion(version), &profile).await?;
    Ok(Json(json!({ "feeder_id": feeder, "version": version, "replaced": true })))
}
