//! The service's HTTP listener: `/healthz` (the process answers), `/readyz` (every
//! readiness check, as JSON, 503 when one fails), `/metrics` (Prometheus text format),
//! read-only lookups `/v1/lists/{item}` (`?signal=purchase` for the purchase list),
//! `/v1/pairs/{a}/{b}` and `/v1/users/{user}/recommendations` (`recommendations`), and the actions that change state (`POST
//! /v1/admin/publish|republish|compact`), which need the bearer token of
//! `http.admin_token` and are off without one.
//!
//! Lookups share one long-lived read-only view of the service's open store
//! (`LookupStore`), run off the async threads, at most `http.max_concurrent_lookups` at
//! once, and each request ends within `http.request_timeout`. Every error is JSON:
//! `{"error": code, "detail": text}`.

use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use anyhow::{Context, Result};
use axum::extract::State;
use axum::http::{header, HeaderMap, StatusCode};
use axum::response::{IntoResponse, Response};
use axum::routing::{get, post};
use axum::{Json, Router};
use serde::Serialize;
use tokio::net::TcpListener;
use tokio::sync::Semaphore;

mod extract;
mod recommendations;

use self::extract::{ApiPath, ApiQuery};
use crate::cluster::{owner, ShardSpec};
use crate::config::Config;
use crate::observability::metrics::Metrics;
use crate::observability::observe::Observation;
use crate::score::ListSettings;
use crate::service::health::Health;
use crate::service::lookup::LookupStore;
use crate::signal::Signal;
use crate::store::Store;
use crate::views::inspect::explain_pair;
use crate::views::recommend::OtherShardLists;
use crate::views::record::NeighborRecord;

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
    /// The shared read-only view lookups read through.
    pub lookups: Arc<LookupStore>,
    /// Places for lookups running at once (`http.max_concurrent_lookups`).
    pub lookup_places: Arc<Semaphore>,
    /// Longest time a request may take (`http.request_timeout`).
    pub request_timeout: Duration,
    /// Longest accepted item id (`input.max_id_bytes`).
    pub max_id_bytes: usize,
    /// List settings for the explain view.
    pub lists: ListSettings,
    /// The admin token; empty = admin endpoints off.
    pub admin_token: String,
    /// Where admin requests go.
    pub admin: Arc<AdminRequests>,
    /// Which items this instance answers for.
    pub shard: ShardSpec,
    /// Where admin snapshots go (`store.snapshot_dir`); `None`: snapshots are off.
    pub snapshots: Option<PathBuf>,
    /// The settings recommendations are ranked with (`[recommend]`, `[similarity]`).
    pub config: Arc<Config>,
    /// On a shard: the other shards' lists, read from the list topics, which
    /// recommendations draw on beside the shard's own.
    pub other_lists: Option<OtherShardLists>,
}

/// A refused or failed request, answered as JSON with a stable code and a sentence.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ApiError {
    #[serde(skip)]
    status: StatusCode,
    /// Stable, machine-readable reason.
    error: &'static str,
    /// What went wrong and, where it helps, what to do.
    detail: String,
    /// For an item kept by another shard: the index of the shard that answers for it.
    #[serde(skip_serializing_if = "Option::is_none")]
    owner: Option<u32>,
}

impl ApiError {
    fn new(status: StatusCode, error: &'static str, detail: impl Into<String>) -> ApiError {
        ApiError {
            status,
            error,
            detail: detail.into(),
            owner: None,
        }
    }

    /// 421 Misdirected Request (RFC 9110, 15.5.20: this server cannot give an
    /// authoritative answer for the target) for `item`, kept by another shard: the
    /// answer names that shard, so a caller can route there (docs/design.md, "Shards").
    fn other_shard(item: &str, shard: ShardSpec) -> ApiError {
        let owner = owner(item, shard.shards);
        ApiError {
            owner: Some(owner),
            ..ApiError::new(
                StatusCode::MISDIRECTED_REQUEST,
                "other_shard",
                format!("item {item:?} belongs to shard {owner}; this is {shard}: ask shard {owner}"),
            )
        }
    }
}

/// Refuses a lookup for which none of `items` belongs to this shard, naming the first
/// one's owner.
fn owned_here(s: &HttpState, items: &[&str]) -> Result<(), ApiError> {
    match items.first() {
        Some(first) if s.shard.is_sharded() && !items.iter().any(|i| s.shard.owns(i)) => {
            Err(ApiError::other_shard(first, s.shard))
        }
        _ => Ok(()),
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        (self.status, Json(&self)).into_response()
    }
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
        .route("/healthz", get(healthz))
        .route("/readyz", get(readyz))
        .route("/metrics", get(metrics))
        .route("/v1/lists/{item}", get(list))
        .route("/v1/pairs/{a}/{b}", get(pair))
        .route("/v1/users/{user}/recommendations", get(recommendations::for_user))
        .route("/v1/admin/{action}", post(admin))
        .fallback(|| async {
            ApiError::new(
                StatusCode::NOT_FOUND,
                "no_such_route",
                "routes: /healthz /readyz /metrics /v1/lists/{item} /v1/pairs/{a}/{b} \
                 /v1/users/{user}/recommendations /v1/admin/{action}",
            )
        })
        .with_state(state)
}

/// 200 while the consuming loop makes progress; 503 with the reason once it has not
/// for `live.stall_limit` (the orchestrator's cue to restart).
async fn healthz(State(s): State<HttpState>) -> Response {
    match s.health.liveness(std::time::Instant::now()) {
        Ok(()) => "alive\n".into_response(),
        Err(stalled) => {
            ApiError::new(StatusCode::SERVICE_UNAVAILABLE, "stalled", stalled.to_string()).into_response()
        }
    }
}

async fn readyz(State(s): State<HttpState>) -> impl IntoResponse {
    let readiness = s.health.readiness(&s.metrics.freshness());
    Observation::ReadinessAnswered {
        ready: readiness.ready,
    }
    .emit(&s.metrics);
    let status = if readiness.ready {
        StatusCode::OK
    } else {
        StatusCode::SERVICE_UNAVAILABLE
    };
    (status, Json(readiness))
}

async fn metrics(State(s): State<HttpState>) -> impl IntoResponse {
    let ready = s.health.readiness(&s.metrics.freshness()).ready;
    Observation::ReadinessAnswered { ready }.emit(&s.metrics);
    if let Some(table) = &s.other_lists {
        Observation::OtherShardListsHeld { lists: table.held() }.emit(&s.metrics);
    }
    (
        [(header::CONTENT_TYPE, "text/plain; version=0.0.4; charset=utf-8")],
        s.metrics.render(),
    )
}

/// Refuses an id longer than the configured maximum without echoing it.
fn check_id(s: &HttpState, what: &str, id: &str) -> Result<(), ApiError> {
    if id.is_empty() || id.len() > s.max_id_bytes {
        return Err(ApiError::new(
            StatusCode::BAD_REQUEST,
            "bad_id",
            format!(
                "{what}: an id has 1 to {} bytes (input.max_id_bytes), this one has {}",
                s.max_id_bytes,
                id.len()
            ),
        ));
    }
    Ok(())
}

/// Runs a read against the shared view, off the async threads, within the request's
/// time and the lookup places. A read that outlives the request keeps its place until
/// it ends, so slow reads cannot pile up beyond the limit.
async fn with_store<T: Send + 'static>(
    s: &HttpState,
    read: impl FnOnce(&Store) -> Result<T> + Send + 'static,
) -> Result<T, ApiError> {
    let deadline = tokio::time::Instant::now() + s.request_timeout;
    let busy = || {
        ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "busy",
            format!(
                "no lookup place became free within http.request_timeout ({} ms); try again",
                s.request_timeout.as_millis()
            ),
        )
    };
    let place = tokio::time::timeout_at(deadline, s.lookup_places.clone().acquire_owned())
        .await
        .map_err(|_| busy())?
        .map_err(|_| busy())?;
    let lookups = s.lookups.clone();
    let task = tokio::task::spawn_blocking(move || {
        let _place = place;
        lookups.read(read)
    });
    match tokio::time::timeout_at(deadline, task).await {
        Err(_) => Err(ApiError::new(
            StatusCode::GATEWAY_TIMEOUT,
            "timeout",
            format!(
                "the lookup took longer than http.request_timeout ({} ms)",
                s.request_timeout.as_millis()
            ),
        )),
        // The reasons go to the log, not to an anonymous caller: they can name files.
        Ok(Err(e)) => {
            tracing::error!(error = %e, "a lookup failed");
            Err(ApiError::new(
                StatusCode::INTERNAL_SERVER_ERROR,
                "internal",
                "the lookup failed; the service log has the reason",
            ))
        }
        Ok(Ok(Err(e))) => {
            tracing::warn!(error = %format!("{e:#}"), "a lookup could not read the store");
            Err(ApiError::new(
                StatusCode::SERVICE_UNAVAILABLE,
                "store",
                "the store could not answer this lookup; /readyz and the service log have the reason",
            ))
        }
        Ok(Ok(Ok(value))) => Ok(value),
    }
}

/// The query of a list lookup: which signal's list (rating when absent).
#[derive(Debug, serde::Deserialize)]
struct ListQuery {
    signal: Option<String>,
}

async fn list(
    State(s): State<HttpState>,
    ApiPath(item): ApiPath<String>,
    ApiQuery(q): ApiQuery<ListQuery>,
) -> Result<Json<NeighborRecord>, ApiError> {
    check_id(&s, "item", &item)?;
    owned_here(&s, &[&item])?;
    let signal = match q.signal.as_deref() {
        None => Signal::Rating,
        Some(name) => Signal::parse(name).ok_or_else(|| {
            ApiError::new(
                StatusCode::BAD_REQUEST,
                "bad_signal",
                "signal: expected \"rating\" or \"purchase\"",
            )
        })?,
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
    .await?;
    found.map(Json).ok_or_else(|| {
        ApiError::new(
            StatusCode::NOT_FOUND,
            "not_found",
            format!("item {item:?} has no published {} list", signal.as_str()),
        )
    })
}

/// What a pair lookup found.
enum PairAnswer {
    /// The explain view.
    Explained(String),
    /// An item is not in the store.
    Unknown,
    /// Fewer co-raters than `similarity.min_common_users` (their number).
    BelowSupport(u64),
}

/// The explain view of a pair, refused below `similarity.min_common_users`: with one
/// co-rater the sums are that person's exact rating deviations, which an anonymous
/// caller must not read.
async fn pair(
    State(s): State<HttpState>,
    ApiPath((a, b)): ApiPath<(String, String)>,
) -> Result<String, ApiError> {
    check_id(&s, "first item", &a)?;
    check_id(&s, "second item", &b)?;
    owned_here(&s, &[&a, &b])?;
    let settings = s.lists;
    let (qa, qb) = (a.clone(), b.clone());
    let found = with_store(&s, move |store| {
        let (Some(ia), Some(ib)) = (store.item_id(&qa), store.item_id(&qb)) else {
            return Ok(PairAnswer::Unknown);
        };
        let co_raters = store.rating_pair(ia, ib)?.map_or(0, |p| p.n.max(0) as u64);
        if co_raters < settings.min_common_users {
            return Ok(PairAnswer::BelowSupport(co_raters));
        }
        explain_pair(store, &qa, &qb, &settings).map(PairAnswer::Explained)
    })
    .await?;
    match found {
        PairAnswer::Explained(text) => Ok(text),
        PairAnswer::Unknown => Err(ApiError::new(
            StatusCode::NOT_FOUND,
            "not_found",
            format!("{a:?} or {b:?} is not in the store"),
        )),
        PairAnswer::BelowSupport(n) => Err(ApiError::new(
            StatusCode::NOT_FOUND,
            "below_support",
            format!(
                "the pair has {n} co-rater(s), fewer than similarity.min_common_users = {}: its sums would show individual ratings",
                settings.min_common_users
            ),
        )),
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

async fn admin(State(s): State<HttpState>, ApiPath(action): ApiPath<String>, headers: HeaderMap) -> Response {
    if s.admin_token.is_empty() {
        return ApiError::new(
            StatusCode::FORBIDDEN,
            "admin_off",
            "state-changing endpoints are off: set http.admin_token (SIMTIDE_HTTP__ADMIN_TOKEN)",
        )
        .into_response();
    }
    if !authorized(&headers, &s.admin_token) {
        Observation::AdminRefused.emit(&s.metrics);
        return (
            [(header::WWW_AUTHENTICATE, "Bearer")],
            ApiError::new(
                StatusCode::UNAUTHORIZED,
                "unauthorized",
                "a valid bearer token is required",
            ),
        )
            .into_response();
    }
    if action == "snapshot" {
        return take_snapshot(&s).await;
    }
    let flag = match action.as_str() {
        "publish" => &s.admin.publish,
        "republish" => &s.admin.republish,
        "compact" => &s.admin.compact,
        _ => {
            return ApiError::new(
                StatusCode::NOT_FOUND,
                "no_such_action",
                "actions: publish, republish, compact, snapshot",
            )
            .into_response()
        }
    };
    flag.store(true, Ordering::Relaxed);
    tracing::info!(action, "admin request accepted");
    (StatusCode::ACCEPTED, format!("{action} requested\n")).into_response()
}

/// What a snapshot holds, answered by `POST /v1/admin/snapshot`.
#[derive(Debug, Serialize)]
struct SnapshotTaken {
    /// The snapshot's directory, under `store.snapshot_dir`.
    path: String,
    /// Events applied up to the snapshot.
    events_applied: u64,
    /// Next offset of each input partition, by topic: where a service started on the
    /// snapshot continues.
    offsets: std::collections::BTreeMap<String, std::collections::BTreeMap<i32, i64>>,
}

/// Writes a snapshot of the store under `store.snapshot_dir`, in a new directory named by
/// the time (never a path from the request), and answers with its positions.
async fn take_snapshot(s: &HttpState) -> Response {
    let Some(root) = s.snapshots.clone() else {
        return ApiError::new(
            StatusCode::CONFLICT,
            "snapshots_off",
            "snapshots are off: set store.snapshot_dir (SIMTIDE_STORE__SNAPSHOT_DIR)",
        )
        .into_response();
    };
    let name = format!("snapshot-{}", crate::timefmt::now_nanos().0);
    let path = root.join(name);
    let lookups = s.lookups.clone();
    let taken = tokio::task::spawn_blocking(move || {
        lookups.read(|store| {
            store.snapshot_to(&path)?;
            let snapshot = Store::open_read_only(&path)?;
            let ledger = snapshot.ledger();
            Ok(SnapshotTaken {
                path: path.display().to_string(),
                events_applied: ledger.next_seq,
                offsets: ledger.offsets.clone(),
            })
        })
    })
    .await;
    match taken {
        Ok(Ok(taken)) => {
            tracing::info!(path = %taken.path, events = taken.events_applied, "snapshot written");
            (StatusCode::CREATED, Json(taken)).into_response()
        }
        Ok(Err(e)) => ApiError::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "snapshot_failed",
            format!("{e:#}"),
        )
        .into_response(),
        Err(e) => ApiError::new(StatusCode::INTERNAL_SERVER_ERROR, "internal", e.to_string()).into_response(),
    }
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
pub async fn serve(listener: TcpListener, state: HttpState, limits: ConnectionLimits) {
    let app = router(state);
    let places = Arc::new(Semaphore::new(limits.max_connections));
    loop {
        // At the cap, new connections wait in the listen backlog until one closes.
        let Ok(place) = places.clone().acquire_owned().await else {
            return;
        };
        let stream = match listener.accept().await {
            Ok((stream, _)) => stream,
            Err(e) => {
                tracing::warn!(error = %e, "HTTP accept failed");
                tokio::time::sleep(Duration::from_millis(100)).await;
                continue;
            }
        };
        let service = hyper_util::service::TowerToHyperService::new(app.clone());
        let header_timeout = limits.header_timeout;
        tokio::spawn(async move {
            let _place = place;
            let mut connection = hyper::server::conn::http1::Builder::new();
            connection
                .timer(hyper_util::rt::TokioTimer::new())
                .header_read_timeout(header_timeout);
            // A client that stalls or hangs up only ends its own connection.
            let _ = connection
                .serve_connection(hyper_util::rt::TokioIo::new(stream), service)
                .await;
        });
    }
}

/// What one client may hold of the listener: connections at once, and the time to send a
/// request's headers (a client that opens connections and sends nothing cannot hold them).
#[derive(Debug, Clone, Copy)]
pub struct ConnectionLimits {
    /// `http.max_connections`.
    pub max_connections: usize,
    /// `http.header_timeout`.
    pub header_timeout: Duration,
}
