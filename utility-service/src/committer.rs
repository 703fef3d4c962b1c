//! Group commit of ingest batches: one task per process checks and writes the
//! signed, parsed uploads that the ingest route hands it.
//!
//! Why a task: through sqlx every statement is two thread hand-offs, and a batch
//! checked and written alone took about a dozen statements and an fsync. Uploads
//! that arrive while a group is being written wait in the queue and form the next
//! group, which is checked with five reads and written in one transaction of
//! multi-row statements. A lone upload still commits at once; nothing waits for a
//! group to fill.
//!
//! Each batch gets exactly the answer it would get alone: a group holds at most
//! one upload per gateway and one per batch id, and when the group's conditional
//! writes show that another writer got in first, the group is rolled back and its
//! uploads are settled one by one.

use std::collections::{HashSet, VecDeque};
use std::sync::Arc;
use std::time::Duration;

use meterveil_shared::wire::AckWire;
use sqlx::pool::PoolConnection;
use sqlx::{Any, AnyConnection};
use tokio::sync::{mpsc, oneshot};

pub use crate::ingest::Upload;
use crate::ingest::{decide, Decision, IngestLimits, Refusal};
use crate::metrics::Metrics;
use crate::store::batches::{Accepted, GroupKeys};
use crate::store::{Store, StoreError, StoredBatch};

/// Why an upload was not stored.
#[derive(Debug, thiserror::Error)]
pub enum CommitError {
    /// The rules refused it.
    #[error(transparent)]
    Refused(#[from] Refusal),
    /// The store failed.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The committer itself failed (stopped, or the group could not be written).
    #[error(transparent)]
    Failed(#[from] anyhow::Error),
}

/// Uploads per group, and readings per group: bounds one transaction's size.
const MAX_GROUP_UPLOADS: usize = 256;
const MAX_GROUP_READINGS: usize = 30_000;
/// Uploads waiting beyond the group being written; senders wait when it is full.
const QUEUE: usize = 2 * MAX_GROUP_UPLOADS;
/// Attempts for an upload alone that keeps racing with another writer.
const ALONE_ATTEMPTS: usize = 3;

/// How an upload was settled.
#[derive(Debug)]
pub enum Committed {
    /// Stored now, with this acknowledgement.
    Stored(AckWire),
    /// The batch id (or the gateway's sequence number with the same body) was
    /// stored before: the caller answers with that batch's acknowledgement.
    Earlier(StoredBatch),
}

type Reply = oneshot::Sender<Result<Committed, CommitError>>;

/// Hands uploads to this process's group-commit task.
#[derive(Clone)]
pub struct Committer {
    tx: mpsc::Sender<(Upload, Reply)>,
}

impl Committer {
    /// Starts the task; it ends when every handle is dropped and the queue is
    /// empty. With a `linger` above zero, a group waits up to that long for more
    /// uploads once its first has arrived (larger groups, later answers).
    pub fn start(store: Store, limits: IngestLimits, linger: Duration, metrics: Arc<Metrics>) -> Self {
        let (tx, rx) = mpsc::channel(QUEUE);
        tokio::spawn(run(Task { store, limits, metrics, conn: None }, linger, rx));
        Self { tx }
    }

    /// Checks and stores `upload` (or finds it stored before).
    pub async fn submit(&self, upload: Upload) -> Result<Committed, CommitError> {
        let (reply, answer) = oneshot::channel();
        self.tx.send((upload, reply)).await.map_err(|_| anyhow::anyhow!("the ingest committer has stopped"))?;
        answer.await.map_err(|_| anyhow::anyhow!("the ingest committer dropped an upload"))?
    }
}

/// What the committer works with.
struct Task {
    store: Store,
    limits: IngestLimits,
    metrics: Arc<Metrics>,
    /// Its own connection, so its reads never queue behind the requests' reads
    /// for the pool; taken again after an error.
    conn: Option<PoolConnection<Any>>,
}

async fn run(mut task: Task, linger: Duration, mut rx: mpsc::Receiver<(Upload, Reply)>) {
    let mut waiting: VecDeque<(Upload, Reply)> = VecDeque::new();
    loop {
        if waiting.is_empty() {
            match rx.recv().await {
                Some(job) => waiting.push_back(job),
                None => return,
            }
            if !linger.is_zero() {
                let until = tokio::time::Instant::now() + linger;
                while waiting.len() < MAX_GROUP_UPLOADS {
                    match tokio::time::timeout_at(until, rx.recv()).await {
                        Ok(Some(job)) => waiting.push_back(job),
                        _ => break,
                    }
                }
            }
        }
        while waiting.len() < QUEUE {
            match rx.try_recv() {
                Ok(job) => waiting.push_back(job),
                Err(_) => break,
            }
        }
        let (uploads, replies): (Vec<Upload>, Vec<Reply>) = next_group(&mut waiting).into_iter().unzip();
        let results = task.settle(&uploads).await;
        for (reply, result) in replies.into_iter().zip(results) {
            // A caller that gave up (timeout, closed connection) no longer listens;
            // its batch is stored all the same and a retry gets the stored ack.
            let _ = reply.send(result);
        }
    }
}

/// Takes the next group off the front of `waiting`, in arrival order: an upload
/// whose gateway or batch id is already in the group waits for the next one, so
/// the uploads of one group never depend on each other.
fn next_group(waiting: &mut VecDeque<(Upload, Reply)>) -> Vec<(Upload, Reply)> {
    let mut group = Vec::new();
    let mut later = VecDeque::new();
    let (mut gateways, mut batch_ids) = (HashSet::new(), HashSet::new());
    let mut readings = 0;
    while let Some(job) = waiting.pop_front() {
        let u = &job.0;
        let full = group.len() >= MAX_GROUP_UPLOADS
            || (!group.is_empty() && readings + u.batch.readings.len() > MAX_GROUP_READINGS);
        if full || gateways.contains(&u.gateway_id) || batch_ids.contains(u.header.batch_id.as_str()) {
            later.push_back(job);
            continue;
        }
        gateways.insert(u.gateway_id.clone());
        batch_ids.insert(u.header.batch_id.to_string());
        readings += u.batch.readings.len();
        group.push(job);
    }
    *waiting = later;
    group
}

impl Task {
    /// Settles every upload of a group, in order.
    async fn settle(&mut self, uploads: &[Upload]) -> Vec<Result<Committed, CommitError>> {
        self.metrics.ingest_groups.inc();
        match self.attempt(uploads).await {
            Ok(Some(results)) => results,
            Ok(None) => {
                self.metrics.ingest_group_retries.inc();
                tracing::debug!(uploads = uploads.len(), "group raced with another writer; settling its uploads alone");
                let mut out = Vec::with_capacity(uploads.len());
                for u in uploads {
                    out.push(self.settle_alone(u).await);
                }
                out
            }
            Err(e) => {
                tracing::error!(error = ?e, uploads = uploads.len(), "group commit failed");
                uploads.iter().map(|_| Err(CommitError::Failed(anyhow::anyhow!("group commit failed: {e}")))).collect()
            }
        }
    }

    async fn settle_alone(&mut self, u: &Upload) -> Result<Committed, CommitError> {
        for _ in 0..ALONE_ATTEMPTS {
            self.metrics.ingest_groups.inc();
            if let Some(mut r) = self.attempt(std::slice::from_ref(u)).await? {
                if let Some(result) = r.pop() {
                    return result;
                }
            }
        }
        Err(CommitError::Failed(anyhow::anyhow!(
            "batch {} kept racing with other writers ({ALONE_ATTEMPTS} attempts)",
            u.header.batch_id
        )))
    }

    /// Reads the group's state, decides each upload and writes the accepted ones.
    /// `Ok(None)`: another writer got in first and nothing was written.
    async fn attempt(
        &mut self,
        uploads: &[Upload],
    ) -> Result<Option<Vec<Result<Committed, CommitError>>>, CommitError> {
        let mut conn = match self.conn.take() {
            Some(c) => c,
            None => self.store.pool().acquire().await.map_err(StoreError::from)?,
        };
        let result = attempt_on(&self.store, &self.limits, &mut conn, uploads).await;
        if result.is_ok() {
            self.conn = Some(conn);
        }
        result
    }
}

/// [`Task::attempt`] on the committer's connection.
async fn attempt_on(
    store: &Store,
    limits: &IngestLimits,
    conn: &mut AnyConnection,
    uploads: &[Upload],
) -> Result<Option<Vec<Result<Committed, CommitError>>>, CommitError> {
    let mut keys = GroupKeys::default();
    for u in uploads {
        keys.gateways.push(&u.gateway_id);
        keys.sequences.push((&u.gateway_id, u.sequence));
        keys.batch_ids.push(u.header.batch_id.as_str());
        keys.feeders.push(u.header.feeder_id.as_str());
        keys.meters.extend(u.batch.readings.iter().map(|r| r.meter_id.as_str()));
        keys.meters.extend(u.batch.registers.iter().map(|g| g.meter_id.as_str()));
    }
    keys.feeders.sort_unstable();
    keys.feeders.dedup();
    keys.meters.sort_unstable();
    keys.meters.dedup();
    let state = store.group_state(conn, &keys).await?;
    let now = crate::clock::now_s();

    let mut results: Vec<Option<Result<Committed, CommitError>>> = Vec::with_capacity(uploads.len());
    let (mut accepted, mut slots) = (Vec::new(), Vec::new());
    for (i, u) in uploads.iter().enumerate() {
        match decide(u, &state, now, limits) {
            Ok(Decision::Write(batch)) => {
                accepted.push(Accepted { batch, sequence: u.sequence, key_generation: u.key_generation });
                slots.push(i);
                results.push(None);
            }
            Ok(Decision::Earlier(prev)) => results.push(Some(Ok(Committed::Earlier(prev)))),
            Err(e) => results.push(Some(Err(e.into()))),
        }
    }
    let Some(acks) = store.write_group(conn, &accepted, now).await? else { return Ok(None) };
    for (slot, ack) in slots.into_iter().zip(acks) {
        results[slot] = Some(Ok(Committed::Stored(ack)));
    }
    Ok(Some(
        results
            .into_iter()
            .map(|r| r.unwrap_or_else(|| Err(anyhow::anyhow!("upload left unsettled").into())))
            .collect(),
    ))
}
