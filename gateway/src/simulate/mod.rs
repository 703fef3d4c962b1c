//! `gateway simulate`: the invented town of Quillmarsh, run faster than real time
//! through real gateways (outbox files, dither, HTTP uploads) against a service.

pub mod town;

use std::collections::HashMap;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::Context;
use meterveil_shared::wire::{NewFeederWire, NewMetersWire};
use meterveil_shared::{DitherProfileSpec, FeederId, GatewayId, MeterId};
use serde::Serialize;
use tokio::sync::watch;

use crate::client::ServiceClient;
use crate::gateway::Gateway;
use crate::identity::GatewayIdentity;
use crate::source::RawReading;
use crate::uploader::{UploadConfig, UploadStats};
pub use town::{Kind, Town, TOWN_ALPHA_KW};

#[derive(Debug, Clone)]
pub struct SimulateOptions {
    pub service_url: String,
    /// When given, the town's feeders, meters and first profiles are registered
    /// with this operator token before the run.
    pub operator_token: Option<String>,
    pub meters: usize,
    pub days: u32,
    /// UTC midnight after the last simulated day; defaults to the latest midnight.
    pub end_day: Option<i64>,
    pub seed: u64,
    /// Where the gateways' outbox files go.
    pub work_dir: PathBuf,
    pub meters_per_gateway: usize,
    pub upload: UploadConfig,
    /// Optional ground-truth CSV (`meter_id,feeder_id,kind,interval_start,kw`), for evaluation only.
    pub truth: Option<PathBuf>,
}

impl SimulateOptions {
    pub fn new(service_url: impl Into<String>, work_dir: impl Into<PathBuf>) -> Self {
        Self {
            service_url: service_url.into(),
            operator_token: None,
            meters: 400,
            days: 28,
            end_day: None,
            seed: 2026,
            work_dir: work_dir.into(),
            meters_per_gateway: 50,
            upload: UploadConfig::default(),
            truth: None,
        }
    }
}

#[derive(Debug, Clone, Default, Serialize)]
pub struct SimulationReport {
    pub town: String,
    pub feeders: usize,
    pub meters: usize,
    pub gateways: usize,
    pub days: u32,
    pub first_day: i64,
    pub readings_generated: u64,
    pub levels_queued: u64,
    pub registers_queued: u64,
    pub batches_acknowledged: u64,
    pub readings_acknowledged: u64,
    pub transient_failures: u64,
    pub refused_batches: u64,
    pub elapsed_s: f64,
}

/// The dither profile each Quillmarsh feeder starts with. Household feeders use
/// three or four levels; the rural feeder, with farms' milking loads, wider steps.
pub fn starting_profiles() -> HashMap<&'static str, DitherProfileSpec> {
    let spec = |noise: &str, scale: f64, b: &[f64], period: &str| DitherProfileSpec {
        noise: noise.into(),
        scale_kw: scale,
        boundaries_kw: b.to_vec(),
        interval_s: 900,
        send_registers: period != "none",
        register_period: Some(period.into()),
    };
    HashMap::from([
        ("QM-CHAPEL-ROW", spec("gaussian", 0.3, &[1.0, 2.0], "daily")),
        ("QM-MILLPOND", spec("gaussian", 0.3, &[0.5, 1.5, 3.0], "monthly")),
        ("QM-FERRY-LANE", spec("logistic", 0.25, &[1.0, 2.0, 4.0], "none")),
        ("QM-UPPER-FIELDS", spec("gaussian", 0.6, &[1.0, 3.0, 6.0], "weekly")),
    ])
}

fn latest_midnight() -> i64 {
    let now =
        std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0);
    now - now.rem_euclid(86_400)
}

/// Registers the town's feeders and meters and, where a feeder has no profile
/// yet, publishes its starting profile.
pub async fn provision(service_url: &str, token: &str, town: &Town) -> anyhow::Result<()> {
    let http = reqwest::Client::new();
    let base = service_url.trim_end_matches('/');
    let check = |r: reqwest::Response, what: String| async move {
        if r.status().is_success() {
            Ok(())
        } else {
            let status = r.status();
            anyhow::bail!("{what}: {status}: {}", r.text().await.unwrap_or_default())
        }
    };
    let profiles = starting_profiles();
    for f in &town.feeders {
        let body = NewFeederWire {
            feeder_id: f.feeder_id.clone(),
            name: f.name.clone(),
            time_zone: Some(town::TIME_ZONE.into()),
        };
        let r = http.post(format!("{base}/v1/feeders")).bearer_auth(token).json(&body).send().await?;
        check(r, format!("registering feeder {}", f.feeder_id)).await?;
        let ids: Vec<String> =
            town.households.iter().filter(|h| h.feeder_id == f.feeder_id).map(|h| h.meter_id.clone()).collect();
        for chunk in ids.chunks(500) {
            let r = http
                .post(format!("{base}/v1/feeders/{}/meters", f.feeder_id))
                .bearer_auth(token)
                .json(&NewMetersWire { meter_ids: chunk.to_vec() })
                .send()
                .await?;
            check(r, format!("registering meters on {}", f.feeder_id)).await?;
        }
        let current = http.get(format!("{base}/v1/feeders/{}/profile", f.feeder_id)).send().await?;
        if current.status() == reqwest::StatusCode::NOT_FOUND {
            let spec = profiles.get(f.feeder_id.as_str()).context("starting profile")?;
            let r = http
                .post(format!("{base}/v1/feeders/{}/profiles", f.feeder_id))
                .bearer_auth(token)
                .json(spec)
                .send()
                .await?;
            check(r, format!("publishing the profile of {}", f.feeder_id)).await?;
        }
    }
    Ok(())
}

/// Writes the town's true loads (for evaluation only; never sent anywhere).
pub fn write_truth(town: &Town, path: &Path) -> anyhow::Result<()> {
    let file = std::fs::File::create(path).with_context(|| format!("creating {}", path.display()))?;
    let mut w = std::io::BufWriter::new(file);
    writeln!(w, "meter_id,feeder_id,kind,interval_start,kw")?;
    for h in &town.households {
        for d in 0..town.days {
            let day = town.start_day + i64::from(d) * 86_400;
            for (i, kw) in town.day_load(h, d).iter().enumerate() {
                writeln!(w, "{},{},{},{},{:.6}", h.meter_id, h.feeder_id, h.kind.as_str(), day + i as i64 * 900, kw)?;
            }
        }
    }
    w.flush()?;
    Ok(())
}

/// Runs the town: one gateway per group of meters on a feeder, each feeding its
/// outbox day by day while its uploader drains it to the service.
pub async fn run(opts: &SimulateOptions) -> anyhow::Result<SimulationReport> {
    let t0 = Instant::now();
    let end = opts.end_day.unwrap_or_else(latest_midnight);
    let start = end - i64::from(opts.days) * 86_400;
    let town = Town::new(opts.meters, opts.days, start, opts.seed);
    if let Some(token) = &opts.operator_token {
        provision(&opts.service_url, token, &town).await?;
    }
    if let Some(path) = &opts.truth {
        write_truth(&town, path)?;
    }
    std::fs::create_dir_all(&opts.work_dir).with_context(|| format!("creating {}", opts.work_dir.display()))?;

    let mut tasks = Vec::new();
    let mut gateways = 0;
    for f in &town.feeders {
        let members: Vec<&town::Household> = town.households.iter().filter(|h| h.feeder_id == f.feeder_id).collect();
        for (g, group) in members.chunks(opts.meters_per_gateway.max(1)).enumerate() {
            gateways += 1;
            let gateway_id = format!("{}-GW{:02}", f.feeder_id, g + 1);
            let key =
                provision_gateway(&opts.service_url, opts.operator_token.as_deref(), &gateway_id, &f.feeder_id).await?;
            let identity = GatewayIdentity {
                gateway_id: GatewayId::parse(&gateway_id)?,
                feeder_id: FeederId::parse(&f.feeder_id)?,
                key,
            };
            let outbox = opts.work_dir.join(format!("{gateway_id}.outbox.sqlite"));
            let group: Vec<town::Household> = group.iter().map(|h| (*h).clone()).collect();
            let town = town.clone();
            let url = opts.service_url.clone();
            let upload = opts.upload;
            tasks.push(tokio::spawn(async move { run_gateway(identity, outbox, url, upload, town, group).await }));
        }
    }
    let mut report = SimulationReport {
        town: town.name.into(),
        feeders: town.feeders.len(),
        meters: town.households.len(),
        gateways,
        days: opts.days,
        first_day: start,
        ..Default::default()
    };
    for t in tasks {
        let (generated, levels, registers, up) = t.await.context("gateway task")??;
        report.readings_generated += generated;
        report.levels_queued += levels;
        report.registers_queued += registers;
        report.batches_acknowledged += up.batches;
        report.readings_acknowledged += up.readings_acknowledged;
        report.transient_failures += up.transient_failures;
        report.refused_batches += up.refused_batches;
    }
    report.elapsed_s = t0.elapsed().as_secs_f64();
    Ok(report)
}

async fn run_gateway(
    identity: GatewayIdentity,
    outbox: PathBuf,
    url: String,
    upload: UploadConfig,
    town: Town,
    group: Vec<town::Household>,
) -> anyhow::Result<(u64, u64, u64, UploadStats)> {
    let client = ServiceClient::new(&url, Duration::from_secs(30))?;
    let mut gw = Gateway::open(identity, &outbox, client).await?;
    gw.pull_profile().await?;
    let (done_tx, done_rx) = watch::channel(false);
    let (_stop_tx, stop_rx) = watch::channel(false);
    let uploader = gw.uploader(upload);
    let up = tokio::spawn(async move { uploader.run(done_rx, stop_rx).await });
    let ids: Vec<MeterId> = group.iter().map(|h| MeterId::parse(&h.meter_id)).collect::<Result<_, _>>()?;
    let (mut generated, mut levels, mut registers) = (0, 0, 0);
    for d in 0..town.days {
        let day = town.start_day + i64::from(d) * 86_400;
        let mut readings = Vec::with_capacity(group.len() * 96);
        for (h, id) in group.iter().zip(&ids) {
            for (i, kw) in town.day_load(h, d).iter().enumerate() {
                readings.push(RawReading { meter_id: id.clone(), interval_start: day + i as i64 * 900, kw: *kw });
            }
        }
        generated += readings.len() as u64;
        let s = gw.accept(&readings, None).await?;
        levels += s.levels;
        registers += s.registers;
    }
    let _ = done_tx.send(true);
    let (_, stats) = up.await.context("uploader")??;
    Ok((generated, levels, registers, stats))
}

/// Provisions a simulated gateway through the service's operator endpoint.
async fn provision_gateway(
    base: &str,
    token: Option<&str>,
    gateway_id: &str,
    feeder_id: &str,
) -> anyhow::Result<crate::gateway::GatewayKey> {
    let token = token.context("the simulation needs the operator token to provision its gateways")?;
    let r = reqwest::Client::new()
        .post(format!("{base}/v1/gateways"))
        .bearer_auth(token)
        .json(&serde_json::json!({ "gateway_id": gateway_id, "feeder_id": feeder_id }))
        .send()
        .await?;
    let status = r.status();
    let body: serde_json::Value = r.json().await.unwrap_or_default();
    if !status.is_success() {
        anyhow::bail!("provisioning gateway {gateway_id}: {status} {body}");
    }
    crate::gateway::GatewayKey::from_hex(body["secret"].as_str().unwrap_or(""))
}
