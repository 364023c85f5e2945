//! Rating rows kept in memory by the live service (docs/design.md, "Live writes"). With
//! heavy users nearly every item is dirty in every interval, and reading every row back
//! through RocksDB was the largest cost of a publication cycle. A row read once is kept;
//! each write adds its summed deltas to the rows kept, so they always equal what the store
//! holds, and later cycles score them without reading. Rows are kept while their memory
//! stays within a bound; the others are read from the store as before. A kept row also
//! keeps its best candidates ([`CandidateBuffer`]), updated pair by pair as deltas land,
//! so that its list is read from them instead of scoring the whole row
//! (docs/design.md, "Lists kept incrementally").

use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

use anyhow::Result;

use super::oriented::{oriented_rating_stats, OrientedRows};
use super::rows::PairRows;
use super::Store;
use crate::engine::{BatchEffects, RatingPairDelta};
use crate::model::RatingPairStats;
use crate::score::ListSettings;
use crate::topk::buffer::CandidateBuffer;
use crate::topk::{rating_candidates, rating_neighbor, select, Exclusions, NameOrder, ScoredRow};

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
    /// The row's best candidates, once a cycle has scored the row.
    buffer: Option<CandidateBuffer>,
    /// Partners whose sums changed since `buffer` last took them (the cycle that next
    /// reads the list scores them, off the consuming thread).
    touched: Vec<u32>,
}

impl KeptRow {
    fn from_pairs(row: RatingRow) -> KeptRow {
        let (others, stats) = row.into_iter().unzip();
        KeptRow {
            others,
            stats,
            buffer: None,
            touched: Vec::new(),
        }
    }

    /// Notes that `other`'s sums changed, for the candidates. Once more partners changed
    /// than half the row, scoring the row whole is cheaper: the candidates are dropped.
    fn touch(&mut self, other: u32) {
        if self.buffer.is_none() {
            return;
        }
        self.touched.push(other);
        if self.touched.len() > self.others.len() / 2 + 16 {
            self.buffer = None;
            self.touched = Vec::new();
        }
    }

    /// The sums of `other` in the row, if the pair is there.
    fn stats_of(&self, other: u32) -> Option<&RatingPairStats> {
        self.others.binary_search(&other).ok().map(|at| &self.stats[at])
    }

    /// The row's entries as (other, sums).
    fn entries(&self) -> impl Iterator<Item = (u32, &RatingPairStats)> {
        self.others.iter().copied().zip(&self.stats)
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
    /// The settings the kept candidates are scored with.
    lists: Option<ListSettings>,
    /// Candidates a row keeps.
    kept_candidates: usize,
}

impl RowMirror {
    /// An empty mirror that keeps rows while they take less than `max_bytes`, and for each
    /// row its best `kept_candidates` candidates under `lists`.
    pub fn within(max_bytes: usize, lists: ListSettings, kept_candidates: usize) -> RowMirror {
        RowMirror {
            rows: HashMap::new(),
            entries: 0,
            max_entries: max_bytes / ENTRY_BYTES,
            lists: Some(lists),
            kept_candidates: kept_candidates.max(lists.neighbors),
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
/// into a merged copy. Pairs whose co-raters fell to zero leave the row. Each changed
/// partner is noted for the row's candidates.
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
        row.touch(other);
        applied += 1;
        at += 1;
    }
    if new_pair {
        merge_into_row(item, row, deltas.row(item).skip(applied));
    } else if emptied {
        let pairs: RatingRow = row.to_pairs().into_iter().filter(|(_, s)| s.n != 0).collect();
        let (others, stats) = pairs.into_iter().unzip();
        row.others = others;
        row.stats = stats;
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
    let mut touched = Vec::new();
    let mut kept = row.to_pairs().into_iter().peekable();
    loop {
        let next = match (kept.peek(), changes.peek()) {
            (Some(k), Some(c)) if k.0 < c.0 => kept.next(),
            (Some(k), Some(c)) if k.0 == c.0 => {
                let (other, mut stats) = kept.next().expect("peeked");
                let (_, d) = changes.next().expect("peeked");
                stats.add(&oriented_rating_stats(item, other, d));
                touched.push(other);
                Some((other, stats))
            }
            (_, Some(_)) => changes.next().map(|(other, d)| {
                touched.push(other);
                (other, oriented_rating_stats(item, other, d))
            }),
            (Some(_), None) => kept.next(),
            (None, None) => break,
        };
        merged.extend(next.filter(|(_, s)| s.n != 0));
    }
    let (others, stats) = merged.into_iter().unzip();
    row.others = others;
    row.stats = stats;
    for other in touched {
        row.touch(other);
    }
}

/// Rows for a publication cycle: kept rows from memory, the others from the store, kept
/// afterwards ([`MirroredRows::finish`]).
pub struct MirroredRows<'a> {
    mirror: &'a mut RowMirror,
    store: &'a Store,
    read: Mutex<Vec<(u32, RatingRow)>>,
    /// Candidates brought up to date or rebuilt during the cycle.
    rebuilt: Mutex<Vec<(u32, CandidateBuffer)>>,
    /// Lists answered from kept candidates.
    from_candidates: AtomicU64,
    /// Kept rows scored whole.
    refills: AtomicU64,
}

/// What a cycle's lists of kept rows cost.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ListSources {
    /// Lists read from a row's kept candidates.
    pub from_candidates: u64,
    /// Kept rows scored whole, their candidates rebuilt (the first list of a row
    /// included).
    pub refills: u64,
}

impl<'a> MirroredRows<'a> {
    /// Rows of `store`, from `mirror` where it holds them.
    pub fn new(mirror: &'a mut RowMirror, store: &'a Store) -> MirroredRows<'a> {
        MirroredRows {
            mirror,
            store,
            read: Mutex::new(Vec::new()),
            rebuilt: Mutex::new(Vec::new()),
            from_candidates: AtomicU64::new(0),
            refills: AtomicU64::new(0),
        }
    }

    /// Keeps the rows read from the store and the candidates brought up to date during
    /// the cycle.
    pub fn finish(self) -> ListSources {
        let read = self.read.into_inner().expect("rows lock");
        for (item, buffer) in self.rebuilt.into_inner().expect("candidates lock") {
            if let Some(row) = self.mirror.rows.get_mut(&item) {
                row.buffer = Some(buffer);
                row.touched.clear();
            }
        }
        self.mirror.keep(read);
        ListSources {
            from_candidates: self.from_candidates.into_inner(),
            refills: self.refills.into_inner(),
        }
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

    fn rating_list(
        &self,
        item: u32,
        settings: &ListSettings,
        excluded: &Exclusions,
        names: &NameOrder,
    ) -> Result<ScoredRow> {
        let Some(row) = self.mirror.rows.get(&item) else {
            let row = self.rating_row(item)?;
            return Ok(crate::topk::rating_list(item, &row, settings, excluded, names));
        };
        let row_len = row.len();
        let same_settings = self.mirror.lists.as_ref() == Some(settings);
        if let Some(kept) = row.buffer.as_ref().filter(|_| same_settings) {
            // The partners changed since the candidates last took them, scored now.
            let mut updated = None;
            if !row.touched.is_empty() {
                let mut buffer = kept.clone();
                let mut touched = row.touched.clone();
                touched.sort_unstable();
                touched.dedup();
                for other in touched {
                    let candidate = row
                        .stats_of(other)
                        .and_then(|stats| rating_neighbor(other, stats, settings));
                    buffer.update(other, candidate);
                }
                updated = Some(buffer);
            }
            let buffer = updated.as_ref().unwrap_or(kept);
            let answered = if excluded.allows(item) {
                buffer.list(settings.neighbors, excluded, names)
            } else {
                Some(Vec::new())
            };
            if let Some(neighbors) = answered {
                self.from_candidates.fetch_add(1, Ordering::Relaxed);
                if let Some(buffer) = updated {
                    self.rebuilt.lock().expect("candidates lock").push((item, buffer));
                }
                return Ok(ScoredRow { neighbors, row_len });
            }
        }
        // Refill: the whole kept row scored, its candidates rebuilt from the same scores.
        let candidates: Vec<_> = rating_candidates(item, row.entries(), settings).collect();
        let neighbors = select(item, candidates.iter().copied(), settings, excluded, names);
        if same_settings {
            let buffer = CandidateBuffer::fill(candidates, self.mirror.kept_candidates);
            self.refills.fetch_add(1, Ordering::Relaxed);
            self.rebuilt.lock().expect("candidates lock").push((item, buffer));
        }
        Ok(ScoredRow { neighbors, row_len })
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

    use rustc_hash::FxHashSet;

    use super::{MirroredRows, RowMirror};
    use crate::config::Config;
    use crate::pipeline::publish::name_order;
    use crate::pipeline::segment::OpenSegment;
    use crate::score::ListSettings;
    use crate::store::{PairRows, PairWrite, Store};
    use crate::topk::{rating_list, Exclusions};

    #[test]
    fn kept_rows_equal_the_stored_rows_after_every_write() {
        let dir = tempfile::tempdir().unwrap();
        let mut config = Config::default();
        config.similarity.max_items_per_user = 0;
        config.similarity.min_common_users = 1;
        let settings = config.engine_settings();
        let mut store = Store::open(&dir.path().join("store"), &config).unwrap();
        // One mirror without bound, one that can keep a few rows only.
        let lists = config.list_settings();
        let mut mirrors = [
            RowMirror::within(usize::MAX, lists, lists.neighbors),
            RowMirror::within(2000, lists, lists.neighbors),
        ];
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

    /// The lists read from kept candidates equal a full rescoring of the stored row, bit
    /// for bit, after every write of a random stream (ratings, re-ratings, withdrawals,
    /// re-centerings at the default tolerance), under settings that exercise each rule:
    /// minimum support, damping, a negative and a positive minimum score, a buffer no
    /// larger than k (refills all the time) and a roomy one; with random unavailable items.
    #[test]
    fn lists_from_kept_candidates_equal_full_rescoring_after_every_write() {
        let dir = tempfile::tempdir().unwrap();
        let mut config = Config::default();
        config.similarity.max_items_per_user = 6;
        let engine = config.engine_settings();
        let mut store = Store::open(&dir.path().join("store"), &config).unwrap();
        let base = config.list_settings();
        let variants: Vec<(ListSettings, usize)> = vec![
            (
                ListSettings {
                    neighbors: 3,
                    min_common_users: 1,
                    damping: 0.0,
                    min_score: 0.0,
                    ..base
                },
                3,
            ),
            (
                ListSettings {
                    neighbors: 2,
                    min_common_users: 2,
                    damping: 2.0,
                    min_score: -0.5,
                    ..base
                },
                5,
            ),
            (
                ListSettings {
                    neighbors: 4,
                    min_common_users: 1,
                    damping: 0.0,
                    min_score: 0.1,
                    ..base
                },
                12,
            ),
        ];
        let mut mirrors: Vec<RowMirror> = variants
            .iter()
            .map(|&(lists, kept)| RowMirror::within(usize::MAX, lists, kept))
            .collect();
        let (mut from_candidates, mut refills, mut compared) = (0, 0, 0);
        let batches = crate::test_random::shop_batches(29, 60, 30, 12, 16, false);
        for (i, batch) in batches.into_iter().enumerate() {
            let mut segment = OpenSegment::new(&store);
            segment.apply(&store, &engine, &batch, &BTreeMap::new()).unwrap();
            let sealed = segment.seal();
            sealed.write(&mut store, PairWrite::RatingsIngested).unwrap();
            let names = name_order(&store);
            let unavailable: FxHashSet<u32> = (0..store.item_count() as u32)
                .filter(|item| (item * 7 + i as u32).is_multiple_of(9))
                .collect();
            let excluded = Exclusions {
                unavailable: &unavailable,
            };
            for (mirror, (lists, _)) in mirrors.iter_mut().zip(&variants) {
                mirror.absorb(sealed.effects());
                let rows = MirroredRows::new(mirror, &store);
                for item in 0..store.item_count() as u32 {
                    let full = rating_list(item, &store.rating_row(item).unwrap(), lists, &excluded, &names);
                    let kept = rows.rating_list(item, lists, &excluded, &names).unwrap();
                    assert_eq!(kept, full, "item {item} after write {i}, settings {lists:?}");
                    compared += 1;
                }
                let sources = rows.finish();
                from_candidates += sources.from_candidates;
                refills += sources.refills;
            }
        }
        assert!(compared > 1000, "lists compared: {compared}");
        assert!(
            from_candidates > refills,
            "most lists come from kept candidates: {from_candidates} against {refills} refills"
        );
    }
}
