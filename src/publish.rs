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
    /// Earliest dirty time among the marks answered.
    pub oldest_dirty: Option<i64>,
}

impl CycleReport {
    fn absorb(&mut self, other: CycleReport) {
        self.rescored += other.rescored;
        self.changed += other.changed;
        self.tombstones += other.tombstones;
        self.oldest_dirty = match (self.oldest_dirty, other.oldest_dirty) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        };
    }
}

/// Orders candidates best first: score descending, then item name ascending.
fn rank(store: &Store, a: &StoredNeighbor, b: &StoredNeighbor) -> Ordering {
    b.score
        .total_cmp(&a.score)
        .then_with(|| store.item_name(a.item).cmp(store.item_name(b.item)))
}

/// Keeps the best `k` candidates, in rank order.
fn top_k(store: &Store, mut candidates: Vec<StoredNeighbor>, k: usize) -> Vec<StoredNeighbor> {
    if candidates.len() > k {
        candidates.select_nth_unstable_by(k - 1, |a, b| rank(store, a, b));
        candidates.truncate(k);
    }
    candidates.sort_unstable_by(|a, b| rank(store, a, b));
    candidates
}

/// Computes the current list of one item from the store.
pub fn compute_list(
    store: &Store,
    signal: Signal,
    item: u32,
    settings: &ListSettings,
    unavailable: &FxHashSet<u32>,
) -> Result<Vec<StoredNeighbor>> {
    if unavailable.contains(&item) {
        return Ok(Vec::new());
    }
    let candidates = match signal {
        Signal::Rating => store
            .rating_row(item)?
            .into_iter()
            .filter(|(other, _)| *other != item && !unavailable.contains(other))
            .filter_map(|(other, stats)| {
                rating_list_score(&stats, settings).map(|score| StoredNeighbor {
                    item: other,
                    score,
                    support: stats.n as u64,
                })
            })
            .collect(),
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
            others
                .into_iter()
                .zip(counts)
                .filter_map(|((other, co), n_other)| {
                    purchase_list_score(co, own, n_other, total, settings).map(|score| StoredNeighbor {
                        item: other,
                        score,
                        support: co as u64,
                    })
                })
                .collect()
        }
    };
    Ok(top_k(store, candidates, settings.neighbors))
}

/// Items to rescore for a signal: every marked item (whose mark the cycle clears), plus
/// the row members of items marked "with neighbors".
fn targets(store: &Store, signal: Signal) -> Result<(BTreeMap<u32, bool>, Option<i64>)> {
    let marks = store.dirty_marks(signal)?;
    let oldest = marks.iter().map(|(_, m)| m.since).min();
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
    Ok((out, oldest))
}

/// Computes the lists of a chunk on every core: rows are independent reads.
fn compute_in_parallel(
    store: &Store,
    chunk: &[(Signal, u32, bool)],
    settings: &ListSettings,
    unavailable: &FxHashSet<u32>,
) -> Result<Vec<Vec<StoredNeighbor>>> {
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
                        .map(|&(signal, item, _)| compute_list(store, signal, item, settings, unavailable))
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
    let mut plan = Vec::new();
    let mut report = CycleReport::default();
    for signal in Signal::ALL {
        let (items, oldest) = targets(store, signal)?;
        report.absorb(CycleReport {
            oldest_dirty: oldest,
            ..CycleReport::default()
        });
        plan.extend(items.into_iter().map(|(item, clears)| (signal, item, clears)));
    }
    let total = plan.len() as u64;
    let watermark = store.progress().event_time_watermark;
    for chunk in plan.chunks(WRITE_CHUNK) {
        let mut writes = Vec::with_capacity(chunk.len());
        let mut part = CycleReport::default();
        let lists = compute_in_parallel(store, chunk, settings, &unavailable)?;
        for (&(signal, item, clears_mark), neighbors) in chunk.iter().zip(lists) {
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
    Ok(report)
}
