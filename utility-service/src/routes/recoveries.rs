//! Recovery jobs: start one for a feeder and window, watch it, fetch its results.

use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use meterveil_shared::recovery::RankChoice;
use meterveil_shared::{FeederId, FieldError};
use serde::Deserialize;
use serde_json::{json, Value};

use super::{now_s, parse_json, AppState, Operator};
use crate::error::ApiError;
use crate::jobs::recover::{run, RecoveryRequest};
use crate::store::recoveries::JobRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/recoveries", post(start))
        .route("/v1/recoveries/{job_id}", get(status))
        .route("/v1/recoveries/{job_id}/intervals", get(intervals))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct StartWire {
    feeder_id: String,
    from: i64,
    to: i64,
    #[serde(default)]
    rank: Option<Value>,
    #[serde(default)]
    alpha_kw: Option<f64>,
}

/// Longest window one job may take: 93 days.
const MAX_WINDOW_S: i64 = 93 * 86_400;

async fn start(_: Operator, State(s): State<AppState>, body: Bytes) -> Result<(StatusCode, Json<Value>), ApiError> {
    let w: StartWire = parse_json(&body)?;
    let feeder = FeederId::parse(&w.feeder_id).map_err(ApiError::Invalid)?;
    if !s.store.feeder_exists(&feeder).await? {
        return Err(ApiError::invalid("feeder_id", format!("feeder {feeder} is not registered")));
    }
    if w.to <= w.from {
        return Err(ApiError::invalid("to", "must be after from"));
    }
    if w.to - w.from > MAX_WINDOW_S {
        return Err(ApiError::invalid("to", "the window may span at most 93 days"));
    }
    let rank = match &w.rank {
        None => RankChoice::Auto(vec![2, 5, 10, 20, 40]),
        Some(Value::String(a)) if a == "auto" => RankChoice::Auto(vec![2, 5, 10, 20, 40]),
        Some(Value::Number(n)) if n.as_u64().is_some_and(|r| (1..=500).contains(&r)) => {
            RankChoice::Fixed(n.as_u64().unwrap_or(1) as usize)
        }
        Some(other) => {
            return Err(ApiError::invalid("rank", format!("{other} is neither \"auto\" nor a rank from 1 to 500")))
        }
    };
    let alpha_kw = w.alpha_kw.unwrap_or(15.0);
    if !(alpha_kw.is_finite() && alpha_kw > 0.0 && alpha_kw <= 10_000.0) {
        return Err(ApiError::invalid("alpha_kw", "must be a positive number of kW up to 10000"));
    }
    let job_id = crate::jobs::new_job_id("rec");
    let params = json!({ "rank": w.rank, "alpha_kw": alpha_kw });
    s.store.create_job(&job_id, &feeder, w.from, w.to, &params, now_s()).await?;
    let req = RecoveryRequest { feeder, from: w.from, to: w.to, rank, alpha_kw };
    tokio::spawn(run(s.clone(), job_id.clone(), req));
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

async fn find(s: &AppState, id: &str) -> Result<JobRecord, ApiError> {
    s.store.job(id).await?.ok_or_else(|| ApiError::NotFound(FieldError::new("job_id", format!("no recovery job {id}"))))
}

async fn status(_: Operator, State(s): State<AppState>, Path(id): Path<String>) -> Result<Json<JobRecord>, ApiError> {
    Ok(Json(find(&s, &id).await?))
}

#[derive(Deserialize)]
struct IntervalQuery {
    format: Option<String>,
    meter_id: Option<String>,
}

async fn intervals(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<IntervalQuery>,
) -> Result<Response, ApiError> {
    let job = find(&s, &id).await?;
    if job.state != "done" {
        return Err(ApiError::Conflict(FieldError::new(
            "job_id",
            format!("job {id} is {}; results appear when it is done", job.state),
        )));
    }
    let rows = s.store.job_rows(&id, q.meter_id.as_deref()).await?;
    tracing::info!(job = %id, rows = rows.len(), meter = ?q.meter_id, "per-meter recovery export");
    match q.format.as_deref().unwrap_or("json") {
        "json" => Ok(Json(rows).into_response()),
        "csv" => {
            let mut out = String::from("meter_id,interval_start,kw,flag,kw_low,kw_high\n");
            for r in rows {
                out.push_str(&format!(
                    "{},{},{:.4},{},{:.4},{:.4}\n",
                    r.meter_id, r.interval_start, r.kw, r.flag, r.kw_low, r.kw_high
                ));
            }
            Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], out).into_response())
        }
        other => Err(ApiError::invalid("format", format!("{other:?} is not json or csv"))),
    }
}
