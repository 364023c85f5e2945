//! Publication (docs/design.md, "Publication"): rescoring the rows of dirty items into top-k
//! lists with deterministic ties, and storing each list that changed with a new version.

use std::collections::BTreeMap;

use anyhow::Result;
use rustc_hash::{FxHashMap, FxHashSet};

use crate::drift::{overlap_drift, rank_biased_overlap, RBO_PERSISTENCE};
use crate::event::UnixNanos;
use crate::model::{DirtyScope, PublishedList};
use crate::score::ListSettings;
use crate::signal::Signal;
use crate::store::{Delivery, MarkAfterWrite, PairRows, PublicationWrite, Store};
use crate::topk::{purchase_list, CoBuyers, Exclusions, NameOrder, ScoredRow};

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

/// The names of the store's items in id order, ranked for tie-breaking.
pub fn name_order(store: &Store) -> NameOrder {
    let names: Vec<&str> = (0..store.item_count() as u32)
        .map(|id| store.item_name(id))
        .collect();
    NameOrder::of(&names)
}

/// Computes the current list of one item from its row.
pub fn compute_list(
    rows: &dyn PairRows,
    signal: Signal,
    item: u32,
    settings: &ListSettings,
    excluded: &Exclusions,
    names: &NameOrder,
) -> Result<ScoredRow> {
    Ok(match signal {
        Signal::Rating => rows.rating_list(item, settings, excluded, names)?,
        Signal::Purchase => {
            let row = rows.purchase_row(item)?;
            let own_buyers = row.iter().find(|(o, _)| *o == item).map_or(0, |(_, c)| *c);
            let others: Vec<(u32, i64)> = row.into_iter().filter(|(other, _)| *other != item).collect();
            let ids: Vec<u32> = others.iter().map(|(o, _)| *o).collect();
            let counts = rows.buyer_counts(&ids)?;
            let row = others
                .into_iter()
                .zip(counts)
                .map(|((other, both), buyers_of_other)| CoBuyers {
                    other,
                    both,
                    buyers_of_other,
                })
                .collect();
            purchase_list(
                item,
                own_buyers,
                rows.total_buyers(),
                row,
                settings,
                excluded,
                names,
            )
        }
    })
}

/// Items to rescore for a signal, with what each does to a stored mark: every marked
/// item, plus the row members of items marked "with neighbors". Items whose mark expands
/// to a row come last, so a cycle cut short (crash, broker away) clears such a mark only
/// after its whole row was rescored, and the next cycle redoes the expansion otherwise.
fn targets(store: &Store, rows: &dyn PairRows, signal: Signal) -> Result<Vec<(u32, MarkAfterWrite)>> {
    let marks = store.dirty_marks(signal)?;
    let mut plain: BTreeMap<u32, MarkAfterWrite> = marks
        .iter()
        .filter(|(_, m)| m.scope == DirtyScope::OwnList)
        .map(|(item, _)| (*item, MarkAfterWrite::Clear))
        .collect();
    let mut expanding = Vec::new();
    for (item, mark) in &marks {
        if mark.scope == DirtyScope::OwnList {
            continue;
        }
        expanding.push((*item, MarkAfterWrite::Clear));
        let members: Vec<u32> = match signal {
            Signal::Rating => rows.rating_row(*item)?.into_iter().map(|(o, _)| o).collect(),
            Signal::Purchase => rows.purchase_row(*item)?.into_iter().map(|(o, _)| o).collect(),
        };
        // In a shard, a row may list another shard's items: their lists are not ours.
        for m in members.into_iter().filter(|&m| store.owns(m)) {
            plain.entry(m).or_insert(MarkAfterWrite::Keep);
        }
    }
    for (item, _) in &expanding {
        plain.remove(item);
    }
    let mut out: Vec<(u32, MarkAfterWrite)> = plain.into_iter().collect();
    out.extend(expanding);
    Ok(out)
}

/// Computes the lists of a chunk on every core: rows are independent reads. A rating list
/// in `scored` (scored by a backfill in the pass that wrote its row) is taken as it is.
fn compute_in_parallel(
    rows: &dyn PairRows,
    chunk: &[(Signal, u32, MarkAfterWrite)],
    scored: &FxHashMap<u32, ScoredRow>,
    settings: &ListSettings,
    excluded: &Exclusions,
    names: &NameOrder,
) -> Result<Vec<ScoredRow>> {
    if chunk.is_empty() {
        return Ok(Vec::new());
    }
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
                        .map(|&(signal, item, _)| match scored.get(&item) {
                            Some(list) if signal == Signal::Rating => Ok(list.clone()),
                            _ => compute_list(rows, signal, item, settings, excluded, names),
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

/// How far a changed list moved from the one it replaces.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ListDrift {
    /// 1 − share of neighbors kept ([`overlap_drift`]).
    pub changed_share: f64,
    /// Rank-biased overlap with p = 0.9 ([`rank_biased_overlap`]).
    pub rbo: f64,
}

/// One rescored item: what to store, and the drift when its list changed.
pub struct Rescored {
    /// The store write.
    pub write: PublicationWrite,
    /// Drift from the previous list; `None` for a first list or an unchanged one.
    pub drift: Option<ListDrift>,
}

/// One publication cycle: the dirty items of both signals, planned at the start and
/// rescored chunk by chunk. The caller stores each chunk (after delivering it, in the live
/// service), so a list is never recorded as published before it reached its readers.
pub struct Cycle {
    plan: Vec<(Signal, u32, MarkAfterWrite)>,
    position: usize,
    unavailable: FxHashSet<u32>,
    names: NameOrder,
    watermark: Option<UnixNanos>,
    now: UnixNanos,
    report: CycleReport,
    /// Rating lists already scored from the rows as the store now holds them.
    scored_rating: FxHashMap<u32, ScoredRow>,
}

impl Cycle {
    /// Plans a cycle over everything dirty now, rows read from `rows`; `now` stamps the
    /// lists it computes.
    pub fn plan(store: &Store, rows: &dyn PairRows, now: UnixNanos) -> Result<Cycle> {
        let mut plan = Vec::new();
        for signal in Signal::ALL {
            let items = targets(store, rows, signal)?;
            plan.extend(items.into_iter().map(|(item, mark)| (signal, item, mark)));
        }
        Ok(Cycle {
            plan,
            position: 0,
            unavailable: store.unavailable_items()?,
            names: name_order(store),
            watermark: store.ledger().event_time_watermark,
            now,
            report: CycleReport::default(),
            scored_rating: FxHashMap::default(),
        })
    }

    /// Takes rating lists a backfill scored in the pass that wrote their rows
    /// (docs/design.md, "Bulk backfill") instead of scoring those rows again. They must
    /// have been scored from the rows the store holds, with this cycle's settings,
    /// exclusions and name order.
    pub fn with_rating_lists(mut self, lists: FxHashMap<u32, ScoredRow>) -> Cycle {
        self.scored_rating = lists;
        self
    }

    /// Lists the cycle will rescore in all.
    pub fn total(&self) -> u64 {
        self.plan.len() as u64
    }

    /// Newest event time the cycle's lists reflect.
    pub fn watermark(&self) -> Option<UnixNanos> {
        self.watermark
    }

    /// Lists rescored so far.
    pub fn done(&self) -> u64 {
        self.position as u64
    }

    /// Rescores the next chunk; `None` when the cycle is complete. Each write holds the new
    /// list when it changed, and the dirty mark it clears.
    pub fn next_chunk(
        &mut self,
        store: &Store,
        rows: &dyn PairRows,
        settings: &ListSettings,
    ) -> Result<Option<Vec<Rescored>>> {
        if self.position >= self.plan.len() {
            return Ok(None);
        }
        let end = (self.position + WRITE_CHUNK).min(self.plan.len());
        let chunk = &self.plan[self.position..end];
        let excluded = Exclusions {
            unavailable: &self.unavailable,
        };
        // A shard holds "with neighbors" marks of other shards' items so that their rows
        // reach its own lists; those items' own lists are not scored here, their marks
        // only cleared (after the rows they expanded to, which come first).
        let owned: Vec<bool> = chunk.iter().map(|&(_, item, _)| store.owns(item)).collect();
        let to_score: Vec<(Signal, u32, MarkAfterWrite)> = chunk
            .iter()
            .zip(&owned)
            .filter(|(_, own)| **own)
            .map(|(c, _)| *c)
            .collect();
        let mut lists = compute_in_parallel(
            rows,
            &to_score,
            &self.scored_rating,
            settings,
            &excluded,
            &self.names,
        )?
        .into_iter();
        let mut writes: Vec<Rescored> = Vec::with_capacity(chunk.len());
        for (&(signal, item, mark), own) in chunk.iter().zip(owned) {
            if !own {
                writes.push(Rescored {
                    write: PublicationWrite {
                        signal,
                        item,
                        list: None,
                        mark,
                    },
                    drift: None,
                });
                continue;
            }
            let scored = lists.next().expect("one list per owned item");
            self.report.rating_pairs_seen += scored.row_len as u64;
            let neighbors = scored.neighbors;
            let previous = store.published(signal, item)?;
            let changed = match &previous {
                Some(p) => p.neighbors != neighbors,
                None => !neighbors.is_empty(),
            };
            self.report.rescored += 1;
            let drift = match &previous {
                Some(p) if changed => {
                    let before: Vec<u32> = p.neighbors.iter().map(|n| n.item).collect();
                    let after: Vec<u32> = neighbors.iter().map(|n| n.item).collect();
                    Some(ListDrift {
                        changed_share: overlap_drift(&before, &after),
                        rbo: rank_biased_overlap(&before, &after, RBO_PERSISTENCE),
                    })
                }
                _ => None,
            };
            let list = changed.then(|| {
                self.report.changed += 1;
                self.report.tombstones += u64::from(neighbors.is_empty());
                PublishedList {
                    version: previous.as_ref().map_or(1, |p| p.version + 1),
                    computed_at: self.now,
                    event_time_watermark: self.watermark,
                    neighbors,
                }
            });
            writes.push(Rescored {
                write: PublicationWrite {
                    signal,
                    item,
                    list,
                    mark,
                },
                drift,
            });
        }
        self.position = end;
        Ok(Some(writes))
    }

    /// What the cycle did so far. Row entries were counted; each pair lies in two rows.
    pub fn report(&self) -> CycleReport {
        CycleReport {
            rating_pairs_seen: self.report.rating_pairs_seen / 2,
            ..self.report
        }
    }
}

/// Rescores every dirty item of both signals from `rows` (rating lists in `scored_rating`
/// taken as they are, see [`Cycle::with_rating_lists`]) and stores the lists that
/// changed, without delivering them anywhere (backfill). `on_progress(done, total)`
/// follows each chunk.
pub fn publish_dirty(
    store: &Store,
    rows: &dyn PairRows,
    scored_rating: FxHashMap<u32, ScoredRow>,
    settings: &ListSettings,
    now: UnixNanos,
    mut on_progress: impl FnMut(u64, u64),
) -> Result<CycleReport> {
    let mut cycle = Cycle::plan(store, rows, now)?.with_rating_lists(scored_rating);
    while let Some(rescored) = cycle.next_chunk(store, rows, settings)? {
        let writes: Vec<PublicationWrite> = rescored.into_iter().map(|r| r.write).collect();
        store.write_publications(&writes, Delivery::StoredOnly, now)?;
        on_progress(cycle.done(), cycle.total());
    }
    Ok(cycle.report())
}
