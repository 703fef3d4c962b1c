//! The job worker: claims queued jobs from the database with a lease, runs them
//! one at a time, renews the lease while they run. Several processes may share
//! one database; a job whose worker died is taken over when its lease runs out.

use std::time::Duration;

use super::WorkContext;
use crate::clock::now_s;
use crate::jobspec::JobSpec;
use crate::store::queue::Claimed;

/// Ends the lease renewal when the job's run ends, however it ends (also when
/// the worker's task is aborted: a dead worker's lease must run out).
struct Heartbeat(tokio::task::JoinHandle<()>);

impl Drop for Heartbeat {
    fn drop(&mut self) {
        self.0.abort();
    }
}

/// Runs one claimed job to its end (done or failed), renewing its lease meanwhile.
async fn execute(s: &WorkContext, c: Claimed) {
    let lease = s.config.job_lease_s.max(3);
    let (store, table, id, clock) = (s.store.clone(), c.table, c.job_id.clone(), s.clock.clone());
    let _heartbeat = Heartbeat(tokio::spawn(async move {
        loop {
            tokio::time::sleep(Duration::from_secs((lease / 3).max(1) as u64)).await;
            match store.renew_lease(table, &id, clock.now() + lease).await {
                Ok(true) => {}
                Ok(false) => break,
                Err(e) => tracing::warn!(job = %id, error = %e, "lease renewal failed"),
            }
        }
    }));
    let id = c.job_id.clone();
    match c.spec {
        Ok(spec) => {
            tracing::info!(job = %id, kind = spec.kind(), attempt = c.attempts, worker = %s.store.worker_id(), "job claimed");
            match spec {
                JobSpec::Recover(spec) => super::recover::run(s.clone(), id, spec).await,
                JobSpec::Cluster(spec) => super::cluster::run(s.clone(), id, spec).await,
                JobSpec::Audit(spec) => super::audit::run_audit(s.clone(), id, spec).await,
                JobSpec::Calibrate(spec) => super::audit::run_calibration(s.clone(), id, spec).await,
            }
        }
        Err(reason) => {
            tracing::warn!(job = %id, %reason, "a claimed job's spec does not parse");
            let _ = s.store.fail(c.table, &id, &reason, now_s()).await;
        }
    }
}

/// Claims and runs jobs until the task is aborted.
pub async fn run(s: WorkContext) {
    loop {
        match s
            .store
            .claim_next(
                s.clock.now(),
                s.config.job_lease_s.max(3),
                s.config.job_max_attempts,
                s.config.job_feeders.as_deref(),
            )
            .await
        {
            Ok(Some(c)) => execute(&s, c).await,
            Ok(None) => {
                tokio::select! {
                    _ = s.wake.notified() => {}
                    _ = tokio::time::sleep(Duration::from_secs(1)) => {}
                }
            }
            Err(e) => {
                tracing::warn!(error = %e, "claiming a job failed");
                tokio::time::sleep(Duration::from_secs(1)).await;
            }
        }
    }
}
