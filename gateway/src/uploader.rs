//! Drains the outbox to the service: claim a batch, send it, delete it only after
//! the acknowledgement; back off on transient failures; keep refused batches.

use rand::Rng;
use tokio::sync::watch;

use crate::backoff::BackoffPolicy;
use crate::client::{ServiceClient, UploadError};
use crate::identity::GatewayIdentity;
use crate::outbox::Outbox;

#[derive(Debug, Clone, Copy, serde::Deserialize)]
#[serde(default)]
pub struct UploadConfig {
    /// Most readings per batch.
    pub batch_max: usize,
    #[serde(flatten)]
    pub backoff: BackoffPolicy,
    /// How often an idle uploader looks for new rows, milliseconds.
    pub idle_poll_ms: u64,
}

impl Default for UploadConfig {
    fn default() -> Self {
        Self { batch_max: 1000, backoff: BackoffPolicy::default(), idle_poll_ms: 250 }
    }
}

#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct UploadStats {
    pub batches: u64,
    pub readings_acknowledged: u64,
    pub duplicates_reported: u64,
    pub transient_failures: u64,
    pub refused_batches: u64,
}

pub struct Uploader {
    identity: GatewayIdentity,
    outbox: Outbox,
    client: ServiceClient,
    config: UploadConfig,
}

/// Why [`Uploader::run`] returned.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UploadEnd {
    /// The source finished and the outbox is empty.
    Drained,
    /// Shutdown was requested; unsent rows stay in the outbox.
    Shutdown,
}

impl Uploader {
    pub fn new(identity: GatewayIdentity, outbox: Outbox, client: ServiceClient, config: UploadConfig) -> Self {
        Self { identity, outbox, client, config }
    }

    /// Uploads until `source_done` is true and the outbox is empty, or until `shutdown` is true.
    pub async fn run(
        &self,
        mut source_done: watch::Receiver<bool>,
        mut shutdown: watch::Receiver<bool>,
    ) -> anyhow::Result<(UploadEnd, UploadStats)> {
        let mut stats = UploadStats::default();
        let mut failures: u32 = 0;
        loop {
            if *shutdown.borrow() {
                return Ok((UploadEnd::Shutdown, stats));
            }
            let Some(batch) = self.outbox.claim(self.config.batch_max).await? else {
                if *source_done.borrow() {
                    return Ok((UploadEnd::Drained, stats));
                }
                let idle = std::time::Duration::from_millis(self.config.idle_poll_ms);
                tokio::select! {
                    _ = tokio::time::sleep(idle) => {}
                    _ = source_done.changed() => {}
                    _ = shutdown.changed() => {}
                }
                continue;
            };
            let wire = batch.to_wire(self.identity.gateway_id.as_str(), self.identity.feeder_id.as_str());
            match self.client.post_batch(&wire, batch.sequence, &self.identity.key).await {
                Ok(ack) => {
                    self.outbox.acknowledge(&batch.batch_id).await?;
                    failures = 0;
                    stats.batches += 1;
                    stats.readings_acknowledged += wire.readings.len() as u64;
                    stats.duplicates_reported += ack.duplicate_readings;
                }
                Err(UploadError::Refused { status, reason }) => {
                    tracing::error!(batch = %batch.batch_id, status, %reason, "service refused batch; kept in refused_batches");
                    self.outbox.refuse(&wire, status, &reason).await?;
                    stats.refused_batches += 1;
                }
                Err(UploadError::Transient(e)) => {
                    failures = failures.saturating_add(1);
                    stats.transient_failures += 1;
                    self.outbox.record_failure(&batch.batch_id, &e).await?;
                    let delay = self.config.backoff.jittered(failures, rand::rng().random_range(0.5..=1.0));
                    tracing::warn!(batch = %batch.batch_id, error = %e, ?delay, "upload failed; will retry the same batch");
                    tokio::select! {
                        _ = tokio::time::sleep(delay) => {}
                        _ = shutdown.changed() => {}
                    }
                }
            }
        }
    }
}
