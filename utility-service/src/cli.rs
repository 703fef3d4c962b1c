//! Command-line interface of the `utility-service` binary.

use std::net::SocketAddr;
use std::path::PathBuf;

use clap::{Parser, Subcommand};

use meterveil_shared::recovery::{RankChoice, RecoveryParams};

use crate::config::{Secret, ServiceConfig};

#[derive(Debug, Parser)]
#[command(
    name = "utility-service",
    version,
    about = "Meterveil utility service: ingest, validate and store privacy-dithered meter readings"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Run the HTTP service.
    Serve {
        #[arg(long, default_value = "127.0.0.1:8080")]
        bind: SocketAddr,
        /// Database: a SQLite file (`sqlite:PATH` or a path, created if missing) or
        /// PostgreSQL (`postgres://user@host:port/db`, the database must exist);
        /// migrated at start.
        #[arg(long, env = "DATABASE_URL", default_value = "sqlite:meterveil.sqlite")]
        database_url: String,
        /// Token operators send as `Authorization: Bearer <token>`.
        #[arg(long, env = "METERVEIL_OPERATOR_TOKEN", hide_env_values = true)]
        operator_token: String,
        /// Largest accepted request body, bytes.
        #[arg(long, default_value_t = 4 * 1024 * 1024)]
        body_limit_bytes: usize,
        /// Master key the gateways' signing keys are derived from (at least 32
        /// characters; keep it secret and stable: changing it invalidates every gateway).
        #[arg(long, env = "METERVEIL_GATEWAY_MASTER_KEY", hide_env_values = true)]
        gateway_master_key: String,
        /// Serve HTTP only; leave the jobs to `utility-service work` processes.
        #[arg(long)]
        no_worker: bool,
        /// Job lease, seconds: a job whose worker died is retried after at most this long.
        #[arg(long, default_value_t = 30)]
        job_lease_s: i64,
    },
    /// Run a job worker (and the settlement scheduler) only, no HTTP, against
    /// the database; start several to share the work.
    Work {
        #[arg(long, env = "DATABASE_URL", default_value = "sqlite:meterveil.sqlite")]
        database_url: String,
        #[arg(long, default_value_t = 30)]
        job_lease_s: i64,
        /// Claim only this feeder's jobs (repeat for several): a worker sharded by
        /// feeder. Without it the worker takes every job, town-wide analyses included.
        #[arg(long = "feeder", value_name = "FEEDER_ID")]
        feeders: Vec<String>,
        /// Run jobs only; leave making the scheduled settlement runs to other
        /// processes (each process with a worker makes them otherwise).
        #[arg(long)]
        no_schedule: bool,
    },
    /// Print a fresh one-time dashboard sign-in link (valid two minutes) for
    /// any `serve` process on this database.
    DashboardLink {
        #[arg(long, env = "DATABASE_URL", default_value = "sqlite:meterveil.sqlite")]
        database_url: String,
        /// The service's address, put in front of the link's path.
        #[arg(long)]
        url: Option<String>,
        /// The dashboard page the link opens.
        #[arg(long, default_value = "/dashboard")]
        next: String,
        /// The operator's name, shown in the action log and the profile history.
        #[arg(long, default_value = "operator")]
        who: String,
    },
    /// List, inspect or cancel jobs in the database.
    Jobs {
        #[arg(long, env = "DATABASE_URL", default_value = "sqlite:meterveil.sqlite")]
        database_url: String,
        #[command(subcommand)]
        action: Option<JobsAction>,
    },
    /// Recover every meter's profile from a file of quantized levels.
    Recover {
        /// CSV with header meter_id,interval_start,level.
        #[arg(long)]
        levels: PathBuf,
        /// Dither profile JSON the levels were made with.
        #[arg(long)]
        profile: PathBuf,
        /// Output CSV: meter_id,interval_start,kw,flag,kw_low,kw_high.
        #[arg(long)]
        output: PathBuf,
        /// Optional CSV of daily energies: meter_id,day_start,wh.
        #[arg(long)]
        registers: Option<PathBuf>,
        /// A rank, or "auto" (held-out likelihood over 2, 5, 10, 20, 40).
        #[arg(long, default_value = "auto")]
        rank: String,
        /// Service limit in kW: estimates stay in [0, alpha].
        #[arg(long, default_value_t = meterveil_shared::recovery::DEFAULT_ALPHA_KW)]
        alpha_kw: f64,
    },
    /// Each group's load per interval with a 95% band, from a `recover` output
    /// and the levels and profile it was fitted to.
    Aggregate {
        /// A `recover` output: meter_id,interval_start,kw,….
        #[arg(long)]
        profiles: PathBuf,
        /// CSV with header meter_id,group (a meter may sit in several groups).
        #[arg(long)]
        groups: PathBuf,
        /// Output CSV: group,interval_start,kw,kw_low,kw_high,meters.
        #[arg(long)]
        output: PathBuf,
        /// The levels the profiles were recovered from (meter_id,interval_start,level).
        #[arg(long)]
        levels: PathBuf,
        /// Their dither profile JSON.
        #[arg(long)]
        profile: PathBuf,
        /// A tariff calendar JSON (README, "Tariff calendars"), with --band-energies.
        #[arg(long, requires = "band_energies")]
        tariff: Option<PathBuf>,
        /// Output CSV: meter_id,period_start,period_end,band,kwh,kwh_low,kwh_high,intervals,register_read.
        #[arg(long, requires = "tariff")]
        band_energies: Option<PathBuf>,
        /// Output CSV: meter_id,day,kwh,kwh_low,kwh_high,intervals,register_read (local days of the tariff's zone, else UTC).
        #[arg(long)]
        daily: Option<PathBuf>,
        /// Register reads (meter_id,day_start,wh) the energies are reconciled to.
        #[arg(long)]
        registers: Option<PathBuf>,
        /// Refits of the bands' bootstrap (0 to 32; 0: the profiles taken as known).
        #[arg(long, default_value_t = 8)]
        band_draws: usize,
        /// The rank the profiles were recovered at (`recover` prints it), or
        /// "auto": the fewest singular values holding 99.9% of the profiles' square.
        #[arg(long, default_value = "auto")]
        rank: String,
    },
    /// Group customers by load shape, from quantized levels (fitted at the
    /// clustering rank first) or from a `recover` output as it is.
    Cluster {
        /// CSV with header meter_id,interval_start,level (with --profile).
        #[arg(long, requires = "profile", conflicts_with = "profiles")]
        levels: Option<PathBuf>,
        /// Dither profile JSON the levels were made with.
        #[arg(long, requires = "levels")]
        profile: Option<PathBuf>,
        /// Optional CSV of register advances for the levels: meter_id,day_start,wh.
        #[arg(long, requires = "levels")]
        registers: Option<PathBuf>,
        /// Service limit in kW for the fit of the levels.
        #[arg(long, default_value_t = meterveil_shared::recovery::DEFAULT_ALPHA_KW)]
        alpha_kw: f64,
        /// CSV with header meter_id,interval_start,kw,… (a recover output),
        /// clustered as it is; its rank must exceed the number of classes.
        #[arg(long, required_unless_present = "levels")]
        profiles: Option<PathBuf>,
        /// Output CSV: meter_id,cluster,confidence,status.
        #[arg(long)]
        output: PathBuf,
        /// A number of clusters, or "auto" (the stability rule).
        #[arg(long, default_value = "auto")]
        clusters: String,
    },
    /// Audit what an eavesdropper holding the captured meters' uploads could
    /// reconstruct, against every attacker strategy known, beside the utility.
    Audit {
        /// CSV with header meter_id,interval_start,level: the whole feeder.
        #[arg(long)]
        levels: PathBuf,
        /// Dither profile JSON the levels were made with.
        #[arg(long)]
        profile: PathBuf,
        /// Text file of captured meter ids, one per line.
        #[arg(long)]
        captured: PathBuf,
        /// Output JSON of the audit.
        #[arg(long)]
        output: PathBuf,
        /// Also write a self-contained HTML report with charts.
        #[arg(long)]
        html: Option<PathBuf>,
        /// Optional CSV of daily energies: meter_id,day_start,wh.
        #[arg(long)]
        registers: Option<PathBuf>,
        #[arg(long, default_value_t = meterveil_shared::recovery::DEFAULT_ALPHA_KW)]
        alpha_kw: f64,
        /// Seed of the simulated events and dither (the audit is a reproducible simulation).
        #[arg(long, default_value_t = meterveil_shared::audit::DEFAULT_SEED)]
        seed: u64,
    },
    /// Recommend a feeder's dither scale and level set for privacy and accuracy targets.
    Calibrate {
        /// CSV with header meter_id,interval_start,level: the whole feeder.
        #[arg(long)]
        levels: PathBuf,
        /// The feeder's current dither profile JSON.
        #[arg(long)]
        profile: PathBuf,
        /// Where the recommended profile JSON goes (written only when the targets are met).
        #[arg(long)]
        output: PathBuf,
        /// Full calibration JSON with the trade-off curve.
        #[arg(long)]
        report: Option<PathBuf>,
        /// HTML report with the trade-off chart.
        #[arg(long)]
        html: Option<PathBuf>,
        /// Optional CSV of daily energies: meter_id,day_start,wh.
        #[arg(long)]
        registers: Option<PathBuf>,
        /// Bound on the strongest attacker's event F1.
        #[arg(long, default_value_t = 0.3)]
        max_event_f1: f64,
        /// Meters the attacker holds.
        #[arg(long, default_value_t = 1)]
        captured: usize,
        /// Bound on the utility's median daily-energy error (fraction).
        #[arg(long, default_value_t = 0.1)]
        max_energy_error: f64,
        /// Optional bound on the load nRMSE of groups of --group-size meters (fraction).
        #[arg(long)]
        max_group_nrmse: Option<f64>,
        /// The meters per group of the group-load target.
        #[arg(long, default_value_t = meterveil_shared::calibrate::DEFAULT_GROUP_SIZE)]
        group_size: usize,
        /// Optional bound on the median band-energy error (fraction); needs --tariff.
        #[arg(long)]
        max_band_error: Option<f64>,
        /// The feeder's tariff calendar (README "Tariff calendars"): band energies are scored on it.
        #[arg(long)]
        tariff: Option<PathBuf>,
        /// Optional bound on the utility's interval nRMSE over the feeder.
        #[arg(long)]
        max_profile_nrmse: Option<f64>,
        #[arg(long, default_value_t = meterveil_shared::recovery::DEFAULT_ALPHA_KW)]
        alpha_kw: f64,
        #[arg(long, default_value_t = meterveil_shared::calibrate::DEFAULT_SEED)]
        seed: u64,
    },
    /// One command: a fresh service and the invented town of Quillmarsh, 28 days of
    /// 15-minute data through real gateway outboxes over HTTP, then a summary.
    Demo {
        #[arg(long, default_value_t = 400)]
        meters: usize,
        #[arg(long, default_value_t = 28)]
        days: u32,
        /// Keep the database and outboxes here instead of a temporary folder.
        #[arg(long)]
        dir: Option<PathBuf>,
        /// Also write the town's true loads (evaluation only) to this CSV.
        #[arg(long)]
        truth: Option<PathBuf>,
        /// Finish after the summary; without it, on a terminal the demo keeps the
        /// service and its dashboard up until Ctrl-C.
        #[arg(long)]
        exit: bool,
    },
}

#[derive(Debug, Subcommand)]
pub enum JobsAction {
    /// The most recent jobs, newest first (the default).
    List {
        #[arg(long, default_value_t = 50)]
        limit: i64,
    },
    /// One job's whole record as JSON.
    Show { job_id: String },
    /// Cancel a queued or running job.
    Cancel { job_id: String },
}

async fn jobs_command(database_url: &str, action: Option<JobsAction>) -> anyhow::Result<()> {
    let store = crate::store::Store::open(database_url).await?;
    match action.unwrap_or(JobsAction::List { limit: 50 }) {
        JobsAction::List { limit } => {
            println!("{:<30} {:<16} {:<9} {:<8} {:>5} {:>3}  message", "job", "feeder", "kind", "state", "done", "try");
            for j in store.list_jobs(limit).await? {
                let msg = j.error.clone().unwrap_or(j.message.clone());
                println!(
                    "{:<30} {:<16} {:<9} {:<8} {:>4.0}% {:>3}  {}",
                    j.job_id,
                    j.feeder_id.as_deref().unwrap_or("-"),
                    j.kind,
                    j.state,
                    100.0 * j.progress,
                    j.attempts,
                    msg
                );
            }
        }
        JobsAction::Show { job_id } => {
            let v = match store.job(&job_id).await? {
                Some(j) => serde_json::to_value(j)?,
                None => match store.analysis(&job_id).await? {
                    Some(a) => serde_json::to_value(a)?,
                    None => anyhow::bail!("job_id: no job {job_id}"),
                },
            };
            println!("{}", serde_json::to_string_pretty(&v)?);
        }
        JobsAction::Cancel { job_id } => {
            if store.cancel_job(&job_id, crate::routes::now_s()).await? {
                println!("cancelled {job_id}");
            } else {
                anyhow::bail!("job_id: {job_id} does not exist or has already ended");
            }
        }
    }
    Ok(())
}

/// Resolves on Ctrl-C (SIGINT) or, on Unix, SIGTERM (what service managers send).
async fn shutdown_signal() {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        match signal(SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = tokio::signal::ctrl_c() => {}
                    _ = term.recv() => {}
                }
                return;
            }
            Err(e) => tracing::warn!(error = %e, "cannot listen for SIGTERM; only Ctrl-C stops the service"),
        }
    }
    let _ = tokio::signal::ctrl_c().await;
}

pub async fn execute(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Work { database_url, job_lease_s, feeders, no_schedule } => {
            work(database_url, job_lease_s, feeders, no_schedule).await
        }
        Command::Jobs { database_url, action } => jobs_command(&database_url, action).await,
        Command::DashboardLink { database_url, url, next, who } => {
            let store = crate::store::Store::open(&database_url).await?;
            let path = crate::routes::dashboard::one_time_link(&store, &next, &who)
                .await
                .map_err(|e| anyhow::anyhow!("{e}"))?;
            println!("{}{path}", url.as_deref().unwrap_or("").trim_end_matches('/'));
            Ok(())
        }
        Command::Serve {
            bind,
            database_url,
            operator_token,
            body_limit_bytes,
            gateway_master_key,
            no_worker,
            job_lease_s,
        } => {
            if operator_token.len() < 16 {
                anyhow::bail!("--operator-token: use at least 16 characters");
            }
            if gateway_master_key.len() < 32 {
                anyhow::bail!("--gateway-master-key: use at least 32 characters");
            }
            let mut config = ServiceConfig::local(database_url, Secret::new(operator_token));
            config.bind = bind;
            config.body_limit_bytes = body_limit_bytes;
            config.run_worker = !no_worker;
            config.gateway_master_key = Secret::new(gateway_master_key);
            config.job_lease_s = job_lease_s;
            let store = crate::store::Store::open(&config.database_url).await?;
            let until = Box::pin(async {
                shutdown_signal().await;
                tracing::info!("finishing in-flight requests, then stopping");
            });
            let svc = crate::app::start_with_store(config, store, Some(until)).await?;
            println!("listening on {}", svc.url());
            svc.wait().await
        }
        Command::Demo { meters, days, dir, truth, exit } => run_demo(meters, days, dir, truth, exit).await,
        file_mode => {
            let summary = tokio::task::spawn_blocking(move || run_file_mode(file_mode)).await??;
            println!("{summary}");
            Ok(())
        }
    }
}

/// `utility-service work`: a job worker without HTTP.
async fn work(database_url: String, job_lease_s: i64, feeders: Vec<String>, no_schedule: bool) -> anyhow::Result<()> {
    for (i, f) in feeders.iter().enumerate() {
        meterveil_shared::FeederId::parse(f).map_err(|e| anyhow::anyhow!("--feeder #{}: {e}", i + 1))?;
    }
    let store = crate::store::Store::open(&database_url).await?;
    let mut config = ServiceConfig::local(database_url, Secret::new(""));
    config.job_lease_s = job_lease_s;
    config.job_feeders = (!feeders.is_empty()).then_some(feeders);
    let state = crate::jobs::WorkContext::new(store, config);
    match &state.config.job_feeders {
        Some(f) => println!("worker {} started for feeders {}", state.store.worker_id(), f.join(", ")),
        None => println!("worker {} started for every feeder", state.store.worker_id()),
    }
    tokio::select! {
        _ = crate::jobs::worker::run(state.clone()) => {}
        _ = async { if no_schedule { std::future::pending().await } else { crate::jobs::schedule::run(state).await } } => {}
        _ = tokio::signal::ctrl_c() => tracing::info!("Ctrl-C: the running job's lease will expire and another worker retries it"),
    }
    Ok(())
}

/// `"auto"` or a number, for a flag named `flag`.
fn auto_or_number(flag: &str, v: &str) -> anyhow::Result<Option<usize>> {
    match v {
        "auto" => Ok(None),
        n => n.parse().map(Some).map_err(|_| anyhow::anyhow!("--{flag}: {n:?} is neither a number nor \"auto\"")),
    }
}

/// The `aggregate` file mode.
fn run_aggregate_command(command: Command) -> anyhow::Result<serde_json::Value> {
    let Command::Aggregate {
        profiles,
        groups,
        output,
        levels,
        profile,
        tariff,
        band_energies,
        daily,
        registers,
        band_draws,
        rank,
    } = command
    else {
        anyhow::bail!("not the aggregate command");
    };
    crate::offline::run_aggregate(&crate::offline::AggregateFiles {
        profiles: &profiles,
        levels: &levels,
        profile: &profile,
        groups: &groups,
        output: &output,
        tariff: tariff.as_deref().zip(band_energies.as_deref()),
        daily: daily.as_deref(),
        registers: registers.as_deref(),
        bootstrap: (band_draws, auto_or_number("rank", &rank)?),
    })
}

/// The file modes (recover, cluster, audit, calibrate), on the blocking pool;
/// returns the summary printed as the last line.
fn run_file_mode(command: Command) -> anyhow::Result<serde_json::Value> {
    use crate::offline::{AuditFiles, CalibrateFiles, ClusterInput};
    match command {
        Command::Recover { levels, profile, output, registers, rank, alpha_kw } => {
            let rank = auto_or_number("rank", &rank)?.map_or_else(|| RecoveryParams::default().rank, RankChoice::Fixed);
            let params = RecoveryParams { rank, alpha_kw, ..RecoveryParams::default() };
            crate::offline::run_recover(&levels, &profile, &output, registers.as_deref(), params)
        }
        c @ Command::Aggregate { .. } => run_aggregate_command(c),
        Command::Cluster { levels, profile, registers, alpha_kw, profiles, output, clusters } => {
            let clusters = auto_or_number("clusters", &clusters)?;
            let input = match (&levels, &profile, &profiles) {
                (Some(levels), Some(profile), _) => {
                    ClusterInput::Levels { levels, profile, registers: registers.as_deref(), alpha_kw }
                }
                (_, _, Some(p)) => ClusterInput::Profiles(p),
                _ => anyhow::bail!("--levels with --profile, or --profiles, is needed"),
            };
            crate::offline::run_cluster(input, &output, clusters)
        }
        Command::Audit { levels, profile, captured, output, html, registers, alpha_kw, seed } => {
            crate::offline::run_audit(&AuditFiles {
                levels: &levels,
                profile: &profile,
                captured: &captured,
                output: &output,
                html: html.as_deref(),
                registers: registers.as_deref(),
                alpha_kw,
                seed,
            })
        }
        Command::Calibrate {
            levels,
            profile,
            output,
            report,
            html,
            registers,
            max_event_f1,
            captured,
            max_energy_error,
            max_group_nrmse,
            group_size,
            max_band_error,
            tariff,
            max_profile_nrmse,
            alpha_kw,
            seed,
        } => crate::offline::run_calibrate(&CalibrateFiles {
            levels: &levels,
            profile: &profile,
            output: &output,
            report: report.as_deref(),
            html: html.as_deref(),
            registers: registers.as_deref(),
            targets: meterveil_shared::calibrate::Targets {
                group_nrmse_max: max_group_nrmse,
                group_size,
                band_energy_error_max: max_band_error,
                profile_nrmse_max: max_profile_nrmse,
                ..meterveil_shared::calibrate::Targets::new(max_event_f1, captured, max_energy_error)
            },
            tariff: tariff.as_deref(),
            alpha_kw,
            seed,
        }),
        _ => anyhow::bail!("not a file mode"),
    }
}

#[cfg(feature = "demo")]
async fn run_demo(
    meters: usize,
    days: u32,
    dir: Option<PathBuf>,
    truth: Option<PathBuf>,
    exit: bool,
) -> anyhow::Result<()> {
    use std::io::IsTerminal;
    let stay_up = !exit && std::io::stdout().is_terminal();
    let opts = crate::demo::DemoOptions { meters, days, dir, truth, stay_up };
    let summary = crate::demo::run(&opts).await?;
    if !stay_up {
        print!("{}", crate::demo::render(&summary));
    }
    Ok(())
}

/// A build without the `demo` feature (the served binary) has no town to run.
#[cfg(not(feature = "demo"))]
async fn run_demo(_: usize, _: u32, _: Option<PathBuf>, _: Option<PathBuf>, _: bool) -> anyhow::Result<()> {
    anyhow::bail!(
        "this build of utility-service has no demo (it links no gateway); run it with \
         `cargo run --release -p meterveil-service --features demo -- demo`"
    )
}
