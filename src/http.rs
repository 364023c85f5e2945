//! The service's HTTP listener: `/healthz` (the process answers) and `/readyz` (every
//! readiness check, as JSON, 503 when one fails).

use std::sync::Arc;

use anyhow::{Context, Result};
use axum::extract::State;
use axum::http::StatusCode;
use axum::response::IntoResponse;
use axum::routing::get;
use axum::{Json, Router};
use tokio::net::TcpListener;

use crate::health::Health;

/// Binds the listener now, so a taken or invalid address fails start-up with its name.
pub async fn bind(listen: &str) -> Result<TcpListener> {
    TcpListener::bind(listen)
        .await
        .with_context(|| format!("http.listen: cannot listen on {listen}"))
}

/// The routes.
pub fn router(health: Arc<Health>) -> Router {
    Router::new()
        .route("/healthz", get(|| async { "alive\n" }))
        .route("/readyz", get(readyz))
        .with_state(health)
}

async fn readyz(State(health): State<Arc<Health>>) -> impl IntoResponse {
    let readiness = health.readiness();
    let status = if readiness.ready {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (status, Json(readiness))
}

/// Serves until the task is dropped.
pub async fn serve(listener: TcpListener, health: Arc<Health>) {
    if let Err(e) = axum::serve(listener, router(health)).await {
        tracing::error!(error = %e, "HTTP listener stopped");
    }
}
