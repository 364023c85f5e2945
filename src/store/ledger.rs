//! The ledger every batch rewrites: id allocators, counters and positions.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::event::UnixNanos;

/// How far a file input has been applied.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
pub struct FilePosition {
    /// Index of the first record not yet applied.
    pub next_record: u64,
    /// True once the whole file has been applied.
    pub done: bool,
}

/// The store's ledger: id allocators, counters and source positions, rewritten by every
/// batch in the same WriteBatch as its changes, so that positions and statistics can
/// never disagree after a crash.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct Ledger {
    /// Next store-wide source position.
    pub next_seq: u64,
    /// Next dense user id.
    pub next_user: u32,
    /// Next dense item id.
    pub next_item: u32,
    /// Users with at least one active purchase (N of the log-likelihood ratio).
    pub buyers: i64,
    /// Newest event time applied.
    pub event_time_watermark: Option<UnixNanos>,
    /// Accepted events by `kind/outcome`.
    pub events: BTreeMap<String, u64>,
    /// Rejected records by reason code.
    pub rejects: BTreeMap<String, u64>,
    /// Length of the rejects file that matches this state.
    pub rejects_file_len: u64,
    /// Re-centerings performed.
    pub recenterings: u64,
    /// Pair contributions added or retracted.
    pub pair_updates: u64,
    /// Position reached in each input file, by canonical path.
    pub files: BTreeMap<String, FilePosition>,
    /// Whether any pair or buyer-count key was ever written (until then a put equals a
    /// merge).
    pub pair_keys_written: bool,
    /// Whether the `ids` family holds any erasure tombstone: until then a new user
    /// name is not looked up among them (docs/design.md, "Personal data").
    #[serde(default)]
    pub erasure_tombstones: bool,
    /// Next offset to consume, by input topic and partition: the live service's position,
    /// which it trusts over the consumer group's committed offsets.
    #[serde(default)]
    pub offsets: BTreeMap<String, BTreeMap<i32, i64>>,
}
