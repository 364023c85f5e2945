//! Predicted ratings and recommendations, from lists and rows the caller has read.
//!
//! p(u, i) = Σ_j s(i,j)^ρ · r_uj / Σ_j |s(i,j)^ρ| over the user's rated items j in i's
//! neighborhood (the weighted sum of Sarwar et al. 2001; ρ is case amplification after
//! Breese, Heckerman and Kadie 1998, sign kept). The neighborhood is either i's published
//! list (what serving has) or the k most similar of the user's rated items, scored from the
//! stored sums (Sarwar et al.'s own definition). Ranking candidates by it, or by
//! similarity mass, is `ranking`'s job.

use std::collections::HashMap;

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

/// What a recommendation needs to know of a user.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct UserHistory {
    /// Ratings that take part in predictions and similarity mass (after the interaction
    /// cut).
    pub ratings: HashMap<u32, f64>,
    /// Items the user bought, whose purchase lists may feed candidates.
    pub bought: FxHashSet<u32>,
    /// Every item the user has: also ratings left out by the cut, and purchases.
    pub owned: FxHashSet<u32>,
}

impl UserHistory {
    /// The mean of the ratings that take part, summed in value order (the same to the
    /// last bit whatever order they were loaded in); `None` without ratings.
    pub fn mean_rating(&self) -> Option<f64> {
        let mut values: Vec<f64> = self.ratings.values().copied().collect();
        values.sort_unstable_by(f64::total_cmp);
        (!values.is_empty()).then(|| values.iter().sum::<f64>() / values.len() as f64)
    }
}

/// The history of a stored user, with the store's interaction cut.
pub fn user_history(state: &UserState, cut: usize) -> UserHistory {
    let ratings = state.active_ratings(cut).into_iter().collect();
    let bought: FxHashSet<u32> = state.purchases.iter().map(|p| p.item).collect();
    let owned = state
        .ratings
        .iter()
        .filter(|r| r.value.is_some())
        .map(|r| r.item)
        .chain(bought.iter().copied())
        .collect();
    UserHistory {
        ratings,
        bought,
        owned,
    }
}

/// s^ρ with the sign of s kept: case amplification of a similarity. ρ = 1, the default,
/// skips the power (a profile of recommendation requests found `pow` at 8 % of the time).
pub fn amplified(s: f64, rho: f64) -> f64 {
    if rho == 1.0 {
        s
    } else {
        s.signum() * s.abs().powf(rho)
    }
}

/// Σ s^ρ·r / Σ |s^ρ| over (similarity, rating) pairs, sign of s kept; `None` when empty.
fn weighted_sum(pairs: impl Iterator<Item = (f64, f64)>, rho: f64) -> Option<f64> {
    let (mut num, mut den) = (0.0, 0.0);
    for (s, r) in pairs {
        let w = amplified(s, rho);
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
