//! Sums the contribution sets of a batch into one delta per pair, row by row.
//!
//! Hashing every pair update into a map of a million pairs costs a cache miss per update.
//! Instead the batch's items are renumbered densely, an inverted index lists where each
//! item occurs, and each row `a` is accumulated in a dense array over its partners `b > a`
//! (Gustavson's row-wise sparse product, which is how sparse matrix libraries form AᵀA).
//! The output comes out sorted by (a, b), ready for the store. Rows are independent, so a
//! large batch shares them among one thread per core in consecutive ranges of equal work
//! (a fresh backfill of a heavy-user data set is one such batch, and was single-threaded).

use super::contrib::ContributionSet;

/// A pair delta that can absorb one signed contribution of (lower item, higher item).
pub trait PairSum<T>: Copy + Default + PartialEq {
    /// Adds `sign` times the contribution of the pair with values `lo` and `hi`.
    fn add(&mut self, sign: i64, lo: &T, hi: &T);
}

/// One item of one contribution set, flattened: its batch-local id, whether it changed,
/// and its value.
struct FlatItem<T> {
    local: u32,
    changed: bool,
    value: T,
}

/// Where an item occurs: its place in the flattened sets, the bounds of its set there,
/// and the set's sign. Everything the partner scan needs, so an occurrence costs one jump
/// in memory rather than one per array (the profile on the 5-million-rating set showed
/// those jumps, not the sums, as the cost).
#[derive(Clone, Copy, Default)]
struct Occurrence {
    at: u32,
    set_start: u32,
    set_end: u32,
    sign: i64,
}

/// Which partners a row is summed over.
#[derive(Clone, Copy, PartialEq, Eq)]
enum Partners {
    /// Only partners with a higher id: each unordered pair once, under (lo, hi).
    Higher,
    /// Every partner: each pair under both orders, oriented to the row.
    All,
}

/// Deltas of every pair the sets touch with at least one item `kept` accepts, as (lo, hi,
/// delta) sorted by (lo, hi), zero deltas left out, and the number of pair contributions
/// summed. An item shard keeps only pairs touching its items; skipping the others here,
/// rather than after summing, spares their sums.
pub fn aggregate_pairs<T: Copy + Sync, S: PairSum<T> + Send>(
    sets: &[ContributionSet<T>],
    kept: &dyn Fn(u32) -> bool,
) -> (Vec<(u32, u32, S)>, u64) {
    aggregate_pairs_sharing(sets, kept, sharing_threads)
}

/// [`aggregate_pairs`] with the rows shared among `threads(work)` threads, `work` being
/// the partner scans the batch needs.
fn aggregate_pairs_sharing<T: Copy + Sync, S: PairSum<T> + Send>(
    sets: &[ContributionSet<T>],
    kept: &dyn Fn(u32) -> bool,
    threads: fn(u64) -> usize,
) -> (Vec<(u32, u32, S)>, u64) {
    let index = RowIndex::with_partners(sets, kept, Partners::Higher);
    let ranges = index.split_rows(threads(index.total_work()));
    let sum_range = |rows: std::ops::Range<usize>| {
        let mut out = Vec::new();
        let updates = index.visit_rows::<S, std::convert::Infallible>(rows, |a, row| {
            out.extend(row.iter().map(|&(b, s)| (a, b, s)));
            Ok(())
        });
        let Ok(updates) = updates;
        (out, updates)
    };
    let mut parts: Vec<SummedRows<S>> = if ranges.len() == 1 {
        vec![sum_range(ranges[0].clone())]
    } else {
        std::thread::scope(|scope| {
            let sum_range = &sum_range;
            let workers: Vec<_> = ranges
                .into_iter()
                .map(|rows| scope.spawn(move || sum_range(rows)))
                .collect();
            workers
                .into_iter()
                .map(|w| w.join().expect("pair summing does not panic"))
                .collect()
        })
    };
    let (mut out, mut updates) = parts.remove(0);
    out.reserve(parts.iter().map(|p| p.0.len()).sum());
    for (more, n) in parts {
        out.extend(more);
        updates += n;
    }
    (out, updates)
}

/// Deltas of a range of rows, sorted by (lo, hi), and the pair contributions summed.
type SummedRows<S> = (Vec<(u32, u32, S)>, u64);

/// Pair contributions below which one thread sums a batch (spawning costs more than it
/// saves on a live micro-batch).
const UPDATES_PER_THREAD_MIN: u64 = 1 << 20;

/// Threads to share rows of `work` partner scans among: one per core for large batches.
fn sharing_threads(work: u64) -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get()) as u64;
    (work / UPDATES_PER_THREAD_MIN).clamp(1, cores) as usize
}

/// The contribution sets of a batch flattened, and where each item occurs in them:
/// everything summing a row reads. Built once per batch; rows are then independent, so
/// consecutive ranges of them can be summed on different threads.
pub struct RowIndex<T> {
    items: Vec<u32>,
    /// Whether pairs of each local item are summed whatever their partner.
    kept: Vec<bool>,
    starts: Vec<usize>,
    occurrences: Vec<Occurrence>,
    flat: Vec<FlatItem<T>>,
    partners: Partners,
}

impl<T: Copy> RowIndex<T> {
    /// Indexes `sets` for summing whole rows under both orders (docs/design.md, "Bulk
    /// backfill"): each row against every partner, oriented to the row, pairs touching no
    /// item `kept` accepts left out.
    pub fn both_orders(sets: &[ContributionSet<T>], kept: &dyn Fn(u32) -> bool) -> Self {
        Self::with_partners(sets, kept, Partners::All)
    }

    fn with_partners(sets: &[ContributionSet<T>], kept: &dyn Fn(u32) -> bool, partners: Partners) -> Self {
        let mut items: Vec<u32> = sets.iter().flat_map(|s| s.items.iter().copied()).collect();
        items.sort_unstable();
        items.dedup();
        let kept: Vec<bool> = items.iter().map(|&item| kept(item)).collect();
        let local = |item: u32| items.binary_search(&item).expect("item of a set") as u32;

        let mut flat: Vec<FlatItem<T>> = Vec::with_capacity(sets.iter().map(|s| s.items.len()).sum());
        let mut starts = vec![0usize; items.len() + 1];
        for set in sets {
            for ((&item, &changed), &value) in set.items.iter().zip(&set.changed).zip(&set.values) {
                let l = local(item);
                starts[l as usize + 1] += 1;
                flat.push(FlatItem {
                    local: l,
                    changed,
                    value,
                });
            }
        }
        for i in 0..items.len() {
            starts[i + 1] += starts[i];
        }
        // Inverted index: for each local item, where it occurs in the flattened sets.
        let mut fill = starts.clone();
        let mut occurrences = vec![Occurrence::default(); flat.len()];
        let mut set_start = 0usize;
        for set in sets {
            let set_end = set_start + set.items.len();
            for (offset, entry) in flat[set_start..set_end].iter().enumerate() {
                let l = entry.local as usize;
                occurrences[fill[l]] = Occurrence {
                    at: (set_start + offset) as u32,
                    set_start: set_start as u32,
                    set_end: set_end as u32,
                    sign: set.sign,
                };
                fill[l] += 1;
            }
            set_start = set_end;
        }
        RowIndex {
            items,
            kept,
            starts,
            occurrences,
            flat,
            partners,
        }
    }

    /// Rows (items) indexed.
    pub fn row_count(&self) -> usize {
        self.items.len()
    }

    /// Partners scanned for row `a` (an upper bound of its pair contributions).
    fn row_work(&self, a: usize) -> u64 {
        self.occurrences[self.starts[a]..self.starts[a + 1]]
            .iter()
            .map(|o| match self.partners {
                Partners::Higher => u64::from(o.set_end - o.at - 1),
                Partners::All => u64::from(o.set_end - o.set_start - 1),
            })
            .sum()
    }

    /// Partner scans of every row: the work of summing the batch.
    pub fn total_work(&self) -> u64 {
        (0..self.items.len()).map(|a| self.row_work(a)).sum()
    }

    /// Consecutive row ranges of about equal work, `parts` at most, covering every row.
    /// Rows are independent and each range's output is in key order, so the ranges'
    /// outputs joined in order are in key order too.
    pub fn split_rows(&self, parts: usize) -> Vec<std::ops::Range<usize>> {
        let rows = self.items.len();
        if parts <= 1 {
            return std::iter::once(0..rows).collect();
        }
        let share = self.total_work().div_ceil(parts as u64).max(1);
        let mut ranges = Vec::with_capacity(parts);
        let (mut start, mut work) = (0usize, 0u64);
        for a in 0..rows {
            work += self.row_work(a);
            if work >= share && ranges.len() + 1 < parts {
                ranges.push(start..a + 1);
                (start, work) = (a + 1, 0);
            }
        }
        ranges.push(start..rows);
        ranges
    }

    /// Sums the rows of `rows` (Gustavson: row `a` accumulated densely over its partners)
    /// and hands each non-empty one to `visit` as (item, [(partner, delta)]) with partners
    /// ascending and zero deltas left out; returns the pair contributions summed. The
    /// first error of `visit` stops the scan.
    pub fn visit_rows<S: PairSum<T>, E>(
        &self,
        rows: std::ops::Range<usize>,
        mut visit: impl FnMut(u32, &[(u32, S)]) -> Result<(), E>,
    ) -> Result<u64, E> {
        let items = &self.items;
        let mut acc = vec![S::default(); items.len()];
        let mut touched = vec![false; items.len()];
        let mut row: Vec<u32> = Vec::new();
        let mut out: Vec<(u32, S)> = Vec::new();
        let mut updates = 0u64;
        for a in rows {
            let row_kept = self.kept[a];
            for occ in &self.occurrences[self.starts[a]..self.starts[a + 1]] {
                let (at, end) = (occ.at as usize, occ.set_end as usize);
                let this = &self.flat[at];
                let lower = match self.partners {
                    Partners::Higher => &self.flat[at..at],
                    Partners::All => &self.flat[occ.set_start as usize..at],
                };
                for b in lower.iter().chain(&self.flat[at + 1..end]) {
                    if (this.changed || b.changed) && (row_kept || self.kept[b.local as usize]) {
                        let bl = b.local as usize;
                        if !touched[bl] {
                            touched[bl] = true;
                            row.push(b.local);
                        }
                        acc[bl].add(occ.sign, &this.value, &b.value);
                        updates += 1;
                    }
                }
            }
            row.sort_unstable();
            for &b in &row {
                let b = b as usize;
                if acc[b] != S::default() {
                    out.push((items[b], acc[b]));
                }
                acc[b] = S::default();
                touched[b] = false;
            }
            row.clear();
            if !out.is_empty() {
                visit(items[a], &out)?;
                out.clear();
            }
        }
        Ok(updates)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::contrib::difference;
    use std::collections::BTreeMap;

    #[derive(Clone, Copy, Default, PartialEq, Debug)]
    struct Products(i64, i64);

    impl PairSum<i64> for Products {
        fn add(&mut self, sign: i64, lo: &i64, hi: &i64) {
            self.0 += sign;
            self.1 += sign * lo * hi;
        }
    }

    fn direct(state: &[(u32, i64)]) -> BTreeMap<(u32, u32), Products> {
        let mut m = BTreeMap::new();
        for (i, a) in state.iter().enumerate() {
            for b in &state[i + 1..] {
                m.insert((a.0, b.0), Products(1, a.1 * b.1));
            }
        }
        m
    }

    #[test]
    fn difference_plus_before_equals_after() {
        let before = vec![(1, 2), (3, -1), (5, 4), (8, 1)];
        let after = vec![(1, 2), (3, 7), (6, -2), (8, 1), (9, 3)];
        for all in [false, true] {
            let sets = difference(&before, &after, all).unwrap();
            let (deltas, updates) = aggregate_pairs::<i64, Products>(&sets, &|_| true);
            assert_eq!(updates, sets[0].pair_count() + sets[1].pair_count());
            let keys: Vec<(u32, u32)> = deltas.iter().map(|d| (d.0, d.1)).collect();
            let mut sorted = keys.clone();
            sorted.sort();
            assert_eq!(keys, sorted, "output is sorted by (lo, hi)");
            let mut acc = direct(&before);
            for (lo, hi, d) in deltas {
                let e = acc.entry((lo, hi)).or_default();
                e.0 += d.0;
                e.1 += d.1;
            }
            acc.retain(|_, v| *v != Products(0, 0));
            assert_eq!(acc, direct(&after), "all_changed = {all}");
        }
    }

    #[test]
    fn rows_shared_among_threads_sum_the_same() {
        let mut sets = Vec::new();
        let mut seed = 7u64;
        let mut next = |n: u64| {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (seed >> 33) % n
        };
        for _ in 0..40 {
            let mut state: Vec<(u32, i64)> = (0..1 + next(30))
                .map(|_| (next(200) as u32, next(9) as i64 - 4))
                .collect();
            state.sort_unstable();
            state.dedup_by_key(|e| e.0);
            let mut after = state.clone();
            after.retain(|_| next(4) != 0);
            after.push((200 + next(20) as u32, 3));
            after.sort_unstable();
            after.dedup_by_key(|e| e.0);
            sets.extend(difference(&state, &after, next(2) == 0).unwrap());
        }
        let whole = aggregate_pairs_sharing::<i64, Products>(&sets, &|_| true, |_| 1);
        assert!(whole.0.len() > 1_000, "enough pairs to split: {}", whole.0.len());
        let sharings: [fn(u64) -> usize; 4] = [|_| 2, |_| 3, |_| 5, |_| 64];
        for (k, threads) in sharings.into_iter().enumerate() {
            assert_eq!(
                aggregate_pairs_sharing::<i64, Products>(&sets, &|_| true, threads),
                whole,
                "sharing {k}"
            );
        }
        // A shard's filter sums exactly the pairs touching its items, with their full sums,
        // on one thread or several.
        let owns = |item: u32| item % 3 == 1;
        let mut touching = whole.0.clone();
        touching.retain(|&(a, b, _)| owns(a) || owns(b));
        assert!(touching.len() < whole.0.len() && !touching.is_empty());
        for threads in [(|_| 1) as fn(u64) -> usize, |_| 3] {
            let (kept, updates) = aggregate_pairs_sharing::<i64, Products>(&sets, &owns, threads);
            assert_eq!(kept, touching);
            assert!(
                updates < whole.1,
                "fewer contributions summed: {updates} of {}",
                whole.1
            );
        }
    }

    #[test]
    fn sets_of_several_users_add_up() {
        let u1 = difference(&[], &[(2, 1), (4, 1)], false).unwrap();
        let u2 = difference(&[], &[(2, 3), (4, 5), (7, 1)], false).unwrap();
        let sets: Vec<_> = u1.into_iter().chain(u2).collect();
        let (deltas, _) = aggregate_pairs::<i64, Products>(&sets, &|_| true);
        assert_eq!(
            deltas,
            vec![
                (2, 4, Products(2, 16)),
                (2, 7, Products(1, 3)),
                (4, 7, Products(1, 5))
            ]
        );
    }
}
