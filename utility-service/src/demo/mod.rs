//! `utility-service demo`: a thin orchestration of library calls. A fresh service
//! on a free port with a fresh SQLite file, the simulated town through real gateway
//! outboxes over HTTP, then a summary of what the utility holds.

use std::path::PathBuf;

use anyhow::Context;
use meterveil_gateway::simulate::{self, SimulateOptions, SimulationReport};

use crate::app;
use crate::config::{Secret, ServiceConfig};
use crate::store::FeederSummary;

mod calibrations;
mod render;
pub use calibrations::FeederCalibration;
pub use render::render;

#[derive(Debug, Clone)]
pub struct DemoOptions {
    pub meters: usize,
    pub days: u32,
    pub dir: Option<PathBuf>,
    pub truth: Option<PathBuf>,
    /// Keep the service up after the summary until Ctrl-C (with a dashboard link).
    pub stay_up: bool,
}

/// One feeder's recovery in the demo, scored against the town's true loads
/// (which only a simulation has).
#[derive(Debug, Clone)]
pub struct FeederRecovery {
    pub feeder_id: String,
    pub job_id: String,
    pub rank: u64,
    pub iterations: u64,
    pub wall_s: f64,
    pub corrected: u64,
    /// Readings left out of the fit as genuine loads its shape does not hold.
    pub atypical: u64,
    pub register_days: u64,
    /// The first meter of the recovery (in meter order), the one the demo audits.
    pub first_meter: String,
    pub nrmse: f64,
    pub median_daily_energy_error: f64,
}

/// One load-shape cluster of the town, described for the summary.
#[derive(Debug, Clone)]
pub struct TownCluster {
    pub size: usize,
    pub weekday_peak: String,
    pub weekday_kwh: f64,
    pub weekend_kwh: f64,
    /// Share of its members' affinity that stays inside it.
    pub coherence: f64,
    /// Members whose own cluster receives less than half of their affinity.
    pub unassigned: usize,
    /// The simulated kinds of its members, most common first (only a demo knows them).
    pub kinds: Vec<(String, usize)>,
}

#[derive(Debug, Clone)]
pub struct DemoSummary {
    pub recoveries: Vec<FeederRecovery>,
    pub clusters: Vec<TownCluster>,
    pub privacy: Option<PrivacyCheck>,
    /// Every feeder's dither calibration against the demo's targets.
    pub calibrations: Vec<FeederCalibration>,
    /// Per feeder, an audit of its first meter at the feeder's own register period.
    pub feeder_audits: Vec<FeederAudit>,
    pub service_url: String,
    pub database: PathBuf,
    pub simulation: SimulationReport,
    pub feeders: Vec<FeederSummary>,
    pub readings_stored: i64,
    pub readings_rejected: u64,
    pub duplicates: u64,
}

/// A random operator token for this demo run only (never printed).
fn demo_token() -> String {
    use rand::Rng;
    let mut rng = rand::rng();
    (0..32).map(|_| char::from(b"abcdefghijklmnopqrstuvwxyz0123456789"[rng.random_range(0..36)])).collect()
}

/// The demo's folder (kept after the run: it holds the database and the
/// reports), emptied of an earlier run's database and outboxes.
fn prepare_dir(opts: &DemoOptions) -> anyhow::Result<(PathBuf, PathBuf, PathBuf)> {
    let dir = match &opts.dir {
        Some(d) => {
            std::fs::create_dir_all(d).with_context(|| format!("creating {}", d.display()))?;
            d.clone()
        }
        None => tempfile::Builder::new().prefix("meterveil-demo-").tempdir()?.keep(),
    };
    let db = dir.join("meterveil-demo.sqlite");
    for suffix in ["", "-wal", "-shm"] {
        let _ = std::fs::remove_file(format!("{}{suffix}", db.display()));
    }
    let outboxes = dir.join("outboxes");
    let _ = std::fs::remove_dir_all(&outboxes);
    Ok((dir, db, outboxes))
}

pub async fn run(opts: &DemoOptions) -> anyhow::Result<DemoSummary> {
    let (dir, db, outboxes) = prepare_dir(opts)?;
    let token = demo_token();
    let config = ServiceConfig::local(format!("sqlite:{}", db.display()), Secret::new(token.clone()));
    let svc = app::start(config).await?;
    eprintln!("demo: service at {} with database {}", svc.url(), db.display());
    eprintln!("demo: simulating {} meters of Quillmarsh for {} days ...", opts.meters, opts.days);

    let mut sim = SimulateOptions::new(svc.url(), &outboxes);
    let token_for_jobs = token.clone();
    sim.operator_token = Some(token);
    sim.meters = opts.meters;
    sim.days = opts.days;
    sim.truth = opts.truth.clone();
    let simulation = simulate::run(&sim).await?;

    let feeders = svc.store.feeder_summaries().await?;
    let readings_stored = feeders.iter().map(|f| f.readings).sum();
    eprintln!("demo: recovering every feeder's profiles ...");
    let town = simulate::Town::new(sim.meters, sim.days, simulation.first_day, sim.seed);
    let mut recoveries = Vec::new();
    for f in &feeders {
        recoveries.push(recover_feeder(&svc.url(), &token_for_jobs, &f.feeder_id, &town).await?);
    }
    let clusters = cluster_town(&svc.url(), &token_for_jobs, &recoveries, &town).await?;
    let privacy = match recoveries.first() {
        Some(r) => Some(privacy_check(&svc.url(), &token_for_jobs, r, &dir).await?),
        None => None,
    };
    let calibrations = calibrations::calibrate_feeders(&svc.url(), &token_for_jobs, &recoveries, &dir).await?;
    let mut feeder_audits = Vec::new();
    for (r, f) in recoveries.iter().zip(&feeders) {
        let period =
            f.current_profile.as_ref().and_then(|p| p.profile.register_period.clone()).unwrap_or_else(|| "none".into());
        eprintln!("demo: auditing {} at its own {period} register reads ...", r.feeder_id);
        let (f1, energy) = light_audit(&svc.url(), &token_for_jobs, r, None).await?;
        feeder_audits.push(FeederAudit {
            feeder_id: r.feeder_id.clone(),
            register_period: period,
            event_f1: f1,
            daily_energy_error: energy,
        });
    }
    let summary = DemoSummary {
        clusters,
        privacy,
        calibrations,
        feeder_audits,
        recoveries,
        service_url: svc.url(),
        database: db,
        simulation,
        feeders,
        readings_stored,
        readings_rejected: svc.metrics.readings_rejected.get(),
        duplicates: svc.metrics.readings_duplicate.get(),
    };
    if opts.stay_up {
        stay_up(&svc, &summary).await;
    }
    svc.stop().await?;
    Ok(summary)
}

/// Prints the summary and a dashboard link, and waits for Ctrl-C.
async fn stay_up(svc: &app::RunningService, summary: &DemoSummary) {
    print!("{}", render(summary));
    match svc.dashboard_link("/dashboard", "demo operator").await {
        Ok(code) => println!(
            "\n  Dashboard: {}{code}\n  (a one-time sign-in link, valid for two minutes; the session it opens lasts eight hours)",
            svc.url()
        ),
        Err(e) => println!("\n  No dashboard link: {e:#}"),
    }
    println!(
        "  A fresh link at any time, from another terminal:\n    \
         cargo run --release -p meterveil-service -- dashboard-link --database-url sqlite:{} --url {}",
        summary.database.display(),
        svc.url()
    );
    println!("  The service stays up until Ctrl-C.");
    let _ = tokio::signal::ctrl_c().await;
}

/// Runs a recovery job for one feeder over the whole window through the service's
/// own HTTP interface, then scores it against the simulated truth.
async fn recover_feeder(
    base: &str,
    token: &str,
    feeder: &str,
    town: &simulate::Town,
) -> anyhow::Result<FeederRecovery> {
    let to = town.start_day + i64::from(town.days) * 86_400;
    let body = serde_json::json!({ "feeder_id": feeder, "from": town.start_day, "to": to, "rank": "auto" });
    let job = run_job(base, token, "/v1/recoveries", body, "/v1/recoveries").await?;
    let job_id = job["job_id"].as_str().context("job id")?.to_owned();
    let rows: Vec<serde_json::Value> = get_json(base, token, &format!("/v1/recoveries/{job_id}/intervals")).await?;
    let truth: std::collections::HashMap<&str, &simulate::town::Household> =
        town.households.iter().filter(|h| h.feeder_id == feeder).map(|h| (h.meter_id.as_str(), h)).collect();
    let (mut num, mut den) = (0.0, 0.0);
    let mut day_est: std::collections::BTreeMap<(String, i64), f64> = Default::default();
    let mut loads: std::collections::HashMap<(String, u32), [f64; 96]> = Default::default();
    for row in &rows {
        let m = row["meter_id"].as_str().unwrap_or_default();
        let t = row["interval_start"].as_i64().unwrap_or_default();
        let kw = row["kw"].as_f64().unwrap_or_default();
        let Some(h) = truth.get(m) else { continue };
        let d = ((t - town.start_day) / 86_400) as u32;
        let load = loads.entry((m.to_owned(), d)).or_insert_with(|| town.day_load(h, d));
        let true_kw = load[((t - town.start_day).rem_euclid(86_400) / 900) as usize];
        num += (kw - true_kw).powi(2);
        den += true_kw * true_kw;
        *day_est.entry((m.to_owned(), i64::from(d))).or_default() += kw;
    }
    let mut per_meter: std::collections::BTreeMap<String, (f64, u32)> = Default::default();
    for ((m, d), est) in &day_est {
        let load = &loads[&(m.clone(), *d as u32)];
        let t: f64 = load.iter().sum();
        let e = per_meter.entry(m.clone()).or_default();
        e.0 += (est - t).abs() / t.max(1e-9);
        e.1 += 1;
    }
    let mut errs: Vec<f64> = per_meter.values().map(|(s, c)| s / f64::from(*c)).collect();
    errs.sort_by(f64::total_cmp);
    let d = &job["diagnostics"];
    Ok(FeederRecovery {
        feeder_id: feeder.to_owned(),
        job_id,
        rank: d["rank"].as_u64().unwrap_or(0),
        iterations: d["iterations"].as_u64().unwrap_or(0),
        wall_s: d["wall_s"].as_f64().unwrap_or(0.0),
        corrected: d["corrected"].as_u64().unwrap_or(0),
        atypical: d["atypical"].as_u64().unwrap_or(0),
        register_days: d["register_days"].as_u64().unwrap_or(0),
        first_meter: rows.first().and_then(|r| r["meter_id"].as_str()).unwrap_or_default().to_owned(),
        nrmse: (num / den.max(1e-300)).sqrt(),
        median_daily_energy_error: errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN),
    })
}

/// GETs `path` of the service as the operator and parses its JSON.
async fn get_json<T: serde::de::DeserializeOwned>(base: &str, token: &str, path: &str) -> anyhow::Result<T> {
    Ok(reqwest::Client::new()
        .get(format!("{base}{path}"))
        .bearer_auth(token)
        .send()
        .await?
        .error_for_status()?
        .json()
        .await?)
}

/// Starts a job by POSTing `body` to `path` and waits for it (its status at
/// `status/{job_id}`); returns its record.
async fn run_job(
    base: &str,
    token: &str,
    path: &str,
    body: serde_json::Value,
    status: &str,
) -> anyhow::Result<serde_json::Value> {
    let http = reqwest::Client::new();
    let r: serde_json::Value = http
        .post(format!("{base}{path}"))
        .bearer_auth(token)
        .json(&body)
        .send()
        .await?
        .error_for_status()?
        .json()
        .await?;
    let job_id = r["job_id"].as_str().context("job id")?.to_owned();
    loop {
        let j: serde_json::Value =
            http.get(format!("{base}{status}/{job_id}")).bearer_auth(token).send().await?.json().await?;
        match j["state"].as_str() {
            Some("done") => return Ok(j),
            Some("failed") => anyhow::bail!("{path} job failed: {}", j["error"]),
            _ => tokio::time::sleep(std::time::Duration::from_millis(250)).await,
        }
    }
}

/// The demo's privacy audit of one feeder.
#[derive(Debug, Clone)]
pub struct PrivacyCheck {
    pub feeder_id: String,
    pub captured: String,
    pub audit: serde_json::Value,
    pub reports: Vec<PathBuf>,
    /// The same audit as if the feeder sent each register period's reads.
    pub by_period: Vec<FeederAudit>,
}

/// One audit's headline: the strongest attacker's event F1 for one captured
/// meter, and the utility's median daily-energy error on it.
#[derive(Debug, Clone)]
pub struct FeederAudit {
    pub feeder_id: String,
    pub register_period: String,
    pub event_f1: f64,
    pub daily_energy_error: f64,
}

/// An audit of the recovery's first meter without curves, optionally as if the
/// feeder sent another register period's reads.
async fn light_audit(
    base: &str,
    token: &str,
    rec: &FeederRecovery,
    period: Option<&str>,
) -> anyhow::Result<(f64, f64)> {
    let mut body = serde_json::json!({ "recovery_job": rec.job_id, "captured": [rec.first_meter], "curves": false });
    if let Some(p) = period {
        body["register_period"] = p.into();
    }
    let a = run_job(base, token, "/v1/audits", body, "/v1/analyses").await?;
    let r = &a["result"];
    Ok((
        r["strongest"]["event_f1"].as_f64().unwrap_or(f64::NAN),
        r["utility"]["daily_energy_error"].as_f64().unwrap_or(f64::NAN),
    ))
}

async fn privacy_check(
    base: &str,
    token: &str,
    rec: &FeederRecovery,
    dir: &std::path::Path,
) -> anyhow::Result<PrivacyCheck> {
    anyhow::ensure!(!rec.first_meter.is_empty(), "the recovery of {} holds no meter", rec.feeder_id);
    let captured = rec.first_meter.clone();
    eprintln!("demo: auditing what an eavesdropper holding {captured} could learn ...");
    let audit = run_job(
        base,
        token,
        "/v1/audits",
        serde_json::json!({ "recovery_job": rec.job_id, "captured": [captured] }),
        "/v1/analyses",
    )
    .await?;
    let mut by_period = Vec::new();
    for p in ["none", "daily", "weekly", "monthly"] {
        eprintln!("demo: auditing {} as if it sent {p} register reads ...", rec.feeder_id);
        let (f1, energy) = light_audit(base, token, rec, Some(p)).await?;
        by_period.push(FeederAudit {
            feeder_id: rec.feeder_id.clone(),
            register_period: p.into(),
            event_f1: f1,
            daily_energy_error: energy,
        });
    }
    let reports = vec![save_report(base, token, &audit, &dir.join("audit.html")).await?];
    Ok(PrivacyCheck { feeder_id: rec.feeder_id.clone(), captured, audit: audit["result"].clone(), reports, by_period })
}

/// Writes a finished audit's or calibration's HTML report to `path`; returns it.
async fn save_report(
    base: &str,
    token: &str,
    job: &serde_json::Value,
    path: &std::path::Path,
) -> anyhow::Result<PathBuf> {
    let id = job["job_id"].as_str().unwrap_or_default();
    let html = reqwest::Client::new()
        .get(format!("{base}/v1/analyses/{id}/report"))
        .bearer_auth(token)
        .send()
        .await?
        .error_for_status()?
        .text()
        .await?;
    crate::offline::write_atomically(path, html.as_bytes())?;
    Ok(path.to_path_buf())
}

/// Clusters the town's meters by load shape (the stability rule's count), as a
/// clustering job over the feeders' recovery jobs.
async fn cluster_town(
    base: &str,
    token: &str,
    recoveries: &[FeederRecovery],
    town: &simulate::Town,
) -> anyhow::Result<Vec<TownCluster>> {
    let ids: Vec<&str> = recoveries.iter().map(|r| r.job_id.as_str()).collect();
    let job = run_job(
        base,
        token,
        "/v1/clusterings",
        serde_json::json!({ "recovery_jobs": ids, "clusters": "auto" }),
        "/v1/analyses",
    )
    .await?;
    let job_id = job["job_id"].as_str().context("job id")?.to_owned();
    let rows: Vec<serde_json::Value> = get_json(base, token, &format!("/v1/clusterings/{job_id}/assignments")).await?;
    let kind_of: std::collections::HashMap<&str, &str> =
        town.households.iter().map(|h| (h.meter_id.as_str(), h.kind.as_str())).collect();
    let per_hour = 3600 / job["result"]["interval_s"].as_u64().unwrap_or(900).max(1) as usize;
    let reps = job["result"]["representatives"].as_array().cloned().unwrap_or_default();
    let floats = |v: &serde_json::Value| -> Vec<f64> {
        v.as_array().map(|a| a.iter().filter_map(|x| x.as_f64()).collect()).unwrap_or_default()
    };
    let mut out: Vec<TownCluster> = reps
        .iter()
        .map(|r| {
            let k = r["cluster"].as_i64().unwrap_or(-1);
            let mut kinds: std::collections::BTreeMap<String, usize> = Default::default();
            let mut unassigned = 0;
            for row in rows.iter().filter(|row| row["cluster"].as_i64() == Some(k)) {
                let kind = kind_of.get(row["meter_id"].as_str().unwrap_or("")).unwrap_or(&"?");
                *kinds.entry(kind.to_string()).or_default() += 1;
                unassigned += usize::from(row["status"] == "unassigned");
            }
            let mut kinds: Vec<(String, usize)> = kinds.into_iter().collect();
            kinds.sort_by_key(|k| std::cmp::Reverse(k.1));
            let (weekday, weekend) = (floats(&r["weekday_kw"]), floats(&r["weekend_kw"]));
            let peak = weekday.iter().enumerate().max_by(|a, b| a.1.total_cmp(b.1)).map_or(0, |p| p.0);
            let minutes = peak * 60 / per_hour;
            TownCluster {
                size: r["size"].as_u64().unwrap_or(0) as usize,
                weekday_peak: format!("{:02}:{:02}", minutes / 60, minutes % 60),
                weekday_kwh: weekday.iter().sum::<f64>() / per_hour as f64,
                weekend_kwh: weekend.iter().sum::<f64>() / per_hour as f64,
                coherence: job["result"]["coherence"][k.max(0) as usize].as_f64().unwrap_or(0.0),
                unassigned,
                kinds,
            }
        })
        .collect();
    out.sort_by_key(|c| std::cmp::Reverse(c.size));
    Ok(out)
}
