//! The operator dashboard: server-rendered HTML with inline SVG charts, no
//! scripts and no external resources. Signing in takes the operator token
//! (a form) or a one-time link minted with it (`POST /v1/dashboard/links`, or
//! `utility-service dashboard-link`); the browser then holds a session cookie.
//! Sessions and codes live in the database (as digests), so every `serve`
//! process on it accepts them and they survive restarts.

use axum::extract::{FromRequestParts, Path, Query, State};
use axum::http::request::Parts;
use axum::http::{header, StatusCode};
use axum::response::{Html, IntoResponse, Redirect, Response};
use axum::routing::{get, post};
use axum::{Form, Json, Router};
use meterveil_shared::{FeederId, FieldError};
use serde::Deserialize;
use serde_json::{json, Value};

use meterveil_shared::auth::body_sha256;

use super::{now_s, AppState, Operator};
use crate::error::ApiError;
use crate::store::queue::{JobFilter, JobLine};
use crate::store::Store;
use maud::{html, Markup, PreEscaped, DOCTYPE};

use super::local_time::{local_days, local_when, zone};
use crate::report::{line_chart, STYLE};
use std::collections::HashMap;

const SESSION_COOKIE: &str = "mv_session";
const SESSION_S: i64 = 8 * 3600;
/// How long a one-time sign-in link stays valid, seconds.
pub const LINK_S: i64 = 120;

/// A fresh secret: 128 random bits from the thread's cryptographic generator
/// (seeded by the operating system), as hex.
fn random_token() -> String {
    use rand::Rng;
    let mut r = rand::rng();
    format!("{:016x}{:016x}", r.random::<u64>(), r.random::<u64>())
}

/// The name an operator signs in with, checked: the action log and the
/// profile history show it. 1 to 60 letters, digits, spaces or `.-_@'`.
pub fn check_who(field: &str, who: &str) -> Result<String, FieldError> {
    let w = who.trim();
    let fine = |c: char| c.is_alphanumeric() || " .-_@'".contains(c);
    if w.is_empty() || w.chars().count() > 60 || !w.chars().all(fine) {
        return Err(FieldError::new(
            field,
            "give a name of 1 to 60 letters, digits, spaces or .-_@' (it names you in the action log)",
        ));
    }
    Ok(w.to_owned())
}

/// Mints a one-time sign-in path to `next` (a dashboard path) for the
/// operator `who`, valid for [`LINK_S`] seconds, on any `serve` process of
/// this database.
pub async fn one_time_link(store: &Store, next: &str, who: &str) -> Result<String, ApiError> {
    let who = check_who("who", who).map_err(ApiError::Invalid)?;
    let code = random_token();
    let now = now_s();
    store.mint_code(&body_sha256(code.as_bytes()), &who, now, now + LINK_S).await?;
    let next = safe_next(Some(next));
    Ok(format!(
        "/dashboard/enter?code={code}&next={}",
        next.replace('&', "%26").replace('?', "%3F").replace('=', "%3D")
    ))
}

pub fn router() -> Router<AppState> {
    Router::new()
        .route("/dashboard/login", get(login_page).post(login))
        .route("/dashboard/enter", get(enter))
        .route("/v1/dashboard/links", post(mint_link))
        .route("/dashboard", get(overview))
        .route("/dashboard/recoveries/{job_id}", get(super::meter_view::meter_page))
        .route("/dashboard/recoveries/{job_id}/groups", get(super::group_view::group_page))
        .route("/dashboard/clusterings/{job_id}", get(clusters_page))
        .route("/dashboard/analyses/{job_id}", get(analysis_page))
        .route("/dashboard/jobs", get(jobs_page))
        .route("/dashboard/feeders/{feeder_id}", get(super::feeder_page::feeder_page))
}

/// A signed-in dashboard user; otherwise a redirect to the sign-in page.
pub struct Viewer {
    /// The session's digest (which session did what, in the action log).
    pub session: String,
    /// The name the operator signed in with.
    pub who: String,
    /// The session's form token: a digest of its secret under another label,
    /// so that only a page served to this session can post its forms.
    pub csrf: String,
}

impl FromRequestParts<AppState> for Viewer {
    type Rejection = Response;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, Response> {
        let cookies = parts.headers.get(header::COOKIE).and_then(|v| v.to_str().ok()).unwrap_or("");
        for (_, v) in cookies.split(';').filter_map(|c| c.trim().split_once('=')).filter(|(k, _)| *k == SESSION_COOKIE)
        {
            let session = body_sha256(v.as_bytes());
            match state.store.session_who(&session, now_s()).await {
                Ok(Some(who)) => return Ok(Viewer { session, who, csrf: body_sha256(format!("form|{v}").as_bytes()) }),
                Ok(None) => {}
                Err(e) => return Err(ApiError::from(e).into_response()),
            }
        }
        Err(Redirect::to("/dashboard/login").into_response())
    }
}

impl Viewer {
    /// Who acts, for the action log: the session's digest and the operator's name.
    pub fn actor(&self) -> (&str, &str) {
        (&self.session, &self.who)
    }
}

pub(crate) fn page(title: &str, body: Markup, refresh: bool) -> Html<String> {
    Html(
        html! {
            (DOCTYPE)
            html lang="en" {
                head {
                    meta charset="utf-8";
                    @if refresh { meta http-equiv="refresh" content="5"; }
                    title { (title) }
                    style { (PreEscaped(STYLE)) }
                }
                body {
                    p { a href="/dashboard" { "Meterveil dashboard" } }
                    h1 { (title) }
                    (body)
                }
            }
        }
        .into_string(),
    )
}

/// Opens a session (stored as its digest) and sends the browser to `to` with its cookie.
async fn with_session(state: &AppState, who: &str, to: &str) -> Response {
    let id = random_token();
    let now = now_s();
    if let Err(e) = state.store.open_session(&body_sha256(id.as_bytes()), who, now, now + SESSION_S).await {
        return ApiError::from(e).into_response();
    }
    let cookie = format!("{SESSION_COOKIE}={id}; HttpOnly; SameSite=Strict; Path=/dashboard; Max-Age={SESSION_S}");
    ([(header::SET_COOKIE, cookie)], Redirect::to(to)).into_response()
}

fn login_form(problem: Option<&str>) -> Html<String> {
    page(
        "Sign in",
        html! {
            @if let Some(p) = problem { p.problem { (p) } }
            form method="post" action="/dashboard/login" {
                label { "Your name " input type="text" name="who" autocomplete="name" required; }
                " "
                label { "Operator token " input type="password" name="token" autocomplete="off"; }
                " "
                button type="submit" { "Sign in" }
            }
        },
        false,
    )
}

async fn login_page() -> Html<String> {
    login_form(None)
}

#[derive(Deserialize)]
struct LoginForm {
    #[serde(default)]
    who: String,
    #[serde(default)]
    token: String,
}

async fn login(State(s): State<AppState>, Form(f): Form<LoginForm>) -> Response {
    let who = match check_who("who", &f.who) {
        Ok(w) => w,
        Err(e) => {
            let problem = format!("Not signed in: {}: {}.", e.field, e.reason);
            return (StatusCode::BAD_REQUEST, login_form(Some(&problem))).into_response();
        }
    };
    if super::constant_time_eq(f.token.as_bytes(), s.config.operator_token.expose().as_bytes()) && !f.token.is_empty() {
        with_session(&s, &who, "/dashboard").await
    } else {
        (StatusCode::UNAUTHORIZED, login_form(Some("Not signed in: token: that operator token is wrong.")))
            .into_response()
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct LinkWire {
    #[serde(default)]
    next: Option<String>,
    /// The operator the link signs in (default `operator`).
    #[serde(default)]
    who: Option<String>,
}

fn safe_next(next: Option<&str>) -> String {
    match next {
        Some(n) if n.starts_with("/dashboard") && !n.contains("//") && !n.contains('\\') => n.to_owned(),
        _ => "/dashboard".to_owned(),
    }
}

/// A one-time sign-in link, valid for two minutes.
async fn mint_link(_: Operator, State(s): State<AppState>, body: axum::body::Bytes) -> Result<Json<Value>, ApiError> {
    let w: LinkWire = if body.is_empty() { LinkWire { next: None, who: None } } else { super::parse_json(&body)? };
    let url =
        one_time_link(&s.store, w.next.as_deref().unwrap_or("/dashboard"), w.who.as_deref().unwrap_or("operator"))
            .await?;
    Ok(Json(json!({ "url": url, "expires_in_s": LINK_S })))
}

#[derive(Deserialize)]
struct EnterQuery {
    code: String,
    next: Option<String>,
}

async fn enter(State(s): State<AppState>, Query(q): Query<EnterQuery>) -> Response {
    let redeemed = match s.store.redeem_code(&body_sha256(q.code.as_bytes()), now_s()).await {
        Ok(r) => r,
        Err(e) => return ApiError::from(e).into_response(),
    };
    if let Some(who) = redeemed {
        with_session(&s, &who, &safe_next(q.next.as_deref())).await
    } else {
        (StatusCode::UNAUTHORIZED, page("Sign in", html! { p { "This sign-in link was used or has expired." } }, false))
            .into_response()
    }
}

async fn overview(v: Viewer, State(s): State<AppState>) -> Result<Html<String>, ApiError> {
    let feeders = super::overview::feeder_rows(&s).await?;
    let zones: HashMap<String, chrono_tz::Tz> =
        feeders.iter().map(|f| (f.summary.feeder_id.clone(), zone(&f.summary.time_zone))).collect();
    let jobs = s.store.list_jobs(10).await?;
    let live = jobs.iter().any(|j| j.state == "running" || j.state == "queued");
    let body = html! {
        h2 { "Feeders" }
        (super::overview::feeder_table(&feeders, &v))
        h2 { "Recent jobs" }
        (jobs_table(&jobs, &zones))
        p { a href="/dashboard/jobs" { "All jobs, by feeder, kind and state" } }
        @if live { p { "This page refreshes every 5 seconds while jobs run." } }
    };
    Ok(page("Meterveil dashboard", body, live))
}

/// A job's id, linked to its page once it is done.
fn job_link(j: &JobLine) -> Markup {
    let page = match (j.kind.as_str(), j.state.as_str()) {
        ("recover", "done") => Some("recoveries"),
        ("cluster", "done") => Some("clusterings"),
        ("audit" | "calibrate", "done") => Some("analyses"),
        _ => None,
    };
    html! {
        @if let Some(page) = page {
            a href=(format!("/dashboard/{page}/{}", j.job_id)) { (j.job_id) }
        } @else {
            (j.job_id)
        }
    }
}

/// Each feeder's time zone, for the job lists (a town-wide job's is UTC).
pub(crate) fn zones(feeders: &[crate::store::overview::FeederHeader]) -> HashMap<String, chrono_tz::Tz> {
    feeders.iter().map(|f| (f.feeder_id.clone(), zone(&f.time_zone))).collect()
}

/// A span of seconds in words: `45 s`, `3 min 05 s`, `2 h 10 min`.
fn duration(s: i64) -> String {
    match s {
        s if s < 60 => format!("{s} s"),
        s if s < 3600 => format!("{} min {:02} s", s / 60, s % 60),
        s => format!("{} h {:02} min", s / 3600, (s % 3600) / 60),
    }
}

pub(crate) fn jobs_table(jobs: &[JobLine], zones: &HashMap<String, chrono_tz::Tz>) -> Markup {
    html! {
        table {
            tr {
                th { "job" } th { "feeder" } th { "window (the feeder's local days)" } th { "kind" } th { "state" } th { "progress" }
                th { "started" } th { "finished" } th { "took" } th { "attempts" } th { "message" }
            }
            @for j in jobs {
                @let tz = j.feeder_id.as_ref().and_then(|f| zones.get(f)).copied().unwrap_or(chrono_tz::UTC);
                tr {
                    td { (job_link(j)) }
                    td { (j.feeder_id.as_deref().unwrap_or("whole town")) }
                    td { (j.window.map_or("–".into(), |(a, b)| local_days(a, b, tz))) }
                    td { (j.kind) }
                    td { (j.state) }
                    td { progress max="1" value=(format!("{:.3}", j.progress)) {} (format!(" {:.0}%", 100.0 * j.progress)) }
                    td { (local_when(j.started_at, tz)) }
                    td { (local_when(j.finished_at, tz)) }
                    td { (j.started_at.zip(j.finished_at).map_or("–".into(), |(a, b)| duration(b - a))) }
                    td { (j.attempts) }
                    td { (j.error.as_deref().unwrap_or(&j.message)) }
                }
            }
        }
    }
}

/// Jobs listed per page.
const JOBS_PER_PAGE: i64 = 25;
const JOB_KINDS: [&str; 4] = ["recover", "cluster", "audit", "calibrate"];
const JOB_STATES: [&str; 4] = ["queued", "running", "done", "failed"];

#[derive(Deserialize)]
struct JobsQuery {
    #[serde(default)]
    feeder: String,
    #[serde(default)]
    kind: String,
    #[serde(default)]
    state: String,
    #[serde(default)]
    page: Option<String>,
}

/// The filter a jobs query asks for, or the field that is wrong and why.
async fn job_filter(s: &AppState, q: &JobsQuery) -> Result<Result<(JobFilter, i64), (&'static str, String)>, ApiError> {
    let pick = |v: &str| (!v.trim().is_empty()).then(|| v.trim().to_owned());
    let (feeder, kind, state) = (pick(&q.feeder), pick(&q.kind), pick(&q.state));
    if let Some(f) = &feeder {
        let known = match FeederId::parse(f) {
            Ok(id) => s.store.feeder_exists(&id).await?,
            Err(_) => false,
        };
        if !known {
            return Ok(Err(("feeder", format!("{f} is not a registered feeder"))));
        }
    }
    if let Some(k) = kind.as_deref().filter(|k| !JOB_KINDS.contains(k)) {
        return Ok(Err(("kind", format!("{k} is not one of {}", JOB_KINDS.join(", ")))));
    }
    if let Some(st) = state.as_deref().filter(|v| !JOB_STATES.contains(v)) {
        return Ok(Err(("state", format!("{st} is not one of {}", JOB_STATES.join(", ")))));
    }
    let page = match q.page.as_deref().map(str::trim).filter(|p| !p.is_empty()) {
        None => 1,
        Some(p) => match p.parse::<i64>() {
            Ok(n) if (1..=100_000).contains(&n) => n,
            _ => return Ok(Err(("page", format!("{p} is not a page number from 1 to 100000")))),
        },
    };
    let filter = JobFilter { feeder_id: feeder, kind, state, limit: JOBS_PER_PAGE, offset: (page - 1) * JOBS_PER_PAGE };
    Ok(Ok((filter, page)))
}

/// Every job, filtered by feeder, kind and state, a page at a time.
async fn jobs_page(v: Viewer, State(s): State<AppState>, Query(q): Query<JobsQuery>) -> Result<Response, ApiError> {
    let feeders = s.store.feeder_headers().await?;
    let form = |problem: Option<(&str, &str)>| {
        html! {
            form method="get" action="/dashboard/jobs" {
                label { "feeder " select name="feeder" {
                    option value="" { "any" }
                    @for f in &feeders { option value=(f.feeder_id) selected[q.feeder == f.feeder_id] { (f.feeder_id) } }
                } }
                " "
                label { "kind " select name="kind" {
                    option value="" { "any" }
                    @for k in JOB_KINDS { option value=(k) selected[q.kind == k] { (k) } }
                } }
                " "
                label { "state " select name="state" {
                    option value="" { "any" }
                    @for st in JOB_STATES { option value=(st) selected[q.state == st] { (st) } }
                } }
                " "
                button type="submit" { "Show" }
            }
            @if let Some((field, reason)) = problem {
                p.problem { strong { "Not shown: " (field) } ": " (reason) "." }
            }
        }
    };
    let (filter, at) = match job_filter(&s, &q).await? {
        Ok(f) => f,
        Err((field, reason)) => {
            return Ok((StatusCode::BAD_REQUEST, page("Jobs", form(Some((field, &reason))), false)).into_response())
        }
    };
    let (jobs, total) = (s.store.find_jobs(&filter).await?, s.store.count_jobs(&filter).await?);
    let pages = ((total + JOBS_PER_PAGE - 1) / JOBS_PER_PAGE).max(1);
    let link = |p: i64| {
        format!("/dashboard/jobs?feeder={}&kind={}&state={}&page={p}", q.feeder.trim(), q.kind.trim(), q.state.trim())
    };
    let live = jobs.iter().any(|j| j.state == "running" || j.state == "queued");
    let body = html! {
        (super::actions::recovery_form(&feeders, &v, None))
        h2 { "Jobs" }
        (form(None))
        p { (format!("{total} jobs; page {at} of {pages}.")) }
        (jobs_table(&jobs, &zones(&feeders)))
        (super::actions::cancel_forms(&jobs, &v))
        p {
            @if at > 1 { a href=(link(at - 1)) { "newer" } " " }
            @if at < pages { a href=(link(at + 1)) { "older" } }
        }
    };
    Ok(page("Jobs", body, live).into_response())
}

async fn clusters_page(_: Viewer, State(s): State<AppState>, Path(id): Path<String>) -> Result<Html<String>, ApiError> {
    let job = super::analyses::find(&s, &id).await?;
    let r = job.result.unwrap_or(Value::Null);
    let interval_s = r["interval_s"].as_u64().unwrap_or(900).max(1) as f64;
    // Clusterings stored before days were local carry no zone: their days are UTC days.
    let zone_name = r["time_zone"].as_str().unwrap_or("UTC").to_owned();
    let reps = r["representatives"].as_array().cloned().unwrap_or_default();
    let series_of = |key: &str| -> Vec<(String, Vec<(f64, f64)>)> {
        reps.iter()
            .map(|c| {
                let pts = c[key]
                    .as_array()
                    .map(|v| {
                        v.iter()
                            .enumerate()
                            .map(|(i, x)| (i as f64 * interval_s / 3600.0, x.as_f64().unwrap_or(0.0)))
                            .collect()
                    })
                    .unwrap_or_default();
                let coherence = c["cluster"].as_u64().and_then(|k| r["coherence"][k as usize].as_f64());
                let name = match coherence {
                    Some(v) => format!("cluster {} ({} customers, coherence {v:.2})", c["cluster"], c["size"]),
                    None => format!("cluster {} ({} customers)", c["cluster"], c["size"]),
                };
                (name, pts)
            })
            .collect()
    };
    let charts: Vec<String> =
        [("weekday_kw", "Representative working day"), ("weekend_kw", "Representative weekend day")]
            .into_iter()
            .map(|(key, title)| {
                let series = series_of(key);
                let y = series.iter().flat_map(|s| s.1.iter().map(|p| p.1)).fold(0.5f64, f64::max) * 1.1;
                let refs: Vec<(&str, Vec<(f64, f64)>)> = series.iter().map(|(n, v)| (n.as_str(), v.clone())).collect();
                line_chart(title, &format!("hour of the local day ({zone_name})"), "kW", &refs, y)
            })
            .collect();
    let body = html! {
        p {
            (format!(
                "{} customers in {} clusters (count chosen by {}); {} customers fit no cluster well (unassigned: \
                 less than half of their self-expression weight inside their cluster). A cluster's coherence is the \
                 share of its members' weight that stays inside it; low coherence means it blends into others.",
                r["meters"],
                r["clusters"],
                r["chosen_by"].as_str().unwrap_or("?"),
                r["unassigned"].as_u64().map_or("an unknown number of".to_owned(), |n| n.to_string()),
            ))
        }
        @for c in &charts { (PreEscaped(c)) }
    };
    Ok(page(&format!("Load-shape clusters {id}"), body, false))
}

async fn analysis_page(_: Viewer, State(s): State<AppState>, Path(id): Path<String>) -> Result<Response, ApiError> {
    let job = super::analyses::find(&s, &id).await?;
    let html = super::analyses::report_html(&job)?;
    Ok(Html(html.replacen("<body>", "<body><p><a href=\"/dashboard\">Meterveil dashboard</a></p>", 1)).into_response())
}
