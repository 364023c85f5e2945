//! One pass over the rows of a staged file segment (docs/design.md, "Bulk backfill"):
//! each core sums a consecutive range of rows under both orders, writes them as row
//! blocks into a table file of its own and — for the run's last segment — scores each
//! row into its top-k list at once, adding the stored row first when the store already
//! held pairs. The segment's pair sums are never held as a list of pairs.

use std::ops::Range;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Duration;

use anyhow::Result;
use rustc_hash::{FxHashMap, FxHashSet};

use crate::engine::aggregate::RowIndex;
use crate::engine::Deviation;
use crate::model::RatingPairStats;
use crate::observability::meter::Meter;
use crate::score::ListSettings;
use crate::store::row_blocks::add_sorted;
use crate::store::{rating_table_options, RatingTable, Store};
use crate::topk::{rating_list, Exclusions, NameOrder, ScoredRow};

/// What the pass needs to score rows into lists: the same settings, exclusions and name
/// order the publication that follows uses, so a list scored here is the list it would
/// compute from the store.
pub struct ListScoring<'a> {
    /// List length, support, damping, minimum score.
    pub settings: &'a ListSettings,
    /// Items that may not be listed.
    pub unavailable: &'a FxHashSet<u32>,
    /// Ties broken by name.
    pub names: &'a NameOrder,
}

/// What a pass did.
pub struct PassOutcome {
    /// Pair contributions summed (each pair counted once, though summed in both rows).
    pub updates: u64,
    /// Whether it wrote any row (false when the store already held this segment: a
    /// rerun after a kill between ingestion and commit).
    pub rows_written: bool,
    /// The rating lists it scored, by item.
    pub lists: FxHashMap<u32, ScoredRow>,
}

/// Ranges of rows each core takes, one at a time, from a shared counter. Summing costs by
/// contributions, writing and scoring by the entries a row ends with, and the two do not
/// follow each other (a popular row folds many contributions into few entries, a rare
/// one few into many): split in two ranges of equal contributions, one core finished in
/// 3.2 s and the other in 7.1 s on the wide benchmark. Small ranges taken in turn keep
/// both busy to the end; each writes a table file of its own.
const RANGES_PER_CORE: usize = 8;

/// A range of rows not yet taken by a core, with its table file (none on a rerun whose
/// rows are already stored).
type Claim<'o> = (Range<usize>, Option<RatingTable<'o>>);

/// Lists scored by one range of the pass, by item.
type Lists = Vec<(u32, ScoredRow)>;

/// What one range of the pass returns: contributions summed, its table, its lists.
type Share<'o> = (u64, Option<RatingTable<'o>>, Lists);

/// Sums, writes and (with `scoring`) scores every row of `index` for the segment ending
/// at `segment_end`, ingesting the rows with the segment marker. `meter` follows rows.
pub fn sum_write_and_score(
    store: &Store,
    index: &RowIndex<Deviation>,
    segment_end: u64,
    scoring: Option<&ListScoring<'_>>,
    mut meter: Meter,
) -> Result<PassOutcome> {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let ranges = index.split_rows(cores * RANGES_PER_CORE);
    let options = rating_table_options();
    let tables = store.open_rating_tables(&options, segment_end, ranges.len())?;
    let rows_written = tables.is_some();
    // The stored row is read when the store held pairs before, or already holds this
    // segment's (a rerun); the segment's row is added unless it is already stored.
    let read_stored = store.ledger().pair_keys_written || !rows_written;
    let work: Vec<Mutex<Option<Claim<'_>>>> = match tables {
        Some(t) => ranges
            .into_iter()
            .zip(t)
            .map(|(r, t)| Mutex::new(Some((r, Some(t)))))
            .collect(),
        None => ranges.into_iter().map(|r| Mutex::new(Some((r, None)))).collect(),
    };
    meter.set_total(index.row_count() as u64);
    let (done, next) = (AtomicU64::new(0), AtomicUsize::new(0));
    let sum_range = |rows: Range<usize>, mut table: Option<&mut RatingTable<'_>>| -> Result<(u64, Lists)> {
        let mut lists = Vec::new();
        let updates = index.visit_rows::<RatingPairStats, anyhow::Error>(rows, |item, entries| {
            if let Some(table) = table.as_mut() {
                table.add_row(item, entries)?;
            }
            let owned = store.owns(item) || item as usize >= store.item_count();
            if let Some(scoring) = scoring.filter(|_| owned) {
                let summed;
                let row = if read_stored {
                    summed = stored_plus(store, item, entries, rows_written)?;
                    &summed
                } else {
                    entries
                };
                let excluded = Exclusions {
                    unavailable: scoring.unavailable,
                };
                lists.push((
                    item,
                    rating_list(item, row, scoring.settings, &excluded, scoring.names),
                ));
            }
            done.fetch_add(1, Ordering::Relaxed);
            Ok(())
        })?;
        Ok((updates, lists))
    };
    let meter_ref = &mut meter;
    let shares: Vec<Result<Share<'_>>> = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..cores.min(work.len()))
            .map(|_| {
                let (work, next, sum_range) = (&work, &next, &sum_range);
                scope.spawn(move || {
                    let mut shares = Vec::new();
                    while let Some(slot) = work.get(next.fetch_add(1, Ordering::Relaxed)) {
                        let (rows, mut table) = slot.lock().expect("unpoisoned").take().expect("taken once");
                        let share =
                            sum_range(rows, table.as_mut()).map(|(updates, lists)| (updates, table, lists));
                        let failed = share.is_err();
                        shares.push(share);
                        if failed {
                            break;
                        }
                    }
                    shares
                })
            })
            .collect();
        while !workers.iter().all(|w| w.is_finished()) {
            meter_ref.update(done.load(Ordering::Relaxed), "rows summed, written and scored");
            std::thread::sleep(Duration::from_millis(200));
        }
        workers
            .into_iter()
            .flat_map(|w| w.join().expect("row summing does not panic"))
            .collect()
    });
    let mut outcome = PassOutcome {
        updates: 0,
        rows_written,
        lists: FxHashMap::default(),
    };
    let mut finished = Vec::new();
    for share in shares {
        let (updates, table, lists) = share?;
        outcome.updates += updates;
        finished.extend(table);
        outcome.lists.extend(lists);
    }
    // Both orders were summed: every contribution was counted in each of its two rows.
    outcome.updates /= 2;
    if rows_written {
        store.ingest_rating_tables(finished, segment_end)?;
    }
    meter.finish();
    Ok(outcome)
}

/// The stored row of `item`, plus the segment's when it is not stored yet: the row as
/// the store will hold it after this segment, pairs without co-raters left out.
fn stored_plus(
    store: &Store,
    item: u32,
    segment: &[(u32, RatingPairStats)],
    add_segment: bool,
) -> Result<Vec<(u32, RatingPairStats)>> {
    let stored = store.rating_row(item)?;
    if !add_segment {
        return Ok(stored);
    }
    let mut row = Vec::with_capacity(stored.len() + segment.len());
    add_sorted(&stored, segment, &mut row);
    row.retain(|(_, s)| s.n != 0);
    Ok(row)
}
