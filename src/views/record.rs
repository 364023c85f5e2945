//! The JSON record of a neighbor list (docs/design.md, "Publication"), shared by `export`
//! and the output topic.

use serde::{Deserialize, Serialize};

use crate::model::PublishedList;
use crate::signal::Signal;
use crate::store::Store;
use crate::timefmt::format_rfc3339;

/// One neighbor in a record.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NeighborJson {
    /// Neighbor item id.
    pub item: String,
    /// Its score.
    pub score: f64,
    /// Co-raters (rating) or co-buyers (purchase) behind the score.
    pub support: u64,
}

/// A full neighbor list of one item and signal.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct NeighborRecord {
    /// The item the list belongs to.
    pub item: String,
    /// `rating` or `purchase`.
    pub signal: String,
    /// Best first.
    pub neighbors: Vec<NeighborJson>,
    /// +1 at every change of this item's list.
    pub version: u64,
    /// When the list was computed (RFC 3339).
    pub computed_at: String,
    /// Newest event time reflected in the store when it was computed (RFC 3339).
    pub event_time_watermark: Option<String>,
}

impl NeighborRecord {
    /// Builds the record of a stored list, resolving item names.
    pub fn from_stored(store: &Store, signal: Signal, item: u32, list: &PublishedList) -> NeighborRecord {
        NeighborRecord {
            item: store.item_name(item).to_string(),
            signal: signal.as_str().to_string(),
            neighbors: list
                .neighbors
                .iter()
                .map(|n| NeighborJson {
                    item: store.item_name(n.item).to_string(),
                    score: n.score,
                    support: n.support,
                })
                .collect(),
            version: list.version,
            computed_at: format_rfc3339(list.computed_at),
            event_time_watermark: list.event_time_watermark.map(format_rfc3339),
        }
    }
}
