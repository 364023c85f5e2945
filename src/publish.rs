//! Publication (DESIGN §6): rescoring the rows of dirty items into top-k lists with
//! deterministic ties, and storing each list that changed with a new version.

use std::cmp::Ordering;
use std::collections::BTreeMap;

use anyhow::Result;
use rustc_hash::FxHashSet;

use crate::score::{purchase_list_score, rating_list_score, ListSettings};
use crate::signal::Signal;
use crate::store::codec::{PublishedList, StoredNeighbor};
use crate::store::{PublicationWrite, Store};

/// Lists written per store write during a publication cycle.
const WRITE_CHUNK: usize = 512;

/// What one publication cycle did.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct CycleReport {
    /// Lists recomputed.
    pub rescored: u64,
    /// Lists that changed and were stored with a new version (tombstones included).
    pub changed: u64,
    /// Of those, lists that became empty.
    pub tombstones: u64,
    /// Rating pairs seen in the rows rescored (each row entry counts half: a pair lies in
    /// two rows). Exact for the whole store when every row was rescored.
    pub rating_pairs_seen: u64,
}

impl CycleReport {
    fn absorb(&mut self, other: CycleReport) {
        self.rescored += other.rescored;
        self.changed += other.changed;
        self.tombstones += other.tombstones;
        self.rating_pairs_seen += other.rating_pairs_seen;
    }
}

/// Position of every item id in name order, so ties can be broken by name with integer
/// comparisons (one sort of the catalogue per cycle instead of string compares per row).
pub struct NameOrder(Vec<u32>);

impl NameOrder {
    /// Ranks the store's current item names.
    pub fn of(store: &Store) -> NameOrder {
        let mut ids: Vec<u32> = (0..store.item_count() as u32).collect();
        ids.sort_unstable_by(|a, b| store.item_name(*a).cmp(store.item_name(*b)));
        let mut rank = vec![0u32; ids.len()];
        for (position, id) in ids.into_iter().enumerate() {
            rank[id as usize] = position as u32;
        }
        NameOrder(rank)
    }

    fn rank(&self, item: u32) -> u32 {
        self.0.get(item as usize).copied().unwrap_or(u32::MAX)
    }
}

/// Orders candidates best first: score descending, then item name ascending.
fn rank(names: &NameOrder, a: &StoredNeighbor, b: &StoredNeighbor) -> Ordering {
    b.score
        .total_cmp(&a.score)
        .then_with(|| names.rank(a.item).cmp(&names.rank(b.item)))
}

/// Keeps the best `k` candidates, in rank order.
fn top_k(names: &NameOrder, mut candidates: Vec<StoredNeighbor>, k: usize) -> Vec<StoredNeighbor> {
    if candidates.len() > k {
        candidates.select_nth_unstable_by(k - 1, |a, b| rank(names, a, b));
        candidates.truncate(k);
    }
    candidates.sort_unstable_by(|a, b| rank(names, a, b));
    candidates
}

/// A freshly computed list, with the size of the row it came from.
#[derive(Debug, Clone, PartialEq)]
pub struct ScoredRow {
    /// The top-k, best first.
    pub neighbors: Vec<StoredNeighbor>,
    /// Other items in the row (rating signal), for counting pairs.
    pub row_len: usize,
}

/// Computes the current list of one item from the store.
pub fn compute_list(
    store: &Store,
    signal: Signal,
    item: u32,
    settings: &ListSettings,
    unavailable: &FxHashSet<u32>,
    names: &NameOrder,
) -> Result<ScoredRow> {
    let item_unavailable = unavailable.contains(&item);
    let (candidates, row_len) = match signal {
        Signal::Rating => {
            let row = store.rating_row(item)?;
            let row_len = row.iter().filter(|(other, _)| *other != item).count();
            let candidates = row
                .into_iter()
                .filter(|(other, _)| !item_unavailable && *other != item && !unavailable.contains(other))
                .filter_map(|(other, stats)| {
                    rating_list_score(&stats, settings).map(|score| StoredNeighbor {
                        item: other,
                        score,
                        support: stats.n as u64,
                    })
                })
                .collect();
            (candidates, row_len)
        }
        Signal::Purchase if item_unavailable => (Vec::new(), 0),
        Signal::Purchase => {
            let row = store.purchase_row(item)?;
            let own = row.iter().find(|(o, _)| *o == item).map_or(0, |(_, c)| *c);
            let others: Vec<(u32, i64)> = row
                .into_iter()
                .filter(|(other, _)| *other != item && !unavailable.contains(other))
                .collect();
            let ids: Vec<u32> = others.iter().map(|(o, _)| *o).collect();
            let counts = store.buyer_counts(&ids)?;
            let total = store.progress().buyers;
            let candidates = others
                .into_iter()
                .zip(counts)
                .filter_map(|((other, co), n_other)| {
                    purchase_list_score(co, own, n_other, total, settings).map(|score| StoredNeighbor {
                        item: other,
                        score,
                        support: co as u64,
                    })
                })
                .collect();
            (candidates, 0)
        }
    };
    Ok(ScoredRow {
        neighbors: top_k(names, candidates, settings.neighbors),
        row_len,
    })
}

/// Items to rescore for a signal: every marked item (whose mark the cycle clears), plus
/// the row members of items marked "with neighbors".
fn targets(store: &Store, signal: Signal) -> Result<BTreeMap<u32, bool>> {
    let marks = store.dirty_marks(signal)?;
    let mut out: BTreeMap<u32, bool> = marks.iter().map(|(item, _)| (*item, true)).collect();
    for (item, mark) in &marks {
        if !mark.with_neighbors {
            continue;
        }
        let members: Vec<u32> = match signal {
            Signal::Rating => store.rating_row(*item)?.into_iter().map(|(o, _)| o).collect(),
            Signal::Purchase => store.purchase_row(*item)?.into_iter().map(|(o, _)| o).collect(),
        };
        for m in members {
            out.entry(m).or_insert(false);
        }
    }
    Ok(out)
}

/// Computes the lists of a chunk on every core: rows are independent reads.
fn compute_in_parallel(
    store: &Store,
    chunk: &[(Signal, u32, bool)],
    settings: &ListSettings,
    unavailable: &FxHashSet<u32>,
    names: &NameOrder,
) -> Result<Vec<ScoredRow>> {
    let workers = std::thread::available_parallelism()
        .map_or(1, |n| n.get())
        .min(chunk.len())
        .max(1);
    let per_worker = chunk.len().div_ceil(workers);
    std::thread::scope(|scope| {
        let handles: Vec<_> = chunk
            .chunks(per_worker)
            .map(|part| {
                scope.spawn(move || {
                    part.iter()
                        .map(|&(signal, item, _)| {
                            compute_list(store, signal, item, settings, unavailable, names)
                        })
                        .collect::<Result<Vec<_>>>()
                })
            })
            .collect();
        let mut out = Vec::with_capacity(chunk.len());
        for h in handles {
            out.extend(h.join().expect("list computation does not panic")?);
        }
        Ok(out)
    })
}

/// Rescores every dirty item of both signals and stores the lists that changed.
/// `on_progress(done, total)` is called after each stored chunk.
pub fn publish_dirty(
    store: &Store,
    settings: &ListSettings,
    now: i64,
    mut on_progress: impl FnMut(u64, u64),
) -> Result<CycleReport> {
    let unavailable = store.unavailable_items()?;
    let names = NameOrder::of(store);
    let mut plan = Vec::new();
    let mut report = CycleReport::default();
    for signal in Signal::ALL {
        let items = targets(store, signal)?;
        plan.extend(items.into_iter().map(|(item, clears)| (signal, item, clears)));
    }
    let total = plan.len() as u64;
    let watermark = store.progress().event_time_watermark;
    for chunk in plan.chunks(WRITE_CHUNK) {
        let mut writes = Vec::with_capacity(chunk.len());
        let mut part = CycleReport::default();
        let lists = compute_in_parallel(store, chunk, settings, &unavailable, &names)?;
        for (&(signal, item, clears_mark), scored) in chunk.iter().zip(lists) {
            part.rating_pairs_seen += scored.row_len as u64;
            let neighbors = scored.neighbors;
            let previous = store.published(signal, item)?;
            let changed = match &previous {
                Some(p) => p.neighbors != neighbors,
                None => !neighbors.is_empty(),
            };
            part.rescored += 1;
            let list = changed.then(|| {
                part.changed += 1;
                part.tombstones += u64::from(neighbors.is_empty());
                PublishedList {
                    version: previous.as_ref().map_or(1, |p| p.version + 1),
                    computed_at: now,
                    event_time_watermark: watermark,
                    neighbors,
                }
            });
            writes.push(PublicationWrite {
                signal,
                item,
                list,
                clears_mark,
            });
        }
        store.write_publications(&writes)?;
        report.absorb(part);
        on_progress(report.rescored, total);
    }
    // Row entries were counted; each pair lies in two rows.
    report.rating_pairs_seen /= 2;
    Ok(report)
}
