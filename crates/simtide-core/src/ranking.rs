//! Top-N recommendations: which items are candidates and how they are ranked.
//!
//! Candidates are the neighbors in the rating lists of the user's rated items, and, when
//! purchase lists take part, in the purchase lists of the items the user bought; never
//! what the user already has, never an unavailable item. Two rankings:
//!
//! - **similarity mass**: m(u, i) = Σ_j s(i,j)^ρ over the user's rated items j whose list
//!   holds i, plus w_p · Σ_j s_p(i,j)^ρ over the bought items j whose purchase list holds
//!   i (the item-based top-N of Deshpande and Karypis, ACM TOIS 2004). With normalised
//!   lists, each list's weights are first divided by their sum, so a user's item with
//!   many strong neighbors does not outweigh the others (their normalisation).
//! - **predicted rating**: the weighted sum of `predict` (Sarwar et al. 2001), the user's
//!   mean standing in where no neighbor is rated. Made for rating prediction; for top-N it
//!   favours items with one or two neighbors the user rated highly.

use std::cmp::Ordering;

use rustc_hash::FxHashSet;

use crate::predict::{amplified, NeighborIndex, Predictor, UserHistory};

/// How candidates are scored.
pub enum Scorer<'a> {
    /// Similarity mass; `normalised`: each list's weights sum to 1.
    Mass {
        /// Divide each list's weights by their sum.
        normalised: bool,
    },
    /// The weighted-sum predicted rating.
    Predicted(Predictor<'a>),
}

/// The lists candidates come from.
pub struct CandidateLists<'a> {
    /// Rating lists of (at least) the user's rated items.
    pub rating: &'a NeighborIndex,
    /// Purchase lists of (at least) the user's bought items, and their weight w_p in the
    /// mass; `None` when purchase lists take no part.
    pub purchase: Option<(&'a NeighborIndex, f64)>,
}

/// One recommended item.
#[derive(Debug, Clone, PartialEq)]
pub struct Recommendation {
    /// Dense item id.
    pub item: u32,
    /// What the ranking sorts by: similarity mass or predicted rating.
    pub score: f64,
    /// False when the user's mean stood in for a missing neighbor-based prediction.
    pub from_neighbors: bool,
}

/// Every (candidate, term) pair, one per list that holds the candidate, sorted by
/// candidate and then by value: one vector sorted once, rather than a vector per
/// candidate (those allocations were a fifth of a request's time in a profile).
fn mass_terms(
    lists: &CandidateLists,
    user: &UserHistory,
    unavailable: &FxHashSet<u32>,
    rho: f64,
    normalised: bool,
) -> Vec<(u32, f64)> {
    // `owned` holds every item the user rated (also those the cut leaves out) or bought.
    let eligible = |i: u32| !user.owned.contains(&i) && !unavailable.contains(&i);
    let mut terms: Vec<(u32, f64)> = Vec::new();
    let mut gather = |index: &NeighborIndex, items: &mut dyn Iterator<Item = u32>, weight: f64| {
        for j in items {
            let list = index.neighbors(j);
            let total: f64 = if normalised {
                list.iter().map(|(_, s)| amplified(*s, rho)).sum()
            } else {
                1.0
            };
            if total <= 0.0 {
                continue;
            }
            terms.extend(
                list.iter()
                    .filter(|(i, _)| eligible(*i))
                    .map(|&(i, s)| (i, weight * amplified(s, rho) / total)),
            );
        }
    };
    gather(lists.rating, &mut user.ratings.keys().copied(), 1.0);
    if let Some((index, weight)) = lists.purchase {
        if weight > 0.0 {
            gather(index, &mut user.bought.iter().copied(), weight);
        }
    }
    terms.sort_unstable_by(|a, b| a.0.cmp(&b.0).then(a.1.total_cmp(&b.1)));
    terms
}

/// The user's candidates, in id order: what a caller must read lists or rows of before
/// predicting them ([`predict_candidates`]).
pub fn candidates(lists: &CandidateLists, user: &UserHistory, unavailable: &FxHashSet<u32>) -> Vec<u32> {
    let mut items: Vec<u32> = mass_terms(lists, user, unavailable, 1.0, false)
        .into_iter()
        .map(|(i, _)| i)
        .collect();
    items.dedup();
    items
}

/// The weighted-sum prediction of each candidate, the user's mean standing in where no
/// neighbor is rated; empty for a user without ratings.
pub fn predict_candidates(
    predictor: &Predictor,
    user: &UserHistory,
    candidates: &[u32],
    rho: f64,
) -> Vec<Recommendation> {
    let Some(mean) = user.mean_rating() else {
        return Vec::new();
    };
    candidates
        .iter()
        .map(|&item| match predictor.predict(&user.ratings, item, rho) {
            Some(p) => Recommendation {
                item,
                score: p,
                from_neighbors: true,
            },
            None => Recommendation {
                item,
                score: mean,
                from_neighbors: false,
            },
        })
        .collect()
}

/// Every candidate of the user with its score, in no particular order; empty for a user
/// with nothing to draw on. A candidate's mass terms are added in ascending order of
/// value, so a score is the same to the last bit whatever order the lists were read in.
pub fn score_candidates(
    lists: &CandidateLists,
    scorer: &Scorer,
    user: &UserHistory,
    unavailable: &FxHashSet<u32>,
    rho: f64,
) -> Vec<Recommendation> {
    match scorer {
        Scorer::Mass { normalised } => mass_terms(lists, user, unavailable, rho, *normalised)
            .chunk_by(|a, b| a.0 == b.0)
            .map(|run| Recommendation {
                item: run[0].0,
                score: run.iter().map(|(_, t)| *t).sum(),
                from_neighbors: true,
            })
            .collect(),
        Scorer::Predicted(predictor) => {
            predict_candidates(predictor, user, &candidates(lists, user, unavailable), rho)
        }
    }
}

/// The best `count` of `scored`, best first: score descending, ties by `tie` (callers
/// break ties by item name, which, unlike dense ids, every store agrees on).
pub fn best_first(
    mut scored: Vec<Recommendation>,
    count: usize,
    tie: impl Fn(u32, u32) -> Ordering,
) -> Vec<Recommendation> {
    let order = |a: &Recommendation, b: &Recommendation| {
        b.score.total_cmp(&a.score).then_with(|| tie(a.item, b.item))
    };
    if scored.len() > count && count > 0 {
        scored.select_nth_unstable_by(count - 1, order);
        scored.truncate(count);
    }
    scored.sort_unstable_by(order);
    scored.truncate(count);
    scored
}

#[cfg(test)]
mod tests {
    use std::collections::HashMap;

    use super::*;

    fn history(ratings: &[(u32, f64)], bought: &[u32]) -> UserHistory {
        UserHistory {
            ratings: ratings.iter().copied().collect(),
            bought: bought.iter().copied().collect(),
            owned: ratings
                .iter()
                .map(|r| r.0)
                .chain(bought.iter().copied())
                .collect(),
        }
    }

    /// Items 0 and 1 rated; 0's list [2: 0.8, 3: 0.4], 1's list [2: 0.5, 4: 0.5].
    fn index() -> NeighborIndex {
        NeighborIndex::from_lists(HashMap::from([
            (0, vec![(2, 0.8), (3, 0.4)]),
            (1, vec![(2, 0.5), (4, 0.5)]),
        ]))
    }

    fn ranked(
        scorer: &Scorer,
        purchase: Option<(&NeighborIndex, f64)>,
        user: &UserHistory,
    ) -> Vec<(u32, f64)> {
        let index = index();
        let lists = CandidateLists {
            rating: &index,
            purchase,
        };
        best_first(
            score_candidates(&lists, scorer, user, &FxHashSet::default(), 1.0),
            10,
            |a, b| a.cmp(&b),
        )
        .into_iter()
        .map(|r| (r.item, r.score))
        .collect()
    }

    #[test]
    fn mass_sums_the_lists_that_hold_a_candidate() {
        let user = history(&[(0, 5.0), (1, 1.0)], &[]);
        // 2: 0.8 + 0.5 = 1.3; 3: 0.4; 4: 0.5 (ratings do not weigh in).
        let got = ranked(&Scorer::Mass { normalised: false }, None, &user);
        assert_eq!(got, vec![(2, 1.3), (4, 0.5), (3, 0.4)]);
        // Normalised: 0's list sums to 1.2, 1's to 1.0. 2: 0.8/1.2 + 0.5 = 1.1666…;
        // 3: 0.4/1.2 = 0.333…; 4: 0.5.
        let got = ranked(&Scorer::Mass { normalised: true }, None, &user);
        let want = [(2, 0.5 + 0.8 / 1.2), (4, 0.5), (3, 0.4 / 1.2)];
        assert_eq!(got.len(), 3);
        for ((item, score), (w_item, w_score)) in got.into_iter().zip(want) {
            assert_eq!(item, w_item);
            assert!((score - w_score).abs() < 1e-15, "{item}: {score} vs {w_score}");
        }
    }

    #[test]
    fn purchase_lists_add_weighted_mass_and_candidates() {
        let purchases = NeighborIndex::from_lists(HashMap::from([(7, vec![(3, 1.0), (8, 0.5)])]));
        let user = history(&[(0, 5.0), (1, 1.0)], &[7]);
        // 3: 0.4 + 0.5·1.0 = 0.9; 8: 0.5·0.5 = 0.25.
        let got = ranked(
            &Scorer::Mass { normalised: false },
            Some((&purchases, 0.5)),
            &user,
        );
        assert_eq!(got, vec![(2, 1.3), (3, 0.9), (4, 0.5), (8, 0.25)]);
        // Weight 0: the purchase lists take no part.
        let got = ranked(
            &Scorer::Mass { normalised: false },
            Some((&purchases, 0.0)),
            &user,
        );
        assert_eq!(got.len(), 3);
    }

    #[test]
    fn never_what_the_user_has_nor_an_unavailable_item() {
        let index = index();
        let lists = CandidateLists {
            rating: &index,
            purchase: None,
        };
        let mut user = history(&[(0, 5.0), (1, 1.0)], &[]);
        user.owned.insert(2);
        let unavailable: FxHashSet<u32> = [4].into_iter().collect();
        let got = score_candidates(
            &lists,
            &Scorer::Mass { normalised: false },
            &user,
            &unavailable,
            1.0,
        );
        assert_eq!(got.iter().map(|r| r.item).collect::<Vec<_>>(), vec![3]);
    }

    #[test]
    fn best_first_keeps_the_top_count_and_breaks_ties_by_the_given_order() {
        let scored = [(5, 0.5), (1, 0.9), (2, 0.5), (9, 0.1), (3, 0.5)]
            .into_iter()
            .map(|(item, score)| Recommendation {
                item,
                score,
                from_neighbors: true,
            })
            .collect();
        let got: Vec<u32> = best_first(scored, 3, |a, b| b.cmp(&a))
            .into_iter()
            .map(|r| r.item)
            .collect();
        assert_eq!(got, vec![1, 5, 3]);
    }
}
