//! Rating rows kept in memory by the live service (docs/design.md, "Live writes"). With
//! heavy users nearly every item is dirty in every interval, and reading every row back
//! through RocksDB was the largest cost of a publication cycle. A row read once is kept;
//! each write adds its summed deltas to the rows kept, so they always equal what the store
//! holds, and later cycles score them without reading. Rows are kept while their memory
//! stays within a bound; the others are read from the store as before.

use std::collections::HashMap;
use std::sync::Mutex;

use anyhow::Result;

use super::oriented::{oriented_rating_stats, OrientedRows};
use super::rows::PairRows;
use super::Store;
use crate::engine::BatchEffects;
use crate::model::RatingPairStats;

/// Bytes one kept row entry takes, with the map's share (rounded up).
const ENTRY_BYTES: usize = std::mem::size_of::<(u32, RatingPairStats)>() + 8;

/// One item's rating row: (other, sums oriented to the item), in key order, n ≠ 0.
type RatingRow = Vec<(u32, RatingPairStats)>;

/// Rating rows, as the store holds them (pairs with n = 0 left out), for some items.
#[derive(Debug, Default)]
pub struct RowMirror {
    rows: HashMap<u32, RatingRow>,
    entries: usize,
    max_entries: usize,
}

impl RowMirror {
    /// An empty mirror that keeps rows while they take less than `max_bytes`.
    pub fn within(max_bytes: usize) -> RowMirror {
        RowMirror {
            rows: HashMap::new(),
            entries: 0,
            max_entries: max_bytes / ENTRY_BYTES,
        }
    }

    /// Rows kept.
    pub fn rows(&self) -> usize {
        self.rows.len()
    }

    /// Adds the rating deltas of a write that just landed to the rows kept; rows not kept
    /// stay unknown.
    pub fn absorb(&mut self, effects: &BatchEffects) {
        // Indexing millions of deltas by row costs a pass over them: only when a kept row
        // can change.
        if self.rows.is_empty() || effects.rating_pairs.is_empty() {
            return;
        }
        let deltas = OrientedRows::of(&effects.rating_pairs, 0);
        for (&item, row) in self.rows.iter_mut() {
            let mut changes = deltas.row(item).peekable();
            if changes.peek().is_none() {
                continue;
            }
            let mut merged = Vec::with_capacity(row.len() + 4);
            let mut kept = std::mem::take(row).into_iter().peekable();
            loop {
                let next = match (kept.peek(), changes.peek()) {
                    (Some(k), Some(c)) if k.0 < c.0 => kept.next(),
                    (Some(k), Some(c)) if k.0 == c.0 => {
                        let (other, mut stats) = kept.next().expect("peeked");
                        let (_, d) = changes.next().expect("peeked");
                        stats.add(&oriented_rating_stats(item, other, d));
                        Some((other, stats))
                    }
                    (_, Some(_)) => changes
                        .next()
                        .map(|(other, d)| (other, oriented_rating_stats(item, other, d))),
                    (Some(_), None) => kept.next(),
                    (None, None) => break,
                };
                merged.extend(next.filter(|(_, s)| s.n != 0));
            }
            *row = merged;
        }
        self.entries = self.rows.values().map(Vec::len).sum();
        // Rows grow: past the bound, forget rows until it holds again.
        while self.entries > self.max_entries {
            let Some(&item) = self.rows.keys().next() else {
                break;
            };
            self.entries -= self.rows.remove(&item).map_or(0, |r| r.len());
        }
    }

    /// Keeps rows read from the store while the bound allows.
    fn keep(&mut self, read: Vec<(u32, RatingRow)>) {
        for (item, row) in read {
            if self.entries + row.len() > self.max_entries {
                continue;
            }
            self.entries += row.len();
            if let Some(old) = self.rows.insert(item, row) {
                self.entries -= old.len();
            }
        }
    }
}

/// Rows for a publication cycle: kept rows from memory, the others from the store, kept
/// afterwards ([`MirroredRows::finish`]).
pub struct MirroredRows<'a> {
    mirror: &'a mut RowMirror,
    store: &'a Store,
    read: Mutex<Vec<(u32, RatingRow)>>,
}

impl<'a> MirroredRows<'a> {
    /// Rows of `store`, from `mirror` where it holds them.
    pub fn new(mirror: &'a mut RowMirror, store: &'a Store) -> MirroredRows<'a> {
        MirroredRows {
            mirror,
            store,
            read: Mutex::new(Vec::new()),
        }
    }

    /// Keeps the rows read from the store during the cycle.
    pub fn finish(self) {
        let read = self.read.into_inner().expect("rows lock");
        self.mirror.keep(read);
    }
}

impl PairRows for MirroredRows<'_> {
    fn rating_row(&self, item: u32) -> Result<RatingRow> {
        if let Some(row) = self.mirror.rows.get(&item) {
            return Ok(row.clone());
        }
        let row = self.store.rating_row(item)?;
        self.read.lock().expect("rows lock").push((item, row.clone()));
        Ok(row)
    }

    fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        self.store.purchase_row(item)
    }

    fn buyer_counts(&self, items: &[u32]) -> Result<Vec<i64>> {
        self.store.buyer_counts(items)
    }

    fn total_buyers(&self) -> i64 {
        self.store.ledger().buyers
    }
}

#[cfg(test)]
mod tests {
    use std::collections::BTreeMap;

    use super::{MirroredRows, RowMirror};
    use crate::config::Config;
    use crate::event::{Event, EventBody, UnixNanos};
    use crate::pipeline::Pending;
    use crate::store::{PairRows, PairWrite, Store};

    /// Batches of ratings, re-ratings and withdrawals by a few users over a few items, so
    /// that pairs appear, change, and fall back to zero across writes.
    fn batches() -> Vec<Vec<Event>> {
        let mut state = 11u64;
        let mut next = move |n: u64| {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 33) % n
        };
        let mut at = 1_000_000_000_000i64;
        (0..40)
            .map(|_| {
                (0..(1 + next(40)))
                    .map(|_| {
                        at += 1_000;
                        let (user, item) = (format!("u{}", next(9)), format!("i{}", next(14)));
                        let body = if next(3) == 0 {
                            EventBody::Unrating { user, item }
                        } else {
                            EventBody::Rating {
                                user,
                                item,
                                value: 1.0 + next(5) as f64,
                            }
                        };
                        Event {
                            at: UnixNanos(at),
                            body,
                        }
                    })
                    .collect()
            })
            .collect()
    }

    #[test]
    fn kept_rows_equal_the_stored_rows_after_every_write() {
        let dir = tempfile::tempdir().unwrap();
        let mut config = Config::default();
        config.similarity.max_items_per_user = 0;
        config.similarity.min_common_users = 1;
        let settings = config.engine_settings();
        let mut store = Store::open(&dir.path().join("store"), &config).unwrap();
        // One mirror without bound, one that can keep a few rows only.
        let mut mirrors = [RowMirror::within(usize::MAX), RowMirror::within(2000)];
        let mut compared = 0;
        for (i, batch) in batches().into_iter().enumerate() {
            let mut pending = Pending::new(&store);
            pending
                .apply(&store, &settings, &batch, &BTreeMap::new())
                .unwrap();
            let sealed = pending.seal();
            sealed.write(&mut store, PairWrite::InBatch).unwrap();
            for mirror in &mut mirrors {
                mirror.absorb(sealed.effects());
                // Every third write a cycle reads every row through the mirror.
                if i % 3 == 0 {
                    let rows = MirroredRows::new(mirror, &store);
                    for item in 0..store.item_count() as u32 {
                        assert_eq!(rows.rating_row(item).unwrap(), store.rating_row(item).unwrap());
                    }
                    rows.finish();
                }
                for (&item, row) in &mirror.rows {
                    assert_eq!(
                        row,
                        &store.rating_row(item).unwrap(),
                        "kept row {item} after write {i}"
                    );
                    compared += 1;
                }
            }
        }
        assert!(compared > 100, "rows were kept and compared: {compared}");
        let [all, few] = &mirrors;
        assert!(few.rows() < all.rows(), "the bound keeps fewer rows");
        assert!(few.entries <= few.max_entries);
    }
}
