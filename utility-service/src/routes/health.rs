use axum::extract::State;
use axum::http::header;
use axum::response::IntoResponse;
use axum::routing::get;
use axum::Router;

use super::AppState;
use crate::error::ApiError;

pub fn router() -> Router<AppState> {
    Router::new().route("/healthz", get(healthz)).route("/metrics", get(metrics))
}

/// 200 when the database answers.
async fn healthz(State(s): State<AppState>) -> Result<&'static str, ApiError> {
    sqlx::query("SELECT 1").execute(s.store.pool()).await?;
    Ok("ok\n")
}

async fn metrics(State(s): State<AppState>) -> impl IntoResponse {
    ([(header::CONTENT_TYPE, "application/openmetrics-text; version=1.0.0; charset=utf-8")], s.metrics.render())
}
