//! The dashboard's home: one row per feeder with its profile, completeness,
//! latest recovery and audit, its targets and whether it meets them, and a
//! pending calibration recommendation. State reads in words and plain marks
//! (✓, ✗, –), never colour alone. Targets are edited here (a form with the
//! session's form token).

use axum::extract::{Path, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Redirect, Response};
use axum::routing::post;
use axum::{Form, Router};
use maud::{html, Markup};
use meterveil_shared::FeederId;
use serde::Deserialize;

use super::dashboard::{page, Viewer};
use super::local_time::{local_days, local_when, zone};
use super::{now_s, AppState};
use crate::error::ApiError;
use crate::store::overview::FeederHeader;
use crate::store::overview::FeederTargets;

pub fn router() -> Router<AppState> {
    Router::new().route("/dashboard/actions/targets/{feeder_id}", post(set_targets))
}

/// Everything one feeder row shows.
pub(crate) struct FeederRow {
    pub summary: FeederHeader,
    pub completeness: String,
    pub profile: String,
    pub recovery: String,
    /// The latest audit's strongest event F1 and the utility's daily-energy error.
    pub audit: Option<(f64, f64)>,
    pub targets: Option<FeederTargets>,
    pub recommendation: String,
    /// A finished calibration whose recommendation meets its targets and is not published.
    pub publishable: Option<String>,
}

/// Whether an audit's figures meet the targets, in words with a plain mark.
pub(crate) fn status_words(audit: Option<(f64, f64)>, targets: Option<FeederTargets>) -> String {
    let (Some((f1, energy)), Some(t)) = (audit, targets) else {
        return match audit {
            None => "– not audited yet".into(),
            Some(_) => "– no targets set".into(),
        };
    };
    let mut misses = Vec::new();
    if f1 > t.event_f1_max {
        misses.push(format!("event F1 {f1:.2} above {:.2}", t.event_f1_max));
    }
    if energy > t.daily_energy_error_max {
        misses.push(format!(
            "daily energy error {:.1}% above {:.1}%",
            100.0 * energy,
            100.0 * t.daily_energy_error_max
        ));
    }
    if misses.is_empty() {
        "✓ meets both targets".into()
    } else {
        format!("✗ misses: {}", misses.join("; "))
    }
}

/// The latest finished recovery in a phrase: when, its window, rank, stop, corrections.
fn recovery_phrase(j: &crate::store::recoveries::JobRecord, tz: chrono_tz::Tz) -> String {
    let d = j.diagnostics.clone().unwrap_or_default();
    let readings = d["readings"].as_f64().unwrap_or(0.0).max(1.0);
    format!(
        "finished {}; local days {}; rank {}, {}, {:.1}% of readings corrected, {:.1}% atypical",
        local_when(j.finished_at, tz),
        local_days(j.window_start, j.window_end, tz),
        d["rank"],
        d["stop"].as_str().unwrap_or("?"),
        100.0 * d["corrected"].as_f64().unwrap_or(0.0) / readings,
        100.0 * d["atypical"].as_f64().unwrap_or(0.0) / readings
    )
}

pub(crate) async fn feeder_rows(s: &AppState) -> Result<Vec<FeederRow>, ApiError> {
    let mut out = Vec::new();
    for f in s.store.feeder_headers().await? {
        let id = FeederId::parse(&f.feeder_id).map_err(ApiError::Invalid)?;
        // Completeness of the 24 hours that end with the newest stored interval.
        let completeness = match s.store.newest_reading(id.as_str()).await? {
            Some(newest) => {
                let step = f.current_profile.as_ref().map_or(900, |p| i64::from(p.profile.interval_s.max(1)));
                let got = s.store.readings_between(id.as_str(), newest - 86_400, newest).await?;
                let expected = f.meters * (86_400 / step);
                format!("{:.1}% of the last 24 h", 100.0 * got as f64 / expected.max(1) as f64)
            }
            None => "– no readings".into(),
        };
        let profile = f.current_profile.as_ref().map_or_else(|| "none".into(), |p| p.describe());
        let recovery = s
            .store
            .latest_recovery(id.as_str())
            .await?
            .map_or("– none yet".into(), |j| recovery_phrase(&j, zone(&f.time_zone)));
        let audit = s
            .store
            .latest_analysis(id.as_str(), "audit")
            .await?
            .and_then(|a| super::feeder_page::audit_figures(a.result.as_ref()?));
        let latest_calibration = s.store.latest_analysis(id.as_str(), "calibrate").await?;
        let publishable = latest_calibration
            .as_ref()
            .filter(|a| {
                a.result.as_ref().is_some_and(|r| r["meets_targets"] == true && r["published_version"].is_null())
            })
            .map(|a| a.job_id.clone());
        let recommendation = match latest_calibration.and_then(|a| a.result) {
            Some(r) if r["meets_targets"] == true && r["published_version"].is_null() => format!(
                "σ {} kW, boundaries {} kW: meets its targets, not published",
                r["recommended"]["scale_kw"], r["recommended"]["boundaries_kw"]
            ),
            Some(r) if r["meets_targets"] == true => format!("published as version {}", r["published_version"]),
            Some(_) => "the last calibration met no setting".into(),
            None => "–".into(),
        };
        let targets = s.store.feeder_targets(id.as_str()).await?;
        out.push(FeederRow {
            summary: f,
            completeness,
            profile,
            recovery,
            audit,
            targets,
            recommendation,
            publishable,
        });
    }
    Ok(out)
}

/// The feeders' table, each with its targets form.
pub(crate) fn feeder_table(rows: &[FeederRow], v: &Viewer) -> Markup {
    html! {
        table {
            tr {
                th { "feeder" } th { "dither profile" } th { "meters" } th { "completeness" } th { "latest recovery" }
                th { "latest audit" } th { "targets" } th { "status" } th { "calibration" }
            }
            @for r in rows {
                tr {
                    td { a href=(format!("/dashboard/feeders/{}", r.summary.feeder_id)) { (r.summary.feeder_id) } }
                    td { (r.profile) }
                    td { (r.summary.meters) }
                    td { (r.completeness) }
                    td { (r.recovery) }
                    td {
                        @if let Some((f1, energy)) = r.audit {
                            (format!("event F1 {f1:.2}; utility daily energy error {:.1}%", 100.0 * energy))
                        } @else { "–" }
                    }
                    td { (targets_form(&r.summary.feeder_id, r.targets, v)) }
                    td { (status_words(r.audit, r.targets)) }
                    td {
                        (r.recommendation)
                        @if let Some(id) = &r.publishable {
                            " " a href=(format!("/dashboard/publish/{id}")) { "review and publish" }
                        }
                    }
                }
            }
        }
        p { "Event F1: the strongest attacker's, holding one meter's uploads (0 finds nothing, 1 finds every event). \
             Targets are the operator's own; this page only compares." }
    }
}

fn targets_form(feeder: &str, t: Option<FeederTargets>, v: &Viewer) -> Markup {
    html! {
        form method="post" action=(format!("/dashboard/actions/targets/{feeder}")) {
            input type="hidden" name="csrf" value=(v.csrf);
            label { "F1 ≤ " input type="text" name="event_f1_max" size="4" value=(t.map_or(String::new(), |t| format!("{:.2}", t.event_f1_max))); }
            " "
            label { "energy ≤ " input type="text" name="daily_energy_error_max_percent" size="4"
                value=(t.map_or(String::new(), |t| format!("{:.1}", 100.0 * t.daily_energy_error_max))); "%" }
            " "
            button type="submit" { "Set" }
        }
    }
}

#[derive(Deserialize)]
struct TargetsForm {
    #[serde(default)]
    csrf: String,
    #[serde(default)]
    event_f1_max: String,
    #[serde(default)]
    daily_energy_error_max_percent: String,
}

/// The targets a form asks for, or the field that is wrong and why.
fn parse_targets(f: &TargetsForm) -> Result<FeederTargets, (&'static str, String)> {
    let number = |field: &'static str, v: &str| -> Result<f64, (&'static str, String)> {
        v.trim().parse::<f64>().ok().filter(|x| x.is_finite()).ok_or((field, format!("{v:?} is not a number")))
    };
    let f1 = number("event_f1_max", &f.event_f1_max)?;
    if !(f1 > 0.0 && f1 <= 1.0) {
        return Err(("event_f1_max", format!("{f1} is not in (0, 1]")));
    }
    let pct = number("daily_energy_error_max_percent", &f.daily_energy_error_max_percent)?;
    if !(pct > 0.0 && pct <= 100.0) {
        return Err(("daily_energy_error_max_percent", format!("{pct} is not a percentage in (0, 100]")));
    }
    Ok(FeederTargets { event_f1_max: f1, daily_energy_error_max: pct / 100.0 })
}

async fn set_targets(
    v: Viewer,
    State(s): State<AppState>,
    Path(feeder): Path<String>,
    Form(f): Form<TargetsForm>,
) -> Result<Response, ApiError> {
    if !super::actions::form_is_ours(&v, &f.csrf) {
        return Ok(super::actions::forged());
    }
    let known = match FeederId::parse(&feeder) {
        Ok(id) => s.store.feeder_exists(&id).await?,
        Err(_) => false,
    };
    let checked =
        if known { parse_targets(&f) } else { Err(("feeder_id", format!("{feeder} is not a registered feeder"))) };
    let targets = match checked {
        Ok(t) => t,
        Err((field, reason)) => {
            let rows = feeder_rows(&s).await?;
            let body = html! {
                p.problem { strong { "Not set: " (field) } ": " (reason) ". Nothing was stored." }
                (feeder_table(&rows, &v))
            };
            return Ok((StatusCode::BAD_REQUEST, page("Feeder targets", body, false)).into_response());
        }
    };
    s.store.set_feeder_targets(&feeder, targets, now_s()).await?;
    let detail = format!(
        "{feeder}: event F1 ≤ {:.2}, daily energy error ≤ {:.1}%",
        targets.event_f1_max,
        100.0 * targets.daily_energy_error_max
    );
    s.store.record_action(now_s(), v.actor(), "set targets", &detail).await?;
    Ok(Redirect::to("/dashboard").into_response())
}
