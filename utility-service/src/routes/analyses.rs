//! Analysis jobs: clustering now; the privacy audit and dither calibration share
//! the same job rows and status endpoint.

use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use meterveil_shared::FieldError;
use serde::Deserialize;
use serde_json::{json, Value};

use super::{now_s, parse_json, AppState, Operator};
use crate::error::ApiError;
use crate::jobs::cluster::{run, ClusterRequest};
use crate::jobs::new_job_id;
use crate::store::analyses::AnalysisRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/clusterings", post(start_clustering))
        .route("/v1/clusterings/{job_id}/assignments", get(assignments))
        .route("/v1/analyses/{job_id}", get(status))
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ClusteringWire {
    recovery_jobs: Vec<String>,
    #[serde(default)]
    clusters: Option<Value>,
}

/// Parses `"auto"` / absent (the eigengap rule) or a count from 2 to 200.
pub fn parse_cluster_count(v: &Option<Value>) -> Result<Option<usize>, ApiError> {
    match v {
        None => Ok(None),
        Some(Value::String(a)) if a == "auto" => Ok(None),
        Some(Value::Number(n)) if n.as_u64().is_some_and(|k| (2..=200).contains(&k)) => {
            Ok(n.as_u64().map(|k| k as usize))
        }
        Some(other) => {
            Err(ApiError::invalid("clusters", format!("{other} is neither \"auto\" nor a count from 2 to 200")))
        }
    }
}

async fn start_clustering(
    _: Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let w: ClusteringWire = parse_json(&body)?;
    if w.recovery_jobs.is_empty() || w.recovery_jobs.len() > 100 {
        return Err(ApiError::invalid("recovery_jobs", "give from 1 to 100 finished recovery job ids"));
    }
    let clusters = parse_cluster_count(&w.clusters)?;
    let mut window = None;
    for id in &w.recovery_jobs {
        let Some(job) = s.store.job(id).await? else {
            return Err(ApiError::invalid("recovery_jobs", format!("no recovery job {id}")));
        };
        if job.state != "done" {
            return Err(ApiError::Conflict(FieldError::new(
                "recovery_jobs",
                format!("recovery job {id} is {}; cluster it when it is done", job.state),
            )));
        }
        let jw = (job.window_start, job.window_end);
        if window.is_some_and(|v| v != jw) {
            return Err(ApiError::invalid(
                "recovery_jobs",
                format!("recovery job {id} covers [{}, {}), unlike the others: cluster one common window", jw.0, jw.1),
            ));
        }
        window = Some(jw);
    }
    let job_id = new_job_id("clu");
    let params = json!({ "recovery_jobs": w.recovery_jobs, "clusters": w.clusters });
    s.store.create_analysis(&job_id, "cluster", &params, now_s()).await?;
    tokio::spawn(run(s.clone(), job_id.clone(), ClusterRequest { recovery_jobs: w.recovery_jobs, clusters }));
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

async fn find(s: &AppState, id: &str) -> Result<AnalysisRecord, ApiError> {
    s.store
        .analysis(id)
        .await?
        .ok_or_else(|| ApiError::NotFound(FieldError::new("job_id", format!("no analysis job {id}"))))
}

async fn status(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
) -> Result<Json<AnalysisRecord>, ApiError> {
    Ok(Json(find(&s, &id).await?))
}

#[derive(Deserialize)]
struct FormatQuery {
    format: Option<String>,
}

async fn assignments(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<FormatQuery>,
) -> Result<Response, ApiError> {
    let job = find(&s, &id).await?;
    if job.kind != "cluster" {
        return Err(ApiError::invalid("job_id", format!("job {id} is a {} job, not a clustering", job.kind)));
    }
    if job.state != "done" {
        return Err(ApiError::Conflict(FieldError::new(
            "job_id",
            format!("job {id} is {}; assignments appear when it is done", job.state),
        )));
    }
    let rows = s.store.assignments(&id).await?;
    match q.format.as_deref().unwrap_or("json") {
        "json" => Ok(Json(rows).into_response()),
        "csv" => {
            let mut out = String::from("meter_id,cluster,confidence\n");
            for r in rows {
                out.push_str(&format!("{},{},{:.3}\n", r.meter_id, r.cluster, r.confidence));
            }
            Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], out).into_response())
        }
        other => Err(ApiError::invalid("format", format!("{other:?} is not json or csv"))),
    }
}
