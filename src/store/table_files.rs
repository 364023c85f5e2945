//! Bulk writing of pair sums (docs/design.md, "Bulk backfill"): a backfill segment's pair
//! rows are written as sorted table files and handed to RocksDB whole, bypassing the
//! write-ahead log and the memtables that a WriteBatch of millions of keys goes through.
//!
//! A segment is committed in two steps that RocksDB cannot join atomically: the table
//! files of each pair family, then one WriteBatch with users, ids, marks and the ledger.
//! With each family's files goes one more file holding only a marker key, with the
//! segment's end position (`next_seq` after its last event); the WriteBatch deletes it. A run killed between the
//! steps finds the marker on restart, replays the same segment up to that position, skips
//! the families that already hold it and writes the rest, so no sum is added twice.

use std::ops::Range;
use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use rocksdb::{IngestExternalFileOptions, SstFileWriter, WriteBatch, DB};

use super::open::read_ledger;
use super::options::cf_options;
use super::oriented::{oriented_rating_stats, OrientedRows};
use super::row_blocks::BlockCutter;
use super::{codec, Store, CF_PAIRS, CF_PURCHASE_PAIRS};
use crate::engine::{BatchEffects, RatingPairDelta};
use crate::model::RatingPairStats;

/// Key of the segment marker: sorts after every pair key (rows are ids below u32::MAX).
pub(super) const SEGMENT_MARKER_KEY: [u8; 9] = [0xFF; 9];

/// The value under [`SEGMENT_MARKER_KEY`]: the segment's end position, then (for a
/// [`PairWrite::RatingsIngested`](super::PairWrite::RatingsIngested) write) the bytes of
/// the WriteBatch that completes it.
struct SegmentMarker<'a> {
    end: u64,
    rest: &'a [u8],
}

impl<'a> SegmentMarker<'a> {
    fn encode(&self) -> Vec<u8> {
        [&(self.end as i64).to_le_bytes()[..], self.rest].concat()
    }

    fn decode(bytes: &'a [u8]) -> Result<SegmentMarker<'a>> {
        if bytes.len() < 8 {
            bail!("segment marker has {} bytes, expected at least 8", bytes.len());
        }
        let (end, rest) = bytes.split_at(8);
        Ok(SegmentMarker {
            end: codec::decode_count(end)? as u64,
            rest,
        })
    }
}

/// Finishes a [`PairWrite::RatingsIngested`](super::PairWrite::RatingsIngested) write
/// that a killed process left half done: its table files are in, its batch (carried by
/// the marker) is not. Writes that batch, which deletes the marker, before anything else
/// reads or writes the store. Returns the segment end when it did.
pub(super) fn finish_carried_write(db: &DB) -> Result<Option<u64>> {
    let pairs = db.cf_handle(CF_PAIRS).expect("pair family exists");
    let Some(bytes) = db.get_cf(pairs, SEGMENT_MARKER_KEY)? else {
        return Ok(None);
    };
    let marker = SegmentMarker::decode(&bytes)?;
    if marker.rest.is_empty() || marker.end <= read_ledger(db)?.next_seq {
        return Ok(None);
    }
    db.write(WriteBatch::from_data(marker.rest))
        .context("cannot finish the store write a stopped process left half done")?;
    Ok(Some(marker.end))
}

/// Where table files are written before RocksDB takes them over.
fn ingest_dir(store_dir: &Path) -> PathBuf {
    store_dir.join("ingest")
}

/// Removes table files a killed run left before handing them over.
pub(super) fn clear_leftovers(store_dir: &Path) -> Result<()> {
    let dir = ingest_dir(store_dir);
    if dir.exists() {
        std::fs::remove_dir_all(&dir).with_context(|| format!("cannot clear {}", dir.display()))?;
    }
    Ok(())
}

/// Where a table writer hands each (key, value): a put into a store that never held a
/// pair, a merge operand otherwise.
type Emit<'w> = dyn FnMut(&[u8], &[u8]) -> Result<(), rocksdb::Error> + 'w;

/// Hands the entries of a range of rows, in key order, to `emit` as keys and values.
type WriteRows<'a, T> = fn(&OrientedRows<'a, T>, Range<u32>, &mut Emit<'_>) -> Result<(), rocksdb::Error>;

/// One pair family's rows, ready to be written.
struct FamilyRows<'a, T> {
    family: &'static str,
    rows: OrientedRows<'a, T>,
    write: WriteRows<'a, T>,
}

/// Rating rows as row blocks (docs/design.md, "Rows in blocks").
pub(super) fn write_rating_rows(
    rows: &OrientedRows<'_, RatingPairDelta>,
    range: Range<u32>,
    emit: &mut Emit<'_>,
) -> Result<(), rocksdb::Error> {
    let mut cutter = BlockCutter::default();
    rows.for_each_in(range, |row, other, d| {
        cutter.push(row, other, oriented_rating_stats(row, other, d), emit)
    })?;
    cutter.flush(emit)
}

/// Co-buyer counts, one key per ordered pair.
fn write_count_rows(
    rows: &OrientedRows<'_, i64>,
    range: Range<u32>,
    emit: &mut Emit<'_>,
) -> Result<(), rocksdb::Error> {
    rows.for_each_in(range, |row, other, d| {
        emit(&codec::pair_row_key(row, other), &d.to_le_bytes())
    })
}

/// A table file of rating row blocks written row by row, for a segment whose rows are
/// summed and written in one pass (docs/design.md, "Bulk backfill"). Rows must come in
/// ascending order, each with its partners ascending.
pub struct RatingTable<'o> {
    writer: SstFileWriter<'o>,
    path: PathBuf,
    fresh: bool,
    cutter: BlockCutter,
    /// Rows written with at least one partner.
    written: bool,
}

impl RatingTable<'_> {
    /// Adds one row's entries (partners ascending, none empty).
    pub fn add_row(&mut self, row: u32, entries: &[(u32, RatingPairStats)]) -> Result<()> {
        let (writer, fresh) = (&mut self.writer, self.fresh);
        let mut emit = |key: &[u8], value: &[u8]| put_or_merge(writer, fresh, key, value);
        for (other, stats) in entries {
            self.cutter.push(row, *other, *stats, &mut emit)?;
        }
        self.cutter.flush(&mut emit)?;
        self.written |= !entries.is_empty();
        Ok(())
    }
}

/// Options of the rating family's table files, which [`RatingTable`]s borrow.
pub fn rating_table_options() -> rocksdb::Options {
    cf_options(CF_PAIRS)
}

fn put_or_merge(
    writer: &mut SstFileWriter<'_>,
    fresh: bool,
    key: &[u8],
    value: &[u8],
) -> Result<(), rocksdb::Error> {
    if fresh {
        writer.put(key, value)
    } else {
        writer.merge(key, value)
    }
}

impl Store {
    /// The segment end recorded by an ingestion whose segment was never committed, if any.
    pub fn uncommitted_segment_end(&self) -> Result<Option<u64>> {
        let mut found = None;
        for family in [CF_PAIRS, CF_PURCHASE_PAIRS] {
            if let Some(end) = self.segment_marker(family)? {
                if found.is_some_and(|f| f != end) {
                    bail!(
                        "store {} holds two different unfinished segments",
                        self.dir.display()
                    );
                }
                found = Some(end);
            }
        }
        Ok(found)
    }

    fn segment_marker(&self, family: &str) -> Result<Option<u64>> {
        let Some(bytes) = self.db.get_cf(self.cf(family), SEGMENT_MARKER_KEY)? else {
            return Ok(None);
        };
        Ok(Some(SegmentMarker::decode(&bytes)?.end))
    }

    /// Writes the segment's pair sums as table files and ingests them, family by family,
    /// skipping a family that already holds this segment (a rerun after a kill).
    pub fn ingest_pairs(&self, effects: &BatchEffects, segment_end: u64) -> Result<()> {
        let rating = FamilyRows {
            family: CF_PAIRS,
            rows: OrientedRows::of(&effects.rating_pairs, 0),
            write: write_rating_rows,
        };
        self.ingest_family(rating, segment_end, &[])?;
        self.ingest_purchase_pairs(effects, segment_end)
    }

    /// Writes the segment's co-buyer counts as table files and ingests them (skipped when
    /// the family already holds this segment).
    pub fn ingest_purchase_pairs(&self, effects: &BatchEffects, segment_end: u64) -> Result<()> {
        let purchase = FamilyRows {
            family: CF_PURCHASE_PAIRS,
            rows: OrientedRows::of(&effects.purchase_pairs, 0),
            write: write_count_rows,
        };
        self.ingest_family(purchase, segment_end, &[])
    }

    /// Writes the segment's rating pair sums as table files and ingests them, the marker
    /// carrying `rest`: the bytes of the WriteBatch that completes the segment
    /// ([`PairWrite::RatingsIngested`](super::PairWrite::RatingsIngested)). Skipped when
    /// the family already holds this segment (a retry after the batch's write failed).
    pub(super) fn ingest_rating_pairs(
        &self,
        effects: &BatchEffects,
        segment_end: u64,
        rest: &[u8],
    ) -> Result<()> {
        let rating = FamilyRows {
            family: CF_PAIRS,
            rows: OrientedRows::of(&effects.rating_pairs, 0),
            write: write_rating_rows,
        };
        self.ingest_family(rating, segment_end, rest)
    }

    /// Pauses (`false`) or resumes (`true`) RocksDB's background compaction of the pair
    /// families. A bulk backfill pauses it: every segment's files would otherwise be
    /// rewritten again and again as the next ones arrive, competing for the cores that
    /// apply batches; [`Store::compact_pairs`] merges them once at the end. Also raises
    /// the count of unmerged files at which RocksDB would hold writes back, which a
    /// paused compaction would otherwise reach after a few dozen segments.
    pub fn set_pair_compaction(&self, running: bool) -> Result<()> {
        let settings: [(&str, &str); 3] = if running {
            [
                ("disable_auto_compactions", "false"),
                ("level0_slowdown_writes_trigger", "20"),
                ("level0_stop_writes_trigger", "36"),
            ]
        } else {
            [
                ("disable_auto_compactions", "true"),
                ("level0_slowdown_writes_trigger", "100000"),
                ("level0_stop_writes_trigger", "100000"),
            ]
        };
        for family in [CF_PAIRS, CF_PURCHASE_PAIRS] {
            self.db
                .set_options_cf(self.cf(family), &settings)
                .with_context(|| format!("cannot set compaction options of {family}"))?;
        }
        Ok(())
    }

    /// Merges every pair family's table files and operands into one sorted run, as a
    /// backfill that ingested several segments (or into a store that held pairs) does
    /// before scoring: reads of a row otherwise visit every segment's files and add their
    /// operands key by key.
    pub fn compact_pairs(&self) {
        for family in [CF_PAIRS, CF_PURCHASE_PAIRS] {
            self.db
                .compact_range_cf(self.cf(family), None::<&[u8]>, None::<&[u8]>);
        }
    }

    fn ingest_family<T: Sync>(&self, family: FamilyRows<'_, T>, segment_end: u64, rest: &[u8]) -> Result<()> {
        if family.rows.len() == 0 || self.segment_marker(family.family)? == Some(segment_end) {
            return Ok(());
        }
        let dir = ingest_dir(&self.dir);
        std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
        let fresh = !self.ledger.pair_keys_written;
        let parts = split_rows(&family.rows, file_count(family.rows.len()));
        let paths: Vec<PathBuf> = (0..parts.len())
            .map(|i| dir.join(format!("{}-{segment_end}-{i}.sst", family.family)))
            .collect();
        let family = &family;
        std::thread::scope(|scope| {
            let writers: Vec<_> = parts
                .into_iter()
                .zip(&paths)
                .map(|(rows, path)| scope.spawn(move || write_table(family, rows, path, fresh)))
                .collect();
            writers
                .into_iter()
                .try_for_each(|w| w.join().expect("table writers do not panic"))
        })?;
        self.ingest_with_marker(family.family, paths, segment_end, rest)
    }

    /// Ingests `paths` into `family` together with the segment marker (carrying `rest`),
    /// in one atomic step.
    fn ingest_with_marker(
        &self,
        family: &str,
        mut paths: Vec<PathBuf>,
        segment_end: u64,
        rest: &[u8],
    ) -> Result<()> {
        let marker_path = ingest_dir(&self.dir).join(format!("{family}-{segment_end}-marker.sst"));
        let marker = SegmentMarker {
            end: segment_end,
            rest,
        };
        write_marker(family, &marker, &marker_path)?;
        paths.push(marker_path);
        let mut opts = IngestExternalFileOptions::default();
        opts.set_move_files(true);
        self.db
            .ingest_external_file_cf_opts(self.cf(family), &opts, paths)
            .with_context(|| format!("cannot ingest the {family} table files"))
    }

    /// Opens `parts` rating table files for a segment whose rows are summed and written
    /// in one pass, each for a consecutive range of rows; `None` when the family already
    /// holds this segment (a rerun after a kill between ingestion and commit).
    pub fn open_rating_tables<'o>(
        &self,
        options: &'o rocksdb::Options,
        segment_end: u64,
        parts: usize,
    ) -> Result<Option<Vec<RatingTable<'o>>>> {
        if self.segment_marker(CF_PAIRS)? == Some(segment_end) {
            return Ok(None);
        }
        let dir = ingest_dir(&self.dir);
        std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
        let fresh = !self.ledger.pair_keys_written;
        (0..parts)
            .map(|i| {
                let path = dir.join(format!("{CF_PAIRS}-{segment_end}-{i}.sst"));
                let writer = SstFileWriter::create(options);
                writer
                    .open(&path)
                    .with_context(|| format!("cannot create table file {}", path.display()))?;
                Ok(RatingTable {
                    writer,
                    path,
                    fresh,
                    cutter: BlockCutter::default(),
                    written: false,
                })
            })
            .collect::<Result<Vec<_>>>()
            .map(Some)
    }

    /// Finishes the rating table files of [`Store::open_rating_tables`] and ingests them
    /// with the segment marker. Files that received no row are left out.
    pub fn ingest_rating_tables(&self, tables: Vec<RatingTable<'_>>, segment_end: u64) -> Result<()> {
        let mut paths = Vec::new();
        for mut table in tables {
            if table.written {
                table
                    .writer
                    .finish()
                    .with_context(|| format!("cannot finish table file {}", table.path.display()))?;
                paths.push(table.path);
            } else {
                drop(table.writer);
                let _ = std::fs::remove_file(&table.path);
            }
        }
        if paths.is_empty() {
            return Ok(());
        }
        self.ingest_with_marker(CF_PAIRS, paths, segment_end, &[])
    }
}

/// Entries per table file below which one file is written (splitting a small family only
/// adds files for compaction to merge).
const ENTRIES_PER_FILE_MIN: usize = 1 << 20;

/// One file per core for large families: the files cover disjoint key ranges, are written
/// in parallel and ingested together in one atomic step.
fn file_count(entries: usize) -> usize {
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    (entries / ENTRIES_PER_FILE_MIN).clamp(1, cores)
}

/// Splits the rows into at most `parts` consecutive ranges of about equal entries, each
/// ending at a row boundary so the files' key ranges do not overlap; empty ranges are
/// left out, but there is always at least one.
fn split_rows<T>(rows: &OrientedRows<'_, T>, parts: usize) -> Vec<Range<u32>> {
    let total = rows.row_count();
    let mut out = Vec::with_capacity(parts);
    let mut start = 0u32;
    for k in 1..parts {
        let target = rows.len() * k / parts;
        let mut end = start;
        while end < total && rows.entries_before(end) < target {
            end += 1;
        }
        if end > start {
            out.push(start..end);
            start = end;
        }
    }
    out.push(start..total);
    out
}

/// Writes one table file with the entries of `rows`: each as a put (into a store that
/// never held a pair) or a merge operand. Compressed like the family: on the MovieLens
/// snapshot LZ4 halves the files (866 MB to 449 MB) at no cost in time, since writing
/// them is bound by the disk as much as by the processor.
fn write_table<T>(family: &FamilyRows<'_, T>, rows: Range<u32>, path: &Path, fresh: bool) -> Result<()> {
    let opts = cf_options(family.family);
    let mut writer = SstFileWriter::create(&opts);
    writer
        .open(path)
        .with_context(|| format!("cannot create table file {}", path.display()))?;
    let mut emit = |key: &[u8], value: &[u8]| put_or_merge(&mut writer, fresh, key, value);
    (family.write)(&family.rows, rows, &mut emit)?;
    writer
        .finish()
        .with_context(|| format!("cannot finish table file {}", path.display()))
}

/// Writes the segment marker as a table file of its own, ingested with the pair files.
/// Apart from them, the marker's value (which may carry users' histories and names, see
/// [`SegmentMarker`]) can be compacted away without rewriting the pair sums
/// (docs/design.md, "Personal data").
fn write_marker(family: &str, marker: &SegmentMarker<'_>, path: &Path) -> Result<()> {
    let options = cf_options(family);
    let mut writer = SstFileWriter::create(&options);
    writer
        .open(path)
        .with_context(|| format!("cannot create table file {}", path.display()))?;
    writer.put(SEGMENT_MARKER_KEY, marker.encode())?;
    writer
        .finish()
        .with_context(|| format!("cannot finish table file {}", path.display()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splits_fall_on_row_starts_and_cover_everything() {
        let deltas: Vec<(u32, u32, u8)> = [(0, 1), (0, 2), (1, 2), (1, 3), (2, 3), (3, 4)]
            .into_iter()
            .map(|(a, b)| (a, b, 0))
            .collect();
        let rows = OrientedRows::of(&deltas, 0);
        for parts in 1..=5 {
            let ranges = split_rows(&rows, parts);
            assert!(!ranges.is_empty() && ranges.len() <= parts);
            assert_eq!(ranges[0].start, 0);
            assert_eq!(ranges.last().unwrap().end, rows.row_count());
            for w in ranges.windows(2) {
                assert_eq!(w[0].end, w[1].start, "ranges are consecutive");
                assert!(w[0].start < w[0].end, "no empty range before the last");
            }
        }
    }
}
