//! One meter's recovered profile: its band and its stored levels over a day, a
//! week or the whole window, in the feeder's local time with UTC beside it;
//! the feeder's meters searchable and paged.

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

/// Meters listed per page.
const METERS_PER_PAGE: usize = 50;

#[derive(Deserialize, Default)]
pub(crate) struct MeterQuery {
    meter_id: Option<String>,
    /// `day`, `week` (default) or `window`.
    #[serde(default)]
    span: String,
    /// First day shown, counted from the window's first day (default 0).
    #[serde(default)]
    start_day: String,
    /// Part of a meter id to search for.
    #[serde(default)]
    q: String,
    #[serde(default)]
    page: String,
}

/// What the query asks for: span in days (None: the whole window), first day,
/// meter-list page; or the field that is wrong and why.
fn parse(q: &MeterQuery, days: i64) -> Result<(Option<i64>, i64, usize), (&'static str, String)> {
    let span = match q.span.trim() {
        "" | "week" => Some(7),
        "day" => Some(1),
        "window" => None,
        other => return Err(("span", format!("{other:?} is not day, week or window"))),
    };
    let start = match q.start_day.trim() {
        "" => 0,
        v => v
            .parse::<i64>()
            .ok()
            .filter(|d| (0..days.max(1)).contains(d))
            .ok_or(("start_day", format!("{v:?} is not a day of the window (0 to {})", days.max(1) - 1)))?,
    };
    let page = match q.page.trim() {
        "" => 1,
        v => v
            .parse::<usize>()
            .ok()
            .filter(|p| (1..=100_000).contains(p))
            .ok_or(("page", format!("{v:?} is not a page number")))?,
    };
    Ok((span, start, page))
}

pub(crate) async fn meter_page(
    _: Viewer,
    State(s): State<AppState>,
    Path(id): Path<String>,
    Query(q): Query<MeterQuery>,
) -> Result<Response, ApiError> {
    let job = super::recoveries::find(&s, &id).await?;
    if job.state != "done" {
        return Ok(page(&format!("Recovery {id}"), html! { p { "The job is " (job.state) "." } }, true).into_response());
    }
    let feeder = FeederId::parse(&job.feeder_id).map_err(ApiError::Invalid)?;
    let tz = super::local_time::zone(&s.store.feeder_time_zone(&feeder).await?.unwrap_or_default());
    let days = (job.window_end - job.window_start).div_euclid(86_400).max(1);
    let (span, start_day, list_page) = match parse(&q, days) {
        Ok(p) => p,
        Err((field, reason)) => {
            let body = html! { p.problem { strong { "Not shown: " (field) } ": " (reason) "." } };
            return Ok((StatusCode::BAD_REQUEST, page(&format!("Recovery {id}"), body, false)).into_response());
        }
    };
    let meters = s.store.meters_of(&feeder).await?;
    let meter =
        q.meter_id.clone().filter(|m| meters.contains(m)).or_else(|| meters.first().cloned()).unwrap_or_default();
    let from = job.window_start + start_day * 86_400;
    let to = span.map_or(job.window_end, |d| (from + d * 86_400).min(job.window_end));
    let rows = s.store.job_rows(&id, Some(&meter)).await?;
    let recovered: Vec<(i64, f64, f64, f64)> = rows
        .iter()
        .filter(|r| (from..to).contains(&r.interval_start))
        .map(|r| (r.interval_start, r.kw, r.kw_low, r.kw_high))
        .collect();
    let profile =
        s.store.profiles(&feeder).await?.into_iter().find(|p| Some(i64::from(p.version.0)) == job.profile_version);
    let bounds: Vec<f64> = profile.map(|p| p.profile.boundaries_kw().to_vec()).unwrap_or_default();
    let levels: Vec<(i64, f64)> = s
        .store
        .meter_levels_between(&meter, from, to)
        .await?
        .into_iter()
        .map(|(t, l)| (t, if l == 0 { 0.0 } else { bounds.get(usize::from(l) - 1).copied().unwrap_or(0.0) }))
        .collect();
    let start_local = chrono::DateTime::from_timestamp(from, 0).unwrap_or_default().with_timezone(&tz);
    let x_label = format!("hours from {} ({tz})", start_local.format("%Y-%m-%d %H:%M"));
    let chart = profile_chart(&format!("Meter {meter}"), &x_label, from, &recovered, &levels);
    let counts = |f: &str| rows.iter().filter(|r| r.flag == f).count();
    let nav = span_links(&id, &meter, &q, span, start_day, days);
    let body = html! {
        p { "Feeder " (job.feeder_id) " · window " (local_and_utc(job.window_start, tz)) " to " (local_and_utc(job.window_end, tz)) }
        p { "Shown: " (local_and_utc(from, tz)) " to " (local_and_utc(to, tz)) "." }
        (nav)
        (PreEscaped(chart))
        p { a href=(format!("/dashboard/recoveries/{id}/groups")) { "A group's load on this recovery" } }
        p {
            (format!(
                "Intervals of the window: {} derived, {} estimated (no reading), {} corrected (reading judged corrupt), \
                 {} atypical (a genuine load the population's shape does not hold: left out of the fit, not judged wrong).",
                counts("derived"),
                counts("estimated"),
                counts("corrected"),
                counts("atypical")
            ))
        }
        (meter_list(&id, &meters, &q, list_page))
    };
    Ok(page(&format!("Recovered profile of {meter}"), body, false).into_response())
}

/// Links to a day, a week or the whole window, and to the previous and next span.
fn span_links(id: &str, meter: &str, q: &MeterQuery, span: Option<i64>, start_day: i64, days: i64) -> Markup {
    let link = |span: &str, start: i64| {
        format!("/dashboard/recoveries/{id}?meter_id={meter}&span={span}&start_day={start}&q={}", q.q.trim())
    };
    let name = match span {
        Some(1) => "day",
        Some(_) => "week",
        None => "window",
    };
    let step = span.unwrap_or(days);
    html! {
        p {
            "Show: " a href=(link("day", start_day)) { "a day" } " · " a href=(link("week", start_day)) { "a week" }
            " · " a href=(link("window", 0)) { "the whole window" }
            @if span.is_some() && start_day > 0 { " · " a href=(link(name, (start_day - step).max(0))) { "earlier" } }
            @if span.is_some() && start_day + step < days { " · " a href=(link(name, start_day + step)) { "later" } }
        }
    }
}

/// The feeder's meters matching the search, a page at a time, with the search form.
fn meter_list(id: &str, meters: &[String], q: &MeterQuery, page_no: usize) -> Markup {
    let needle = q.q.trim().to_ascii_lowercase();
    let found: Vec<&String> = meters.iter().filter(|m| m.to_ascii_lowercase().contains(&needle)).collect();
    let pages = found.len().div_ceil(METERS_PER_PAGE).max(1);
    let shown = found.iter().skip((page_no - 1) * METERS_PER_PAGE).take(METERS_PER_PAGE);
    let link = |p: usize| format!("/dashboard/recoveries/{id}?q={needle}&page={p}&span={}", q.span.trim());
    html! {
        h2 { "Meters" }
        form method="get" action=(format!("/dashboard/recoveries/{id}")) {
            label { "meter id contains " input type="text" name="q" value=(q.q.trim()); }
            " " button type="submit" { "Search" }
        }
        p { (format!("{} of {} meters match; page {page_no} of {pages}.", found.len(), meters.len())) }
        ul {
            @for m in shown {
                li { a href=(format!("/dashboard/recoveries/{id}?meter_id={m}&span={}&q={needle}", q.span.trim())) { (m) } }
            }
        }
        p {
            @if page_no > 1 { a href=(link(page_no - 1)) { "previous meters" } " " }
            @if page_no < pages { a href=(link(page_no + 1)) { "more meters" } }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_bad_view_field_is_named() {
        let q = |span: &str, start: &str, page: &str| MeterQuery {
            span: span.into(),
            start_day: start.into(),
            page: page.into(),
            ..Default::default()
        };
        assert_eq!(parse(&q("", "", ""), 28), Ok((Some(7), 0, 1)));
        assert_eq!(parse(&q("window", "3", "2"), 28), Ok((None, 3, 2)));
        assert_eq!(parse(&q("month", "", ""), 28).unwrap_err().0, "span");
        assert_eq!(parse(&q("day", "28", ""), 28).unwrap_err().0, "start_day");
        assert_eq!(parse(&q("day", "-1", ""), 28).unwrap_err().0, "start_day");
        assert_eq!(parse(&q("day", "", "0"), 28).unwrap_err().0, "page");
    }
}
