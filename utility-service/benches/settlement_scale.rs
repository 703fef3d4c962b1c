//! Daily settlement at utility scale: FEEDERS feeders of METERS meters on
//! PostgreSQL, SETTLED simulated days of scheduled runs: each day an initial
//! run of the day just ended, an interim run of the day before and a final run
//! of the day before that, every run a recovery of the trailing WINDOW days
//! started from the previous runs. Two `utility-service work` processes run the
//! jobs; this process makes the runs (it ticks the schedule on a clock it moves
//! a day at a time; the workers' own schedulers are off). A benchmark, not a
//! test: the levels are a planted low-rank population dithered with the
//! feeders' profile, for the cost only (accuracy is measured on outside
//! populations in `shared/tests/recovery_rolling.rs`).
//!
//! Needs a PostgreSQL server: `source scripts/test-postgres.sh` starts one and
//! sets `METERVEIL_TEST_POSTGRES`, then
//! `cargo bench -p meterveil-service --bench settlement_scale -- [FEEDERS] [METERS] [WINDOW] [SETTLED]`
//! (default 40 500 28 3). Prints per day the runs, wall time and CPU seconds
//! of the workers and of the whole machine (PostgreSQL included), then the
//! meter-days settled per core-second, each worker's peak memory, the
//! database's growth, and one JSON line with all of it.

use std::fmt::Write as _;
use std::time::{Duration, Instant};

use meterveil_service::clock::Clock;
use meterveil_service::config::{Secret, ServiceConfig};
use meterveil_service::jobs::{schedule, WorkContext};
use meterveil_service::store::Store;
use meterveil_shared::mechanism::dither_and_quantize;
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId, MeterId};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use serde_json::json;

mod common;

use common::{cpu_s, peak_rss_mib};

const DAY: i64 = 86_400;
const PER_DAY: usize = 96;

/// CPU seconds the whole machine has been busy (all but idle and iowait).
fn machine_busy_s() -> f64 {
    let stat = std::fs::read_to_string("/proc/stat").unwrap_or_default();
    let v: Vec<f64> =
        stat.lines().next().unwrap_or("").split_whitespace().skip(1).filter_map(|x| x.parse().ok()).collect();
    let total: f64 = v.iter().sum();
    (total - v.get(3).unwrap_or(&0.0) - v.get(4).unwrap_or(&0.0)) / 100.0
}

/// One feeder's levels as COPY text: six daily shapes mixed per meter, a
/// weather factor per day, a household's own noise per reading, 2% missing.
fn feeder_copy(feeder: &str, meters: usize, start: i64, days: usize, profile: &DitherProfile, seed: u64) -> String {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let n = days * PER_DAY;
    let weights = DMatrix::<f64>::from_fn(meters, 6, |_, _| rng.random_range(0.0..1.0));
    let weather: Vec<f64> = (0..days).map(|_| rng.random_range(0.8..1.2)).collect();
    let shapes = DMatrix::<f64>::from_fn(6, n, |k, j| {
        let t = (j % PER_DAY) as f64 / PER_DAY as f64 * std::f64::consts::TAU;
        weather[j / PER_DAY] * (1.0 + (t * (k % 3 + 1) as f64 + k as f64).sin()) * 0.5
    });
    let mut out = String::with_capacity(meters * n * 40);
    for i in 0..meters {
        for j in 0..n {
            if rng.random_bool(0.02) {
                continue;
            }
            let kw = ((weights.row(i) * shapes.column(j))[(0, 0)] * rng.random_range(0.7..1.3)).clamp(0.0, 15.0);
            let level = dither_and_quantize(profile, kw, &mut rng);
            let _ = writeln!(out, "{feeder}-{i:04}\t{}\t{level}\t1\tbench", start + j as i64 * 900);
        }
    }
    out
}

async fn database() -> anyhow::Result<String> {
    use sqlx::Connection;
    let admin = std::env::var("METERVEIL_TEST_POSTGRES")
        .map_err(|_| anyhow::anyhow!("start a server first: source scripts/test-postgres.sh"))?;
    let name = format!("mvbench_{:08x}", rand::random::<u32>());
    let mut conn = sqlx::PgConnection::connect(&admin).await?;
    sqlx::query(&format!("CREATE DATABASE {name}")).execute(&mut conn).await?;
    let base = admin.rsplit_once('/').map(|(b, _)| b).unwrap_or(&admin);
    Ok(format!("{base}/{name}"))
}

/// Feeders, meters, profiles, schedules and every level of the simulated span.
#[allow(clippy::too_many_arguments)]
async fn load(
    url: &str,
    store: &Store,
    feeders: usize,
    meters: usize,
    start: i64,
    days: usize,
    window: usize,
    first: i64,
) -> anyhow::Result<()> {
    use sqlx::Connection;
    let profile = DitherProfile::try_from(DitherProfileSpec {
        noise: "gaussian".into(),
        scale_kw: 0.3,
        boundaries_kw: vec![1.0, 2.0],
        interval_s: 900,
        send_registers: false,
        register_period: None,
    })?;
    let schedule: meterveil_service::schedule::Schedule = serde_json::from_value(json!({
        "first_day": meterveil_service::schedule::day_name(first), "completeness": 0.98, "initial_by": "06:00",
        "later_runs": [{"kind": "interim", "after_days": 1}, {"kind": "final", "after_days": 2}],
        "window_days": window
    }))?;
    let mut conn = sqlx::PgConnection::connect(url).await?;
    let t0 = Instant::now();
    for f in 0..feeders {
        let name = format!("BENCH-F{f:02}");
        let id = FeederId::parse(&name)?;
        store.create_feeder(&id, &name, "Europe/London", start).await?;
        let ids: Vec<MeterId> =
            (0..meters).map(|i| MeterId::parse(&format!("{name}-{i:04}"))).collect::<Result<_, _>>()?;
        store.add_meters(&id, &ids, start).await?;
        store.publish_profile(&id, &profile, start).await?;
        store.put_schedule(&id, &schedule, start).await?;
        let text = feeder_copy(&name, meters, start, days, &profile, 7 + f as u64);
        let mut copy = conn
            .copy_in_raw("COPY readings (meter_id, interval_start, level, profile_version, batch_id) FROM STDIN")
            .await?;
        copy.send(text.into_bytes()).await?;
        copy.finish().await?;
        eprint!("\rloaded {} of {feeders} feeders ({:.0} s)", f + 1, t0.elapsed().as_secs_f64());
    }
    eprintln!();
    Ok(())
}

#[tokio::main(flavor = "multi_thread")]
async fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let num = |i: usize, d: usize| args.get(i).and_then(|a| a.parse().ok()).unwrap_or(d);
    let (feeders, meters, window, settled) = (num(0, 40), num(1, 500), num(2, 28).clamp(2, 93), num(3, 3).max(1));
    let url = database().await?;
    let store = Store::open(&url).await?;
    let now = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH)?.as_secs() as i64;
    let end = now - now.rem_euclid(DAY);
    let days = window - 1 + settled;
    let start = end - days as i64 * DAY;
    let first = end - settled as i64 * DAY;
    load(&url, &store, feeders, meters, start, days, window, first).await?;
    let size = |store: Store| async move {
        sqlx::query_scalar::<_, i64>("SELECT pg_database_size(current_database())").fetch_one(store.pool()).await
    };
    let loaded_bytes = size(store.clone()).await?;

    let mut workers = Vec::new();
    for _ in 0..2 {
        workers.push(
            std::process::Command::new(env!("CARGO_BIN_EXE_utility-service"))
                .args(["work", "--no-schedule", "--job-lease-s", "300", "--database-url", &url])
                .env("RUST_LOG", "warn")
                .stdout(std::process::Stdio::null())
                .spawn()?,
        );
    }
    let pids: Vec<u32> = workers.iter().map(|c| c.id()).collect();
    let mut config = ServiceConfig::local(url.clone(), Secret::new("unused-operator-token"));
    config.run_worker = false;
    let mut ctx = WorkContext::new(store.clone(), config);
    ctx.clock = Clock::driven(first);
    let (mut runs_total, mut worker_cpu_total, mut machine_total, mut wall_total) = (0usize, 0.0, 0.0, 0.0);
    let mut per_day = Vec::new();
    for k in 0..settled as i64 {
        ctx.clock.set(first + (k + 1) * DAY + 7 * 3600);
        let (cpu0, busy0, t0) =
            (pids.iter().map(|p| cpu_s(&p.to_string())).sum::<f64>(), machine_busy_s(), Instant::now());
        let made = schedule::tick(&ctx, ctx.clock.now()).await?;
        loop {
            let open: i64 =
                sqlx::query_scalar("SELECT COUNT(*) FROM recovery_jobs WHERE state IN ('queued', 'running')")
                    .fetch_one(store.pool())
                    .await?;
            if open == 0 {
                break;
            }
            tokio::time::sleep(Duration::from_millis(200)).await;
        }
        let failed: i64 = sqlx::query_scalar("SELECT COUNT(*) FROM recovery_jobs WHERE state = 'failed'")
            .fetch_one(store.pool())
            .await?;
        anyhow::ensure!(failed == 0, "{failed} runs failed");
        let wall = t0.elapsed().as_secs_f64();
        let cpu = pids.iter().map(|p| cpu_s(&p.to_string())).sum::<f64>() - cpu0;
        let busy = machine_busy_s() - busy0;
        let kinds: Vec<&str> = made.iter().map(|m| m.kind.as_str()).collect();
        println!(
            "day {}: {} runs ({} initial, {} later), {wall:.1} s wall, workers {cpu:.1} CPU s, machine {busy:.1} CPU s",
            k + 1,
            made.len(),
            kinds.iter().filter(|k| **k == "initial").count(),
            kinds.iter().filter(|k| **k != "initial").count()
        );
        per_day.push(json!({"runs": made.len(), "wall_s": wall, "worker_cpu_s": cpu, "machine_cpu_s": busy}));
        runs_total += made.len();
        worker_cpu_total += cpu;
        machine_total += busy;
        wall_total += wall;
    }
    let peaks: Vec<f64> = pids.iter().map(|p| peak_rss_mib(*p)).collect();
    let grown = size(store.clone()).await? - loaded_bytes;
    for mut w in workers {
        let _ = w.kill();
        let _ = w.wait();
    }
    let meter_days = (runs_total * meters) as f64;
    let summary = json!({
        "feeders": feeders, "meters_per_feeder": meters, "window_days": window, "settled_days": settled,
        "runs": runs_total, "meter_days_settled": meter_days, "wall_s": wall_total,
        "worker_cpu_s": worker_cpu_total, "machine_cpu_s": machine_total,
        "meter_days_per_worker_cpu_s": meter_days / worker_cpu_total,
        "meter_days_per_machine_cpu_s": meter_days / machine_total,
        "machine_cpu_s_per_run": machine_total / runs_total as f64,
        "worker_peak_rss_mib": peaks,
        "database_bytes_loaded": loaded_bytes,
        "database_bytes_per_stored_meter_day": loaded_bytes as f64 / (feeders * meters * days) as f64,
        "database_bytes_per_run": grown as f64 / runs_total as f64,
        "days": per_day,
    });
    println!(
        "{meter_days:.0} meter-days settled in {runs_total} runs: {:.0} per worker CPU second, {:.0} per machine CPU second \
         (PostgreSQL included); workers' peak memory {:.0} and {:.0} MiB; the database grew {:.1} MB per run",
        meter_days / worker_cpu_total,
        meter_days / machine_total,
        peaks[0],
        peaks[1],
        grown as f64 / runs_total as f64 / 1e6
    );
    println!("{summary}");
    Ok(())
}
