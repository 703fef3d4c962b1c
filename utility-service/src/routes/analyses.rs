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
use crate::jobs::new_job_id;
use crate::jobspec::{AuditRequest, AuditSpec, CalibrateRequest, CalibrateSpec, ClusterRequest, JobSpec};
use crate::store::analyses::AnalysisRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/clusterings", post(start_clustering))
        .route("/v1/clusterings/{job_id}/assignments", get(assignments))
        .route("/v1/analyses/{job_id}", get(status))
        .route("/v1/analyses/{job_id}/report", get(report))
        .route("/v1/audits", post(start_audit))
        .route("/v1/calibrations", post(start_calibration))
}

async fn start_clustering(
    _: Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let spec = parse_json::<ClusterRequest>(&body)?.check().map_err(ApiError::Invalid)?;
    let mut window = None;
    let mut feeders = std::collections::BTreeSet::new();
    for id in &spec.recovery_jobs {
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
        feeders.insert(job.feeder_id);
    }
    // One feeder's clustering goes to that feeder's shard; a town-wide one to an unsharded worker.
    let feeder = if feeders.len() == 1 { feeders.into_iter().next() } else { None };
    let job_id = new_job_id("clu");
    s.store.create_analysis(&job_id, &JobSpec::Cluster(spec), feeder.as_deref(), now_s()).await?;
    s.wake.notify_one();
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

/// A finished recovery job named by a request, or the error naming `recovery_job`.
async fn done_recovery(s: &AppState, id: &str) -> Result<crate::store::recoveries::JobRecord, ApiError> {
    let Some(job) = s.store.job(id).await? else {
        return Err(ApiError::invalid("recovery_job", format!("no recovery job {id}")));
    };
    if job.state != "done" {
        return Err(ApiError::Conflict(FieldError::new(
            "recovery_job",
            format!("recovery job {id} is {}; analyse it when it is done", job.state),
        )));
    }
    Ok(job)
}

async fn start_audit(
    _: Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let spec = parse_json::<AuditRequest>(&body)?.check().map_err(ApiError::Invalid)?;
    let job_id = queue_audit(&s, spec).await?;
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

/// Queues a checked audit of a finished recovery whose feeder holds every
/// captured meter; returns the job id. The HTTP API and the dashboard share it.
pub(crate) async fn queue_audit(s: &AppState, spec: AuditSpec) -> Result<String, ApiError> {
    let job = done_recovery(s, &spec.recovery_job).await?;
    let feeder = meterveil_shared::FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let meters: std::collections::HashSet<String> = s.store.meters_of(&feeder).await?.into_iter().collect();
    if let Some(m) = spec.captured.iter().find(|m| !meters.contains(m.as_str())) {
        return Err(ApiError::invalid("captured", format!("meter {m} is not on feeder {feeder}")));
    }
    let job_id = new_job_id("aud");
    s.store.create_analysis(&job_id, &JobSpec::Audit(spec), Some(&job.feeder_id), now_s()).await?;
    s.wake.notify_one();
    Ok(job_id)
}

async fn start_calibration(
    _: Operator,
    State(s): State<AppState>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let spec = parse_json::<CalibrateRequest>(&body)?.check().map_err(ApiError::Invalid)?;
    let job_id = queue_calibration(&s, spec).await?;
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

/// Queues a checked calibration of a finished recovery whose population the
/// targets fit; returns the job id. The HTTP API and the dashboard share it.
pub(crate) async fn queue_calibration(s: &AppState, spec: CalibrateSpec) -> Result<String, ApiError> {
    let job = done_recovery(s, &spec.recovery_job).await?;
    let population = job.diagnostics.as_ref().and_then(|d| d["meters"].as_u64()).unwrap_or(0) as usize;
    meterveil_shared::calibrate::CalibrationConfig::new(spec.targets.clone())
        .check(population)
        .map_err(ApiError::Invalid)?;
    let feeder = meterveil_shared::FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    if spec.targets.band_energy_error_max.is_some() && s.store.tariffs(&feeder).await?.is_empty() {
        return Err(ApiError::Invalid(FieldError::new(
            "band_energy_error_max",
            format!("feeder {} has no tariff calendar; post one to /v1/feeders/{{feeder}}/tariffs", job.feeder_id),
        )));
    }
    let job_id = new_job_id("cal");
    s.store.create_analysis(&job_id, &JobSpec::Calibrate(spec), Some(&job.feeder_id), now_s()).await?;
    s.wake.notify_one();
    Ok(job_id)
}

/// The HTML report of a finished audit or calibration.
async fn report(_: Operator, State(s): State<AppState>, Path(id): Path<String>) -> Result<Response, ApiError> {
    let job = find(&s, &id).await?;
    if job.state != "done" {
        return Err(ApiError::Conflict(FieldError::new(
            "job_id",
            format!("job {id} is {}; its report appears when it is done", job.state),
        )));
    }
    let html = report_html(&job)?;
    Ok(([(header::CONTENT_TYPE, "text/html; charset=utf-8")], html).into_response())
}

/// The HTML report of a finished audit or calibration job.
pub(crate) fn report_html(job: &AnalysisRecord) -> Result<String, ApiError> {
    let id = &job.job_id;
    let result = job.result.clone().unwrap_or(Value::Null);
    let feeder = result["feeder_id"].as_str().unwrap_or("?").to_owned();
    let bad = |e: serde_json::Error| ApiError::Internal(anyhow::anyhow!("stored result of {id} does not parse: {e}"));
    Ok(match job.kind.as_str() {
        "audit" => crate::report::audit_html(
            &format!("Privacy audit of feeder {feeder}"),
            &serde_json::from_value(result).map_err(bad)?,
        ),
        "calibrate" => crate::report::calibration_html(
            &format!("Dither calibration of feeder {feeder}"),
            &serde_json::from_value(result).map_err(bad)?,
        ),
        other => return Err(ApiError::invalid("job_id", format!("a {other} job has no report"))),
    })
}

pub(crate) async fn find(s: &AppState, id: &str) -> Result<AnalysisRecord, ApiError> {
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
        "json" => {
            let rows: Vec<serde_json::Value> = rows
                .iter()
                .map(|r| {
                    json!({"meter_id": r.meter_id, "feeder_id": r.feeder_id, "cluster": r.cluster,
                           "confidence": r.confidence, "status": meterveil_shared::cluster::status(r.confidence)})
                })
                .collect();
            Ok(Json(rows).into_response())
        }
        "csv" => {
            let mut out = String::from("meter_id,cluster,confidence,status\n");
            for r in rows {
                let status = meterveil_shared::cluster::status(r.confidence);
                out.push_str(&format!("{},{},{:.3},{status}\n", r.meter_id, r.cluster, r.confidence));
            }
            Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], out).into_response())
        }
        other => Err(ApiError::invalid("format", format!("{other:?} is not json or csv"))),
    }
}
