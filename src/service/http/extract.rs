//! Path and query extractors whose refusals answer in the service's JSON error shape
//! (`{"error", "detail"}`) instead of axum's plain-text rejections, so a client parses
//! every answer the same way, a malformed one included.

use axum::extract::{FromRequestParts, Path, Query};
use axum::http::request::Parts;
use axum::http::StatusCode;
use serde::de::DeserializeOwned;

use super::ApiError;

/// The path parameters, or 400 `bad_path`.
pub(super) struct ApiPath<T>(pub T);

impl<S: Send + Sync, T: DeserializeOwned + Send> FromRequestParts<S> for ApiPath<T> {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, ApiError> {
        Path::<T>::from_request_parts(parts, state)
            .await
            .map(|Path(value)| ApiPath(value))
            .map_err(|e| ApiError::new(StatusCode::BAD_REQUEST, "bad_path", e.body_text()))
    }
}

/// The query string, or 400 `bad_query`.
pub(super) struct ApiQuery<T>(pub T);

impl<S: Send + Sync, T: DeserializeOwned + Send> FromRequestParts<S> for ApiQuery<T> {
    type Rejection = ApiError;

    async fn from_request_parts(parts: &mut Parts, state: &S) -> Result<Self, ApiError> {
        Query::<T>::from_request_parts(parts, state)
            .await
            .map(|Query(value)| ApiQuery(value))
            .map_err(|e| ApiError::new(StatusCode::BAD_REQUEST, "bad_query", e.body_text()))
    }
}
