//! The values the maths produces and the store keeps: the sums of a rating pair, the mark
//! that a list is out of date, and a published list with its neighbors. They live here,
//! with the maths that defines them; the store only encodes and decodes them.

use crate::event::UnixNanos;

/// Sums of one rating pair, oriented to its row: (row item, other item). The sufficient
/// statistics of adjusted cosine over co-raters (docs/design.md, "Adjusted cosine over
/// co-raters").
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RatingPairStats {
    /// Co-raters.
    pub n: i64,
    /// Σ d_row·d_other, fixed point (see [`crate::engine::fixed`]).
    pub dot: i128,
    /// Σ d_row² over co-raters.
    pub s_row: i128,
    /// Σ d_other² over co-raters.
    pub s_other: i128,
}

impl RatingPairStats {
    /// Field-wise sum; wrapping, as the range argument in `engine::fixed` rules out
    /// overflow and a store merge must not panic.
    pub fn add(&mut self, other: &RatingPairStats) {
        self.n = self.n.wrapping_add(other.n);
        self.dot = self.dot.wrapping_add(other.dot);
        self.s_row = self.s_row.wrapping_add(other.s_row);
        self.s_other = self.s_other.wrapping_add(other.s_other);
    }
}

/// Whether re-scoring an item must also re-score every item whose row holds it (its
/// availability or buyer count changed, which moves scores in other rows too).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum DirtyScope {
    /// Only the item's own list.
    OwnList,
    /// The item's list and the list of every item in its row.
    WithNeighbors,
}

impl DirtyScope {
    /// The wider of two scopes.
    pub fn widest(self, other: DirtyScope) -> DirtyScope {
        if self == DirtyScope::WithNeighbors || other == DirtyScope::WithNeighbors {
            DirtyScope::WithNeighbors
        } else {
            DirtyScope::OwnList
        }
    }
}

/// A pending re-score of an item's list.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct DirtyMark {
    /// Wall-clock time the list first became out of date.
    pub since: UnixNanos,
    /// Which lists the re-score covers.
    pub scope: DirtyScope,
}

impl DirtyMark {
    /// Combination of two marks: the earlier time, the wider scope.
    pub fn combine(&self, other: &DirtyMark) -> DirtyMark {
        DirtyMark {
            since: self.since.min(other.since),
            scope: self.scope.widest(other.scope),
        }
    }
}

/// One entry of a list, with the dense id of the neighbor.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Neighbor {
    /// Dense item id.
    pub item: u32,
    /// Its score.
    pub score: f64,
    /// Co-raters or co-buyers behind the score.
    pub support: u64,
}

/// The last list published for an item and signal.
#[derive(Debug, Clone, PartialEq)]
pub struct PublishedList {
    /// Starts at 1, +1 at every change.
    pub version: u64,
    /// Wall-clock time it was computed.
    pub computed_at: UnixNanos,
    /// Newest event time reflected in the store when it was computed.
    pub event_time_watermark: Option<UnixNanos>,
    /// Neighbors, best first; empty means a tombstone.
    pub neighbors: Vec<Neighbor>,
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pair_stats_add_back_to_zero() {
        let mut a = RatingPairStats {
            n: 2,
            dot: -5,
            s_row: 1 << 100,
            s_other: 3,
        };
        a.add(&RatingPairStats {
            n: -2,
            dot: 5,
            s_row: -(1 << 100),
            s_other: -3,
        });
        assert_eq!(a, RatingPairStats::default());
    }

    #[test]
    fn marks_combine_to_the_earlier_time_and_wider_scope() {
        let a = DirtyMark {
            since: UnixNanos(5),
            scope: DirtyScope::OwnList,
        };
        let b = DirtyMark {
            since: UnixNanos(9),
            scope: DirtyScope::WithNeighbors,
        };
        assert_eq!(
            a.combine(&b),
            DirtyMark {
                since: UnixNanos(5),
                scope: DirtyScope::WithNeighbors
            }
        );
        assert_eq!(a.combine(&a), a);
    }
}
