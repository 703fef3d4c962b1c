//! HTTP routes. Each module exports `router()`; handlers are short scripts over
//! the store and the domain functions.

pub mod actions;
pub mod analyses;
pub mod analysis_forms;
pub mod dashboard;
pub mod feeder_page;
pub mod feeders;
pub mod group_view;
pub mod groups;
pub mod health;
pub mod ingest;
pub mod local_time;
pub mod meter_view;
pub mod overview;
pub mod publish;
pub mod recoveries;
pub mod settlement_runs;
pub mod tariffs;

use std::sync::Arc;

use axum::extract::FromRequestParts;
use axum::http::request::Parts;
use axum::Router;
use meterveil_shared::FieldError;
use serde::de::DeserializeOwned;

use crate::error::ApiError;
use crate::jobs::WorkContext;
use crate::metrics::Metrics;

/// What the handlers share: the background work's context (store,
/// configuration, the worker's wake-up), reached through `Deref`, and the
/// HTTP side's own state.
#[derive(Clone)]
pub struct AppState {
    pub work: WorkContext,
    pub metrics: Arc<Metrics>,
    /// Per-gateway upload rate buckets.
    pub buckets: Arc<ingest::Buckets>,
    /// Checks and writes uploads in groups.
    pub committer: crate::committer::Committer,
}

impl std::ops::Deref for AppState {
    type Target = WorkContext;
    fn deref(&self) -> &WorkContext {
        &self.work
    }
}

pub fn router(state: AppState) -> Router {
    Router::new()
        .merge(health::router())
        .merge(ingest::router())
        .merge(feeders::router())
        .merge(recoveries::router())
        .merge(groups::router())
        .merge(tariffs::router())
        .merge(settlement_runs::router())
        .merge(analyses::router())
        .merge(dashboard::router())
        .merge(actions::router())
        .merge(analysis_forms::router())
        .merge(overview::router())
        .merge(publish::router())
        .with_state(state)
}

/// Proof that the request carried the operator token (`Authorization: Bearer …`).
pub struct Operator;

impl FromRequestParts<AppState> for Operator {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &AppState) -> Result<Self, ApiError> {
        let header = parts.headers.get(axum::http::header::AUTHORIZATION).and_then(|v| v.to_str().ok()).unwrap_or("");
        let token = header.strip_prefix("Bearer ").unwrap_or("");
        if token.is_empty() {
            return Err(ApiError::Unauthorized(FieldError::new(
                "authorization",
                "operator endpoint: send the operator token as 'Authorization: Bearer <token>'",
            )));
        }
        if !constant_time_eq(token.as_bytes(), state.config.operator_token.expose().as_bytes()) {
            return Err(ApiError::Unauthorized(FieldError::new("authorization", "operator token is wrong")));
        }
        Ok(Operator)
    }
}

pub(crate) fn constant_time_eq(a: &[u8], b: &[u8]) -> bool {
    a.len() == b.len() && a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
}

/// Parses a JSON body, naming the path of the first bad field (400).
pub fn parse_json<T: DeserializeOwned>(body: &[u8]) -> Result<T, ApiError> {
    let de = &mut serde_json::Deserializer::from_slice(body);
    serde_path_to_error::deserialize(de).map_err(|e| {
        let path = e.path().to_string();
        let field = if path == "." { "body".to_owned() } else { path };
        ApiError::Malformed(FieldError::new(field, e.into_inner().to_string()))
    })
}

pub use crate::clock::now_s;
