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
use crate::engine::{BatchEffects, RatingPairDelta};
use crate::model::RatingPairStats;

/// Bytes one kept row entry takes, with the map's share (rounded up).
const ENTRY_BYTES: usize = std::mem::size_of::<u32>() + std::mem::size_of::<RatingPairStats>() + 4;

/// One item's rating row as the store reads it: (other, sums oriented to the item), in
/// key order, n ≠ 0.
type RatingRow = Vec<(u32, RatingPairStats)>;

/// One kept rating row: the other items in key order and, beside them, the sums. Kept
/// apart so that finding where a write's deltas land reads 4 bytes per pair, not 80 (the
/// rows together hold millions of pairs, walked after every write).
#[derive(Debug, Default, Clone, PartialEq)]
struct KeptRow {
    others: Vec<u32>,
    stats: Vec<RatingPairStats>,
}

impl KeptRow {
    fn from_pairs(row: RatingRow) -> KeptRow {
        let (others, stats) = row.into_iter().unzip();
        KeptRow { others, stats }
    }

    fn to_pairs(&self) -> RatingRow {
        self.others
            .iter()
            .copied()
            .zip(self.stats.iter().copied())
            .collect()
    }

    fn len(&self) -> usize {
        self.others.len()
    }
}

/// Rating rows, as the store holds them (pairs with n = 0 left out), for some items.
#[derive(Debug, Default)]
pub struct RowMirror {
    rows: HashMap<u32, KeptRow>,
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
        let started = std::time::Instant::now();
        let deltas = OrientedRows::of(&effects.rating_pairs, 0);
        // Rows are independent: split them over the cores.
        let mut rows: Vec<(u32, &mut KeptRow)> = self.rows.iter_mut().map(|(&i, r)| (i, r)).collect();
        let workers = std::thread::available_parallelism().map_or(1, |n| n.get());
        let per_worker = rows.len().div_ceil(workers).max(1);
        let deltas = &deltas;
        std::thread::scope(|scope| {
            for part in rows.chunks_mut(per_worker) {
                scope.spawn(move || {
                    for (item, row) in part {
                        absorb_row(*item, row, deltas);
                    }
                });
            }
        });
        self.entries = self.rows.values().map(KeptRow::len).sum();
        tracing::debug!(
            rows = self.rows.len(),
            entries = self.entries,
            seconds = started.elapsed().as_secs_f64(),
            "kept rows updated"
        );
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
            if let Some(old) = self.rows.insert(item, KeptRow::from_pairs(row)) {
                self.entries -= old.len();
            }
        }
    }
}

/// Adds a write's deltas to one kept row. Most deltas land on pairs the row already
/// holds and are added in place; the first one that does not (a new pair) moves the rest
/// into a merged copy. Pairs whose co-raters fell to zero leave the row.
fn absorb_row(item: u32, row: &mut KeptRow, deltas: &OrientedRows<'_, RatingPairDelta>) {
    let mut applied = 0;
    let mut at = 0;
    let mut emptied = false;
    let mut new_pair = false;
    for (other, d) in deltas.row(item) {
        while at < row.others.len() && row.others[at] < other {
            at += 1;
        }
        if at == row.others.len() || row.others[at] != other {
            new_pair = true;
            break;
        }
        let stats = &mut row.stats[at];
        stats.add(&oriented_rating_stats(item, other, d));
        emptied |= stats.n == 0;
        applied += 1;
        at += 1;
    }
    if new_pair {
        merge_into_row(item, row, deltas.row(item).skip(applied));
    } else if emptied {
        *row = KeptRow::from_pairs(row.to_pairs().into_iter().filter(|(_, s)| s.n != 0).collect());
    }
}

/// Merges deltas (in key order) into a row, new pairs included, leaving out pairs whose
/// co-raters fall to zero.
fn merge_into_row<'d>(
    item: u32,
    row: &mut KeptRow,
    changes: impl Iterator<Item = (u32, &'d RatingPairDelta)>,
) {
    let mut changes = changes.peekable();
    let mut merged = Vec::with_capacity(row.len() + 4);
    let mut kept = std::mem::take(row).to_pairs().into_iter().peekable();
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
    *row = KeptRow::from_pairs(merged);
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
            return Ok(row.to_pairs());
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
    use crate::pipeline::segment::OpenSegment;
    use crate::store::{PairRows, PairWrite, Store};

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
        // Ratings, re-ratings and withdrawals by a few customers over a few items, so that
        // pairs appear, change, and fall back to zero across writes.
        let batches = crate::test_random::shop_batches(11, 40, 40, 9, 14, false);
        for (i, batch) in batches.into_iter().enumerate() {
            let mut segment = OpenSegment::new(&store);
            segment
                .apply(&store, &settings, &batch, &BTreeMap::new())
                .unwrap();
            let sealed = segment.seal();
            // Both ways the store takes pair sums: in the batch, and as table files.
            let pairs = if i % 2 == 0 {
                PairWrite::InBatch
            } else {
                PairWrite::RatingsIngested
            };
            sealed.write(&mut store, pairs).unwrap();
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
                        row.to_pairs(),
                        store.rating_row(item).unwrap(),
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
