//! Predicted ratings and recommendations from the published rating lists.
//!
//! p(u, i) = Σ_j s(i,j)^ρ · r_uj / Σ_j |s(i,j)^ρ| over the user's rated items j that appear
//! in i's list (the weighted sum of Sarwar et al. 2001; ρ is case amplification after
//! Breese, Heckerman and Kadie 1998, sign kept). Candidates are the neighbors of the
//! user's items, minus what the user already has and unavailable items. When none of the
//! user's items is among a candidate's neighbors, the user's mean rating stands in.

use std::collections::{BTreeSet, HashMap};

use anyhow::Result;
use rustc_hash::FxHashSet;

use crate::signal::Signal;
use crate::store::Store;

/// Rating lists in memory: item → (neighbor, score), best first.
#[derive(Debug, Default, Clone)]
pub struct NeighborIndex {
    lists: HashMap<u32, Vec<(u32, f64)>>,
}

impl NeighborIndex {
    /// The rating lists published in a store.
    pub fn from_store(store: &Store) -> Result<NeighborIndex> {
        let mut lists = HashMap::new();
        for entry in store.all_published() {
            let (signal, item, list) = entry?;
            if signal == Signal::Rating && !list.neighbors.is_empty() {
                lists.insert(item, list.neighbors.iter().map(|n| (n.item, n.score)).collect());
            }
        }
        Ok(NeighborIndex { lists })
    }

    /// Builds an index from lists computed elsewhere (evaluation sweeps).
    pub fn from_lists(lists: HashMap<u32, Vec<(u32, f64)>>) -> NeighborIndex {
        NeighborIndex { lists }
    }

    /// The list of one item (empty when it has none).
    pub fn neighbors(&self, item: u32) -> &[(u32, f64)] {
        self.lists.get(&item).map_or(&[], Vec::as_slice)
    }
}

/// A similarity raised to ρ with its sign kept.
fn amplify(score: f64, rho: f64) -> f64 {
    score.signum() * score.abs().powf(rho)
}

/// The weighted-sum prediction of `item` for a user with `ratings` (item → rating), or
/// `None` when none of the user's items is among the item's neighbors.
pub fn predict(index: &NeighborIndex, ratings: &HashMap<u32, f64>, item: u32, rho: f64) -> Option<f64> {
    let (mut num, mut den) = (0.0, 0.0);
    for &(j, s) in index.neighbors(item) {
        if let Some(r) = ratings.get(&j) {
            let w = amplify(s, rho);
            num += w * r;
            den += w.abs();
        }
    }
    (den > 0.0).then(|| num / den)
}

/// One recommended item.
#[derive(Debug, Clone, PartialEq)]
pub struct Recommendation {
    /// Dense item id.
    pub item: u32,
    /// Predicted rating.
    pub predicted: f64,
    /// False when the user's mean stood in for a missing neighbor-based prediction.
    pub from_neighbors: bool,
}

/// Up to `count` items for a user with these ratings (and other owned items, e.g.
/// purchases), ranked by prediction, ties by item id. Empty for a user with no ratings.
pub fn recommend_for(
    index: &NeighborIndex,
    ratings: &HashMap<u32, f64>,
    owned: &FxHashSet<u32>,
    unavailable: &FxHashSet<u32>,
    count: usize,
    rho: f64,
) -> Vec<Recommendation> {
    if ratings.is_empty() {
        return Vec::new();
    }
    let mean = ratings.values().sum::<f64>() / ratings.len() as f64;
    let candidates: BTreeSet<u32> = ratings
        .keys()
        .flat_map(|j| index.neighbors(*j).iter().map(|(i, _)| *i))
        .filter(|i| !ratings.contains_key(i) && !owned.contains(i) && !unavailable.contains(i))
        .collect();
    let mut out: Vec<Recommendation> = candidates
        .into_iter()
        .map(|item| match predict(index, ratings, item, rho) {
            Some(p) => Recommendation {
                item,
                predicted: p,
                from_neighbors: true,
            },
            None => Recommendation {
                item,
                predicted: mean,
                from_neighbors: false,
            },
        })
        .collect();
    out.sort_by(|a, b| b.predicted.total_cmp(&a.predicted).then(a.item.cmp(&b.item)));
    out.truncate(count);
    out
}

/// Recommendations for a stored user by name, from the store's published lists.
pub fn recommend_user(store: &Store, user: &str, count: usize, rho: f64) -> Result<Vec<Recommendation>> {
    let Some(state) = store.user_state(user)? else {
        return Ok(Vec::new());
    };
    let ratings: HashMap<u32, f64> = state
        .active_ratings(store.fingerprint().max_items_per_user)
        .into_iter()
        .collect();
    // Everything the user has, also ratings left out by the interaction cut.
    let owned: FxHashSet<u32> = state
        .ratings
        .iter()
        .filter(|r| r.value.is_some())
        .map(|r| r.item)
        .chain(state.purchases.iter().map(|p| p.item))
        .collect();
    let index = NeighborIndex::from_store(store)?;
    Ok(recommend_for(
        &index,
        &ratings,
        &owned,
        &store.unavailable_items()?,
        count,
        rho,
    ))
}
