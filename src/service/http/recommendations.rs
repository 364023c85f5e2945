//! `GET /v1/users/{user}/recommendations?count=N`: the ranking `simtide recommend` prints,
//! as JSON, read-only and under the lookups' limits (places and request time). An
//! unsharded instance reads every list from its store; a shard reads its own items' lists
//! from its store and the others' from the list topic it follows (docs/design.md,
//! "Recommendations").

use axum::extract::State;
use axum::http::StatusCode;
use axum::Json;
use serde::{Deserialize, Serialize};

use super::extract::{ApiPath, ApiQuery};
use super::{check_id, with_store, ApiError, HttpState};
use crate::views::recommend::{recommend_user, StoredLists};

/// Most items one request may ask for: a bound on the answer's size, far above any
/// page a shop shows.
pub const MOST_ITEMS: usize = 1000;

/// The query: how many items (`recommend.count` when absent).
#[derive(Debug, Deserialize)]
pub(super) struct CountQuery {
    count: Option<String>,
}

/// One recommended item in the answer.
#[derive(Debug, Serialize)]
struct RecommendedItem {
    /// The item id.
    item: String,
    /// What the ranking sorts by (`ranking`): similarity mass or predicted rating.
    score: f64,
    /// `neighbors` when the score comes from the item's neighbors, `user_mean` when the
    /// user's mean stood in.
    basis: &'static str,
}

/// The answer: the user's items, best first.
#[derive(Debug, Serialize)]
pub(super) struct Recommended {
    user: String,
    /// `recommend.ranking`: what `score` is.
    ranking: &'static str,
    items: Vec<RecommendedItem>,
}

/// The count asked for, refused with its reason when it is not a whole number from 1 to
/// [`MOST_ITEMS`].
fn parse_count(text: Option<&str>, default: usize) -> Result<usize, ApiError> {
    let Some(text) = text else {
        return Ok(default);
    };
    match text.parse::<usize>() {
        Ok(n) if (1..=MOST_ITEMS).contains(&n) => Ok(n),
        _ => Err(ApiError::new(
            StatusCode::BAD_REQUEST,
            "bad_count",
            format!("count: expected a whole number from 1 to {MOST_ITEMS}, got {text:?}"),
        )),
    }
}

/// Answers the user's recommendations; 404 for a user the store does not know, 503
/// while a shard has not yet read the other shards' lists.
pub(super) async fn for_user(
    State(s): State<HttpState>,
    ApiPath(user): ApiPath<String>,
    ApiQuery(q): ApiQuery<CountQuery>,
) -> Result<Json<Recommended>, ApiError> {
    check_id(&s, "user", &user)?;
    let count = parse_count(q.count.as_deref(), s.config.recommend.count)?;
    if s.other_lists.as_ref().is_some_and(|table| !table.loaded()) {
        return Err(ApiError::new(
            StatusCode::SERVICE_UNAVAILABLE,
            "lists_loading",
            format!(
                "this shard is still reading the other shards' lists from the list topics ({}); try again shortly",
                s.config.kafka.output_topic
            ),
        ));
    }
    let (config, table, wanted) = (s.config.clone(), s.other_lists.clone(), user.clone());
    let found = with_store(&s, move |store| {
        let Some(recs) = (match &table {
            Some(others) => recommend_user(store, others, &wanted, count, &config)?,
            None => recommend_user(store, &StoredLists, &wanted, count, &config)?,
        }) else {
            return Ok(None);
        };
        Ok(Some(
            recs.into_iter()
                .map(|r| RecommendedItem {
                    item: store.item_name(r.item).to_string(),
                    score: r.score,
                    basis: if r.from_neighbors {
                        "neighbors"
                    } else {
                        "user_mean"
                    },
                })
                .collect(),
        ))
    })
    .await?;
    match found {
        Some(items) => Ok(Json(Recommended {
            user,
            ranking: s.config.recommend.ranking.as_str(),
            items,
        })),
        None => Err(ApiError::new(
            StatusCode::NOT_FOUND,
            "unknown_user",
            "the store holds no events of this user (never seen, or erased)",
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_count_is_a_whole_number_within_bounds() {
        assert_eq!(parse_count(None, 10).unwrap(), 10);
        assert_eq!(parse_count(Some("25"), 10).unwrap(), 25);
        for bad in ["0", "-3", "ten", "1001", ""] {
            let e = parse_count(Some(bad), 10).unwrap_err();
            assert_eq!(e.error, "bad_count", "{bad}");
            assert!(e.detail.contains("count"), "{}", e.detail);
        }
    }
}
