//! What an operator can do from the dashboard: start a recovery for a feeder
//! and a window of local dates, and cancel a job. Plain HTML forms; each
//! carries the session's form token (`csrf`), and a form without it is refused
//! with 403 before anything changes. Every action is recorded (when, which
//! session, what) in `dashboard_actions`.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::post;
use axum::{Form, Router};
use chrono::{NaiveDate, TimeZone};
use maud::{html, Markup};
use meterveil_shared::FieldError;
use serde::Deserialize;
use serde_json::Value;

use super::dashboard::{page, Viewer};
use super::{now_s, AppState};
use crate::error::ApiError;
use crate::jobspec::RecoverRequest;
use crate::store::overview::FeederHeader;
use crate::store::queue::JobLine;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/dashboard/actions/recover", post(start_recovery))
        .route("/dashboard/actions/cancel/{job_id}", post(cancel))
}

/// Whether a posted form token is this session's (compared in constant time).
pub(crate) fn form_is_ours(v: &Viewer, token: &str) -> bool {
    super::constant_time_eq(token.as_bytes(), v.csrf.as_bytes())
}

pub(crate) fn forged() -> Response {
    let body = html! {
        p.problem { strong { "Refused: " } "this form was not served to your session (its form token is missing or wrong). Nothing was changed." }
        p { a href="/dashboard/jobs" { "Back to the jobs" } }
    };
    (StatusCode::FORBIDDEN, page("Refused", body, false)).into_response()
}

/// The form that starts a recovery, with a problem to show beside it.
pub(crate) fn recovery_form(feeders: &[FeederHeader], v: &Viewer, problem: Option<(&str, &str)>) -> Markup {
    html! {
        h2 { "Start a recovery" }
        form method="post" action="/dashboard/actions/recover" {
            input type="hidden" name="csrf" value=(v.csrf);
            label { "feeder " select name="feeder_id" {
                @for f in feeders { option value=(f.feeder_id) { (f.feeder_id) } }
            } }
            " "
            label { "from (local date) " input type="date" name="from" required; }
            " "
            label { "to, not included (local date) " input type="date" name="to" required; }
            " "
            label { "rank " input type="text" name="rank" value="auto" size="5"; }
            " "
            button type="submit" { "Start" }
        }
        p { "Dates are midnights in the feeder's own time zone; the rank is a number or auto." }
        @if let Some((field, reason)) = problem {
            p.problem { strong { "Not started: " (field) } ": " (reason) ". Nothing was stored." }
        }
    }
}

/// A cancel button for each queued or running job.
pub(crate) fn cancel_forms(jobs: &[JobLine], v: &Viewer) -> Markup {
    html! {
        @for j in jobs.iter().filter(|j| j.state == "queued" || j.state == "running") {
            form method="post" action=(format!("/dashboard/actions/cancel/{}", j.job_id)) {
                input type="hidden" name="csrf" value=(v.csrf);
                button type="submit" { "Cancel " (j.job_id) }
            }
        }
    }
}

#[derive(Deserialize)]
struct RecoveryForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    feeder_id: String,
    #[serde(default)]
    from: String,
    #[serde(default)]
    to: String,
    #[serde(default)]
    rank: String,
}

/// Midnight of a local date in the feeder's time zone, as UTC epoch seconds.
fn local_midnight(field: &str, date: &str, tz: chrono_tz::Tz) -> Result<i64, FieldError> {
    let d = NaiveDate::parse_from_str(date.trim(), "%Y-%m-%d")
        .map_err(|_| FieldError::new(field, format!("{date:?} is not a date (YYYY-MM-DD)")))?;
    let midnight = d.and_hms_opt(0, 0, 0).ok_or_else(|| FieldError::new(field, "has no midnight"))?;
    tz.from_local_datetime(&midnight)
        .earliest()
        .map(|t| t.timestamp())
        .ok_or_else(|| FieldError::new(field, format!("midnight of {date} does not exist in {tz}")))
}

/// The recovery request a form asks for, or the field that is wrong and why.
async fn recovery_request(s: &AppState, f: &RecoveryForm) -> Result<RecoverRequest, FieldError> {
    let feeder = meterveil_shared::FeederId::parse(&f.feeder_id)?;
    let tz = match s.store.feeder_time_zone(&feeder).await {
        Ok(Some(tz)) => tz.parse::<chrono_tz::Tz>().unwrap_or(chrono_tz::UTC),
        Ok(None) => return Err(FieldError::new("feeder_id", format!("{feeder} is not a registered feeder"))),
        Err(e) => return Err(FieldError::new("feeder_id", e.to_string())),
    };
    let from = local_midnight("from", &f.from, tz)?;
    let to = local_midnight("to", &f.to, tz)?;
    let rank = match f.rank.trim() {
        "" | "auto" => None,
        r => Some(Value::from(
            r.parse::<u64>().map_err(|_| FieldError::new("rank", format!("{r:?} is neither a number nor auto")))?,
        )),
    };
    Ok(RecoverRequest {
        feeder_id: feeder.to_string(),
        from,
        to,
        rank,
        alpha_kw: None,
        warm_from: None,
        band_draws: None,
    })
}

async fn start_recovery(
    v: Viewer,
    State(s): State<AppState>,
    Form(f): Form<RecoveryForm>,
) -> Result<Response, ApiError> {
    if !form_is_ours(&v, &f.csrf) {
        return Ok(forged());
    }
    let refuse = |feeders: Vec<FeederHeader>, field: &str, reason: &str| {
        let body = recovery_form(&feeders, &v, Some((field, reason)));
        (StatusCode::BAD_REQUEST, page("Start a recovery", body, false)).into_response()
    };
    let checked = match recovery_request(&s, &f).await.and_then(RecoverRequest::check) {
        Ok(spec) => super::recoveries::queue_recovery(&s, &spec).await.map(|id| (spec, id)),
        Err(e) => Err(ApiError::Invalid(e)),
    };
    let (spec, job_id) = match checked {
        Ok(done) => done,
        Err(ApiError::Invalid(e)) => return Ok(refuse(s.store.feeder_headers().await?, &e.field, &e.reason)),
        Err(e) => return Err(e),
    };
    let detail = format!("{job_id}: feeder {} from {} to {}", spec.feeder_id, f.from.trim(), f.to.trim());
    s.store.record_action(now_s(), v.actor(), "start recovery", &detail).await?;
    Ok(Redirect::to("/dashboard/jobs").into_response())
}

#[derive(Deserialize)]
struct CancelForm {
    #[serde(default)]
    csrf: String,
}

async fn cancel(
    v: Viewer,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Form(f): Form<CancelForm>,
) -> Result<Response, ApiError> {
    if !form_is_ours(&v, &f.csrf) {
        return Ok(forged());
    }
    if !s.store.cancel_job(&id, now_s()).await? {
        let body = html! {
            p.problem { strong { "Not cancelled: job_id" } ": " (id) " does not exist or has already ended." }
            p { a href="/dashboard/jobs" { "Back to the jobs" } }
        };
        return Ok((StatusCode::BAD_REQUEST, page("Cancel a job", body, false)).into_response());
    }
    s.store.record_action(now_s(), v.actor(), "cancel job", &id).await?;
    Ok(Redirect::to("/dashboard/jobs").into_response())
}
