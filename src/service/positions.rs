//! What the group consumer's rebalance handler asks of the live service: the positions
//! the store holds, a commit of the batch in flight before partitions are revoked,
//! readiness's "consuming" flag, and what became of positions the log no longer holds.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use super::state::{Core, Flushed};
use crate::kafka::group::PositionKeeper;
use crate::kafka::outside_log::OutsidePosition;
use crate::observability::metrics::Metrics;
use crate::observability::observe::Observation;
use crate::service::health::Health;

/// The live service's side of a rebalance.
pub struct StorePositions {
    core: Arc<Mutex<Core>>,
    health: Arc<Health>,
    metrics: Arc<Metrics>,
}

impl StorePositions {
    /// Answers from the service state behind `core`.
    pub fn new(core: Arc<Mutex<Core>>, health: Arc<Health>, metrics: Arc<Metrics>) -> StorePositions {
        StorePositions {
            core,
            health,
            metrics,
        }
    }
}

impl PositionKeeper for StorePositions {
    fn stored_offsets(&self) -> BTreeMap<i32, i64> {
        self.core.lock().expect("core lock").stored_offsets()
    }

    fn commit_before_revoke(&self, grace: Duration) -> Option<BTreeMap<i32, i64>> {
        match self
            .core
            .lock()
            .expect("core lock")
            .flush(Some(Instant::now() + grace))
        {
            Flushed::Committed(offsets) => Some(offsets),
            Flushed::Nothing | Flushed::Abandoned => None,
        }
    }

    fn set_consuming(&self, consuming: bool) {
        self.health.set_consuming(consuming);
    }

    fn set_refused(&self, refused: &BTreeMap<i32, OutsidePosition>) {
        let refused: Vec<&OutsidePosition> = refused.values().collect();
        Observation::PositionsRefused { refused: &refused }.emit(&self.metrics);
        self.health
            .set_refused_positions(refused.iter().map(|o| o.to_string()).collect());
    }

    fn note_resumed(&self, outside: &OutsidePosition, at: i64, skipped: u64) {
        Observation::OffsetsSkipped { outside, at, skipped }.emit(&self.metrics);
    }
}
