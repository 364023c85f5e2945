//! Recommendations for a stored user: reads the user's history, the lists of the user's
//! items (and, for the predicted rating, of their candidates, or their rows for the
//! `rated` neighborhood), then ranks with the core (`simtide_core::ranking`). Lists are
//! read one by one, so the cost follows the user's history, not the catalogue.

use std::collections::HashMap;
use std::sync::Arc;

use anyhow::Result;

use crate::config::{Config, Neighborhood, Ranking};
use crate::kafka::list_table::ListTable;
use crate::predict::{user_history, NeighborIndex, Predictor, ScoreTable};
use crate::ranking::{
    best_first, candidates, predict_candidates, score_candidates, CandidateLists, Recommendation, Scorer,
};
use crate::signal::Signal;
use crate::store::Store;

/// Where a recommendation reads items' lists from: the lists differ between a store that
/// publishes every item and a shard that publishes only its own.
pub trait ItemLists {
    /// The `signal` list of `item` as (neighbor, score), best first; empty when it has none.
    fn list(&self, store: &Store, signal: Signal, item: u32) -> Result<Vec<(u32, f64)>>;
}

/// The lists the store itself published: every list of an unsharded store.
pub struct StoredLists;

impl ItemLists for StoredLists {
    fn list(&self, store: &Store, signal: Signal, item: u32) -> Result<Vec<(u32, f64)>> {
        Ok(store
            .published(signal, item)?
            .map(|list| list.neighbors.iter().map(|n| (n.item, n.score)).collect())
            .unwrap_or_default())
    }
}

/// A shard's view of every list: its own items' lists from its store, the other shards'
/// from the list topics read as tables (docs/design.md, "Recommendations").
#[derive(Clone)]
pub struct OtherShardLists {
    /// The other shards' rating lists, by item name.
    pub rating: Arc<ListTable>,
    /// The other shards' purchase lists, when purchase lists take part.
    pub purchase: Option<Arc<ListTable>>,
}

impl OtherShardLists {
    /// Whether every table has been read to the end its topic had at start-up.
    pub fn loaded(&self) -> bool {
        self.rating.loaded() && self.purchase.as_ref().is_none_or(|t| t.loaded())
    }

    /// How many lists the tables hold.
    pub fn held(&self) -> usize {
        self.rating.held() + self.purchase.as_ref().map_or(0, |t| t.held())
    }
}

impl ItemLists for OtherShardLists {
    fn list(&self, store: &Store, signal: Signal, item: u32) -> Result<Vec<(u32, f64)>> {
        let name = store.item_name(item);
        if store.shard().owns(name) {
            return StoredLists.list(store, signal, item);
        }
        let table = match signal {
            Signal::Rating => Some(&self.rating),
            Signal::Purchase => self.purchase.as_ref(),
        };
        // A neighbor the store has never seen cannot be recommended by name here; every
        // shard reads every event, so this happens only for items newer than its view.
        Ok(table
            .and_then(|t| t.list(name))
            .into_iter()
            .flatten()
            .filter_map(|(other, score)| store.item_id(&other).map(|id| (id, score)))
            .collect())
    }
}

/// The `signal` lists of `items`, read through `lists`, as a neighbor index.
fn index_of<'a>(
    store: &Store,
    lists: &dyn ItemLists,
    signal: Signal,
    items: impl Iterator<Item = &'a u32>,
) -> Result<NeighborIndex> {
    let mut out = HashMap::new();
    for &item in items {
        let list = lists.list(store, signal, item)?;
        if !list.is_empty() {
            out.insert(item, list);
        }
    }
    Ok(NeighborIndex::from_lists(out))
}

/// Recommendations for a stored user by name, with the configuration's `[recommend]`
/// settings and list settings, ties broken by item name; `None` when the store does not
/// know the user.
pub fn recommend_user(
    store: &Store,
    lists: &dyn ItemLists,
    user: &str,
    count: usize,
    config: &Config,
) -> Result<Option<Vec<Recommendation>>> {
    let Some(state) = store.user_state(user)? else {
        return Ok(None);
    };
    let history = user_history(&state, store.fingerprint().max_items_per_user);
    let rc = &config.recommend;
    let of_rated = index_of(store, lists, Signal::Rating, history.ratings.keys())?;
    let purchase = if rc.purchase_weight > 0.0 {
        Some(index_of(store, lists, Signal::Purchase, history.bought.iter())?)
    } else {
        None
    };
    let unavailable = store.unavailable_items()?;
    let candidate_lists = CandidateLists {
        rating: &of_rated,
        purchase: purchase.as_ref().map(|p| (p, rc.purchase_weight)),
    };
    let scored = match rc.ranking {
        Ranking::SimilarityMass => score_candidates(
            &candidate_lists,
            &Scorer::Mass {
                normalised: rc.normalise_lists,
            },
            &history,
            &unavailable,
            rc.amplification,
        ),
        Ranking::PredictedRating => {
            // Candidates first, then what predicting them needs.
            let candidates = candidates(&candidate_lists, &history, &unavailable);
            let (index, table) = match rc.neighborhood {
                // Predictions read each candidate's own list.
                Neighborhood::List => (
                    index_of(store, lists, Signal::Rating, candidates.iter())?,
                    ScoreTable::default(),
                ),
                // Only candidates are predicted: score just their rows.
                Neighborhood::Rated => {
                    let rows = candidates
                        .iter()
                        .map(|&item| Ok((item, store.rating_row(item)?)))
                        .collect::<Result<Vec<_>>>()?;
                    (
                        NeighborIndex::default(),
                        ScoreTable::from_rows(rows, &config.list_settings()),
                    )
                }
            };
            let predictor = match rc.neighborhood {
                Neighborhood::List => Predictor::List(&index),
                Neighborhood::Rated => Predictor::Rated(&table),
            };
            predict_candidates(&predictor, &history, &candidates, rc.amplification)
        }
    };
    // Ties go by item name, not by dense id: ids depend on the order a store first saw
    // its items, so shards and replicas would otherwise cut ties differently.
    Ok(Some(best_first(scored, count, |a, b| {
        store.item_name(a).cmp(store.item_name(b))
    })))
}
