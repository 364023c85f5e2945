//! Recommendations for a stored user: reads the user's history, the published rating lists
//! and (for the `rated` neighborhood) the candidates' rows from the store, then ranks with
//! the core's weighted-sum predictor (`simtide_core::predict`).

use std::collections::{BTreeSet, HashMap};

use anyhow::Result;

use crate::config::{Config, Neighborhood};
use crate::predict::{
    recommend_for, user_history, NeighborIndex, Predictor, Recommendation, ScoreTable, UserView,
};
use crate::signal::Signal;
use crate::store::Store;

/// The rating lists published in a store, as a neighbor index.
pub fn published_rating_lists(store: &Store) -> Result<NeighborIndex> {
    let mut lists = HashMap::new();
    for entry in store.all_published() {
        let (signal, item, list) = entry?;
        if signal == Signal::Rating && !list.neighbors.is_empty() {
            lists.insert(item, list.neighbors.iter().map(|n| (n.item, n.score)).collect());
        }
    }
    Ok(NeighborIndex::from_lists(lists))
}

/// Recommendations for a stored user by name, with the configuration's `[recommend]`
/// settings and list settings.
pub fn recommend_user(
    store: &Store,
    user: &str,
    count: usize,
    config: &Config,
) -> Result<Vec<Recommendation>> {
    let Some(state) = store.user_state(user)? else {
        return Ok(Vec::new());
    };
    let (ratings, owned) = user_history(&state, store.fingerprint().max_items_per_user);
    let index = published_rating_lists(store)?;
    let table = match config.recommend.neighborhood {
        Neighborhood::List => ScoreTable::default(),
        // Only candidates are predicted: score just their rows.
        Neighborhood::Rated => {
            let candidates: BTreeSet<u32> = ratings
                .keys()
                .flat_map(|j| index.neighbors(*j).iter().map(|(i, _)| *i))
                .collect();
            let rows = candidates
                .into_iter()
                .map(|item| Ok((item, store.rating_row(item)?)))
                .collect::<Result<Vec<_>>>()?;
            ScoreTable::from_rows(rows, &config.list_settings())
        }
    };
    let predictor = match config.recommend.neighborhood {
        Neighborhood::List => Predictor::List(&index),
        Neighborhood::Rated => Predictor::Rated(&table),
    };
    let view = UserView {
        ratings: &ratings,
        owned: &owned,
    };
    Ok(recommend_for(
        &index,
        &predictor,
        &view,
        &store.unavailable_items()?,
        count,
        config.recommend.amplification,
    ))
}
