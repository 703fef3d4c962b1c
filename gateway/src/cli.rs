//! Command-line interface of the `gateway` binary.

use std::path::PathBuf;

use clap::{Parser, Subcommand};
use tokio::sync::watch;

use crate::config::GatewayConfig;
use crate::simulate::{self, SimulateOptions};
use crate::uploader::UploadConfig;

#[derive(Debug, Parser)]
#[command(
    name = "gateway",
    version,
    about = "Meterveil gateway: dither and quantize interval readings, upload only levels"
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Read a source (file, watched directory or stdin) and upload its levels.
    Run {
        /// Gateway configuration file (TOML).
        #[arg(long)]
        config: PathBuf,
    },
    /// Run the invented town of Quillmarsh against a service, faster than real time.
    Simulate {
        /// Base URL of the utility service.
        #[arg(long)]
        service: String,
        /// Operator token; when given, the town's feeders, meters and profiles are registered first.
        #[arg(long, env = "METERVEIL_OPERATOR_TOKEN", hide_env_values = true)]
        operator_token: Option<String>,
        #[arg(long, default_value_t = 400)]
        meters: usize,
        #[arg(long, default_value_t = 28)]
        days: u32,
        /// Seed of the town's loads (the dither is never seeded).
        #[arg(long, default_value_t = 2026)]
        seed: u64,
        /// Folder for the gateways' outbox files.
        #[arg(long, default_value = "quillmarsh-outboxes")]
        work_dir: PathBuf,
        #[arg(long, default_value_t = 50)]
        meters_per_gateway: usize,
        #[arg(long, default_value_t = 1000)]
        batch_max: usize,
        /// Also write the true loads here (CSV), for evaluation only.
        #[arg(long)]
        truth: Option<PathBuf>,
    },
}

fn shutdown_on_ctrl_c() -> watch::Receiver<bool> {
    let (tx, rx) = watch::channel(false);
    tokio::spawn(async move {
        if tokio::signal::ctrl_c().await.is_ok() {
            tracing::info!("Ctrl-C: finishing the current batch, then stopping");
            let _ = tx.send(true);
        }
    });
    rx
}

pub async fn execute(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Run { config } => {
            let config = GatewayConfig::load(&config)?;
            let report = crate::run::run(config, shutdown_on_ctrl_c()).await?;
            println!(
                "queued {} levels and {} register reads; {} lines rejected, {} repeats skipped; uploaded {} batches ({} readings), {} refused",
                report.levels_queued,
                report.registers_queued,
                report.lines_rejected,
                report.readings_skipped,
                report.upload.batches,
                report.upload.readings_acknowledged,
                report.upload.refused_batches
            );
        }
        Command::Simulate {
            service,
            operator_token,
            meters,
            days,
            seed,
            work_dir,
            meters_per_gateway,
            batch_max,
            truth,
        } => {
            if batch_max == 0 {
                anyhow::bail!("--batch-max must be at least 1");
            }
            let mut opts = SimulateOptions::new(service, work_dir);
            opts.operator_token = operator_token;
            opts.meters = meters;
            opts.days = days;
            opts.seed = seed;
            opts.meters_per_gateway = meters_per_gateway;
            opts.upload = UploadConfig { batch_max, ..UploadConfig::default() };
            opts.truth = truth;
            let report = simulate::run(&opts).await?;
            println!("{}", serde_json::to_string_pretty(&report)?);
        }
    }
    Ok(())
}
