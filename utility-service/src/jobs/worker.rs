//! The job worker: claims queued jobs from the database with a lease, runs them
//! one at a time, renews the lease while they run. Several processes may share
//! one database; a job whose worker died is taken over when its lease runs out.

use std::time::Duration;

use super::WorkContext;
use crate::clock::now_s;
use crate::jobspec::JobSpec;
use crate::store::queue::Claimed;

/// Runs one claimed job to its end (done or failed), renewing its lease meanwhile.
async fn execute(s: &WorkContext, c: Claimed) {
    let lease = s.config.job_lease_s.max(3);
    let (store, table, id) = (s.store.clone(), c.table, c.job_id.clone());
    let heartbeat = tokio::spawn(async move {
        loop {
            tokio::time::sleep(Duration::from_secs((lease / 3).max(1) as u64)).await;
            match store.renew_lease(table, &id, now_s() + lease).await {
                Ok(true) => {}
                Ok(false) => break,
                Err(e) => tracing::warn!(job = %id, error = %e, "lease renewal failed"),
            }
        }
    });
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
    heartbeat.abort();
}

/// Claims and runs jobs until the task is aborted.
pub async fn run(s: WorkContext) {
    loop {
        match s
            .store
            .claim_next(
                now_s(),
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
