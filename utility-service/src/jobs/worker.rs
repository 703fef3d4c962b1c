//! The job worker: claims queued jobs from the database with a lease, runs them
//! one at a time, renews the lease while they run. Several processes may share
//! one database; a job whose worker died is taken over when its lease runs out.

use std::time::Duration;

use meterveil_shared::calibrate::Targets;
use meterveil_shared::recovery::RankChoice;
use meterveil_shared::FeederId;
use serde_json::Value;

use super::WorkContext;
use crate::clock::now_s;
use crate::store::queue::Claimed;
use crate::store::queue::JobTable;

/// Rebuilds a recovery request from its row.
fn recovery_request(c: &Claimed) -> anyhow::Result<super::recover::RecoveryRequest> {
    let feeder = FeederId::parse(c.feeder_id.as_deref().unwrap_or("")).map_err(|e| anyhow::anyhow!("{e}"))?;
    let (from, to) = c.window.ok_or_else(|| anyhow::anyhow!("recovery job without a window"))?;
    let rank = match &c.params["rank"] {
        Value::Number(n) => RankChoice::Fixed(n.as_u64().unwrap_or(10) as usize),
        _ => meterveil_shared::recovery::RecoveryParams::default().rank,
    };
    let alpha_kw = c.params["alpha_kw"].as_f64().unwrap_or(15.0);
    Ok(super::recover::RecoveryRequest { feeder, from, to, rank, alpha_kw })
}

fn strings(v: &Value) -> Vec<String> {
    v.as_array().map(|a| a.iter().filter_map(|s| s.as_str().map(str::to_owned)).collect()).unwrap_or_default()
}

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
    tracing::info!(job = %c.job_id, kind = %c.kind, attempt = c.attempts, worker = %s.store.worker_id(), "job claimed");
    let id = c.job_id.clone();
    let p = &c.params;
    match c.kind.as_str() {
        "recover" => match recovery_request(&c) {
            Ok(req) => super::recover::run(s.clone(), id, req).await,
            Err(e) => {
                let _ = s.store.fail(JobTable::Recovery, &id, &format!("{e:#}"), now_s()).await;
            }
        },
        "cluster" => {
            let req = super::cluster::ClusterRequest {
                recovery_jobs: strings(&p["recovery_jobs"]),
                clusters: p["clusters"].as_u64().map(|k| k as usize),
            };
            super::cluster::run(s.clone(), id, req).await;
        }
        "audit" => {
            let req = super::audit::AuditRequest {
                recovery_job: p["recovery_job"].as_str().unwrap_or_default().to_owned(),
                captured: strings(&p["captured"]),
                seed: p["seed"].as_u64().unwrap_or(meterveil_shared::audit::DEFAULT_SEED),
                register_period: p["register_period"]
                    .as_str()
                    .and_then(|v| meterveil_shared::RegisterPeriod::parse("register_period", v).ok()),
                curves: p["curves"].as_bool().unwrap_or(true),
            };
            super::audit::run_audit(s.clone(), id, req).await;
        }
        "calibrate" => match serde_json::from_value::<Targets>(p["targets"].clone()) {
            Ok(targets) => {
                let req = super::audit::CalibrationRequest {
                    recovery_job: p["recovery_job"].as_str().unwrap_or_default().to_owned(),
                    targets,
                    publish: p["publish"].as_bool().unwrap_or(false),
                    seed: p["seed"].as_u64().unwrap_or(meterveil_shared::calibrate::DEFAULT_SEED),
                    register_periods: p["register_periods"]
                        .as_array()
                        .into_iter()
                        .flatten()
                        .filter_map(|v| meterveil_shared::RegisterPeriod::parse("register_periods", v.as_str()?).ok())
                        .collect(),
                };
                super::audit::run_calibration(s.clone(), id, req).await;
            }
            Err(e) => {
                let _ =
                    s.store.fail(JobTable::Analysis, &id, &format!("stored targets do not parse: {e}"), now_s()).await;
            }
        },
        other => {
            let _ = s.store.fail(JobTable::Analysis, &id, &format!("unknown job kind {other}"), now_s()).await;
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
