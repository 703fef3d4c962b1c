//! A named group's load on a finished recovery, charted with its 95% band over
//! the whole window in the feeder's local time; the group named by a form on
//! the page.

use axum::extract::{Path, Query, State};
use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use maud::{html, Markup, PreEscaped};
use meterveil_shared::FeederId;
use serde::Deserialize;

use super::dashboard::{page, Viewer};
use super::local_time::local_and_utc;
use super::AppState;
use crate::error::ApiError;
use crate::report::profile_chart;

#[derive(Deserialize, Default)]
pub(crate) struct GroupQuery {
    #[serde(default)]
    name: String,
}

/// The form that names a group.
fn group_form(id: &str, name: &str) -> Markup {
    html! {
        form method="get" action=(format!("/dashboard/recoveries/{id}/groups")) {
            label { "group " input type="text" name="name" value=(name) required; }
            " " button type="submit" { "Show its load" }
        }
        p { "Groups are defined with PUT /v1/groups/{name}: a list of meters, or the members of one load-shape cluster." }
    }
}

pub(crate) async fn group_page(
    _: Viewer,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<GroupQuery>,
) -> Result<Response, ApiError> {
    let job = super::recoveries::find(&s, &id).await?;
    let title = format!("Group load on recovery {id}");
    let name = q.name.trim().to_owned();
    if job.state != "done" || name.is_empty() {
        let body = html! {
            @if job.state != "done" { p { "The job is " (job.state) "." } } @else { (group_form(&id, "")) }
        };
        return Ok(page(&title, body, false).into_response());
    }
    let refuse = |reason: String| {
        let body = html! { (group_form(&id, &name)) p.problem { strong { "Not shown: name" } ": " (reason) "." } };
        Ok((StatusCode::BAD_REQUEST, page(&title, body, false)).into_response())
    };
    let members = s.store.group_members(&name).await?;
    if members.is_empty() {
        return refuse(format!("no group {name}"));
    }
    let (band, step, meters, draws) = match super::groups::member_band(&s, &job, &name, &members).await {
        Ok(b) => b,
        Err(ApiError::Invalid(e)) => return refuse(e.reason),
        Err(e) => return Err(e),
    };
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let tz = super::local_time::zone(&s.store.feeder_time_zone(&feeder).await?.unwrap_or_default());
    let points: Vec<(i64, f64, f64, f64)> =
        band.iter().enumerate().map(|(j, (kw, lo, hi))| (job.window_start + j as i64 * step, *kw, *lo, *hi)).collect();
    let start_local = chrono::DateTime::from_timestamp(job.window_start, 0).unwrap_or_default().with_timezone(&tz);
    let x_label = format!("hours from {} ({tz})", start_local.format("%Y-%m-%d %H:%M"));
    let chart = profile_chart(&format!("Group {name}: {meters} meters"), &x_label, job.window_start, &points, &[]);
    let hours = step as f64 / 3600.0;
    let kwh: f64 = points.iter().map(|p| p.1 * hours).sum();
    let peak = points.iter().max_by(|a, b| a.1.total_cmp(&b.1));
    let body = html! {
        (group_form(&id, &name))
        p { "Feeder " (job.feeder_id) " · window " (local_and_utc(job.window_start, tz)) " to " (local_and_utc(job.window_end, tz)) }
        p {
            (format!("{meters} of the group's {} meters are on this feeder; their energy over the window is {kwh:.0} kWh", members.len()))
            @if let Some(p) = peak { (format!("; the highest interval, {:.1} kW, starts ", p.1)) (local_and_utc(p.0, tz)) }
            "."
        }
        (PreEscaped(chart))
        p { "The band is each interval's 95% range from every member's spread around its recovered profile, \
             that interval's stored level and the recovery's bootstrap of its own fit (" (draws) " refits). \
             Measured on populations we did not design, it holds the true load 90-99% of the time on household \
             and mixed feeders under dither σ 0.3 and 1.0 kW, but only 76-92% on smooth standard-profile \
             feeders (README, \"Group loads and their bands\")." }
    };
    Ok(page(&title, body, false).into_response())
}
