//! Dashboard pages at utility size: one feeder of METERS meters (default
//! 10,000) with DAYS days (default 7) of 15-minute readings and a finished
//! recovery of them, beside a reference feeder of 100 meters with the same
//! history, in one database behind an in-process `serve`. Each page is fetched
//! with a signed-in session RUNS times (default 7); the median and the slowest
//! time are reported for both feeders, with their ratio. The target is a page
//! under one second at 10,000 meters.
//!
//! `cargo bench -p meterveil-service --bench dashboard_pages -- [METERS] [DAYS] [RUNS]`.
//! `METERVEIL_BENCH_DATABASE_URL=postgres://…` runs it on an empty PostgreSQL
//! database instead of a fresh SQLite file. Set-up (bulk SQL inserts) is not timed.

use std::time::Instant;

use meterveil_service::app;
use meterveil_service::config::{Secret, ServiceConfig};
use meterveil_shared::{DitherProfile, DitherProfileSpec, FeederId};
use serde_json::json;

const TOKEN: &str = "bench-operator-token-0123456789";
const INTERVAL_S: i64 = 900;
/// Monday 2026-11-02 00:00 UTC.
const START: i64 = 1_793_577_600;
/// Rows per INSERT statement.
const CHUNK: usize = 800;

/// Runs `rows` as multi-row INSERTs of `head` (values are generated numbers and ids).
async fn insert(pool: &sqlx::AnyPool, head: &str, rows: impl Iterator<Item = String>) -> anyhow::Result<()> {
    let mut tx = pool.begin().await?;
    let mut batch: Vec<String> = Vec::with_capacity(CHUNK);
    let flush = |batch: &mut Vec<String>| -> Option<String> {
        (!batch.is_empty()).then(|| format!("{head} VALUES {}", std::mem::take(batch).join(",")))
    };
    for r in rows {
        batch.push(r);
        if batch.len() == CHUNK {
            if let Some(sql) = flush(&mut batch) {
                sqlx::query(&sql).execute(&mut *tx).await?;
            }
        }
    }
    if let Some(sql) = flush(&mut batch) {
        sqlx::query(&sql).execute(&mut *tx).await?;
    }
    tx.commit().await?;
    Ok(())
}

/// A feeder of `meters` meters with `days` of readings, a finished recovery,
/// an audit and a calibration; returns the recovery's id.
async fn populate(svc: &app::RunningService, feeder: &str, meters: usize, days: i64) -> anyhow::Result<String> {
    let store = &svc.store;
    let pool = store.pool();
    let id = FeederId::parse(feeder).map_err(|e| anyhow::anyhow!("{e}"))?;
    sqlx::query("INSERT INTO feeders (feeder_id, name, created_at, time_zone) VALUES ($1, $2, $3, 'Europe/London')")
        .bind(feeder)
        .bind(format!("{feeder} bench feeder"))
        .bind(START)
        .execute(pool)
        .await?;
    let spec: DitherProfileSpec = serde_json::from_value(json!({"noise": "gaussian", "scale_kw": 0.6,
        "boundaries_kw": [1.0, 2.0, 4.0], "interval_s": 900, "send_registers": false}))?;
    let profile = DitherProfile::try_from(spec).map_err(|e| anyhow::anyhow!("{e}"))?;
    store.publish_profile(&id, &profile, START).await?;
    let meter = |m: usize| format!("{feeder}-{m:05}");
    insert(
        pool,
        "INSERT INTO meters (meter_id, feeder_id, created_at)",
        (0..meters).map(|m| format!("('{}', '{feeder}', {START})", meter(m))),
    )
    .await?;
    let slots = days * 86_400 / INTERVAL_S;
    let cells = move || (0..meters).flat_map(move |m| (0..slots).map(move |j| (m, j)));
    insert(
        pool,
        "INSERT INTO readings (meter_id, interval_start, level, profile_version, batch_id)",
        cells().map(|(m, j)| {
            format!("('{}', {}, {}, 1, 'bench')", meter(m), START + j * INTERVAL_S, (m + j as usize) % 4)
        }),
    )
    .await?;
    let job = format!("rec-bench-{}", feeder.to_lowercase());
    let diagnostics = json!({"rank": 12, "stop": "converged", "meters": meters, "readings": meters as i64 * slots,
        "corrected": 0});
    sqlx::query(
        "INSERT INTO recovery_jobs (job_id, feeder_id, window_start, window_end, params, profile_version, state,
         progress, message, created_at, started_at, finished_at, diagnostics)
         VALUES ($1, $2, $3, $4, '{}', 1, 'done', 1, 'done', $3, $3, $3, $5)",
    )
    .bind(&job)
    .bind(feeder)
    .bind(START)
    .bind(START + days * 86_400)
    .bind(diagnostics.to_string())
    .execute(pool)
    .await?;
    insert(
        pool,
        "INSERT INTO recovered_intervals (job_id, meter_id, interval_start, estimate_kw, flag, band_low_kw, band_high_kw)",
        cells().map(|(m, j)| {
            let kw = 0.3 + ((m * 7 + j as usize) % 40) as f64 / 10.0;
            format!("('{job}', '{}', {}, {kw}, 'estimated', {}, {})", meter(m), START + j * INTERVAL_S, kw * 0.8, kw * 1.2)
        }),
    )
    .await?;
    for (kind, result) in [
        (
            "audit",
            json!({"strongest": {"event_f1": 0.41}, "utility": {"daily_energy_error": 0.03},
            "recovery_job": job, "captured": [meter(0)]}),
        ),
        (
            "calibrate",
            json!({"meets_targets": true, "recovery_job": job, "published_version": null,
            "recommended": {"scale_kw": 1.1, "boundaries_kw": [1.0, 2.0]},
            "targets": {"event_f1_max": 0.5, "daily_energy_error_max": 0.05},
            "chosen": {"attacker_event_f1": 0.45, "utility_daily_energy_error": 0.04},
            "curve": [{"attacker_event_f1": 0.45, "utility_daily_energy_error": 0.04}]}),
        ),
    ] {
        sqlx::query(
            "INSERT INTO analysis_jobs (job_id, kind, feeder_id, params, state, created_at, finished_at, result)
             VALUES ($1, $2, $3, '{}', 'done', $4, $4, $5)",
        )
        .bind(format!("{kind}-bench-{}", feeder.to_lowercase()))
        .bind(kind)
        .bind(feeder)
        .bind(START + days * 86_400)
        .bind(result.to_string())
        .execute(pool)
        .await?;
    }
    Ok(job)
}

/// Median and slowest of `runs` fetches of `path`, milliseconds; the page must answer 200.
async fn time_page(http: &reqwest::Client, base: &str, cookie: &str, path: &str, runs: usize) -> (f64, f64) {
    let mut ms = Vec::with_capacity(runs);
    for _ in 0..runs {
        let t0 = Instant::now();
        let r = http.get(format!("{base}{path}")).header("cookie", cookie).send().await.expect("get");
        let status = r.status();
        let body = r.text().await.expect("body");
        ms.push(t0.elapsed().as_secs_f64() * 1000.0);
        assert!(status.is_success(), "{path}: {status}: {}", &body[..body.len().min(300)]);
    }
    ms.sort_by(f64::total_cmp);
    (ms[ms.len() / 2], ms[ms.len() - 1])
}

#[tokio::main(flavor = "multi_thread")]
async fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let meters: usize = args.first().and_then(|a| a.parse().ok()).unwrap_or(10_000);
    let days: i64 = args.get(1).and_then(|a| a.parse().ok()).unwrap_or(7).clamp(1, 60);
    let runs: usize = args.get(2).and_then(|a| a.parse().ok()).unwrap_or(7).max(1);
    let dir = tempfile::tempdir()?;
    let url = std::env::var("METERVEIL_BENCH_DATABASE_URL")
        .unwrap_or_else(|_| format!("sqlite:{}", dir.path().join("pages.sqlite").display()));
    let mut config = ServiceConfig::local(url, Secret::new(TOKEN));
    config.run_worker = false;
    let svc = app::start(config).await?;
    let t0 = Instant::now();
    let big = populate(&svc, "QM-BENCH-LARGE", meters, days).await?;
    let small = populate(&svc, "QM-BENCH-SMALL", 100, days).await?;
    eprintln!("set-up: {meters} + 100 meters × {days} days in {:.0} s", t0.elapsed().as_secs_f64());
    let http = reqwest::Client::builder().redirect(reqwest::redirect::Policy::none()).build()?;
    let base = svc.url();
    let link: serde_json::Value = http
        .post(format!("{base}/v1/dashboard/links"))
        .bearer_auth(TOKEN)
        .json(&json!({"who": "bench"}))
        .send()
        .await?
        .json()
        .await?;
    let r = http.get(format!("{base}{}", link["url"].as_str().unwrap_or_default())).send().await?;
    let cookie = r.headers()["set-cookie"].to_str()?.split(';').next().unwrap_or_default().to_owned();
    println!("| page | {meters} meters, median / slowest ms | 100 meters, median / slowest ms | ratio of medians |");
    println!("|---|---|---|---|");
    let pages = |feeder: &str, job: &str| {
        vec![
            ("overview (both feeders)", "/dashboard".to_owned()),
            ("feeder page", format!("/dashboard/feeders/{feeder}")),
            ("meter view, a week", format!("/dashboard/recoveries/{job}?meter_id={feeder}-00042&span=week")),
            ("meter list searched, page 3", format!("/dashboard/recoveries/{job}?q=7&page=3")),
            ("jobs of the feeder", format!("/dashboard/jobs?feeder={feeder}")),
        ]
    };
    let mut worst: f64 = 0.0;
    for ((name, large), (_, reference)) in
        pages("QM-BENCH-LARGE", &big).into_iter().zip(pages("QM-BENCH-SMALL", &small))
    {
        let (lm, lx) = time_page(&http, &base, &cookie, &large, runs).await;
        let (sm, sx) = time_page(&http, &base, &cookie, &reference, runs).await;
        worst = worst.max(lx);
        println!("| {name} | {lm:.0} / {lx:.0} | {sm:.0} / {sx:.0} | {:.1} |", lm / sm.max(0.01));
    }
    println!(
        "\nslowest page at {meters} meters: {worst:.0} ms ({} the one-second target)",
        if worst < 1000.0 { "within" } else { "OVER" }
    );
    svc.stop().await?;
    Ok(())
}
