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
}

#[derive(Debug, Clone)]
pub struct DemoSummary {
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
    let (dir, _temp) = match &opts.dir {
        Some(d) => {
            std::fs::create_dir_all(d).with_context(|| format!("creating {}", d.display()))?;
            (d.clone(), None)
        }
        None => {
            let t = tempfile::Builder::new().prefix("meterveil-demo-").tempdir()?;
            (t.path().to_path_buf(), Some(t))
        }
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
    sim.operator_token = Some(token);
    sim.meters = opts.meters;
    sim.days = opts.days;
    sim.truth = opts.truth.clone();
    let simulation = simulate::run(&sim).await?;

    let feeders = svc.store.feeder_summaries().await?;
    let readings_stored = feeders.iter().map(|f| f.readings).sum();
    let summary = DemoSummary {
        service_url: svc.url(),
        database: db,
        simulation,
        feeders,
        readings_stored,
        readings_rejected: svc.metrics.readings_rejected.get(),
        duplicates: svc.metrics.readings_duplicate.get(),
    };
    svc.stop().await?;
    Ok(summary)
}

/// The printed summary.
pub fn render(s: &DemoSummary) -> String {
    let sim = &s.simulation;
    let mut o = String::new();
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
