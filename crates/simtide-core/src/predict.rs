//! Predicted ratings and recommendations, from lists and rows the caller has read.
//!
//! p(u, i) = Σ_j s(i,j)^ρ · r_uj / Σ_j |s(i,j)^ρ| over the user's rated items j in i's
//! neighborhood (the weighted sum of Sarwar et al. 2001; ρ is case amplification after
//! Breese, Heckerman and Kadie 1998, sign kept). The neighborhood is either i's published
//! list (what serving has) or the k most similar of the user's rated items, scored from the
//! stored sums (Sarwar et al.'s own definition). Candidates are the list neighbors of the
//! user's items, minus what the user already has and unavailable items. When no neighbor
//! is rated the user's mean rating stands in.

use std::collections::{BTreeSet, HashMap};

use rustc_hash::FxHashSet;

use crate::engine::user_state::UserState;
use crate::model::RatingPairStats;
use crate::score::{rating_list_score, ListSettings};

/// Rating lists in memory: item → (neighbor, score), best first.
#[derive(Debug, Default, Clone)]
pub struct NeighborIndex {
    lists: HashMap<u32, Vec<(u32, f64)>>,
}

impl NeighborIndex {
    /// Builds an index from rating lists: item → (neighbor, score), best first.
    pub fn from_lists(lists: HashMap<u32, Vec<(u32, f64)>>) -> NeighborIndex {
        NeighborIndex { lists }
    }

    /// The list of one item (empty when it has none).
    pub fn neighbors(&self, item: u32) -> &[(u32, f64)] {
        self.lists.get(&item).map_or(&[], Vec::as_slice)
    }
}

/// A user's ratings that take part in predictions, and every item the user has (also
/// ratings left out by the interaction cut, and purchases).
pub fn user_history(state: &UserState, cut: usize) -> (HashMap<u32, f64>, FxHashSet<u32>) {
    let ratings = state.active_ratings(cut).into_iter().collect();
    let owned = state
        .ratings
        .iter()
        .filter(|r| r.value.is_some())
        .map(|r| r.item)
        .chain(state.purchases.iter().map(|p| p.item))
        .collect();
    (ratings, owned)
}

/// Σ s^ρ·r / Σ |s^ρ| over (similarity, rating) pairs, sign of s kept; `None` when empty.
fn weighted_sum(pairs: impl Iterator<Item = (f64, f64)>, rho: f64) -> Option<f64> {
    let (mut num, mut den) = (0.0, 0.0);
    for (s, r) in pairs {
        let w = s.signum() * s.abs().powf(rho);
        num += w * r;
        den += w.abs();
    }
    (den > 0.0).then(|| num / den)
}

/// Publishable scores of whole rows, for predictions from the user's rated items:
/// item → (other, score) sorted by other.
#[derive(Debug, Default)]
pub struct ScoreTable {
    rows: HashMap<u32, Vec<(u32, f64)>>,
    /// How many of the user's rated items a prediction may use.
    neighbors: usize,
}

impl ScoreTable {
    /// Scores whole rows of pair sums (item → its row, sorted by other item) under
    /// `settings`.
    pub fn from_rows(
        stored: impl IntoIterator<Item = (u32, Vec<(u32, RatingPairStats)>)>,
        settings: &ListSettings,
    ) -> ScoreTable {
        let mut rows = HashMap::new();
        for (item, row) in stored {
            let row: Vec<(u32, f64)> = row
                .into_iter()
                .filter(|(other, _)| *other != item)
                .filter_map(|(other, stats)| rating_list_score(&stats, settings).map(|s| (other, s)))
                .collect();
            rows.insert(item, row);
        }
        ScoreTable {
            rows,
            neighbors: settings.neighbors,
        }
    }

    fn score(&self, item: u32, other: u32) -> Option<f64> {
        let row = self.rows.get(&item)?;
        row.binary_search_by_key(&other, |(o, _)| *o)
            .ok()
            .map(|i| row[i].1)
    }
}

/// How predictions find an item's neighbors.
pub enum Predictor<'a> {
    /// From the item's list.
    List(&'a NeighborIndex),
    /// The most similar of the user's rated items, from whole scored rows.
    Rated(&'a ScoreTable),
}

impl Predictor<'_> {
    /// The weighted-sum prediction of `item` for a user with `ratings`, or `None` when no
    /// neighbor of the item is rated by the user.
    pub fn predict(&self, ratings: &HashMap<u32, f64>, item: u32, rho: f64) -> Option<f64> {
        match self {
            Predictor::List(index) => weighted_sum(
                index
                    .neighbors(item)
                    .iter()
                    .filter_map(|(j, s)| ratings.get(j).map(|r| (*s, *r))),
                rho,
            ),
            Predictor::Rated(table) => {
                let mut scored: Vec<(f64, u32, f64)> = ratings
                    .iter()
                    .filter_map(|(j, r)| table.score(item, *j).map(|s| (s, *j, *r)))
                    .collect();
                scored.sort_unstable_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
                scored.truncate(table.neighbors);
                weighted_sum(scored.into_iter().map(|(s, _, r)| (s, r)), rho)
            }
        }
    }
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

/// What a recommendation needs to know of the user.
pub struct UserView<'a> {
    /// Ratings taking part in predictions.
    pub ratings: &'a HashMap<u32, f64>,
    /// Everything the user has.
    pub owned: &'a FxHashSet<u32>,
}

/// Up to `count` items for a user, ranked by prediction, ties by item id. Candidates come
/// from the lists of the user's rated items. Empty for a user with no ratings.
pub fn recommend_for(
    index: &NeighborIndex,
    predictor: &Predictor,
    user: &UserView,
    unavailable: &FxHashSet<u32>,
    count: usize,
    rho: f64,
) -> Vec<Recommendation> {
    if user.ratings.is_empty() {
        return Vec::new();
    }
    let mean = user.ratings.values().sum::<f64>() / user.ratings.len() as f64;
    let candidates: BTreeSet<u32> = user
        .ratings
        .keys()
        .flat_map(|j| index.neighbors(*j).iter().map(|(i, _)| *i))
        .filter(|i| !user.ratings.contains_key(i) && !user.owned.contains(i) && !unavailable.contains(i))
        .collect();
    let mut out = Vec::with_capacity(candidates.len());
    for item in candidates {
        out.push(match predictor.predict(user.ratings, item, rho) {
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
        });
    }
    out.sort_by(|a, b| b.predicted.total_cmp(&a.predicted).then(a.item.cmp(&b.item)));
    out.truncate(count);
    out
}
