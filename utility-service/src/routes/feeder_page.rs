//! One feeder's page: its profile history (each version, when it was
//! published and by whom, when an upload first used it), its recoveries,
//! audits and calibrations over time, the privacy trade-off across profile
//! versions in one chart, the forms that start its jobs, and the actions
//! operators took on it. Times are in the feeder's zone with UTC beside them.

use std::collections::HashMap;

use axum::extract::{Path, State};
use axum::response::Html;
use maud::{html, Markup, PreEscaped};
use meterveil_shared::FeederId;
use serde_json::Value;

use super::dashboard::{page, Viewer};
use super::local_time::{local_days, local_when, zone};
use super::AppState;
use crate::error::ApiError;
use crate::records::ProfileRecord;
use crate::store::analyses::AnalysisRecord;
use crate::store::history::ActionLine;
use crate::store::overview::FeederTargets;
use crate::store::recoveries::JobRecord;

/// Chart points: (utility error in %, attacker event F1).
type Points = Vec<(f64, f64)>;

/// How many of each kind of job the page lists.
const HISTORY: i64 = 25;

/// What the page shows, read from the store.
pub(crate) struct FeederHistory {
    pub feeder: FeederId,
    pub tz: chrono_tz::Tz,
    pub profiles: Vec<ProfileRecord>,
    pub recoveries: Vec<JobRecord>,
    pub audits: Vec<AnalysisRecord>,
    pub calibrations: Vec<AnalysisRecord>,
    pub targets: Option<FeederTargets>,
    pub actions: Vec<ActionLine>,
    /// Each recovery's profile version.
    pub versions: HashMap<String, i64>,
}

pub(crate) async fn read_history(s: &AppState, feeder_id: &str) -> Result<FeederHistory, ApiError> {
    let feeder = FeederId::parse(feeder_id).map_err(|e| ApiError::invalid("feeder_id", e.reason))?;
    let Some(tz) = s.store.feeder_time_zone(&feeder).await? else {
        return Err(ApiError::NotFound(meterveil_shared::FieldError::new(
            "feeder_id",
            format!("{feeder} is not a registered feeder"),
        )));
    };
    let f = feeder.as_str();
    let versions = s.store.recovery_versions(f).await?;
    Ok(FeederHistory {
        tz: zone(&tz),
        profiles: s.store.profiles(&feeder).await?,
        recoveries: s.store.feeder_recoveries(f, HISTORY).await?,
        audits: s.store.feeder_analyses(f, "audit", HISTORY).await?,
        calibrations: s.store.feeder_analyses(f, "calibrate", HISTORY).await?,
        targets: s.store.feeder_targets(f).await?,
        actions: s.store.actions_naming(f, HISTORY).await?,
        versions: versions.into_iter().filter_map(|(id, v)| Some((id, v?))).collect(),
        feeder,
    })
}

/// An audit's strongest event F1 and the utility's daily-energy error.
pub(crate) fn audit_figures(r: &Value) -> Option<(f64, f64)> {
    Some((r["strongest"]["event_f1"].as_f64()?, r["utility"]["daily_energy_error"].as_f64()?))
}

impl FeederHistory {
    /// The profile version an analysis of `recovery_job` looked at.
    fn version_of(&self, a: &AnalysisRecord) -> Option<i64> {
        let job = a.result.as_ref().and_then(|r| r["recovery_job"].as_str())?;
        self.versions.get(job).copied()
    }

    /// Audits grouped by the version they audited, as chart points (error in %, F1).
    fn audit_points(&self) -> Vec<(String, Vec<(f64, f64)>)> {
        let mut by_version: Vec<(Option<i64>, Points)> = Vec::new();
        for a in self.audits.iter().rev() {
            let Some((f1, err)) = a.result.as_ref().and_then(audit_figures) else { continue };
            let v = self.version_of(a);
            match by_version.iter_mut().find(|(k, _)| *k == v) {
                Some((_, pts)) => pts.push((100.0 * err, f1)),
                None => by_version.push((v, vec![(100.0 * err, f1)])),
            }
        }
        by_version.sort_by_key(|(v, _)| *v);
        by_version
            .into_iter()
            .map(|(v, pts)| (v.map_or("audits, version unknown".into(), |v| format!("audits of profile v{v}")), pts))
            .collect()
    }

    /// The newest finished calibration's candidate settings, as chart points.
    fn candidates(&self) -> Option<(String, Vec<(f64, f64)>)> {
        let c = self.calibrations.iter().find(|c| c.state == "done")?;
        let curve = c.result.as_ref()?["curve"].as_array()?;
        let pts = curve
            .iter()
            .filter_map(|p| Some((100.0 * p["utility_daily_energy_error"].as_f64()?, p["attacker_event_f1"].as_f64()?)))
            .collect::<Vec<_>>();
        (!pts.is_empty()).then(|| (format!("settings tried by calibration {}", c.job_id), pts))
    }

    fn chart(&self) -> String {
        let audits = self.audit_points();
        let candidates = self.candidates();
        let targets = self.targets.map(|t| (100.0 * t.daily_energy_error_max, t.event_f1_max));
        crate::report::tradeoff_chart(&audits, candidates.as_ref().map(|(n, p)| (n.as_str(), p.as_slice())), targets)
    }
}

fn profiles_table(h: &FeederHistory) -> Markup {
    let newest = h.profiles.last().map(|p| p.version.0);
    html! {
        table {
            tr { th { "version" } th { "profile" } th { "published" } th { "published by" } th { "first used by an upload" } }
            @for p in h.profiles.iter().rev() {
                tr {
                    td { "v" (p.version.0) @if Some(p.version.0) == newest { " (current)" } }
                    td { (p.profile.describe()) }
                    td { (local_when(Some(p.created_at), h.tz)) }
                    td { (p.published_by) }
                    td { @if p.first_used_at.is_some() { (local_when(p.first_used_at, h.tz)) } @else { "not yet" } }
                }
            }
        }
    }
}

fn recoveries_table(h: &FeederHistory) -> Markup {
    html! {
        table {
            tr { th { "job" } th { "window (local dates)" } th { "finished" } th { "profile" } th { "result" } }
            @for j in &h.recoveries {
                @let d = j.diagnostics.clone().unwrap_or_default();
                tr {
                    td { @if j.state == "done" { a href=(format!("/dashboard/recoveries/{}", j.job_id)) { (j.job_id) } } @else { (j.job_id) } }
                    td { (local_days(j.window_start, j.window_end, h.tz)) }
                    td { (local_when(j.finished_at, h.tz)) }
                    td { (j.profile_version.map_or("–".into(), |v| format!("v{v}"))) }
                    td {
                        @if j.state == "done" {
                            (format!("rank {}, {}, {} meters", d["rank"], d["stop"].as_str().unwrap_or("?"), d["meters"]))
                        } @else { "failed: " (j.error.as_deref().unwrap_or("")) }
                    }
                }
            }
        }
    }
}

fn audits_table(h: &FeederHistory) -> Markup {
    html! {
        table {
            tr { th { "job" } th { "finished" } th { "profile" } th { "captured" } th { "event F1" } th { "daily energy error" } th { "against today's targets" } }
            @for a in &h.audits {
                @let r = a.result.clone().unwrap_or_default();
                @let figures = audit_figures(&r);
                tr {
                    td { @if a.state == "done" { a href=(format!("/dashboard/analyses/{}", a.job_id)) { (a.job_id) } } @else { (a.job_id) } }
                    td { (local_when(a.finished_at, h.tz)) }
                    td { (h.version_of(a).map_or("–".into(), |v| format!("v{v}"))) }
                    td { (r["captured"].as_array().map_or(0, Vec::len)) " meter(s)" }
                    @if let Some((f1, err)) = figures {
                        td { (format!("{f1:.2}")) }
                        td { (format!("{:.1}%", 100.0 * err)) }
                        td { (super::overview::status_words(Some((f1, err)), h.targets)) }
                    } @else {
                        td colspan="3" { "failed: " (a.error.as_deref().unwrap_or("")) }
                    }
                }
            }
        }
    }
}

fn calibrations_table(h: &FeederHistory) -> Markup {
    html! {
        table {
            tr { th { "job" } th { "finished" } th { "targets" } th { "outcome" } th { "recommended" } th { "published" } }
            @for c in &h.calibrations {
                @let r = c.result.clone().unwrap_or_default();
                tr {
                    td { @if c.state == "done" { a href=(format!("/dashboard/analyses/{}", c.job_id)) { (c.job_id) } } @else { (c.job_id) } }
                    td { (local_when(c.finished_at, h.tz)) }
                    td { (format!("F1 ≤ {}, energy ≤ {}", r["targets"]["event_f1_max"], r["targets"]["daily_energy_error_max"])) }
                    td {
                        @if c.state != "done" { "failed: " (c.error.as_deref().unwrap_or("")) }
                        @else if r["meets_targets"] == true {
                            (format!("✓ met: F1 {:.2}, energy error {:.1}%",
                                r["chosen"]["attacker_event_f1"].as_f64().unwrap_or(f64::NAN),
                                100.0 * r["chosen"]["utility_daily_energy_error"].as_f64().unwrap_or(f64::NAN)))
                        } @else { "✗ no setting met both targets" }
                    }
                    td { (format!("σ {} kW, boundaries {} kW", r["recommended"]["scale_kw"], r["recommended"]["boundaries_kw"])) }
                    td {
                        @if let Some(v) = r["published_version"].as_i64() { "as v" (v) }
                        @else if r["meets_targets"] == true && c.state == "done" {
                            a href=(format!("/dashboard/publish/{}", c.job_id)) { "review and publish" }
                        } @else { "–" }
                    }
                }
            }
        }
    }
}

fn actions_table(h: &FeederHistory) -> Markup {
    html! {
        @if h.actions.is_empty() { p { "No dashboard action has named this feeder yet." } }
        @else {
            table {
                tr { th { "when" } th { "who" } th { "action" } th { "details" } }
                @for a in &h.actions {
                    tr { td { (local_when(Some(a.at), h.tz)) } td { (a.who) } td { (a.action) } td { (a.detail) } }
                }
            }
        }
    }
}

pub(crate) async fn feeder_page(
    v: Viewer,
    State(s): State<AppState>,
    Path(feeder_id): Path<String>,
) -> Result<Html<String>, ApiError> {
    let h = read_history(&s, &feeder_id).await?;
    let summaries = s.store.feeder_headers().await?;
    let this: Vec<_> = summaries.into_iter().filter(|f| f.feeder_id == h.feeder.as_str()).collect();
    let done: Vec<&JobRecord> = h.recoveries.iter().filter(|j| j.state == "done").collect();
    let body = html! {
        p { "Time zone " (h.tz) "; times below are local, with UTC beside them. "
            a href=(format!("/dashboard/jobs?feeder={}", h.feeder)) { "This feeder's jobs" } }
        p { "Targets: " (h.targets.map_or("none set (set them on the overview)".into(), |t| format!(
            "the strongest attacker's event F1 ≤ {:.2}; the utility's daily energy error ≤ {:.1}%",
            t.event_f1_max, 100.0 * t.daily_energy_error_max))) }
        h2 { "Privacy against accuracy" }
        (PreEscaped(h.chart()))
        p { "Each dot is an audit: how well the strongest attacker we know finds events in one captured meter's \
             uploads (F1; 0 finds nothing, 1 finds every event), against the utility's daily-energy error. \
             Crosses are the settings the newest calibration tried." }
        h2 { "Profile history" }
        (profiles_table(&h))
        h2 { "Recoveries" }
        (recoveries_table(&h))
        h2 { "Audits" }
        (audits_table(&h))
        h2 { "Calibrations" }
        (calibrations_table(&h))
        h2 { "Start a job" }
        (super::actions::recovery_form(&this, &v, None))
        (super::analysis_forms::audit_form(&h.feeder, &done, h.tz, &v, None))
        (super::analysis_forms::calibration_form(&h.feeder, &done, (h.tz, h.targets), &v, None))
        h2 { "Actions on this feeder" }
        (actions_table(&h))
        p.caution { (meterveil_shared::audit::CAUTION) }
    };
    Ok(page(&format!("Feeder {}", h.feeder), body, false))
}
