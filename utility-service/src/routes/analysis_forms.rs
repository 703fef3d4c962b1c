//! Starting an audit or a calibration from the dashboard: plain forms on the
//! feeder page, each with the session's form token. They build the same
//! requests as the HTTP API and are checked and queued by the same code; a bad
//! field gets the form back naming it, with nothing stored; a good one is
//! recorded in the action log.

use axum::extract::State;
use axum::http::StatusCode;
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::post;
use axum::{Form, Router};
use maud::{html, Markup};
use meterveil_shared::{FeederId, FieldError};
use serde::Deserialize;

use super::actions::{forged, form_is_ours};
use super::dashboard::{page, Viewer};
use super::local_time::local_days;
use super::{now_s, AppState};
use crate::error::ApiError;
use crate::jobspec::{AuditRequest, CalibrateRequest};
use crate::store::overview::FeederTargets;
use crate::store::recoveries::JobRecord;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/dashboard/actions/audit", post(start_audit))
        .route("/dashboard/actions/calibrate", post(start_calibration))
}

/// The register periods an audit may assume instead of the profile's own.
const PERIODS: [&str; 4] = ["none", "daily", "weekly", "monthly"];

/// The fields every analysis form starts with: the session's form token, the
/// feeder, and the choice of its finished recoveries.
fn form_head(feeder: &FeederId, done: &[&JobRecord], tz: chrono_tz::Tz, v: &Viewer) -> Markup {
    html! {
        input type="hidden" name="csrf" value=(v.csrf);
        input type="hidden" name="feeder_id" value=(feeder);
        label { "recovery " select name="recovery_job" {
            @for j in done {
                option value=(j.job_id) { (j.job_id) ", " (local_days(j.window_start, j.window_end, tz)) }
            }
        } }
    }
}

fn problem_line(problem: Option<(&str, &str)>) -> Markup {
    html! {
        @if let Some((field, reason)) = problem {
            p.problem { strong { "Not started: " (field) } ": " (reason) ". Nothing was stored." }
        }
    }
}

/// The form that starts an audit of one of the feeder's finished recoveries.
pub(crate) fn audit_form(
    feeder: &FeederId,
    done: &[&JobRecord],
    tz: chrono_tz::Tz,
    v: &Viewer,
    problem: Option<(&str, &str)>,
) -> Markup {
    html! {
        h3 { "Audit" }
        @if done.is_empty() { p { "An audit needs a finished recovery of this feeder." } }
        @else {
            form method="post" action="/dashboard/actions/audit" {
                (form_head(feeder, done, tz, v))
                " "
                label { "captured meters " input type="text" name="captured" size="40" placeholder="meter ids, by commas or spaces" required; }
                " "
                label { "assume register reads " select name="register_period" {
                    option value="" { "as the profile sends them" }
                    @for p in PERIODS { option value=(p) { (p) } }
                } }
                " "
                button type="submit" { "Start the audit" }
            }
            p { "The attacker holds the captured meters' uploads and the published profile; the audit measures what \
                 the strongest attack we know finds in them." }
        }
        (problem_line(problem))
    }
}

/// The form that starts a calibration, prefilled with the feeder's targets.
pub(crate) fn calibration_form(
    feeder: &FeederId,
    done: &[&JobRecord],
    (tz, targets): (chrono_tz::Tz, Option<FeederTargets>),
    v: &Viewer,
    problem: Option<(&str, &str)>,
) -> Markup {
    let f1 = targets.map_or(String::new(), |t| format!("{:.2}", t.event_f1_max));
    let energy = targets.map_or(String::new(), |t| format!("{:.1}", 100.0 * t.daily_energy_error_max));
    html! {
        h3 { "Calibration" }
        @if done.is_empty() { p { "A calibration needs a finished recovery of this feeder." } }
        @else {
            form method="post" action="/dashboard/actions/calibrate" {
                (form_head(feeder, done, tz, v))
                " "
                label { "event F1 ≤ " input type="text" name="event_f1_max" size="4" value=(f1) required; }
                " "
                label { "daily energy error ≤ " input type="text" name="daily_energy_error_max_percent" size="4" value=(energy) required; "%" }
                " "
                label { "captured meters " input type="text" name="captured" size="3" value="1"; }
                br;
                label { "group load nRMSE ≤ " input type="text" name="group_nrmse_max_percent" size="4"; "%" }
                " "
                label { "for groups of " input type="text" name="group_size" size="4" value="50"; " meters" }
                " "
                label { "band energy error ≤ " input type="text" name="band_energy_error_max_percent" size="4"; "% (needs a tariff calendar)" }
                br;
                label { input type="checkbox" name="publish" value="yes"; " publish the recommendation if it meets them" }
                " "
                button type="submit" { "Start the calibration" }
            }
            p { "The calibration searches the dither scale and level sets for the least dither that keeps the \
                 strongest attacker's event F1 under the target, and reports the utility's errors there on what it \
                 uses: daily energies, group loads and tariff-band energies." }
        }
        (problem_line(problem))
    }
}

#[derive(Deserialize)]
struct AuditForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    feeder_id: String,
    #[serde(default)]
    recovery_job: String,
    #[serde(default)]
    captured: String,
    #[serde(default)]
    register_period: String,
}

#[derive(Deserialize)]
struct CalibrationForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    feeder_id: String,
    #[serde(default)]
    recovery_job: String,
    #[serde(default)]
    event_f1_max: String,
    #[serde(default)]
    daily_energy_error_max_percent: String,
    #[serde(default)]
    captured: String,
    #[serde(default)]
    group_nrmse_max_percent: String,
    #[serde(default)]
    group_size: String,
    #[serde(default)]
    band_energy_error_max_percent: String,
    #[serde(default)]
    publish: Option<String>,
}

/// An optional percent field as a fraction: blank is no target.
fn optional_percent(field: &str, v: &str) -> Result<Option<f64>, ApiError> {
    match v.trim() {
        "" => Ok(None),
        t => Ok(Some(number(field, t).map_err(ApiError::Invalid)? / 100.0)),
    }
}

/// A number from a form field, or the field's error.
fn number(field: &str, v: &str) -> Result<f64, FieldError> {
    v.trim()
        .parse::<f64>()
        .ok()
        .filter(|x| x.is_finite())
        .ok_or_else(|| FieldError::new(field, format!("{v:?} is not a number")))
}

/// The named feeder, and the finished recovery the form chose on it.
async fn feeder_and_recovery(s: &AppState, feeder_id: &str, job: &str) -> Result<FeederId, ApiError> {
    let feeder = FeederId::parse(feeder_id).map_err(|e| ApiError::invalid("feeder_id", e.reason))?;
    if !s.store.feeder_exists(&feeder).await? {
        return Err(ApiError::invalid("feeder_id", format!("{feeder} is not a registered feeder")));
    }
    match s.store.job(job).await? {
        Some(j) if j.feeder_id == feeder.as_str() && j.state == "done" => Ok(feeder),
        Some(j) if j.feeder_id == feeder.as_str() => {
            Err(ApiError::invalid("recovery_job", format!("recovery {job} is {}, not done", j.state)))
        }
        _ => Err(ApiError::invalid("recovery_job", format!("{job:?} is not a recovery of feeder {feeder}"))),
    }
}

/// The form back with its problem (400), or the error when it is not the operator's.
async fn refuse(s: &AppState, v: &Viewer, feeder_id: &str, e: ApiError, audit: bool) -> Result<Response, ApiError> {
    let e = match e {
        ApiError::Invalid(e) | ApiError::Malformed(e) | ApiError::Conflict(e) => e,
        other => return Err(other),
    };
    let problem = Some((e.field.as_str(), e.reason.as_str()));
    let body = match super::feeder_page::read_history(s, feeder_id).await {
        Ok(h) => {
            let done: Vec<&JobRecord> = h.recoveries.iter().filter(|j| j.state == "done").collect();
            if audit {
                audit_form(&h.feeder, &done, h.tz, v, problem)
            } else {
                calibration_form(&h.feeder, &done, (h.tz, h.targets), v, problem)
            }
        }
        Err(_) => problem_line(problem),
    };
    let title = if audit { "Start an audit" } else { "Start a calibration" };
    Ok((StatusCode::BAD_REQUEST, page(title, body, false)).into_response())
}

async fn start_audit(v: Viewer, State(s): State<AppState>, Form(f): Form<AuditForm>) -> Result<Response, ApiError> {
    if !form_is_ours(&v, &f.csrf) {
        return Ok(forged());
    }
    let queued = async {
        let feeder = feeder_and_recovery(&s, &f.feeder_id, f.recovery_job.trim()).await?;
        let captured: Vec<String> = f
            .captured
            .split([',', ' ', '\n', '\t'])
            .filter(|m| !m.trim().is_empty())
            .map(|m| m.trim().into())
            .collect();
        let period = f.register_period.trim();
        let request = AuditRequest {
            recovery_job: f.recovery_job.trim().into(),
            captured,
            seed: None,
            register_period: (!period.is_empty()).then(|| period.to_owned()),
            curves: true,
        };
        let spec = request.check().map_err(ApiError::Invalid)?;
        let n = spec.captured.len();
        let id = super::analyses::queue_audit(&s, spec).await?;
        Ok::<_, ApiError>((feeder, id, n))
    };
    let (feeder, id, n) = match queued.await {
        Ok(q) => q,
        Err(e) => return refuse(&s, &v, &f.feeder_id, e, true).await,
    };
    let detail = format!("{id}: feeder {feeder}, recovery {}, {n} captured meter(s)", f.recovery_job.trim());
    s.store.record_action(now_s(), v.actor(), "start audit", &detail).await?;
    Ok(Redirect::to(&format!("/dashboard/feeders/{feeder}")).into_response())
}

async fn start_calibration(
    v: Viewer,
    State(s): State<AppState>,
    Form(f): Form<CalibrationForm>,
) -> Result<Response, ApiError> {
    if !form_is_ours(&v, &f.csrf) {
        return Ok(forged());
    }
    let publish = f.publish.as_deref() == Some("yes");
    let queued = async {
        let feeder = feeder_and_recovery(&s, &f.feeder_id, f.recovery_job.trim()).await?;
        let captured = match f.captured.trim() {
            "" => 1,
            c => c.parse::<usize>().map_err(|_| ApiError::invalid("captured", format!("{c:?} is not a count")))?,
        };
        let request = CalibrateRequest {
            recovery_job: f.recovery_job.trim().into(),
            event_f1_max: number("event_f1_max", &f.event_f1_max).map_err(ApiError::Invalid)?,
            captured,
            daily_energy_error_max: number("daily_energy_error_max_percent", &f.daily_energy_error_max_percent)
                .map_err(ApiError::Invalid)?
                / 100.0,
            group_nrmse_max: optional_percent("group_nrmse_max_percent", &f.group_nrmse_max_percent)?,
            group_size: match f.group_size.trim() {
                "" => None,
                g => Some(
                    g.parse::<usize>().map_err(|_| ApiError::invalid("group_size", format!("{g:?} is not a count")))?,
                ),
            },
            band_energy_error_max: optional_percent("band_energy_error_max_percent", &f.band_energy_error_max_percent)?,
            profile_nrmse_max: None,
            publish,
            seed: None,
            register_periods: Vec::new(),
        };
        let spec = request.check().map_err(|e| ApiError::Invalid(percent_field(e)))?;
        let id = super::analyses::queue_calibration(&s, spec).await.map_err(|e| match e {
            ApiError::Invalid(e) => ApiError::Invalid(percent_field(e)),
            other => other,
        })?;
        Ok::<_, ApiError>((feeder, id))
    };
    let (feeder, id) = match queued.await {
        Ok(q) => q,
        Err(e) => return refuse(&s, &v, &f.feeder_id, e, false).await,
    };
    let detail = format!(
        "{id}: feeder {feeder}, recovery {}, F1 ≤ {}, energy ≤ {}%{}",
        f.recovery_job.trim(),
        f.event_f1_max.trim(),
        f.daily_energy_error_max_percent.trim(),
        if publish { ", publish if met" } else { "" }
    );
    s.store.record_action(now_s(), v.actor(), "start calibration", &detail).await?;
    Ok(Redirect::to(&format!("/dashboard/feeders/{feeder}")).into_response())
}

/// The request's `daily_energy_error_max` (a fraction) is the form's percent field.
fn percent_field(mut e: FieldError) -> FieldError {
    if ["daily_energy_error_max", "group_nrmse_max", "band_energy_error_max"].contains(&e.field.as_str()) {
        e.field = format!("{}_percent", e.field);
    }
    e
}
