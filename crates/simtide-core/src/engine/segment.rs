//! The effects of consecutive batches added up in memory, so a bulk backfill writes a
//! segment of many batches at once (docs/design.md, "Bulk backfill"). Adding is exact:
//! pair sums are integers, dirty marks keep their widest scope, statuses the latest.

use std::collections::BTreeMap;

use rustc_hash::{FxHashMap, FxHashSet};

use super::runs::PairRuns;
use super::tally::EventTally;
use super::{mark_dirty, BatchEffects, ItemStatus, RatingPairDelta};
use crate::event::UnixNanos;
use crate::model::DirtyScope;

/// Everything the batches of a segment changed, not yet persisted.
#[derive(Debug, Default)]
pub struct SegmentEffects {
    outcomes: EventTally,
    rating_pairs: PairRuns<RatingPairDelta>,
    purchase_pairs: PairRuns<i64>,
    buyers_delta: i64,
    dirty_rating: FxHashMap<u32, DirtyScope>,
    dirty_purchase: FxHashMap<u32, DirtyScope>,
    statuses: BTreeMap<u32, ItemStatus>,
    touched_users: FxHashSet<u32>,
    recenterings: u64,
    pair_updates: u64,
    newest_event_at: Option<UnixNanos>,
}

impl SegmentEffects {
    /// Adds the effects of the batch that followed the ones absorbed so far.
    pub fn absorb(&mut self, fx: BatchEffects) {
        self.outcomes.absorb(&fx.outcomes);
        self.rating_pairs.push(fx.rating_pairs);
        self.purchase_pairs.push(fx.purchase_pairs);
        self.buyers_delta += fx.buyers_delta;
        for (target, marks) in [
            (&mut self.dirty_rating, fx.dirty_rating),
            (&mut self.dirty_purchase, fx.dirty_purchase),
        ] {
            for (item, scope) in marks {
                mark_dirty(target, item, scope);
            }
        }
        self.statuses.extend(fx.statuses);
        self.touched_users.extend(fx.touched_users);
        self.recenterings += fx.recenterings;
        self.pair_updates += fx.pair_updates;
        self.newest_event_at = self.newest_event_at.max(fx.newest_event_at);
    }

    /// Pair delta entries held (rating, purchase), an upper bound on distinct pairs.
    pub fn pair_entries(&self) -> (usize, usize) {
        (self.rating_pairs.entries(), self.purchase_pairs.entries())
    }

    /// The segment as one batch's effects: pair deltas summed and sorted, users sorted.
    /// The per-batch center gaps are not carried (they are reported batch by batch).
    pub fn into_effects(self) -> BatchEffects {
        let mut touched_users: Vec<u32> = self.touched_users.into_iter().collect();
        touched_users.sort_unstable();
        BatchEffects {
            outcomes: self.outcomes,
            rating_pairs: self.rating_pairs.into_sorted(),
            purchase_pairs: self.purchase_pairs.into_sorted(),
            buyers_delta: self.buyers_delta,
            dirty_rating: self.dirty_rating,
            dirty_purchase: self.dirty_purchase,
            statuses: self.statuses.into_iter().collect(),
            touched_users,
            recenterings: self.recenterings,
            pair_updates: self.pair_updates,
            max_center_gap: 0.0,
            center_gaps: Vec::new(),
            newest_event_at: self.newest_event_at,
        }
    }
}
