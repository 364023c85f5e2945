//! Where pair rows are read for scoring: the store itself, or — right after a topic
//! backfill that wrote a fresh store in one segment — that segment's sums still in
//! memory, which hold exactly what the store holds and spare reading millions of rows
//! back. (A file backfill scores its last segment's rows in the pass that writes them:
//! `backfill::row_pass`, docs/design.md "Bulk backfill".)

use anyhow::Result;

use super::oriented::{oriented_rating_stats, OrientedRows};
use super::Store;
use crate::engine::{BatchEffects, RatingPairDelta};
use crate::model::RatingPairStats;
use crate::score::ListSettings;
use crate::topk::{rating_list, Exclusions, NameOrder, ScoredRow};

/// Pair rows for scoring.
pub trait PairRows: Sync {
    /// The rating row of an item: (other, sums oriented to the item), pairs with n = 0 left out.
    fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>>;
    /// The rating list of an item: by default its whole row scored; a source that keeps
    /// candidates between cycles answers from them when it can (docs/design.md, "Lists
    /// kept incrementally"), with the same result.
    fn rating_list(
        &self,
        item: u32,
        settings: &ListSettings,
        excluded: &Exclusions,
        names: &NameOrder,
    ) -> Result<ScoredRow> {
        Ok(rating_list(
            item,
            &self.rating_row(item)?,
            settings,
            excluded,
            names,
        ))
    }
    /// The purchase row of an item, including its own buyer count under its own id.
    fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>>;
    /// Buyer counts of the given items.
    fn buyer_counts(&self, items: &[u32]) -> Result<Vec<i64>>;
    /// Users with at least one active purchase.
    fn total_buyers(&self) -> i64;
}

impl PairRows for Store {
    fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>> {
        Store::rating_row(self, item)
    }

    fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        Store::purchase_row(self, item)
    }

    fn buyer_counts(&self, items: &[u32]) -> Result<Vec<i64>> {
        Store::buyer_counts(self, items)
    }

    fn total_buyers(&self) -> i64 {
        self.ledger().buyers
    }
}

/// The rows of a fresh store's only segment, in memory.
pub struct SegmentRows<'a> {
    rating: OrientedRows<'a, RatingPairDelta>,
    purchase: OrientedRows<'a, i64>,
    buyers: i64,
}

impl<'a> SegmentRows<'a> {
    /// Rows of `effects`, the whole content of a store with `items` items and `buyers`
    /// buyers (the caller guarantees the store held no pair before).
    pub fn new(effects: &'a BatchEffects, items: usize, buyers: i64) -> SegmentRows<'a> {
        SegmentRows {
            rating: OrientedRows::of(&effects.rating_pairs, items),
            purchase: OrientedRows::of(&effects.purchase_pairs, items),
            buyers,
        }
    }
}

impl PairRows for SegmentRows<'_> {
    fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>> {
        Ok(self
            .rating
            .row(item)
            .map(|(other, d)| (other, oriented_rating_stats(item, other, d)))
            .filter(|(_, s)| s.n != 0)
            .collect())
    }

    fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        Ok(self
            .purchase
            .row(item)
            .filter(|(_, c)| **c != 0)
            .map(|(other, c)| (other, *c))
            .collect())
    }

    fn buyer_counts(&self, items: &[u32]) -> Result<Vec<i64>> {
        Ok(items
            .iter()
            .map(|&i| self.purchase.get(i, i).copied().unwrap_or(0))
            .collect())
    }

    fn total_buyers(&self) -> i64 {
        self.buyers
    }
}
