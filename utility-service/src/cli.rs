//! Command-line interface of the `utility-service` binary.

use std::net::SocketAddr;
use std::path::PathBuf;

use clap::{Parser, Subcommand};

use meterveil_shared::recovery::{RankChoice, RecoveryParams};

use crate::config::{Secret, ServiceConfig};
use crate::demo::{self, DemoOptions};

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
        /// SQLite file (`sqlite:PATH` or a path); created and migrated at start.
        #[arg(long, env = "DATABASE_URL", default_value = "sqlite:meterveil.sqlite")]
        database_url: String,
        /// Token operators send as `Authorization: Bearer <token>`.
        #[arg(long, env = "METERVEIL_OPERATOR_TOKEN", hide_env_values = true)]
        operator_token: String,
        /// Largest accepted request body, bytes.
        #[arg(long, default_value_t = 4 * 1024 * 1024)]
        body_limit_bytes: usize,
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
        #[arg(long, default_value_t = 15.0)]
        alpha_kw: f64,
    },
    /// Group customers by load shape from recovered profiles (a `recover` output).
    Cluster {
        /// CSV with header meter_id,interval_start,kw,… (the recover output).
        #[arg(long)]
        profiles: PathBuf,
        /// Output CSV: meter_id,cluster,confidence.
        #[arg(long)]
        output: PathBuf,
        /// A number of clusters, or "auto" (eigengap rule).
        #[arg(long, default_value = "auto")]
        clusters: String,
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
    },
}

pub async fn execute(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Serve { bind, database_url, operator_token, body_limit_bytes } => {
            if operator_token.len() < 16 {
                anyhow::bail!("--operator-token: use at least 16 characters");
            }
            let mut config = ServiceConfig::local(database_url, Secret::new(operator_token));
            config.bind = bind;
            config.body_limit_bytes = body_limit_bytes;
            let store = crate::store::Store::open(&config.database_url).await?;
            let until = Box::pin(async {
                let _ = tokio::signal::ctrl_c().await;
                tracing::info!("Ctrl-C: finishing in-flight requests");
            });
            let svc = crate::app::start_with_store(config, store, Some(until)).await?;
            println!("listening on {}", svc.url());
            svc.wait().await
        }
        Command::Recover { levels, profile, output, registers, rank, alpha_kw } => {
            let rank = match rank.as_str() {
                "auto" => RecoveryParams::default().rank,
                n => RankChoice::Fixed(
                    n.parse().map_err(|_| anyhow::anyhow!("--rank: {n:?} is neither a number nor \"auto\""))?,
                ),
            };
            let params = RecoveryParams { rank, alpha_kw, ..RecoveryParams::default() };
            let summary = tokio::task::spawn_blocking(move || {
                crate::offline::run_recover(&levels, &profile, &output, registers.as_deref(), params)
            })
            .await??;
            println!("{summary}");
            Ok(())
        }
        Command::Cluster { profiles, output, clusters } => {
            let clusters = match clusters.as_str() {
                "auto" => None,
                n => {
                    Some(n.parse().map_err(|_| anyhow::anyhow!("--clusters: {n:?} is neither a number nor \"auto\""))?)
                }
            };
            let summary =
                tokio::task::spawn_blocking(move || crate::offline::run_cluster(&profiles, &output, clusters))
                    .await??;
            println!("{summary}");
            Ok(())
        }
        Command::Demo { meters, days, dir, truth } => {
            let opts = DemoOptions { meters, days, dir, truth };
            let summary = demo::run(&opts).await?;
            print!("{}", demo::render(&summary));
            Ok(())
        }
    }
}
