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
    /// A diagonal pair (a, a) appears once. Large writes are counted and placed by one
    /// thread per core, each over a consecutive share of the deltas (the index was a
    /// single-threaded step of every large write, built twice in a fresh backfill).
    pub(super) fn of(deltas: &'a [(u32, u32, T)], min_rows: usize) -> Self
    where
        T: Sync,
    {
        Self::indexed_in_chunks(deltas, min_rows, chunk_len(deltas.len()))
    }

    /// [`OrientedRows::of`] with the deltas shared among threads `chunk` at a time.
    fn indexed_in_chunks(deltas: &'a [(u32, u32, T)], min_rows: usize, chunk: usize) -> Self
    where
        T: Sync,
    {
        debug_assert!(deltas.windows(2).all(|w| (w[0].0, w[0].1) < (w[1].0, w[1].1)));
        let rows = deltas
            .iter()
            .map(|d| d.1.max(d.0) as usize + 1)
            .max()
            .unwrap_or(0)
            .max(min_rows);
        let chunks: Vec<&[(u32, u32, T)]> = deltas.chunks(chunk.max(1)).collect();
        let counts: Vec<Vec<usize>> = std::thread::scope(|scope| {
            let counters: Vec<_> = chunks
                .iter()
                .map(|chunk| scope.spawn(move || count_per_row(chunk, rows)))
                .collect();
            counters
                .into_iter()
                .map(|c| c.join().expect("row counting does not panic"))
                .collect()
        });
        let mut starts = vec![0usize; rows + 1];
        for r in 0..rows {
            starts[r + 1] = starts[r] + counts.iter().map(|c| c[r]).sum::<usize>();
        }
        let mut entries = vec![(0u32, 0u32); starts[rows]];
        let mut slots = chunk_slots(&mut entries, &starts, &counts);
        std::thread::scope(|scope| {
            let mut first = 0u32;
            for (chunk, rows_of_chunk) in chunks.iter().zip(slots.iter_mut()) {
                scope.spawn(move || fill_rows(chunk, first, rows_of_chunk));
                first += chunk.len() as u32;
            }
        });
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

/// Deltas per counting thread below which one thread indexes them all (spawning costs
/// more than it saves on small writes).
const DELTAS_PER_THREAD_MIN: usize = 1 << 18;

/// How many deltas each indexing thread takes: one share per core for large writes.
fn chunk_len(deltas: usize) -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let threads = (deltas / DELTAS_PER_THREAD_MIN).clamp(1, cores);
    deltas.div_ceil(threads)
}

/// Entries each row receives from `chunk` (a pair (lo, hi) lands in rows lo and hi).
fn count_per_row<T>(chunk: &[(u32, u32, T)], rows: usize) -> Vec<usize> {
    let mut counts = vec![0usize; rows];
    for (lo, hi, _) in chunk {
        counts[*lo as usize] += 1;
        if lo != hi {
            counts[*hi as usize] += 1;
        }
    }
    counts
}

/// Cuts `entries` into, per chunk, one slot per row: row r's span holds first the entries
/// of chunk 0, then of chunk 1, and so on. Because the deltas are sorted and the chunks
/// consecutive, each chunk's entries of a row follow the earlier chunks' in key order.
fn chunk_slots<'e>(
    entries: &'e mut [(u32, u32)],
    starts: &[usize],
    counts: &[Vec<usize>],
) -> Vec<Vec<&'e mut [(u32, u32)]>> {
    let rows = starts.len() - 1;
    let mut slots: Vec<Vec<&mut [(u32, u32)]>> = counts.iter().map(|_| Vec::with_capacity(rows)).collect();
    let mut rest = entries;
    for r in 0..rows {
        for (chunk_slots, chunk_counts) in slots.iter_mut().zip(counts) {
            let (slot, after) = std::mem::take(&mut rest).split_at_mut(chunk_counts[r]);
            chunk_slots.push(slot);
            rest = after;
        }
    }
    slots
}

/// Writes (other, index of the delta) for every delta of `chunk`, whose first delta has
/// index `first`, into its rows' slots, consuming each slot from the front.
fn fill_rows<T>(chunk: &[(u32, u32, T)], first: u32, slots: &mut [&mut [(u32, u32)]]) {
    let mut put = |row: u32, entry: (u32, u32)| {
        let slot = std::mem::take(&mut slots[row as usize]);
        let (head, tail) = slot.split_first_mut().expect("rows were counted");
        *head = entry;
        slots[row as usize] = tail;
    };
    for (at, (lo, hi, _)) in chunk.iter().enumerate() {
        let index = first + at as u32;
        put(*hi, (*lo, index));
        if lo != hi {
            put(*lo, (*hi, index));
        }
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

    #[test]
    fn any_sharing_among_threads_gives_the_same_index() {
        let mut random = crate::test_random::TestRandom::seeded(11);
        let mut keys: Vec<(u32, u32)> = (0..5_000)
            .map(|_| {
                let (a, b) = (random.below(300) as u32, random.below(300) as u32);
                (a.min(b), a.max(b))
            })
            .collect();
        keys.sort_unstable();
        keys.dedup();
        let deltas: Vec<(u32, u32, u64)> = keys
            .iter()
            .enumerate()
            .map(|(i, &(a, b))| (a, b, i as u64))
            .collect();
        let whole = OrientedRows::indexed_in_chunks(&deltas, 310, deltas.len());
        for chunk in [1, 2, 7, 1_000, deltas.len() / 2 + 1] {
            let shared = OrientedRows::indexed_in_chunks(&deltas, 310, chunk);
            assert_eq!(shared.starts, whole.starts, "chunk {chunk}");
            assert_eq!(shared.entries, whole.entries, "chunk {chunk}");
        }
        let mut walked = Vec::new();
        whole.each(|r, o, d| walked.push((r, o, *d)));
        assert!(
            walked.windows(2).all(|w| (w[0].0, w[0].1) < (w[1].0, w[1].1)),
            "key order"
        );
        assert_eq!(
            walked.len(),
            2 * deltas.len() - deltas.iter().filter(|d| d.0 == d.1).count()
        );
    }
}
