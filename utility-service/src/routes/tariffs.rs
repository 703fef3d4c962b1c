//! Tariff calendars per feeder, versioned, and each meter's energy per
//! billing period and tariff band from a finished recovery, with 95% bands
//! (`shared::energies`), reconciled to the feeder's register reads; and per
//! day the same way.

use axum::body::Bytes;
use axum::extract::{Path, Query, State};
use axum::http::{header, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};
use meterveil_shared::aggregate::meter_spreads;
use meterveil_shared::bootstrap::FitDraws;
use meterveil_shared::energies::{band_label, day_label, meter_energies, EnergyCell, Fitted};
use meterveil_shared::tariff::TariffCalendar;
use meterveil_shared::{FeederId, FieldError};
use serde::Deserialize;
use serde_json::{json, Value};

use super::{now_s, AppState, Operator};
use crate::error::ApiError;
use crate::store::tariffs::TariffRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/v1/feeders/{feeder_id}/tariffs", get(list).post(add))
        .route("/v1/recoveries/{job_id}/band-energies", get(band_energies))
        .route("/v1/recoveries/{job_id}/day-energies", get(day_energies))
}

/// A calendar body is at most this large.
const MAX_BODY: usize = 1 << 20;

async fn add(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    body: Bytes,
) -> Result<(StatusCode, Json<Value>), ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    if body.len() > MAX_BODY {
        return Err(ApiError::invalid("body", "a calendar is at most 1 MB"));
    }
    let text = std::str::from_utf8(&body).map_err(|_| ApiError::invalid("body", "not UTF-8 text"))?;
    let calendar = TariffCalendar::parse(text).map_err(|e| {
        ApiError::Invalid(FieldError::new(e.error.field, format!("line {}: {}", e.line, e.error.reason)))
    })?;
    let version = s.store.add_tariff(&feeder, &calendar.name, text, now_s()).await?;
    tracing::info!(feeder = %feeder, version, name = %calendar.name, "tariff calendar stored");
    Ok((StatusCode::CREATED, Json(json!({"feeder_id": feeder.as_str(), "version": version, "name": calendar.name}))))
}

async fn list(
    _: Operator,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
) -> Result<Json<Vec<TariffRecord>>, ApiError> {
    let feeder = super::feeders::known_feeder(&s, &feeder).await?;
    Ok(Json(s.store.tariffs(&feeder).await?))
}

#[derive(Deserialize)]
struct BandQuery {
    format: Option<String>,
    tariff_version: Option<i64>,
}

/// Each meter's energy per billing period and band under one of the feeder's
/// calendars (default: its newest), from a finished recovery.
async fn band_energies(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<BandQuery>,
) -> Result<Response, ApiError> {
    let csv = wants_csv(q.format.as_deref())?;
    let job = super::recoveries::find_done(&s, &id).await?;
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let stored = s.store.tariffs(&feeder).await?;
    let chosen = match q.tariff_version {
        Some(v) => stored.iter().find(|t| t.version == v),
        None => stored.last(),
    };
    let Some(record) = chosen else {
        let reason = format!(
            "feeder {feeder} has no tariff calendar{}",
            q.tariff_version.map(|v| format!(" version {v}")).unwrap_or_default()
        );
        return Err(ApiError::NotFound(FieldError::new("tariff_version", reason)));
    };
    let calendar = TariffCalendar::parse(&record.body)
        .map_err(|e| ApiError::Internal(anyhow::anyhow!("stored calendar no longer parses: {e}")))?;
    let (cells, meters, draws_used) = cells_of(&s, &job, Cells::Bands(calendar.clone())).await?;
    tracing::info!(job = %id, tariff_version = record.version, cells = cells.len(), "band energies");
    let out: Vec<Value> = cells
        .iter()
        .map(|c| {
            json!({
                "meter_id": meters[c.meter], "period_start": c.label.0.to_string(),
                "period_end": calendar.period_end(c.label.0).to_string(), "band": calendar.bands[c.label.1],
                "kwh": c.kwh, "kwh_low": c.kwh_low, "kwh_high": c.kwh_high, "intervals": c.intervals,
                "register_read": c.registered,
            })
        })
        .collect();
    if csv {
        return Ok(
            ([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], csv_of(&cells, &meters, &calendar)).into_response()
        );
    }
    Ok(Json(json!({
        "job_id": id, "tariff_version": record.version, "tariff": calendar.name,
        "bootstrap_draws": draws_used, "energies": out,
    }))
    .into_response())
}

/// `format`: json (the default) or csv; true for csv.
pub(crate) fn wants_csv(format: Option<&str>) -> Result<bool, ApiError> {
    match format.unwrap_or("json") {
        "json" => Ok(false),
        "csv" => Ok(true),
        other => Err(ApiError::invalid("format", format!("{other:?} is not json or csv"))),
    }
}

/// What a recovery's energies are summed by.
pub(crate) enum Cells {
    Bands(TariffCalendar),
    /// Days in this zone (UTC: the settlement day).
    Days(chrono_tz::Tz),
}

/// Each meter's energies of a finished recovery by `by`, with 95% bands from
/// its stored band model (spreads and bootstrap; a job without one has its
/// spreads fitted here and no bootstrap), reconciled to the register reads.
/// Gives back the cells, the meters in the cells' order and the bootstrap's
/// draws used.
pub(crate) async fn cells_of(
    s: &AppState,
    job: &crate::store::recoveries::JobRecord,
    by: Cells,
) -> Result<(Vec<EnergyCell>, Vec<String>, usize), ApiError> {
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let window = crate::jobs::recover::load_window(&s.store, &feeder, job.window_start, job.window_end)
        .await
        .map_err(ApiError::Internal)?;
    let rows = s.store.job_rows(&job.job_id, None).await?;
    let cols = window.levels.cols();
    let x =
        super::recoveries::recovered_matrix(&rows, &window.meters, job.window_start, window.layout.interval_s, cols);
    let start = job.window_start;
    let model = super::recoveries::band_model(s, &job.job_id, &window.meters, cols).await?;
    let draws_used = model.as_ref().map_or(0, |m| m.1.shifts.len());
    let out = tokio::task::spawn_blocking(move || {
        let (spreads, draws) = model.unwrap_or_else(|| {
            (meter_spreads(&x, &window.levels, &window.profile, window.layout.interval_s), FitDraws::default())
        });
        let fitted =
            Fitted { x: &x, levels: &window.levels, start, interval_s: window.layout.interval_s, draws: &draws };
        let energies = |label: &dyn Fn(i64) -> Option<(chrono::NaiveDate, usize)>| {
            meter_energies(fitted, &window.profile, &spreads, &window.constraints, label)
        };
        let cells = match &by {
            Cells::Bands(calendar) => energies(&band_label(calendar)),
            Cells::Days(zone) => energies(&day_label(Some(*zone))),
        };
        (cells, window.meters)
    })
    .await
    .map_err(|e| ApiError::Internal(e.into()))?;
    Ok((out.0, out.1, draws_used))
}

#[derive(Deserialize)]
struct DayQuery {
    format: Option<String>,
    /// `utc` (default: the settlement day) or `local` (the feeder's zone).
    days: Option<String>,
}

/// Each meter's energy per day from a finished recovery, with its 95% band
/// (the levels' estimate, not the settled sum of the recovered profile: see
/// README "Group loads and their bands"), a read day fixed to its read.
async fn day_energies(
    _: Operator,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<DayQuery>,
) -> Result<Response, ApiError> {
    let csv = wants_csv(q.format.as_deref())?;
    let job = super::recoveries::find_done(&s, &id).await?;
    let zone = match q.days.as_deref().unwrap_or("utc") {
        "utc" => chrono_tz::UTC,
        "local" => {
            let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
            let name = s.store.feeder_time_zone(&feeder).await?.unwrap_or_else(|| "UTC".into());
            name.parse().map_err(|_| ApiError::Internal(anyhow::anyhow!("stored zone {name} does not parse")))?
        }
        other => return Err(ApiError::invalid("days", format!("{other:?} is not utc or local"))),
    };
    let (cells, meters, draws_used) = cells_of(&s, &job, Cells::Days(zone)).await?;
    tracing::info!(job = %id, cells = cells.len(), "day energies");
    if csv {
        let mut text = String::from("meter_id,day,kwh,kwh_low,kwh_high,intervals,register_read\n");
        for c in &cells {
            text.push_str(&format!(
                "{},{},{:.4},{:.4},{:.4},{},{}\n",
                meters[c.meter], c.label.0, c.kwh, c.kwh_low, c.kwh_high, c.intervals, c.registered
            ));
        }
        return Ok(([(header::CONTENT_TYPE, "text/csv; charset=utf-8")], text).into_response());
    }
    let out: Vec<Value> = cells
        .iter()
        .map(|c| {
            json!({
                "meter_id": meters[c.meter], "day": c.label.0.to_string(), "kwh": c.kwh,
                "kwh_low": c.kwh_low, "kwh_high": c.kwh_high, "intervals": c.intervals, "register_read": c.registered,
            })
        })
        .collect();
    Ok(Json(json!({"job_id": id, "days": zone.name(), "bootstrap_draws": draws_used, "energies": out})).into_response())
}

/// The band energies as CSV, one row per meter, period and band.
fn csv_of(cells: &[meterveil_shared::energies::EnergyCell], meters: &[String], calendar: &TariffCalendar) -> String {
    let mut text = String::from("meter_id,period_start,period_end,band,kwh,kwh_low,kwh_high,intervals,register_read\n");
    for c in cells {
        text.push_str(&format!(
            "{},{},{},{},{:.4},{:.4},{:.4},{},{}\n",
            meters[c.meter],
            c.label.0,
            calendar.period_end(c.label.0),
            calendar.bands[c.label.1],
            c.kwh,
            c.kwh_low,
            c.kwh_high,
            c.intervals,
            c.registered
        ));
    }
    text
}
