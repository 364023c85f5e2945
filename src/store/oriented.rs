//! Pair deltas under both orders, as rows: every unordered pair (lo, hi) is stored under
//! key (lo, hi) and under key (hi, lo) so that a prefix scan lists an item's whole row
//! (see `store/mod.rs`). Writers and the in-memory scorer walk the deltas row by row.

use std::ops::Range;

use crate::engine::RatingPairDelta;
use crate::model::RatingPairStats;

/// Deltas sorted by (lo, hi) seen as rows: row r lists (other, delta) for every pair that
/// contains r, in key order. An index (compressed sparse rows) into the deltas, 8 bytes
/// per entry; the deltas are not copied.
pub(super) struct OrientedRows<'a, T> {
    deltas: &'a [(u32, u32, T)],
    /// Where each row's entries start in `entries`; one more than the rows.
    starts: Vec<usize>,
    /// (other, index of the delta) per entry.
    entries: Vec<(u32, u32)>,
}

/// Entries ahead of the one being written whose delta is fetched into the cache early:
/// the second order reads the deltas in scattered places, and without a hint each read
/// waits for memory (the profile showed it as the largest cost of writing table files).
const PREFETCH_DISTANCE: usize = 16;

impl<'a, T> OrientedRows<'a, T> {
    /// Indexes `deltas`, which are sorted by (lo, hi) with each pair once, for a store of
    /// at least `min_rows` rows.
    ///
    /// A counting sort by row, without comparisons: walking the deltas in (lo, hi) order
    /// reaches, for each row r, first the pairs (lo < r, r) with lo ascending and only
    /// then the pairs (r, hi ≥ r) with hi ascending, which is exactly row r's key order.
    /// A diagonal pair (a, a) appears once.
    pub(super) fn of(deltas: &'a [(u32, u32, T)], min_rows: usize) -> Self {
        debug_assert!(deltas.windows(2).all(|w| (w[0].0, w[0].1) < (w[1].0, w[1].1)));
        let rows = deltas
            .iter()
            .map(|d| d.1.max(d.0) as usize + 1)
            .max()
            .unwrap_or(0)
            .max(min_rows);
        let mut starts = vec![0usize; rows + 1];
        for (lo, hi, _) in deltas {
            starts[*lo as usize + 1] += 1;
            if lo != hi {
                starts[*hi as usize + 1] += 1;
            }
        }
        for r in 0..rows {
            starts[r + 1] += starts[r];
        }
        let mut fill = starts.clone();
        let mut entries = vec![(0u32, 0u32); starts[rows]];
        for (index, (lo, hi, _)) in deltas.iter().enumerate() {
            let (lo, hi, index) = (*lo as usize, *hi as usize, index as u32);
            entries[fill[hi]] = (lo as u32, index);
            fill[hi] += 1;
            if lo != hi {
                entries[fill[lo]] = (hi as u32, index);
                fill[lo] += 1;
            }
        }
        OrientedRows {
            deltas,
            starts,
            entries,
        }
    }

    /// Entries in all rows.
    pub(super) fn len(&self) -> usize {
        self.entries.len()
    }

    /// Rows indexed (the largest id plus one, or more).
    pub(super) fn row_count(&self) -> u32 {
        (self.starts.len() - 1) as u32
    }

    /// Entries of `rows` before row `row` (the split points of parallel writers).
    pub(super) fn entries_before(&self, row: u32) -> usize {
        self.starts[row as usize]
    }

    /// One row: (other, delta) in key order; empty beyond the indexed rows.
    pub(super) fn row(&self, row: u32) -> impl Iterator<Item = (u32, &'a T)> + '_ {
        let r = row as usize;
        let span = match (self.starts.get(r), self.starts.get(r + 1)) {
            (Some(&a), Some(&b)) => a..b,
            _ => 0..0,
        };
        self.entries[span]
            .iter()
            .map(|&(other, i)| (other, &self.deltas[i as usize].2))
    }

    /// The delta of key (row, other), if present.
    pub(super) fn get(&self, row: u32, other: u32) -> Option<&'a T> {
        let r = row as usize;
        let (&a, &b) = (self.starts.get(r)?, self.starts.get(r + 1)?);
        let entries = &self.entries[a..b];
        let at = entries.binary_search_by_key(&other, |e| e.0).ok()?;
        Some(&self.deltas[entries[at].1 as usize].2)
    }

    /// Calls `f(row, other, delta)` for every entry, in key order.
    pub(super) fn each(&self, mut f: impl FnMut(u32, u32, &T)) {
        let all = self.for_each_in(0..self.row_count(), |row, other, d| {
            f(row, other, d);
            Ok::<(), std::convert::Infallible>(())
        });
        if let Err(never) = all {
            match never {}
        }
    }

    /// Calls `f(row, other, delta)` for every entry of the rows in `rows`, in key order,
    /// fetching deltas ahead into the cache; stops at the first error.
    pub(super) fn for_each_in<E>(
        &self,
        rows: Range<u32>,
        mut f: impl FnMut(u32, u32, &T) -> Result<(), E>,
    ) -> Result<(), E> {
        let span = self.starts[rows.start as usize]..self.starts[rows.end as usize];
        let mut row = rows.start;
        for at in span.clone() {
            if let Some(&(_, ahead)) = self
                .entries
                .get(at + PREFETCH_DISTANCE)
                .filter(|_| at + PREFETCH_DISTANCE < span.end)
            {
                prefetch(&self.deltas[ahead as usize]);
            }
            while self.starts[row as usize + 1] <= at {
                row += 1;
            }
            let (other, i) = self.entries[at];
            f(row, other, &self.deltas[i as usize].2)?;
        }
        Ok(())
    }
}

/// Asks the processor to start loading `value` into the cache (a hint, no effect on
/// results).
fn prefetch<V>(value: &V) {
    #[cfg(target_arch = "x86_64")]
    {
        use std::arch::x86_64::{_mm_prefetch, _MM_HINT_T0};
        // SAFETY: prefetching only hints the cache; it never faults and reads nothing the
        // program sees, and the pointer comes from a live reference.
        unsafe { _mm_prefetch::<_MM_HINT_T0>((value as *const V).cast::<i8>()) };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = value;
}

/// A rating pair delta as the sums stored under key (row, other): the norms oriented to
/// the key.
pub(super) fn oriented_rating_stats(row: u32, other: u32, d: &RatingPairDelta) -> RatingPairStats {
    let (s_row, s_other) = if row < other {
        (d.s_lo, d.s_hi)
    } else {
        (d.s_hi, d.s_lo)
    };
    RatingPairStats {
        n: d.n,
        dot: d.dot,
        s_row,
        s_other,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn both_orders_come_out_in_key_order() {
        let deltas: Vec<(u32, u32, i64)> =
            vec![(0, 3, 1), (1, 1, 2), (1, 2, 3), (1, 5, 4), (2, 3, 5), (3, 5, 6)];
        let rows = OrientedRows::of(&deltas, 0);
        let mut got: Vec<(u32, u32, i64)> = Vec::new();
        rows.each(|r, o, d| got.push((r, o, *d)));
        let mut want: Vec<(u32, u32, i64)> = deltas
            .iter()
            .flat_map(|&(a, b, d)| {
                if a == b {
                    vec![(a, b, d)]
                } else {
                    vec![(a, b, d), (b, a, d)]
                }
            })
            .collect();
        want.sort_unstable();
        assert_eq!(got, want);
        assert_eq!(rows.len(), want.len());
        let row3: Vec<(u32, i64)> = rows.row(3).map(|(o, d)| (o, *d)).collect();
        assert_eq!(row3, vec![(0, 1), (2, 5), (5, 6)]);
        assert_eq!(rows.row(99).count(), 0);
        assert_eq!(
            (rows.get(1, 1), rows.get(5, 3), rows.get(5, 4)),
            (Some(&2), Some(&6), None)
        );
    }
}
