//! Ingest load: N provisioned gateways of M meters each upload one day of
//! 15-minute levels in 96-reading signed batches, all at once, to a
//! `utility-service serve` child process on loopback with a fresh SQLite file.
//! Reports accepted readings per second, batch latency percentiles, errors and
//! the service's peak resident memory (VmHWM of the child). Bounded: it stops
//! after every gateway has sent its day, or after the time limit.
//!
//! `cargo bench -p meterveil-service --bench ingest_load -- [GATEWAYS] [METERS_PER_GATEWAY] [DAYS]`
//! (default 1000 4 1; more days keep the same gateways uploading for longer, to
//! show the rate is sustained). At the end the service's own count of stored
//! readings must equal the acknowledged ones. `METERVEIL_BENCH_DATABASE_URL=postgres://…` runs it against
//! an (empty) PostgreSQL database instead.

use std::io::BufRead;
use std::time::{Duration, Instant};

use meterveil_shared::auth::{
    body_sha256, sign, signing_text, HEADER_GATEWAY, HEADER_SEQUENCE, HEADER_SIGNATURE, HEADER_TIMESTAMP,
};
use serde_json::{json, Value};

mod common;

use common::{cpu_s, peak_rss_mib};

const TOKEN: &str = "load-test-operator-token-0123";
const LIMIT: Duration = Duration::from_secs(600);

fn now_s() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.as_secs() as i64).unwrap_or(0)
}

#[tokio::main(flavor = "multi_thread")]
async fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let gateways: usize = args.first().and_then(|a| a.parse().ok()).unwrap_or(1000);
    let per_gateway: usize = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(4);
    let days: i64 = args.get(2).and_then(|a| a.parse().ok()).unwrap_or(1).max(1);
    let dir = tempfile::tempdir()?;
    let mut child = std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
        .args(["serve", "--bind", "127.0.0.1:0", "--operator-token", TOKEN, "--no-worker"])
        .args(["--gateway-master-key", "load-master-key-0123456789abcdef0123456789"])
        .arg("--database-url")
        .arg(
            std::env::var("METERVEIL_BENCH_DATABASE_URL")
                .unwrap_or_else(|_| format!("sqlite:{}", dir.path().join("load.sqlite").display())),
        )
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::null())
        .spawn()?;
    let mut line = String::new();
    std::io::BufReader::new(child.stdout.take().expect("stdout")).read_line(&mut line)?;
    let base = line.trim().trim_start_matches("listening on ").to_owned();
    let http = reqwest::Client::builder().pool_max_idle_per_host(gateways).build()?;

    // Set-up (not timed): feeders of 100 gateways, meters, a profile, gateway keys.
    let feeders = gateways.div_ceil(100);
    let mut keys = Vec::with_capacity(gateways);
    for f in 0..feeders {
        let feeder = format!("LD-FEEDER-{f:03}");
        http.post(format!("{base}/v1/feeders"))
            .bearer_auth(TOKEN)
            .json(&json!({"feeder_id": feeder}))
            .send()
            .await?
            .error_for_status()?;
        http.post(format!("{base}/v1/feeders/{feeder}/profiles"))
            .bearer_auth(TOKEN)
            .json(&json!({"noise": "gaussian", "scale_kw": 0.3, "boundaries_kw": [1.0, 2.0], "interval_s": 900}))
            .send()
            .await?
            .error_for_status()?;
        let gws: Vec<usize> = (f * 100..((f + 1) * 100).min(gateways)).collect();
        let meters: Vec<String> =
            gws.iter().flat_map(|g| (0..per_gateway).map(move |m| format!("LD-M-{g:05}-{m}"))).collect();
        for chunk in meters.chunks(500) {
            http.post(format!("{base}/v1/feeders/{feeder}/meters"))
                .bearer_auth(TOKEN)
                .json(&json!({"meter_ids": chunk}))
                .send()
                .await?
                .error_for_status()?;
        }
        for g in gws {
            let gid = format!("LD-GW-{g:05}");
            let r: Value = http
                .post(format!("{base}/v1/gateways"))
                .bearer_auth(TOKEN)
                .json(&json!({"gateway_id": gid, "feeder_id": feeder}))
                .send()
                .await?
                .error_for_status()?
                .json()
                .await?;
            keys.push((gid, feeder.clone(), hex::decode(r["secret"].as_str().unwrap_or(""))?, g));
        }
    }
    let first_day = now_s() - now_s().rem_euclid(86_400) - 86_400 * days;
    let started = Instant::now();
    let (service_cpu0, load_cpu0) = (cpu_s(&child.id().to_string()), cpu_s("self"));
    let mut tasks = Vec::with_capacity(gateways);
    for (gid, feeder, key, g) in keys {
        let (http, base) = (http.clone(), base.clone());
        tasks.push(tokio::spawn(async move {
            let mut out: Vec<(Duration, bool, usize)> = Vec::new();
            // Day by day, one 96-reading batch per meter and day.
            let readings: Vec<Value> = (0..days)
                .flat_map(|d| (0..per_gateway).map(move |m| (first_day + 86_400 * d, m)))
                .flat_map(|(day, m)| {
                    (0..96).map(move |i| {
                        json!({"meter_id": format!("LD-M-{g:05}-{m}"), "interval_start": day + 900 * i, "level": (i % 3), "profile_version": 1})
                    })
                })
                .collect();
            for (seq, chunk) in readings.chunks(96).enumerate() {
                let body = json!({"batch_id": format!("{gid}-{seq}"), "gateway_id": gid, "feeder_id": feeder, "readings": chunk}).to_string();
                let ts = now_s();
                let text = signing_text("POST", "/v1/ingest/batches", &gid, seq as u64 + 1, ts, &body_sha256(body.as_bytes()));
                let t0 = Instant::now();
                let r = http
                    .post(format!("{base}/v1/ingest/batches"))
                    .header("content-type", "application/json")
                    .header(HEADER_GATEWAY, &gid)
                    .header(HEADER_SEQUENCE, (seq + 1).to_string())
                    .header(HEADER_TIMESTAMP, ts.to_string())
                    .header(HEADER_SIGNATURE, sign(&key, &text))
                    .body(body)
                    .send()
                    .await;
                let ok = matches!(&r, Ok(resp) if resp.status().is_success());
                out.push((t0.elapsed(), ok, chunk.len()));
                if started.elapsed() > LIMIT {
                    break;
                }
            }
            out
        }));
    }
    let mut lat = Vec::new();
    let (mut accepted, mut errors) = (0usize, 0usize);
    for t in tasks {
        for (d, ok, n) in t.await? {
            lat.push(d);
            if ok {
                accepted += n;
            } else {
                errors += 1;
            }
        }
    }
    let wall = started.elapsed().as_secs_f64();
    lat.sort();
    let pct = |p: f64| lat.get(((lat.len() as f64 - 1.0) * p) as usize).map_or(f64::NAN, |d| d.as_secs_f64() * 1000.0);
    let peak = peak_rss_mib(child.id());
    let service_cpu = cpu_s(&child.id().to_string()) - service_cpu0;
    let load_cpu = cpu_s("self") - load_cpu0;
    // The service's own count, so an acknowledgement without a stored row shows.
    let listed: Value =
        http.get(format!("{base}/v1/feeders")).bearer_auth(TOKEN).send().await?.error_for_status()?.json().await?;
    let stored: i64 = listed.as_array().map_or(0, |fs| fs.iter().filter_map(|f| f["readings"].as_i64()).sum());
    let _ = child.kill();
    let _ = child.wait();
    println!(
        "{}",
        json!({
            "gateways": gateways, "meters_per_gateway": per_gateway, "days": days, "batches": lat.len(), "errors": errors,
            "readings_accepted": accepted, "readings_stored_by_service": stored, "wall_s": wall, "readings_per_s": accepted as f64 / wall,
            "latency_ms": {"p50": pct(0.5), "p99": pct(0.99), "max": pct(1.0)},
            "service_peak_rss_mib": peak,
            // Both share the machine's cores: the load generator's CPU is not the service's.
            "service_cpu_s": service_cpu, "load_generator_cpu_s": load_cpu,
            "service_cpu_us_per_reading": service_cpu * 1e6 / accepted.max(1) as f64,
        })
    );
    anyhow::ensure!(stored == accepted as i64, "the service stored {stored} readings but acknowledged {accepted}");
    Ok(())
}
