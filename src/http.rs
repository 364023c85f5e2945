//! The service's HTTP listener: `/healthz` (the process answers), `/readyz` (every
//! readiness check, as JSON, 503 when one fails), `/metrics` (Prometheus text format),
//! read-only lookups `/v1/lists/{item}` (`?signal=purchase` for the purchase list) and
//! `/v1/pairs/{a}/{b}`, and the actions
//! that change state (`POST /v1/admin/publish|republish|compact`), which need the bearer
//! token of `http.admin_token` and are off without one.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use anyhow::{Context, Result};
use axum::extract::{Path, Query, State};
use axum::http::{header, HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use tokio::net::TcpListener;

use crate::health::Health;
use crate::inspect::explain_pair;
use crate::metrics::Metrics;
use crate::record::NeighborRecord;
use crate::score::ListSettings;
use crate::signal::Signal;
use crate::store::Store;

/// Requests made over HTTP for the service loop to carry out.
#[derive(Debug, Default)]
pub struct AdminRequests {
    /// Run a publication cycle now.
    pub publish: AtomicBool,
    /// Deliver every stored list again, then publish.
    pub republish: AtomicBool,
    /// Compact the store.
    pub compact: AtomicBool,
}

/// What the handlers share.
#[derive(Clone)]
pub struct HttpState {
    /// Readiness checks.
    pub health: Arc<Health>,
    /// The metrics to expose.
    pub metrics: Arc<Metrics>,
    /// The store directory, opened read-only per lookup.
    pub store_dir: PathBuf,
    /// List settings for the explain view.
    pub lists: ListSettings,
    /// The admin token; empty = admin endpoints off.
    pub admin_token: String,
    /// Where admin requests go.
    pub admin: Arc<AdminRequests>,
}

/// Binds the listener now, so a taken or invalid address fails start-up with its name.
pub async fn bind(listen: &str) -> Result<TcpListener> {
    TcpListener::bind(listen)
        .await
        .with_context(|| format!("http.listen: cannot listen on {listen}"))
}

/// The routes.
pub fn router(state: HttpState) -> Router {
    Router::new()
        .route("/healthz", get(|| async { "alive\n" }))
        .route("/readyz", get(readyz))
        .route("/metrics", get(metrics))
        .route("/v1/lists/{item}", get(list))
        .route("/v1/pairs/{a}/{b}", get(pair))
        .route("/v1/admin/{action}", post(admin))
        .with_state(state)
}

async fn readyz(State(s): State<HttpState>) -> impl IntoResponse {
    let readiness = s.health.readiness();
    s.metrics.ready.set(i64::from(readiness.ready));
    let status = if readiness.ready {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (status, Json(readiness))
}

async fn metrics(State(s): State<HttpState>) -> impl IntoResponse {
    s.metrics.ready.set(i64::from(s.health.readiness().ready));
    (
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")],
        s.metrics.render(),
    )
}

/// Runs a read against a read-only view of the store, off the async threads.
async fn with_store<T: Send + 'static>(
    s: &HttpState,
    read: impl FnOnce(&Store) -> Result<Option<T>> + Send + 'static,
) -> Result<Option<T>, Response> {
    let dir = s.store_dir.clone();
    let outcome =
        tokio::task::spawn_blocking(move || Store::open_read_only(&dir).and_then(|store| read(&store)))
            .await
            .map_err(|e| (StatusCode::INTERNAL_SERVER_ERROR, e.to_string()).into_response())?;
    outcome.map_err(|e| (StatusCode::INTERNAL_SERVER_ERROR, format!("{e:#}\n")).into_response())
}

/// The query of a list lookup: which signal's list (rating when absent).
#[derive(Debug, serde::Deserialize)]
struct ListQuery {
    signal: Option<String>,
}

async fn list(State(s): State<HttpState>, Path(item): Path<String>, Query(q): Query<ListQuery>) -> Response {
    let signal = match q.signal.as_deref().map(Signal::parse) {
        None => Signal::Rating,
        Some(Some(signal)) => signal,
        Some(None) => {
            return (
                StatusCode::BAD_REQUEST,
                "signal: expected \"rating\" or \"purchase\"\n",
            )
                .into_response()
        }
    };
    let wanted = item.clone();
    let found = with_store(&s, move |store| {
        let Some(id) = store.item_id(&wanted) else {
            return Ok(None);
        };
        Ok(store
            .published(signal, id)?
            .map(|list| NeighborRecord::from_stored(store, signal, id, &list)))
    })
    .await;
    match found {
        Ok(Some(record)) => Json(record).into_response(),
        Ok(None) => (
            StatusCode::NOT_FOUND,
            format!("item {item:?} has no published {} list\n", signal.as_str()),
        )
            .into_response(),
        Err(response) => response,
    }
}

async fn pair(State(s): State<HttpState>, Path((a, b)): Path<(String, String)>) -> Response {
    let settings = s.lists;
    let (qa, qb) = (a.clone(), b.clone());
    let found = with_store(&s, move |store| {
        if store.item_id(&qa).is_none() || store.item_id(&qb).is_none() {
            return Ok(None);
        }
        explain_pair(store, &qa, &qb, &settings).map(Some)
    })
    .await;
    match found {
        Ok(Some(text)) => text.into_response(),
        Ok(None) => (
            StatusCode::NOT_FOUND,
            format!("{a:?} or {b:?} is not in the store\n"),
        )
            .into_response(),
        Err(response) => response,
    }
}

/// Whether the request carries the configured token (compared in constant time).
fn authorized(headers: &HeaderMap, token: &str) -> bool {
    let Some(given) = headers
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.strip_prefix("Bearer "))
    else {
        return false;
    };
    given.len() == token.len()
        && given
            .bytes()
            .zip(token.bytes())
            .fold(0u8, |acc, (x, y)| acc | (x ^ y))
            == 0
}

async fn admin(State(s): State<HttpState>, Path(action): Path<String>, headers: HeaderMap) -> Response {
    if s.admin_token.is_empty() {
        return (
            StatusCode::FORBIDDEN,
            "state-changing endpoints are off: set http.admin_token (SIMTIDE_HTTP__ADMIN_TOKEN)\n",
        )
            .into_response();
    }
    if !authorized(&headers, &s.admin_token) {
        tracing::warn!(action, "admin request refused: missing or wrong bearer token");
        return (
            StatusCode::UNAUTHORIZED,
            [(header::WWW_AUTHENTICATE, "Bearer")],
            "a valid bearer token is required\n",
        )
            .into_response();
    }
    let flag = match action.as_str() {
        "publish" => &s.admin.publish,
        "republish" => &s.admin.republish,
        "compact" => &s.admin.compact,
        _ => return (StatusCode::NOT_FOUND, "actions: publish, republish, compact\n").into_response(),
    };
    flag.store(true, Ordering::Relaxed);
    tracing::info!(action, "admin request accepted");
    (StatusCode::ACCEPTED, format!("{action} requested\n")).into_response()
}

/// Serves `/metrics` alone on `listen` from a thread of its own, for the commands that
/// run without the service's listener (backfill). The address is bound before returning,
/// so a taken or invalid one fails the command at once.
pub fn serve_metrics_in_background(listen: &str, metrics: Arc<Metrics>) -> Result<()> {
    let listener = std::net::TcpListener::bind(listen)
        .with_context(|| format!("--metrics-listen: cannot listen on {listen}"))?;
    listener.set_nonblocking(true)?;
    std::thread::Builder::new()
        .name("simtide-metrics".into())
        .spawn(move || {
            let runtime = match tokio::runtime::Builder::new_current_thread().enable_all().build() {
                Ok(r) => r,
                Err(e) => {
                    tracing::error!(error = %e, "metrics listener not started");
                    return;
                }
            };
            runtime.block_on(async move {
                let router = Router::new().route(
                    "/metrics",
                    get(move || {
                        let metrics = metrics.clone();
                        async move {
                            (
                                [(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")],
                                metrics.render(),
                            )
                        }
                    }),
                );
                match TcpListener::from_std(listener) {
                    Ok(l) => {
                        if let Err(e) = axum::serve(l, router).await {
                            tracing::error!(error = %e, "metrics listener stopped");
                        }
                    }
                    Err(e) => tracing::error!(error = %e, "metrics listener not started"),
                }
            });
        })?;
    Ok(())
}

/// Serves until the task is dropped.
pub async fn serve(listener: TcpListener, state: HttpState) {
    if let Err(e) = axum::serve(listener, router(state)).await {
        tracing::error!(error = %e, "HTTP listener stopped");
    }
}
