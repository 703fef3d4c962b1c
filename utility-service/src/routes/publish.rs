//! Publishing a calibration's recommendation as the feeder's next profile
//! version from the dashboard: a confirmation page that shows the trade-off,
//! then a form (with the session's form token) that publishes. Refused, with
//! the reason, for a job that is not a finished calibration, one that met no
//! setting, or one published before.

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::{get, post};
use axum::{Form, Router};
use maud::{html, Markup};
use meterveil_shared::calibrate::Calibration;
use meterveil_shared::{DitherProfile, FeederId};
use serde::Deserialize;

use super::actions::{forged, form_is_ours};
use super::dashboard::{page, Viewer};
use super::{now_s, AppState};
use crate::error::ApiError;

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/dashboard/publish/{job_id}", get(confirm))
        .route("/dashboard/actions/publish/{job_id}", post(publish))
}

/// A calibration that may be published: its feeder, its result and the profile.
struct Publishable {
    feeder: FeederId,
    calibration: Calibration,
    profile: DitherProfile,
}

/// The calibration `id` if it may be published, or the field and reason why not.
async fn publishable(s: &AppState, id: &str) -> Result<Result<Publishable, (&'static str, String)>, ApiError> {
    let Some(job) = s.store.analysis(id).await? else {
        return Ok(Err(("job_id", format!("there is no job {id}"))));
    };
    if job.kind != "calibrate" || job.state != "done" {
        return Ok(Err(("job_id", format!("{id} is a {} {} job, not a finished calibration", job.state, job.kind))));
    }
    let result = job.result.unwrap_or_default();
    if !result["published_version"].is_null() {
        return Ok(Err(("job_id", format!("{id} was published before, as version {}", result["published_version"]))));
    }
    let feeder = FeederId::parse(result["feeder_id"].as_str().unwrap_or("")).map_err(ApiError::Invalid)?;
    let calibration: Calibration = serde_json::from_value(result)
        .map_err(|e| ApiError::Internal(anyhow::anyhow!("stored calibration {id} does not parse: {e}")))?;
    if !calibration.meets_targets {
        return Ok(Err((
            "meets_targets",
            format!("calibration {id} found no setting that meets its targets; only a recommendation that does is published"),
        )));
    }
    let profile = DitherProfile::try_from(calibration.recommended.clone())
        .map_err(|e| ApiError::Internal(anyhow::anyhow!("stored recommendation of {id} is invalid: {e}")))?;
    Ok(Ok(Publishable { feeder, calibration, profile }))
}

fn refused(field: &str, reason: &str) -> Response {
    let body = html! {
        p.problem { strong { "Not published: " (field) } ": " (reason) ". Nothing was changed." }
        p { a href="/dashboard" { "Back to the feeders" } }
    };
    (StatusCode::BAD_REQUEST, page("Publish a recommendation", body, false)).into_response()
}

fn trade_off(p: &Publishable) -> Markup {
    let c = &p.calibration.chosen;
    let t = &p.calibration.targets;
    let bound = |b: Option<f64>| b.map(|b| format!(" (target ≤ {:.1}%)", 100.0 * b)).unwrap_or_default();
    html! {
        table {
            tr { th { "" } th { "recommended" } }
            tr { td { "profile" } td { (p.profile.describe()) } }
            tr { td { "strongest attacker's event F1, one captured meter" } td { (format!("{:.2} (target ≤ {:.2})", c.attacker_event_f1, p.calibration.targets.event_f1_max)) } }
            tr { td { "utility's median daily-energy error" } td { (format!("{:.1}% (target ≤ {:.1}%)", 100.0 * c.utility_daily_energy_error, 100.0 * p.calibration.targets.daily_energy_error_max)) } }
            tr { td { (format!("utility's group-load nRMSE, groups of {} meters", t.group_size)) } td { (format!("{:.1}%{}", 100.0 * c.utility_group_nrmse, bound(t.group_nrmse_max))) } }
            tr { td { "utility's median band-energy error" } td { (c.utility_band_energy_error.map_or("no tariff calendar".into(), |e| format!("{:.1}%{}", 100.0 * e, bound(t.band_energy_error_max)))) } }
            tr { td { "utility's interval nRMSE" } td { (format!("{:.2}", c.utility_nrmse)) } }
        }
        p { (p.calibration.message) }
    }
}

async fn confirm(v: Viewer, State(s): State<AppState>, Path(id): Path<String>) -> Result<Response, ApiError> {
    let p = match publishable(&s, &id).await? {
        Ok(p) => p,
        Err((field, reason)) => return Ok(refused(field, &reason)),
    };
    let current =
        s.store.profiles(&p.feeder).await?.last().map(|r| format!("v{}: {}", r.version.0, r.profile.describe()));
    let body = html! {
        p { "Feeder " (p.feeder) "; its current profile: " (current.unwrap_or_else(|| "none".into())) "." }
        (trade_off(&p))
        p { "Publishing makes this the feeder's next profile version; gateways take it on their next pull. \
             Dithering is a privacy measure with limits; the targets are the utility's to defend with its privacy officer." }
        form method="post" action=(format!("/dashboard/actions/publish/{id}")) {
            input type="hidden" name="csrf" value=(v.csrf);
            button type="submit" { "Publish as the next profile version" }
        }
    };
    Ok(page(&format!("Publish calibration {id}"), body, false).into_response())
}

#[derive(Deserialize)]
struct PublishForm {
    #[serde(default)]
    csrf: String,
}

async fn publish(
    v: Viewer,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Form(f): Form<PublishForm>,
) -> Result<Response, ApiError> {
    if !form_is_ours(&v, &f.csrf) {
        return Ok(forged());
    }
    let p = match publishable(&s, &id).await? {
        Ok(p) => p,
        Err((field, reason)) => return Ok(refused(field, &reason)),
    };
    let version = match s.store.publish_recommendation(&id, &p.feeder, &p.profile, (now_s(), &v.who)).await {
        Ok(v) => v,
        Err(crate::store::StoreError::Conflict(e)) => return Ok(refused("job_id", &e.reason)),
        Err(e) => return Err(e.into()),
    };
    let detail = format!("{id}: feeder {} version {version}: {}", p.feeder, p.profile.describe());
    s.store.record_action(now_s(), v.actor(), "publish recommendation", &detail).await?;
    Ok(Redirect::to("/dashboard").into_response())
}
