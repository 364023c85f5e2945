//! Top-k selection (docs/design.md, "Publication"): a row of pair sums becomes the best
//! `k` neighbors that may be published, best first, ties broken by item name so that equal
//! inputs give byte-equal lists. The caller reads the row; nothing here touches storage.

use std::cmp::Ordering;

use rustc_hash::FxHashSet;

use crate::model::{Neighbor, RatingPairStats};
use crate::score::{purchase_list_score, rating_list_score, ListSettings};

pub mod buffer;

/// Position of every item id in name order, so ties can be broken by name with integer
/// comparisons (one sort of the catalogue per cycle instead of string compares per row).
pub struct NameOrder(Vec<u32>);

impl NameOrder {
    /// Ranks a catalogue given as item names indexed by dense id.
    pub fn of<S: AsRef<str>>(names: &[S]) -> NameOrder {
        let mut ids: Vec<u32> = (0..names.len() as u32).collect();
        ids.sort_unstable_by(|a, b| names[*a as usize].as_ref().cmp(names[*b as usize].as_ref()));
        let mut rank = vec![0u32; ids.len()];
        for (position, id) in ids.into_iter().enumerate() {
            rank[id as usize] = position as u32;
        }
        NameOrder(rank)
    }

    /// The item's place in name order (items it does not know go last).
    pub fn rank(&self, item: u32) -> u32 {
        self.0.get(item as usize).copied().unwrap_or(u32::MAX)
    }
}

/// Orders candidates best first: score descending, then item name ascending.
fn rank(names: &NameOrder, a: &Neighbor, b: &Neighbor) -> Ordering {
    b.score
        .total_cmp(&a.score)
        .then_with(|| names.rank(a.item).cmp(&names.rank(b.item)))
}

/// Keeps the best `k` candidates, in rank order.
pub fn top_k(names: &NameOrder, mut candidates: Vec<Neighbor>, k: usize) -> Vec<Neighbor> {
    if k == 0 {
        return Vec::new();
    }
    if candidates.len() > k {
        candidates.select_nth_unstable_by(k - 1, |a, b| rank(names, a, b));
        candidates.truncate(k);
    }
    candidates.sort_unstable_by(|a, b| rank(names, a, b));
    candidates
}

/// What list selection must leave out: items marked unavailable.
pub struct Exclusions<'a> {
    /// Dense ids of unavailable items.
    pub unavailable: &'a FxHashSet<u32>,
}

impl Exclusions<'_> {
    /// Whether `item` may be listed.
    pub fn allows(&self, item: u32) -> bool {
        !self.unavailable.contains(&item)
    }
}

/// The list of `item` from its scored candidates: nothing for an excluded item, otherwise
/// the best `k` of the candidates that are not excluded.
pub fn select(
    item: u32,
    candidates: impl Iterator<Item = Neighbor>,
    settings: &ListSettings,
    excluded: &Exclusions,
    names: &NameOrder,
) -> Vec<Neighbor> {
    if !excluded.allows(item) {
        return Vec::new();
    }
    let allowed = candidates.filter(|n| excluded.allows(n.item)).collect();
    top_k(names, allowed, settings.neighbors)
}

/// A freshly computed list, with the size of the row it came from.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoredRow {
    /// The top-k, best first.
    pub neighbors: Vec<Neighbor>,
    /// Other items in the row (rating signal), for counting pairs.
    pub row_len: usize,
}

/// The rating list of `item` from its row of pair sums.
pub fn rating_list(
    item: u32,
    row: &[(u32, RatingPairStats)],
    settings: &ListSettings,
    excluded: &Exclusions,
    names: &NameOrder,
) -> ScoredRow {
    let row_len = row.iter().filter(|(other, _)| *other != item).count();
    ScoredRow {
        neighbors: select(
            item,
            rating_candidates(item, row.iter().map(|(other, stats)| (*other, stats)), settings),
            settings,
            excluded,
            names,
        ),
        row_len,
    }
}

/// The partners of `item` in `row` that have a publishable score, scored.
pub fn rating_candidates<'r>(
    item: u32,
    row: impl IntoIterator<Item = (u32, &'r RatingPairStats)> + 'r,
    settings: &'r ListSettings,
) -> impl Iterator<Item = Neighbor> + 'r {
    row.into_iter()
        .filter(move |(other, _)| *other != item)
        .filter_map(|(other, stats)| rating_neighbor(other, stats, settings))
}

/// `other` as a scored candidate, when its pair sums give a publishable score.
pub fn rating_neighbor(other: u32, stats: &RatingPairStats, settings: &ListSettings) -> Option<Neighbor> {
    rating_list_score(stats, settings).map(|score| Neighbor {
        item: other,
        score,
        support: stats.n as u64,
    })
}

/// One entry of a purchase row as list selection needs it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct CoBuyers {
    /// The other item.
    pub other: u32,
    /// Users who bought both.
    pub both: i64,
    /// Users who bought the other item.
    pub buyers_of_other: i64,
}

/// The purchase list of an item bought by `own_buyers` users, out of `all_buyers`, from
/// its row of co-buyer counts (the item itself excluded by the caller).
pub fn purchase_list(
    item: u32,
    own_buyers: i64,
    all_buyers: i64,
    row: Vec<CoBuyers>,
    settings: &ListSettings,
    excluded: &Exclusions,
    names: &NameOrder,
) -> ScoredRow {
    let candidates = row.into_iter().filter(|c| c.other != item).filter_map(|c| {
        purchase_list_score(c.both, own_buyers, c.buyers_of_other, all_buyers, settings).map(|score| {
            Neighbor {
                item: c.other,
                score,
                support: c.both as u64,
            }
        })
    });
    ScoredRow {
        neighbors: select(item, candidates, settings, excluded, names),
        row_len: 0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn neighbor(item: u32, score: f64) -> Neighbor {
        Neighbor {
            item,
            score,
            support: 1,
        }
    }

    #[test]
    fn ties_go_to_the_earlier_name_whatever_the_id() {
        // Ids 0..3 named so that name order is 2, 0, 1.
        let names = NameOrder::of(&["m", "z", "a"]);
        let picked = top_k(
            &names,
            vec![neighbor(0, 0.5), neighbor(1, 0.9), neighbor(2, 0.5)],
            2,
        );
        assert_eq!(
            picked.iter().map(|n| n.item).collect::<Vec<_>>(),
            vec![1, 2],
            "0.9 first, then the tie at 0.5 goes to \"a\" (id 2) over \"m\" (id 0)"
        );
        assert!(top_k(&names, vec![neighbor(0, 0.1)], 0).is_empty());
    }
}
