//! The micro-batches applied in memory since the service last wrote to the store
//! (docs/design.md, "Live writes"): the engine's pending segment, the input positions it
//! reached, the record timestamps it covers and what it counted. The service writes it as
//! one write — pair deltas summed, next offsets in the same write (rating pair sums as
//! table files whose marker carries the rest, see `PairWrite::RatingsIngested`) — before each
//! publication cycle, before partitions are revoked, at shutdown, and when it outgrows
//! `live.memory_budget`. A crash loses only this memory; the store's positions say where
//! consumption resumes, so nothing is applied twice.

use std::collections::BTreeMap;

use super::report::RunCounters;
use crate::event::UnixMillis;
use crate::pipeline::segment::OpenSegment;
use crate::store::Store;

/// Applied batches not yet in the store.
pub struct AppliedSegment {
    /// The engine's state for them: histories, ids, summed pair deltas, the ledger.
    pub changes: OpenSegment,
    /// Next offset per partition after the last applied batch.
    pub offsets: BTreeMap<i32, i64>,
    /// Record timestamps of the applied messages, for event-to-publication latency.
    pub timestamps: Vec<UnixMillis>,
    /// Messages, batches, events and dead letters of the applied batches; added to the
    /// run's counters once they are in the store.
    pub counts: RunCounters,
}

impl AppliedSegment {
    /// An empty segment over the store's committed state.
    pub fn new(store: &Store) -> AppliedSegment {
        AppliedSegment {
            changes: OpenSegment::new(store),
            offsets: BTreeMap::new(),
            timestamps: Vec::new(),
            counts: RunCounters::default(),
        }
    }

    /// Records the positions a just-applied batch reached, in the segment's ledger (so
    /// they are written with its changes) and in the offsets to commit to the group after.
    pub fn advance(&mut self, topic: &str, next_offsets: &BTreeMap<i32, i64>) {
        let stored = self
            .changes
            .ledger_mut()
            .offsets
            .entry(topic.to_string())
            .or_default();
        for (&partition, &next) in next_offsets {
            stored.insert(partition, next);
            self.offsets.insert(partition, next);
        }
    }
}
