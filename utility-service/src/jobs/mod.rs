//! Background jobs. CPU work runs on the blocking pool, never on the async runtime.

pub mod audit;
pub mod cluster;
pub mod recover;
pub mod schedule;
pub mod settle;
pub mod worker;

use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::Context;

use crate::clock::now_s;
use crate::config::ServiceConfig;
use crate::store::queue::JobTable;
use crate::store::Store;

/// What background work needs, and nothing of HTTP: the store, the service
/// configuration, and the wake-up of this process's job worker.
#[derive(Clone)]
pub struct WorkContext {
    pub store: Store,
    pub config: Arc<ServiceConfig>,
    /// Wakes this process's job worker when a job is queued.
    pub wake: Arc<tokio::sync::Notify>,
    /// What job leases and the settlement schedule go by (the system clock
    /// but in tests that drive simulated days).
    pub clock: crate::clock::Clock,
}

impl WorkContext {
    pub fn new(store: Store, config: ServiceConfig) -> Self {
        Self { store, config: Arc::new(config), wake: Default::default(), clock: Default::default() }
    }
}

/// Runs `work` on the blocking pool, copying the stage and fraction it reports
/// into the job's row every half second.
pub async fn run_reporting<T, F>(s: &WorkContext, table: JobTable, job_id: &str, work: F) -> anyhow::Result<T>
where
    T: Send + 'static,
    F: FnOnce(&mut dyn FnMut(&str, f64)) -> anyhow::Result<T> + Send + 'static,
{
    let progress = Arc::new(Mutex::new((String::from("starting"), 0.0f64)));
    let shared = progress.clone();
    let task = tokio::task::spawn_blocking(move || {
        work(&mut |stage: &str, f: f64| {
            if let Ok(mut p) = shared.lock() {
                *p = (stage.to_owned(), f);
            }
        })
    });
    tokio::pin!(task);
    loop {
        tokio::select! {
            r = &mut task => return r.context("job task")?,
            _ = tokio::time::sleep(Duration::from_millis(500)) => {
                let (stage, f) = progress.lock().map(|p| p.clone()).unwrap_or_default();
                s.store.set_progress(table, job_id, f, &stage, now_s()).await?;
            }
        }
    }
}

/// A job id with a kind prefix and 96 random bits.
pub fn new_job_id(prefix: &str) -> String {
    use rand::Rng;
    let mut r = rand::rng();
    format!("{prefix}-{:016x}{:08x}", r.random::<u64>(), r.random::<u32>())
}
