//! Starting and stopping the HTTP service.

use std::net::SocketAddr;
use std::sync::Arc;

use anyhow::Context;
use tokio::sync::oneshot;
use tokio::task::JoinHandle;
use tower_http::trace::TraceLayer;

use crate::config::ServiceConfig;
use crate::metrics::Metrics;
use crate::routes::{self, AppState};
use crate::store::Store;

/// A service listening on `addr` until [`RunningService::stop`] or the handle is dropped.
pub struct RunningService {
    pub addr: SocketAddr,
    pub store: Store,
    pub metrics: Arc<Metrics>,
    shutdown: Option<oneshot::Sender<()>>,
    handle: JoinHandle<std::io::Result<()>>,
}

impl RunningService {
    /// Base URL, e.g. `http://127.0.0.1:41234`.
    pub fn url(&self) -> String {
        format!("http://{}", self.addr)
    }

    /// A one-time dashboard sign-in path to `next` for the operator `who`.
    pub async fn dashboard_link(&self, next: &str, who: &str) -> anyhow::Result<String> {
        crate::routes::dashboard::one_time_link(&self.store, next, who).await.map_err(|e| anyhow::anyhow!("{e}"))
    }

    /// Stops accepting connections, finishes in-flight requests and returns.
    pub async fn stop(mut self) -> anyhow::Result<()> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        (&mut self.handle).await.context("server task panicked")??;
        Ok(())
    }

    /// Waits until the server ends (Ctrl-C for the `serve` command).
    pub async fn wait(mut self) -> anyhow::Result<()> {
        (&mut self.handle).await.context("server task panicked")??;
        Ok(())
    }
}

/// Opens the store (applying migrations), binds and serves in a background task.
pub async fn start(config: ServiceConfig) -> anyhow::Result<RunningService> {
    let store = Store::open(&config.database_url).await?;
    start_with_store(config, store, None).await
}

/// As [`start`], on an opened store; `until` ends the server when it resolves.
pub async fn start_with_store(
    config: ServiceConfig,
    store: Store,
    until: Option<std::pin::Pin<Box<dyn std::future::Future<Output = ()> + Send>>>,
) -> anyhow::Result<RunningService> {
    let metrics = Arc::new(Metrics::default());
    let listener =
        tokio::net::TcpListener::bind(config.bind).await.with_context(|| format!("binding {}", config.bind))?;
    let addr = listener.local_addr()?;
    let committer = crate::committer::Committer::start(
        store.clone(),
        config.ingest_limits(),
        config.ingest_group_linger,
        metrics.clone(),
    );
    let state = AppState {
        work: crate::jobs::WorkContext::new(store.clone(), config),
        metrics: metrics.clone(),
        buckets: Default::default(),
        committer,
    };
    // The worker and, beside it, the settlement scheduler.
    let worker = state.config.run_worker.then(|| {
        let (w, s) = (state.work.clone(), state.work.clone());
        tokio::spawn(async move {
            tokio::join!(crate::jobs::worker::run(w), crate::jobs::schedule::run(s));
        })
    });
    // A request that takes longer than this is answered 408 and dropped; a batch's
    // commit is one transaction, so nothing half-written remains.
    let app = routes::router(state)
        .layer(tower_http::timeout::TimeoutLayer::with_status_code(
            axum::http::StatusCode::REQUEST_TIMEOUT,
            std::time::Duration::from_secs(60),
        ))
        .layer(TraceLayer::new_for_http());
    let (tx, rx) = oneshot::channel::<()>();
    let handle = tokio::spawn(async move {
        let served = axum::serve(listener, app)
            .with_graceful_shutdown(async move {
                match until {
                    Some(f) => {
                        tokio::select! { _ = f => {}, _ = rx => {} }
                    }
                    None => {
                        let _ = rx.await;
                    }
                }
            })
            .await;
        if let Some(w) = worker {
            w.abort();
        }
        served
    });
    tracing::info!(%addr, "utility service listening");
    Ok(RunningService { addr, store, metrics, shutdown: Some(tx), handle })
}
