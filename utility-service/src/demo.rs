//! `utility-service demo`: a thin orchestration of library calls. A fresh service
//! on a free port with a fresh SQLite file, the simulated town through real gateway
//! outboxes over HTTP, then a summary of what the utility holds.

use std::fmt::Write as _;
use std::path::PathBuf;

use anyhow::Context;
use meterveil_gateway::simulate::{self, SimulateOptions, SimulationReport};
use meterveil_shared::DitherProfile;

use crate::app;
use crate::config::{Secret, ServiceConfig};
use crate::store::FeederSummary;

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

pub async fn run(opts: &DemoOptions) -> anyhow::Result<DemoSummary> {
    // The folder is kept after the run: it holds the database and the reports.
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
        print!("{}", render(&summary));
        let code = svc.dashboard_link("/dashboard");
        println!(
            "\n  Dashboard: {}{code}\n  (a one-time sign-in link, valid for two minutes; the session it opens lasts eight hours)",
            svc.url()
        );
        println!("  The service stays up until Ctrl-C.");
        let _ = tokio::signal::ctrl_c().await;
    }
    svc.stop().await?;
    Ok(summary)
}

/// Runs a recovery job for one feeder over the whole window through the service's
/// own HTTP interface, then scores it against the simulated truth.
async fn recover_feeder(
    base: &str,
    token: &str,
    feeder: &str,
    town: &simulate::Town,
) -> anyhow::Result<FeederRecovery> {
    let http = reqwest::Client::new();
    let to = town.start_day + i64::from(town.days) * 86_400;
    let body = serde_json::json!({ "feeder_id": feeder, "from": town.start_day, "to": to, "rank": "auto" });
    let job = run_job(base, token, "/v1/recoveries", body, "/v1/recoveries").await?;
    let job_id = job["job_id"].as_str().context("job id")?.to_owned();
    let rows: Vec<serde_json::Value> = http
        .get(format!("{base}/v1/recoveries/{job_id}/intervals"))
        .bearer_auth(token)
        .send()
        .await?
        .error_for_status()?
        .json()
        .await?;
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
        register_days: d["register_days"].as_u64().unwrap_or(0),
        first_meter: rows.first().and_then(|r| r["meter_id"].as_str()).unwrap_or_default().to_owned(),
        nrmse: (num / den.max(1e-300)).sqrt(),
        median_daily_energy_error: errs.get(errs.len() / 2).copied().unwrap_or(f64::NAN),
    })
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

/// The demo's privacy audit of one feeder and its dither calibration.
#[derive(Debug, Clone)]
pub struct PrivacyCheck {
    pub feeder_id: String,
    pub captured: String,
    pub audit: serde_json::Value,
    pub calibration: serde_json::Value,
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
    let http = reqwest::Client::new();
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
    eprintln!("demo: calibrating the dither of {} ...", rec.feeder_id);
    let body = serde_json::json!({
        "recovery_job": rec.job_id, "event_f1_max": 0.3, "captured": 1, "daily_energy_error_max": 0.1,
        "profile_nrmse_max": 0.6, "publish": true
    });
    let calibration = run_job(base, token, "/v1/calibrations", body, "/v1/analyses").await?;
    let mut reports = Vec::new();
    for (job, name) in [(&audit, "audit.html"), (&calibration, "calibration.html")] {
        let id = job["job_id"].as_str().unwrap_or_default();
        let html = http
            .get(format!("{base}/v1/analyses/{id}/report"))
            .bearer_auth(token)
            .send()
            .await?
            .error_for_status()?
            .text()
            .await?;
        let path = dir.join(name);
        crate::offline::write_atomically(&path, html.as_bytes())?;
        reports.push(path);
    }
    Ok(PrivacyCheck {
        feeder_id: rec.feeder_id.clone(),
        captured,
        audit: audit["result"].clone(),
        calibration: calibration["result"].clone(),
        reports,
        by_period,
    })
}

/// Clusters the town's meters by load shape (the stability rule's count), as a
/// clustering job over the feeders' recovery jobs.
async fn cluster_town(
    base: &str,
    token: &str,
    recoveries: &[FeederRecovery],
    town: &simulate::Town,
) -> anyhow::Result<Vec<TownCluster>> {
    let http = reqwest::Client::new();
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
    let rows: Vec<serde_json::Value> = http
        .get(format!("{base}/v1/clusterings/{job_id}/assignments"))
        .bearer_auth(token)
        .send()
        .await?
        .error_for_status()?
        .json()
        .await?;
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

/// The printed summary.
pub fn render(s: &DemoSummary) -> String {
    let mut o = String::new();
    render_town(&mut o, s);
    render_recoveries(&mut o, s);
    render_clusters(&mut o, s);
    if let Some(p) = &s.privacy {
        render_privacy(&mut o, p);
        render_calibration(&mut o, p);
    }
    render_feeder_audits(&mut o, s);
    let _ = writeln!(o, "\n  database: {}", s.database.display());
    let _ = writeln!(
        o,
        "\n  Stored are quantizer levels only. The dither hides what a household did in a\n  \
         given interval from anyone who intercepts the uploads, but a long history still\n  \
         shows its habits, and the utility's population model recovers daily shapes.\n  \
         Dithering is a privacy measure with limits, not a guarantee: obligations follow\n  \
         local regulation and the utility's privacy officer."
    );
    o
}

/// The town, its uploads and its feeders.
fn render_town(o: &mut String, s: &DemoSummary) {
    let sim = &s.simulation;
    let _ = writeln!(o, "\nMeterveil demo: the town of {} ({} days of 15-minute data)", sim.town, sim.days);
    let _ = writeln!(o, "  meters {}  feeders {}  gateways {}", sim.meters, sim.feeders, sim.gateways);
    let _ = writeln!(
        o,
        "  readings generated {}  levels uploaded {}  stored {}  rejected {}  duplicates {}",
        sim.readings_generated, sim.readings_acknowledged, s.readings_stored, s.readings_rejected, s.duplicates
    );
    let _ = writeln!(
        o,
        "  register reads queued {}  upload retries {}  refused batches {}  wall time {:.1} s",
        sim.registers_queued, sim.transient_failures, sim.refused_batches, sim.elapsed_s
    );
    let _ = writeln!(o, "\n  {:<16} {:>6} {:>9} {:>9}  dither profile", "feeder", "meters", "readings", "registers");
    for f in &s.feeders {
        let profile = f
            .current_profile
            .as_ref()
            .map(|p| match DitherProfile::try_from(p.profile.clone()) {
                Ok(d) => format!("v{}: {}", p.version, d.describe()),
                Err(e) => format!("v{}: invalid ({e})", p.version),
            })
            .unwrap_or_else(|| "none".into());
        let _ =
            writeln!(o, "  {:<16} {:>6} {:>9} {:>9}  {}", f.feeder_id, f.meters, f.readings, f.register_reads, profile);
    }
}

/// One recovery per feeder, scored against the simulated truth.
fn render_recoveries(o: &mut String, s: &DemoSummary) {
    let _ = writeln!(
        o,
        "\n  Recovered profiles (one job per feeder; accuracy against the simulated truth, which only a demo has):"
    );
    let _ = writeln!(
        o,
        "  {:<16} {:>4} {:>5} {:>7} {:>9} {:>13} {:>7} {:>14}",
        "feeder", "rank", "iters", "time s", "corrected", "reg. periods", "nRMSE", "day energy err"
    );
    for r in &s.recoveries {
        let _ = writeln!(
            o,
            "  {:<16} {:>4} {:>5} {:>7.1} {:>9} {:>13} {:>7.3} {:>13.1}%",
            r.feeder_id,
            r.rank,
            r.iterations,
            r.wall_s,
            r.corrected,
            r.register_days,
            r.nrmse,
            100.0 * r.median_daily_energy_error
        );
    }
}

/// The town's load-shape clusters.
fn render_clusters(o: &mut String, s: &DemoSummary) {
    let _ = writeln!(
        o,
        "\n  Load-shape clusters ({} found by the stability rule, from a rank-{} fit of each feeder's levels).\n  Coherence: the share of the members' self-expression weight that stays inside the cluster.\n  Unassigned: members with most of their weight elsewhere, fitting no cluster well.",
        s.clusters.len(),
        meterveil_shared::cluster::CLUSTER_RANK
    );
    let _ = writeln!(
        o,
        "  {:>7} {:>9} {:>10} {:>12} {:>12} {:>12}  simulated kinds (demo only)",
        "members", "coherence", "unassigned", "weekday peak", "weekday kWh", "weekend kWh"
    );
    for c in &s.clusters {
        let kinds: Vec<String> = c.kinds.iter().take(3).map(|(k, n)| format!("{k} {n}")).collect();
        let _ = writeln!(
            o,
            "  {:>7} {:>9.2} {:>10} {:>12} {:>12.1} {:>12.1}  {}",
            c.size,
            c.coherence,
            c.unassigned,
            c.weekday_peak,
            c.weekday_kwh,
            c.weekend_kwh,
            kinds.join(", ")
        );
    }
}

/// Each feeder audited at its own register period.
fn render_feeder_audits(o: &mut String, s: &DemoSummary) {
    if !s.feeder_audits.is_empty() {
        let _ = writeln!(
            o,
            "\n  Each feeder at its own register period (one captured meter, the strongest attacker's event F1\n  and the utility's median daily-energy error on that meter):"
        );
        let _ = writeln!(o, "  {:<16} {:<15} {:>9} {:>11}", "feeder", "register reads", "event F1", "day energy");
        for a in &s.feeder_audits {
            let _ = writeln!(
                o,
                "  {:<16} {:<15} {:>9.2} {:>10.1}%",
                a.feeder_id,
                a.register_period,
                a.event_f1,
                100.0 * a.daily_energy_error
            );
        }
    }
}

fn render_privacy(o: &mut String, p: &PrivacyCheck) {
    let a = &p.audit;
    let f = |v: &serde_json::Value| v.as_f64().unwrap_or(f64::NAN);
    let _ = writeln!(
        o,
        "\n  Privacy audit of {} (parametric bootstrap: appliance events injected into {}'s recovered profile,\n  \
         levels re-drawn, every known attack run on that one meter's {} days):",
        p.feeder_id, p.captured, a["days"]
    );
    let _ = writeln!(o, "  {:<22} {:>7} {:>12} {:>9}", "strategy", "nRMSE", "day energy", "event F1");
    for s in a["strategies"].as_array().into_iter().flatten() {
        let _ = writeln!(
            o,
            "  {:<22} {:>7.3} {:>11.1}% {:>9.3}",
            s["strategy"].as_str().unwrap_or("?"),
            f(&s["nrmse"]),
            100.0 * f(&s["daily_energy_error"]),
            f(&s["events"]["f1"])
        );
    }
    let u = &a["utility"];
    let _ = writeln!(
        o,
        "  {:<22} {:>7.3} {:>11.1}% {:>9.3}   (whole-feeder recovery, same meter)",
        "utility",
        f(&u["nrmse"]),
        100.0 * f(&u["daily_energy_error"]),
        f(&u["event_f1"])
    );
    let st = &a["strongest"];
    let _ = writeln!(
        o,
        "  strongest attacker: event F1 {:.2} ({}), nRMSE {:.3} ({}).",
        f(&st["event_f1"]),
        st["strategy"].as_str().unwrap_or("?"),
        f(&st["nrmse"]),
        st["nrmse_strategy"].as_str().unwrap_or("?")
    );
    let _ = writeln!(
        o,
        "  at thresholds tuned on other simulated households: event F1 {:.2}.",
        f(&st["event_f1_tuned_elsewhere"])
    );
    if let Ok(s) = serde_json::from_value::<meterveil_shared::audit::Strongest>(st.clone()) {
        let _ = writeln!(o, "  {}", meterveil_shared::audit::kinds_in_words(&s));
    }
    let m = &a["mechanism"];
    let _ = writeln!(
        o,
        "  per reading: {:.2} bits of {:.2} about the load; LDP epsilon {:.0} over [0, {}] kW (finite only\n  \
         because the dither has full support, and far too large to be a guarantee).",
        f(&m["mutual_information_bits"]),
        f(&m["level_bits"]),
        f(&m["ldp_epsilon"]),
        m["ldp_range_kw"][1]
    );
    let curve: Vec<String> = a["curve_captured"]
        .as_array()
        .into_iter()
        .flatten()
        .map(|c| format!("{} meters F1 {:.2}", c["captured"], f(&c["strongest_event_f1"])))
        .collect();
    let _ = writeln!(o, "  more captured meters: {}", curve.join(", "));
    let _ = writeln!(o, "  the same audit as if {} sent other register reads (what-ifs, without curves):", p.feeder_id);
    for a in &p.by_period {
        let _ = writeln!(
            o,
            "    {:<8} register reads: event F1 {:.2}, utility day-energy error {:.1}%",
            a.register_period,
            a.event_f1,
            100.0 * a.daily_energy_error
        );
    }
}

/// The calibration of the audited feeder, and the reports written.
fn render_calibration(o: &mut String, p: &PrivacyCheck) {
    let c = &p.calibration;
    let _ = writeln!(
        o,
        "\n  Dither calibration of {} (targets: event F1 ≤ 0.3 for one captured meter, daily energy error ≤ 10%,\n  interval nRMSE ≤ 0.6):",
        p.feeder_id
    );
    let _ = writeln!(o, "  {}", c["message"].as_str().unwrap_or(""));
    let r = &c["recommended"];
    let _ = writeln!(
        o,
        "  recommended: {} σ {} kW, boundaries {} kW{}",
        r["noise"].as_str().unwrap_or("?"),
        r["scale_kw"],
        r["boundaries_kw"],
        match c["published_version"].as_i64() {
            Some(v) => format!("; published as version {v}, gateways pick it up on their next pull"),
            None => "; not published".into(),
        }
    );
    for path in &p.reports {
        let _ = writeln!(o, "  report: {}", path.display());
    }
}
