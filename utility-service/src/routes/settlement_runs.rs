//! Settlement runs: each feeder's schedule, the runs made by it or by an
//! operator, a run's frozen figures (JSON, CSV, ESPI, each naming the run and
//! its version) and the comparison of two runs of one day.

use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};
use meterveil_shared::FieldError;
use serde::Deserialize;
use serde_json::{json, Value};

use super::{now_s, parse_json, AppState, Operator};
use crate::error::ApiError;
use crate::jobs::schedule::{make_run, Made};
use crate::schedule::{check_kind, day_name, parse_day, Schedule};
use crate::settlement::DailyEnergy;
use crate::store::runs::RunRecord;

const DAY: i64 = 86_400;
/// Longest span of days one list may cover.
const MAX_LIST_DAYS: i64 = 366;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/feeders/{feeder_id}/settlement-schedule", get(get_schedule).put(put_schedule))
        .route("/v1/feeders/{feeder_id}/settlement-runs", get(list).post(start))
        .route("/v1/feeders/{feeder_id}/settlement-runs/{day}/{kind}", get(figures))
        .route("/v1/feeders/{feeder_id}/settlement-runs/{day}/{kind}/compare/{later}", get(compare))
}

async fn put_schedule(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    body: Bytes,
) -> Result<Json<Value>, ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    let schedule: Schedule = parse_json(&body)?;
    schedule.check().map_err(ApiError::Invalid)?;
    s.store.put_schedule(&feeder, &schedule, now_s()).await?;
    tracing::info!(feeder = %feeder, "settlement schedule stored");
    Ok(Json(json!({"feeder_id": feeder.as_str(), "schedule": schedule})))
}

async fn get_schedule(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
) -> Result<Json<Value>, ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    let schedule = s.store.schedule(&feeder).await?.ok_or_else(|| {
        ApiError::NotFound(FieldError::new("feeder_id", format!("feeder {feeder} has no settlement schedule")))
    })?;
    Ok(Json(json!({"feeder_id": feeder.as_str(), "schedule": schedule})))
}

/// `POST …/settlement-runs`: an operator's run of one day, of a kind the
/// operator names.
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RunRequest {
    day: String,
    kind: String,
}

async fn start(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    body: Bytes,
) -> Result<(StatusCode, Json<Made>), ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    let req: RunRequest = parse_json(&body)?;
    let day = parse_day("day", &req.day).map_err(ApiError::Invalid)?;
    check_kind("kind", &req.kind).map_err(ApiError::Invalid)?;
    let now = now_s();
    if day + DAY > now {
        return Err(ApiError::invalid("day", format!("{} has not ended yet", req.day)));
    }
    if s.store.readings_per_day(&feeder, day, day + DAY).await?.is_empty() {
        return Err(ApiError::invalid("day", format!("feeder {feeder} has no readings stored for {}", req.day)));
    }
    let window = s.store.schedule(&feeder).await?.map_or(28, |sc| sc.window_days);
    let made = make_run(&s, &feeder, window, day, &req.kind, "operator", now, now).await?.ok_or_else(|| {
        ApiError::Conflict(FieldError::new("kind", format!("{} already has a run of kind {}", req.day, req.kind)))
    })?;
    Ok((StatusCode::ACCEPTED, Json(made)))
}

#[derive(Deserialize)]
struct ListQuery {
    from: Option<String>,
    to: Option<String>,
}

/// A feeder's runs of the days from `from` to `to` (dates, both included;
/// default the last 35 days).
async fn list(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    Query(q): Query<ListQuery>,
) -> Result<Json<Vec<RunRecord>>, ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    let today = now_s().div_euclid(DAY) * DAY;
    let to = match &q.to {
        Some(d) => parse_day("to", d).map_err(ApiError::Invalid)? + DAY,
        None => today + DAY,
    };
    let from = match &q.from {
        Some(d) => parse_day("from", d).map_err(ApiError::Invalid)?,
        None => to - 35 * DAY,
    };
    if to <= from || to - from > MAX_LIST_DAYS * DAY {
        return Err(ApiError::invalid("to", format!("give from 1 to {MAX_LIST_DAYS} days, from no later than to")));
    }
    Ok(Json(s.store.runs(&feeder, from, to).await?))
}

/// A finished run of a feeder's day, and its frozen figures.
async fn finished_run(
    s: &AppState,
    feeder: &str,
    day: &str,
    kind: &str,
) -> Result<(RunRecord, Vec<DailyEnergy>), ApiError> {
    let feeder = super::feeders::known_feeder(s, feeder).await?;
    let day_start = parse_day("day", day).map_err(ApiError::Invalid)?;
    let run = s.store.run(&feeder, day_start, kind).await?.ok_or_else(|| {
        ApiError::NotFound(FieldError::new("kind", format!("{day} of feeder {feeder} has no run of kind {kind:?}")))
    })?;
    let Some(days) = run.days.as_deref().filter(|_| run.state == "done") else {
        let reason =
            format!("run {} ({kind} of {day}) is {}; its figures appear when it is done", run.run_id, run.state);
        return Err(ApiError::Conflict(FieldError::new("kind", reason)));
    };
    let days: Vec<DailyEnergy> = serde_json::from_str(days)
        .map_err(|e| ApiError::Internal(anyhow::anyhow!("run {}'s stored figures: {e}", run.run_id)))?;
    Ok((run, days))
}

#[derive(Deserialize)]
struct FormatQuery {
    format: Option<String>,
}

/// A run's figures: each meter's settled energy of the day (JSON or CSV), or
/// the run's interval estimates of the day as ESPI; each names the run.
async fn figures(
    _: Operator,
    State(s): State<AppState>,
    Path((feeder, day, kind)): Path<(String, String, String)>,
    Query(q): Query<FormatQuery>,
) -> Result<Response, ApiError> {
    let (run, days) = finished_run(&s, &feeder, &day, &kind).await?;
    match q.format.as_deref().unwrap_or("json") {
        "json" => Ok(Json(json!({"run": run, "days": days})).into_response()),
        "csv" => {
            let mut out = String::new();
            for (i, line) in crate::settlement::daily_csv(&days).lines().enumerate() {
                let head = if i == 0 {
                    "feeder_id,run_kind,run_version,run_id".to_owned()
                } else {
                    format!("{},{},{},{}", run.feeder_id, run.kind, run.version, run.run_id)
                };
                out.push_str(&format!("{head},{line}\n"));
            }
            Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], out).into_response())
        }
        "espi" => {
            let mut rows = s.store.job_rows(&run.job_id, None).await?;
            rows.retain(|r| (run.day_start..run.day_start + DAY).contains(&r.interval_start));
            let interval_s = (DAY / days.first().map_or(96, |d| d.intervals.max(1)) as i64) as u32;
            let id = format!("urn:meterveil:settlement:{}:{}:{}:v{}", run.feeder_id, run.day, run.kind, run.version);
            let title =
                format!("Settlement run {} version {} of {}, {}", run.kind, run.version, run.feeder_id, run.day);
            let href = format!("/v1/feeders/{}/settlement-runs/{}/{}?format=espi", run.feeder_id, run.day, run.kind);
            let xml = crate::settlement::espi_feed(&rows, (&id, &title), &href, interval_s, now_s());
            Ok(([(header::CONTENT_TYPE, "application/atom+xml; charset=utf-8")], xml).into_response())
        }
        other => Err(ApiError::invalid("format", format!("{other:?} is not json, csv or espi"))),
    }
}

/// How each meter's energy of the day moved from run `kind` to run `later`, and why.
async fn compare(
    _: Operator,
    State(s): State<AppState>,
    Path((feeder, day, kind, later)): Path<(String, String, String, String)>,
) -> Result<Json<Value>, ApiError> {
    let (a, da) = finished_run(&s, &feeder, &day, &kind).await?;
    let (b, db) = finished_run(&s, &feeder, &day, &later).await?;
    let (ja, jb) = (s.store.job(&a.job_id).await?, s.store.job(&b.job_id).await?);
    let changed = ja.and_then(|j| j.profile_version) != jb.and_then(|j| j.profile_version);
    let changes = crate::settlement::compare_days(&da, &db, changed);
    let (reasons, quiet) = crate::settlement::comparison_summary(&changes);
    tracing::info!(feeder = %a.feeder_id, day = %day_name(a.day_start), earlier = %kind, later = %later, "run comparison");
    Ok(Json(json!({
        "feeder_id": a.feeder_id,
        "day": a.day,
        "earlier": a,
        "later": b,
        "meter_days": changes.len(),
        "reasons": reasons,
        "median_move_without_new_data": quiet,
        "days": changes,
    })))
}
