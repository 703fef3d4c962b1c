//! Recovery jobs: start one for a feeder and window, watch it, fetch its results.

use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use meterveil_shared::{FeederId, FieldError};
use serde::Deserialize;
use serde_json::{json, Value};

use super::{now_s, parse_json, AppState, Operator};
use crate::error::ApiError;
use crate::jobspec::{RecoverRequest, RecoverSpec};
use crate::store::recoveries::JobRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/recoveries", post(start))
        .route("/v1/recoveries/{job_id}", get(status))
        .route("/v1/recoveries/{job_id}/intervals", get(intervals))
        .route("/v1/recoveries/{job_id}/daily", get(daily))
        .route("/v1/recoveries/{job_id}/compare/{later}", get(compare))
}

async fn start(_: Operator, State(s): State<AppState>, body: Bytes) -> Result<(StatusCode, Json<Value>), ApiError> {
    let spec = parse_json::<RecoverRequest>(&body)?.check().map_err(ApiError::Invalid)?;
    let job_id = queue_recovery(&s, &spec).await?;
    Ok((StatusCode::ACCEPTED, Json(json!({ "job_id": job_id, "state": "queued" }))))
}

/// Queues a checked recovery after the checks that need the store (the feeder
/// exists; every profile version keeps the fit's table bounded); its job id.
pub(crate) async fn queue_recovery(s: &AppState, spec: &RecoverSpec) -> Result<String, ApiError> {
    let feeder = &spec.feeder_id;
    if !s.store.feeder_exists(feeder).await? {
        return Err(ApiError::invalid("feeder_id", format!("feeder {feeder} is not registered")));
    }
    // Every profile version the window may hold must keep the fit's table bounded.
    for p in s.store.profiles(feeder).await? {
        meterveil_shared::recovery::table::check_table_size(&p.profile, spec.alpha_kw).map_err(ApiError::Invalid)?;
    }
    if let Some(w) = &spec.warm_from {
        check_warm_start(s, spec, w).await?;
    }
    let job_id = crate::jobs::new_job_id("rec");
    s.store.create_job(&job_id, spec, now_s()).await?;
    s.wake.notify_one();
    Ok(job_id)
}

/// A warm start must be a finished recovery of the same feeder whose window
/// starts no later than this one's and overlaps it.
async fn check_warm_start(s: &AppState, spec: &RecoverSpec, w: &str) -> Result<(), ApiError> {
    let bad = |reason: String| ApiError::invalid("warm_from", reason);
    let job = s.store.job(w).await?.ok_or_else(|| bad(format!("no recovery job {w}")))?;
    if job.state != "done" {
        return Err(bad(format!("job {w} is {}, not done", job.state)));
    }
    if job.feeder_id != spec.feeder_id.as_str() {
        return Err(bad(format!("job {w} recovered feeder {}, not {}", job.feeder_id, spec.feeder_id)));
    }
    if job.window_start > spec.from || job.window_end <= spec.from {
        return Err(bad(format!(
            "job {w}'s window [{}, {}) must hold this window's start {}",
            job.window_start, job.window_end, spec.from
        )));
    }
    Ok(())
}

/// A recovery job whose results may be served: 409 until it is done.
pub(crate) async fn find_done(s: &AppState, id: &str) -> Result<JobRecord, ApiError> {
    let job = find(s, id).await?;
    if job.state != "done" {
        return Err(ApiError::Conflict(FieldError::new(
            "job_id",
            format!("job {id} is {}; results appear when it is done", job.state),
        )));
    }
    Ok(job)
}

pub(crate) async fn find(s: &AppState, id: &str) -> Result<JobRecord, ApiError> {
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
    let job = find_done(&s, &id).await?;
    let rows = s.store.job_rows(&id, q.meter_id.as_deref()).await?;
    tracing::info!(job = %id, rows = rows.len(), meter = ?q.meter_id, format = ?q.format, "per-meter recovery export");
    let interval_s = job_interval(&rows, &job);
    match q.format.as_deref().unwrap_or("json") {
        "local-csv" => {
            let tz = feeder_tz(&s, &job.feeder_id).await?;
            let csv = crate::settlement::interval_csv(&rows, tz, interval_s);
            Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], csv).into_response())
        }
        "espi" => {
            let xml = crate::settlement::espi_feed(
                &rows,
                (&format!("urn:meterveil:recovery:{id}"), "Recovered interval energy"),
                &format!("/v1/recoveries/{id}/intervals?format=espi"),
                interval_s,
                now_s(),
            );
            Ok(([(header::CONTENT_TYPE, "application/atom+xml; charset=utf-8")], xml).into_response())
        }
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
        other => Err(ApiError::invalid("format", format!("{other:?} is not json, csv, local-csv or espi"))),
    }
}

/// Interval length of a job's rows (the window over the per-meter row count).
fn job_interval(rows: &[crate::store::recoveries::RecoveredRow], job: &JobRecord) -> u32 {
    let per_meter = rows.iter().take_while(|r| rows.first().is_some_and(|f| f.meter_id == r.meter_id)).count().max(1);
    (((job.window_end - job.window_start) / per_meter as i64).max(1)) as u32
}

async fn feeder_tz(s: &AppState, feeder: &str) -> Result<chrono_tz::Tz, ApiError> {
    let id = FeederId::parse(feeder).map_err(ApiError::Invalid)?;
    let name = s.store.feeder_time_zone(&id).await?.unwrap_or_else(|| "UTC".into());
    name.parse().map_err(|_| ApiError::Internal(anyhow::anyhow!("feeder {feeder} has an unknown time zone {name:?}")))
}

/// Settlement energies per meter and UTC day, reconciled to register advances.
async fn daily(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<IntervalQuery>,
) -> Result<Response, ApiError> {
    // The format is checked before the day estimates are made.
    let csv = super::tariffs::wants_csv(q.format.as_deref())?;
    let job = find_done(&s, &id).await?;
    let rows = s.store.job_rows(&id, q.meter_id.as_deref()).await?;
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let mut reads = s.store.feeder_registers_between(&feeder, job.window_start, job.window_end + 1).await?;
    if let Some(m) = &q.meter_id {
        reads.retain(|r| &r.meter_id == m);
    }
    let (cells, meters, _) = super::tariffs::cells_of(&s, &job, super::tariffs::Cells::Days(chrono_tz::UTC)).await?;
    let estimates = crate::settlement::day_estimates(&cells, &meters);
    let days = crate::settlement::daily(&rows, &reads, job_interval(&rows, &job), &estimates);
    tracing::info!(job = %id, days = days.len(), meter = ?q.meter_id, "per-meter daily energy export");
    if csv {
        return Ok(
            ([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], crate::settlement::daily_csv(&days)).into_response()
        );
    }
    Ok(Json(days).into_response())
}

/// A finished recovery's daily energies (rows of all meters) against the
/// feeder's register advances now, at their recovered sums (a comparison
/// follows how the recovered profile moved).
async fn daily_of(s: &AppState, job: &JobRecord) -> Result<Vec<crate::settlement::DailyEnergy>, ApiError> {
    let rows = s.store.job_rows(&job.job_id, None).await?;
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let reads = s.store.feeder_registers_between(&feeder, job.window_start, job.window_end + 1).await?;
    Ok(crate::settlement::daily(&rows, &reads, job_interval(&rows, job), &Default::default()))
}

/// How each meter-day both recoveries of one feeder hold moved from the
/// earlier (`job_id`) to the later, and why; with a summary.
async fn compare(
    _: Operator,
    State(s): State<AppState>,
    Path((id, later)): Path<(String, String)>,
) -> Result<Json<Value>, ApiError> {
    let (a, b) = (find_done(&s, &id).await?, find_done(&s, &later).await?);
    if a.feeder_id != b.feeder_id {
        let reason = format!("{later} recovered feeder {}, {id} feeder {}", b.feeder_id, a.feeder_id);
        return Err(ApiError::invalid("later", reason));
    }
    let changes = crate::settlement::compare_days(
        &daily_of(&s, &a).await?,
        &daily_of(&s, &b).await?,
        a.profile_version != b.profile_version,
    );
    let (reasons, quiet) = crate::settlement::comparison_summary(&changes);
    tracing::info!(earlier = %id, later = %later, meter_days = changes.len(), "run comparison");
    Ok(Json(json!({
        "feeder_id": a.feeder_id,
        "earlier": {"job_id": id, "window_start": a.window_start, "window_end": a.window_end, "profile_version": a.profile_version},
        "later": {"job_id": later, "window_start": b.window_start, "window_end": b.window_end, "profile_version": b.profile_version},
        "meter_days": changes.len(),
        "reasons": reasons,
        "median_move_without_new_data": quiet,
        "days": changes,
    })))
}

/// A finished recovery's estimates as a matrix, rows in `meters`' order and
/// a column per interval of its window (what the group and band routes fit
/// their spreads to).
pub(crate) fn recovered_matrix(
    rows: &[crate::store::recoveries::RecoveredRow],
    meters: &[String],
    window_start: i64,
    interval_s: u32,
    cols: usize,
) -> nalgebra::DMatrix<f64> {
    let index: std::collections::HashMap<&str, usize> =
        meters.iter().enumerate().map(|(i, m)| (m.as_str(), i)).collect();
    let mut x = nalgebra::DMatrix::zeros(meters.len(), cols);
    for r in rows {
        let j = ((r.interval_start - window_start) / i64::from(interval_s)) as usize;
        if let (Some(&i), true) = (index.get(r.meter_id.as_str()), j < cols) {
            x[(i, j)] = r.kw;
        }
    }
    x
}

/// A finished recovery's band model (`shared::bootstrap`): each meter's
/// spread and the bootstrap's draws, when the job stored them for exactly
/// these meters and `cols` intervals. `None` for a job that ran without the
/// bootstrap (its bands then take the profile as known and say so).
pub(crate) async fn band_model(
    s: &AppState,
    id: &str,
    meters: &[String],
    cols: usize,
) -> Result<Option<(Vec<meterveil_shared::aggregate::Spread>, meterveil_shared::bootstrap::FitDraws)>, ApiError> {
    let Some(body) = s.store.bands(id).await? else { return Ok(None) };
    let stored: meterveil_shared::bootstrap::StoredBands = serde_json::from_str(&body)
        .map_err(|e| ApiError::Internal(anyhow::anyhow!("stored bands of {id} no longer parse: {e}")))?;
    if stored.meters != meters {
        tracing::info!(job = %id, "the feeder's meters changed since the recovery: bands without its bootstrap");
        return Ok(None);
    }
    let parts = stored.parts(cols).map_err(|e| ApiError::Internal(anyhow::anyhow!("stored bands of {id}: {e}")))?;
    Ok(Some(parts))
}
