//! What the group consumer's rebalance handler asks of the live service: the positions
//! the store holds, a commit of the batch in flight before partitions are revoked, and
//! readiness's "consuming" flag.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use super::core::{Core, Flushed};
use crate::health::Health;
use crate::kafka::group::PositionKeeper;

/// The live service's side of a rebalance.
pub struct StorePositions {
    core: Arc<Mutex<Core>>,
    health: Arc<Health>,
}

impl StorePositions {
    /// Answers from the service state behind `core`.
    pub fn new(core: Arc<Mutex<Core>>, health: Arc<Health>) -> StorePositions {
        StorePositions { core, health }
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
}
