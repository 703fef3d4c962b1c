//! `gateway run`: read a source, dither, queue, upload.

use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use anyhow::Context;
use tokio::io::AsyncBufReadExt;
use tokio::sync::watch;

use crate::client::ServiceClient;
use crate::config::{GatewayConfig, SourceKind};
use crate::gateway::Gateway;
use crate::source::{Format, LineParser, RawReading};
use crate::uploader::{UploadEnd, UploadStats};

/// Lines per outbox transaction: a crash loses at most the readings of one
/// chunk not yet queued (the source position is saved with each chunk, so a
/// file or directory source re-reads them; stdin cannot be re-read).
pub const CHUNK_LINES: usize = 96;
/// Stdin: a partial chunk is queued once no line has arrived for this long.
pub const STDIN_IDLE_FLUSH: Duration = Duration::from_secs(1);

#[derive(Debug, Clone, Copy, Default)]
pub struct RunReport {
    pub lines_rejected: u64,
    pub levels_queued: u64,
    pub registers_queued: u64,
    pub readings_skipped: u64,
    pub upload: UploadStats,
}

struct Feeder<'a> {
    gateway: Gateway,
    config: &'a GatewayConfig,
    last_pull: Instant,
    report: RunReport,
}

impl Feeder<'_> {
    async fn refresh_if_due(&mut self) -> anyhow::Result<()> {
        if self.last_pull.elapsed() >= Duration::from_secs(self.config.profile_refresh_s) {
            self.gateway.pull_profile().await?;
            self.last_pull = Instant::now();
        }
        Ok(())
    }

    async fn push(&mut self, batch: &mut Vec<RawReading>, position: Option<(&str, i64)>) -> anyhow::Result<()> {
        self.refresh_if_due().await?;
        let s = self.gateway.accept(batch, position).await?;
        self.report.levels_queued += s.levels;
        self.report.registers_queued += s.registers;
        self.report.readings_skipped += s.skipped;
        batch.clear();
        Ok(())
    }

    /// Reads one file from its saved byte position to its end. A watched file may
    /// still be being written, so there an unterminated last line is left for the
    /// next pass (`whole_lines_only`).
    async fn read_file(&mut self, path: &Path, format: Format, whole_lines_only: bool) -> anyhow::Result<()> {
        let key = path.display().to_string();
        let start = self.gateway.outbox().source_position(&key).await?;
        let text = tokio::fs::read_to_string(path).await.with_context(|| format!("reading {key}"))?;
        if (text.len() as i64) <= start {
            return Ok(());
        }
        let len = self.gateway.profile().context("no profile")?.profile.interval();
        let mut parser = LineParser::new(format);
        let mut batch = Vec::with_capacity(CHUNK_LINES);
        let mut offset = 0i64;
        for line in text.split_inclusive('\n') {
            if whole_lines_only && !line.ends_with('\n') {
                break;
            }
            // The header is parsed on every pass; data lines before the saved
            // position were queued by an earlier run.
            let is_new = offset >= start;
            offset += line.len() as i64;
            match parser.next_line(line, len) {
                Ok(Some(r)) if is_new => batch.push(r),
                Err(e) if is_new => {
                    self.report.lines_rejected += 1;
                    tracing::warn!(source = %key, "{e}");
                }
                _ => {}
            }
            if batch.len() >= CHUNK_LINES {
                self.push(&mut batch, Some((&key, offset))).await?;
            }
        }
        if offset > start {
            self.push(&mut batch, Some((&key, offset))).await?;
        }
        Ok(())
    }

    async fn read_stdin(&mut self, format: Format) -> anyhow::Result<()> {
        let len = self.gateway.profile().context("no profile")?.profile.interval();
        let mut parser = LineParser::new(format);
        let mut lines = tokio::io::BufReader::new(tokio::io::stdin()).lines();
        let mut batch = Vec::with_capacity(CHUNK_LINES);
        loop {
            let line = match tokio::time::timeout(STDIN_IDLE_FLUSH, lines.next_line()).await {
                Ok(line) => line?,
                Err(_) => {
                    // Idle: queue what has arrived rather than hold it in memory.
                    if !batch.is_empty() {
                        self.push(&mut batch, None).await?;
                    }
                    continue;
                }
            };
            let Some(line) = line else { break };
            match parser.next_line(&line, len) {
                Ok(Some(r)) => batch.push(r),
                Ok(None) => {}
                Err(e) => {
                    self.report.lines_rejected += 1;
                    tracing::warn!(source = "stdin", "{e}");
                }
            }
            if batch.len() >= CHUNK_LINES {
                self.push(&mut batch, None).await?;
            }
        }
        self.push(&mut batch, None).await
    }
}

fn listed_files(dir: &Path) -> anyhow::Result<Vec<PathBuf>> {
    let mut files: Vec<PathBuf> = std::fs::read_dir(dir)
        .with_context(|| format!("listing {}", dir.display()))?
        .filter_map(Result::ok)
        .map(|e| e.path())
        .filter(|p| {
            p.is_file() && matches!(p.extension().and_then(|e| e.to_str()), Some("csv" | "jsonl" | "ndjson" | "json"))
        })
        .collect();
    files.sort();
    Ok(files)
}

/// Runs a gateway until its source is exhausted and uploaded (file, stdin) or
/// until `shutdown` turns true (directory).
pub async fn run(config: GatewayConfig, shutdown: watch::Receiver<bool>) -> anyhow::Result<RunReport> {
    let client = ServiceClient::new(&config.service_url, Duration::from_secs(30))?;
    let mut gateway = Gateway::open(config.identity.clone(), &config.outbox, client).await?;
    let mut failures = 0;
    loop {
        match gateway.pull_profile().await {
            Ok(_) => break,
            Err(e) => {
                failures += 1;
                let d = config.upload.backoff.delay(failures);
                tracing::warn!(error = %e, ?d, "no dither profile yet; retrying");
                let mut s = shutdown.clone();
                tokio::select! { _ = tokio::time::sleep(d) => {}, _ = s.changed() => return Err(e) }
            }
        }
    }
    let (done_tx, done_rx) = watch::channel(false);
    let uploader = gateway.uploader(config.upload);
    let up_shutdown = shutdown.clone();
    let upload = tokio::spawn(async move { uploader.run(done_rx, up_shutdown).await });

    let mut f = Feeder { gateway, config: &config, last_pull: Instant::now(), report: RunReport::default() };
    let src = &config.source;
    let read = async {
        match src.kind {
            SourceKind::File => {
                let path = src.path.as_deref().context("source.path")?;
                f.read_file(path, src.format.unwrap_or_else(|| Format::from_path(path)), false).await
            }
            SourceKind::Stdin => f.read_stdin(src.format.unwrap_or(Format::Csv)).await,
            SourceKind::Directory => {
                let dir = src.path.as_deref().context("source.path")?;
                let mut s = shutdown.clone();
                loop {
                    for file in listed_files(dir)? {
                        let fmt = src.format.unwrap_or_else(|| Format::from_path(&file));
                        f.read_file(&file, fmt, true).await?;
                    }
                    tokio::select! {
                        _ = tokio::time::sleep(Duration::from_secs(src.poll_s)) => {}
                        _ = s.changed() => break Ok(()),
                    }
                }
            }
        }
    };
    read.await?;
    let _ = done_tx.send(true);
    let (end, stats) = upload.await.context("uploader task")??;
    f.report.upload = stats;
    if end == UploadEnd::Shutdown {
        tracing::info!("stopped on request; unsent levels stay in the outbox for the next run");
    }
    Ok(f.report)
}
