use clap::Parser;
use meterveil_service::cli::{Cli, Command};

#[tokio::main]
async fn main() -> anyhow::Result<()> {
    let cli = Cli::parse();
    // The demo prints its own summary; only warnings go to the log unless asked.
    let default = match cli.command {
        Command::Demo { .. } => "warn,sqlx=error",
        _ => "info,sqlx=warn,tower_http=warn",
    };
    tracing_subscriber::fmt()
        .with_env_filter(tracing_subscriber::EnvFilter::try_from_default_env().unwrap_or_else(|_| default.into()))
        .with_writer(std::io::stderr)
        .init();
    meterveil_service::cli::execute(cli).await
}
