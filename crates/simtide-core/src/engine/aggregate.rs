//! Sums the contribution sets of a batch into one delta per pair, row by row.
//!
//! Hashing every pair update into a map of a million pairs costs a cache miss per update.
//! Instead the batch's items are renumbered densely, an inverted index lists where each
//! item occurs, and each row `a` is accumulated in a dense array over its partners `b > a`
//! (Gustavson's row-wise sparse product, which is how sparse matrix libraries form AᵀA).
//! The output comes out sorted by (a, b), ready for the store.

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

/// Where an item occurs: its place in the flattened sets, the end of its set there, and
/// the set's sign. Everything the partner scan needs, so an occurrence costs one jump in
/// memory rather than one per array (the profile on the 5-million-rating set showed those
/// jumps, not the sums, as the cost).
#[derive(Clone, Copy, Default)]
struct Occurrence {
    at: u32,
    set_end: u32,
    sign: i64,
}

/// Deltas of every pair the sets touch, as (lo, hi, delta) sorted by (lo, hi), zero deltas
/// left out, and the number of pair contributions summed.
pub fn aggregate_pairs<T: Copy, S: PairSum<T>>(sets: &[ContributionSet<T>]) -> (Vec<(u32, u32, S)>, u64) {
    let mut items: Vec<u32> = sets.iter().flat_map(|s| s.items.iter().copied()).collect();
    items.sort_unstable();
    items.dedup();
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
                set_end: set_end as u32,
                sign: set.sign,
            };
            fill[l] += 1;
        }
        set_start = set_end;
    }

    let mut acc = vec![S::default(); items.len()];
    let mut touched = vec![false; items.len()];
    let mut row: Vec<u32> = Vec::new();
    let mut out = Vec::new();
    let mut updates = 0u64;
    for a in 0..items.len() {
        for occ in &occurrences[starts[a]..starts[a + 1]] {
            let (at, end) = (occ.at as usize, occ.set_end as usize);
            let this = &flat[at];
            for b in &flat[at + 1..end] {
                if this.changed || b.changed {
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
                out.push((items[a], items[b], acc[b]));
            }
            acc[b] = S::default();
            touched[b] = false;
        }
        row.clear();
    }
    (out, updates)
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
            let (deltas, updates) = aggregate_pairs::<i64, Products>(&sets);
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
    fn sets_of_several_users_add_up() {
        let u1 = difference(&[], &[(2, 1), (4, 1)], false).unwrap();
        let u2 = difference(&[], &[(2, 3), (4, 5), (7, 1)], false).unwrap();
        let sets: Vec<_> = u1.into_iter().chain(u2).collect();
        let (deltas, _) = aggregate_pairs::<i64, Products>(&sets);
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
