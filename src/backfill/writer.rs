//! The one batch writer of every backfill, whatever it reads: each batch's rejected
//! records are appended to the rejects file and its events staged (file backfill) or
//! applied (topic backfill) to a pending segment in memory; when the segment fills
//! `backfill.memory_budget` (or the input ends) a file segment's rows are summed,
//! written as table files and — for the last one — scored in one pass, a topic segment's
//! pair sums put in the commit itself; everything else — users, ids, counters, source
//! positions and the rejects file's length — is committed in one store write, so a crash
//! never leaves rejects or sums of an uncommitted segment behind. A file run killed
//! between ingestion and commit finds the segment's marker and replays exactly that
//! segment (docs/design.md, "Bulk backfill"). At the end every dirty list is published.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::Write;
use std::time::Instant;

use anyhow::{bail, Result};
use serde_json::{json, Value};

use super::row_pass::{sum_write_and_score, ListScoring};
use super::summary::BackfillSummary;
use super::BackfillRequest;
use crate::decode::{RejectReason, Rejection};
use crate::engine::{BatchEffects, EngineSettings};
use crate::event::Event;
use crate::observability::meter::{Display, Meter, Unit};
use crate::observability::observe::Observation;
use crate::pipeline::publish::publish_dirty;
use crate::pipeline::segment::{BatchSummary, OpenSegment};
use crate::store::{open_rejects, rejects_path, Ledger, PairRows, PairWrite, SegmentRows, Store};
use crate::timefmt::now_nanos;
use crate::topk::NameOrder;
use rustc_hash::FxHashSet;

/// Where a refused record came from, as the rejects file names it.
pub enum RecordOrigin {
    /// A line of an input file.
    File {
        /// 1-based line number.
        line: u64,
        /// 0-based record number (what resuming counts).
        record: u64,
    },
    /// A message of the input topic.
    Topic {
        /// Its partition.
        partition: i32,
        /// Its offset.
        offset: i64,
    },
}

/// One batch as a reader hands it over.
#[derive(Default)]
pub struct ReadBatch {
    /// The valid events, in input order.
    pub events: Vec<Event>,
    /// Refused records by reason.
    pub rejects: BTreeMap<RejectReason, u64>,
    /// Their lines for the rejects file, newline-terminated.
    pub reject_lines: String,
    /// Records read (valid and refused).
    pub records: usize,
}

impl ReadBatch {
    /// Records a refused record from `source`; its text only when given
    /// (`backfill.rejects_keep_text`).
    pub fn reject(&mut self, source: &str, origin: RecordOrigin, rejection: &Rejection, raw: Option<&str>) {
        tracing::debug!(%rejection, "rejected record");
        *self.rejects.entry(rejection.reason).or_default() += 1;
        let mut line = reject_line(source, origin, rejection);
        if let (Some(raw), Value::Object(fields)) = (raw, &mut line) {
            fields.insert("raw".into(), raw.into());
        }
        self.reject_lines.push_str(&line.to_string());
        self.reject_lines.push('\n');
    }
}

/// One line of the rejects file, without the record's text: where the record is and
/// why it was refused. Shared by backfills and the live service's undeliverable dead
/// letters, so the file has one shape whoever wrote a line.
pub fn reject_line(source: &str, origin: RecordOrigin, rejection: &Rejection) -> Value {
    let mut line = json!({
        "source": source,
        "field": rejection.field,
        "reason": rejection.reason.code(),
        "detail": rejection.detail,
    });
    let position = match origin {
        RecordOrigin::File { line, record } => json!({ "line": line, "record": record }),
        RecordOrigin::Topic { partition, offset } => json!({ "partition": partition, "offset": offset }),
    };
    if let (Value::Object(fields), Value::Object(at)) = (&mut line, position) {
        fields.extend(at);
    }
    line
}

/// Applies batches to one store for one backfill run, segment by segment.
pub struct BatchWriter<'a> {
    request: &'a BackfillRequest,
    store: Store,
    settings: EngineSettings,
    rejects_file: File,
    summary: BackfillSummary,
    started: Instant,
    segment: Option<OpenSegment>,
    /// How segments write their pair sums.
    pairs: PairWrite,
    /// The end of a segment a killed run ingested but did not commit: the next segment
    /// must end exactly there.
    unfinished_segment_end: Option<u64>,
    /// The effects of the last committed segment while it is the only one that wrote
    /// pairs into the store: its rows are then the store's whole content, and the lists
    /// are scored from them instead of reading millions of rows back (topic backfill).
    only_pair_segment: Option<BatchEffects>,
    /// Records and rejects staged in the pending file segment, reported when its engine
    /// runs.
    staged_records: usize,
    staged_rejects: BTreeMap<RejectReason, u64>,
    /// Rating lists the last file segment's pass scored.
    scored_in_pass: Option<rustc_hash::FxHashMap<u32, crate::topk::ScoredRow>>,
    /// Whether the store held pairs before the last file segment: its rows then hold
    /// merge operands, folded by a compaction before the run ends.
    operands_left: bool,
}

impl<'a> BatchWriter<'a> {
    /// Opens the request's store and its rejects file.
    /// Opens the request's store and its rejects file. `pairs` says how segments write
    /// their pair sums: ingested table files need a reader that cuts the same batches on
    /// every run (files); a reader whose batches depend on timing (the topic, whose
    /// partitions interleave as they arrive) writes them in the segment's WriteBatch, so
    /// a kill can never leave half a segment behind.
    pub fn open(request: &'a BackfillRequest, pairs: PairWrite) -> Result<BatchWriter<'a>> {
        let started = Instant::now();
        let store = Store::open(&request.store_dir, &request.config)?;
        store.set_pair_compaction(false)?;
        let rejects_file = open_rejects(&store)?;
        let unfinished_segment_end = store.uncommitted_segment_end()?;
        if let Some(end) = unfinished_segment_end {
            if pairs != PairWrite::Ingested {
                bail!(
                    "store {} holds an unfinished segment of a file backfill (up to event {end}): \
                     rerun that file backfill to finish it before replaying the topic",
                    store.dir().display()
                );
            }
            tracing::info!(
                segment_end = end,
                "resuming a segment whose pair sums were ingested but not committed"
            );
        }
        let summary = BackfillSummary {
            rejects_file: rejects_path(store.dir()),
            ..BackfillSummary::default()
        };
        Ok(BatchWriter {
            request,
            settings: request.config.engine_settings(),
            store,
            rejects_file,
            summary,
            started,
            segment: None,
            pairs,
            unfinished_segment_end,
            only_pair_segment: None,
            staged_records: 0,
            staged_rejects: BTreeMap::new(),
            scored_in_pass: None,
            operands_left: false,
        })
    }

    /// The store, for what the reader needs of it (its positions).
    pub fn store(&self) -> &Store {
        &self.store
    }

    /// Records per second over the run so far.
    pub fn records_per_second(&self) -> f64 {
        self.summary.records() as f64 / self.started.elapsed().as_secs_f64().max(1e-9)
    }

    /// Records topic offsets the run will never apply (a position outside the log,
    /// resumed elsewhere by policy), for the summary.
    pub fn note_offsets_skipped(&mut self, skipped: u64) {
        self.summary.skipped_offsets += skipped;
    }

    /// Writes the batch's rejects and stages (files) or applies (topic) it in the pending
    /// segment; `advance` records the source position it consumed in the ledger the
    /// segment will commit. Commits the segment when it is due.
    pub fn apply(&mut self, batch: ReadBatch, advance: impl FnOnce(&mut Ledger)) -> Result<()> {
        self.rejects_file.write_all(batch.reject_lines.as_bytes())?;
        self.rejects_file.flush()?;
        let rejects_len = self.rejects_file.metadata()?.len();
        let apply_started = Instant::now();
        self.summary.batches += 1;
        let segment = self.segment.get_or_insert_with(|| OpenSegment::new(&self.store));
        if self.pairs == PairWrite::Ingested {
            segment.stage(&self.store, &batch.events, &batch.rejects)?;
            self.staged_records += batch.records;
            for (reason, n) in &batch.rejects {
                *self.staged_rejects.entry(*reason).or_default() += n;
            }
        } else {
            let applied = segment.apply(&self.store, &self.settings, &batch.events, &batch.rejects)?;
            let unwritten = segment.estimated_bytes() as u64;
            self.note_applied(&applied, batch.records, &batch.rejects, apply_started, unwritten);
        }
        let segment = self.segment.as_mut().expect("just made");
        advance(segment.ledger_mut());
        segment.ledger_mut().rejects_file_len = rejects_len;
        for (reason, n) in batch.rejects {
            *self.summary.rejects.entry(reason).or_default() += n;
        }
        let due = match self.unfinished_segment_end {
            Some(end) => segment.next_seq() >= end,
            None => segment.estimated_bytes() as u64 >= self.request.config.backfill.memory_budget.0,
        };
        if due {
            self.commit_segment(false)?;
        }
        Ok(())
    }

    /// Adds an applied batch (or a file segment's engine run) to the summary and the
    /// metrics.
    fn note_applied(
        &mut self,
        applied: &BatchSummary,
        records: usize,
        rejects: &BTreeMap<RejectReason, u64>,
        started: Instant,
        unwritten_bytes: u64,
    ) {
        self.summary.absorb(applied);
        if let Some(m) = &self.request.metrics {
            Observation::BatchApplied {
                messages: records,
                summary: applied,
                rejects,
                seconds: started.elapsed().as_secs_f64(),
                unwritten_bytes,
            }
            .emit(m);
        }
    }

    /// Commits the pending segment, if any; a file segment's rows are scored into lists
    /// in the same pass when `last` (no segment follows).
    fn commit_segment(&mut self, last: bool) -> Result<()> {
        let Some(segment) = self.segment.take() else {
            return Ok(());
        };
        if let Some(end) = self.unfinished_segment_end.take() {
            if segment.next_seq() != end {
                bail!(
                    "store {} holds pair sums of a segment ending at event {end}, but this run's \
                     batches end at event {}: rerun with the same inputs and backfill.batch_events \
                     as the interrupted run",
                    self.store.dir().display(),
                    segment.next_seq()
                );
            }
        }
        if self.pairs == PairWrite::Ingested {
            self.commit_staged(segment, last)?;
        } else {
            let store_had_pairs = self.store.ledger().pair_keys_written;
            let effects = segment.commit(&mut self.store, self.pairs)?;
            self.only_pair_segment = (!store_had_pairs).then_some(effects);
        }
        self.summary.segments += 1;
        Ok(())
    }

    /// Runs the engine over a staged file segment, sums, writes and (when `last`) scores
    /// its rows in one pass, and commits the rest.
    fn commit_staged(&mut self, segment: OpenSegment, last: bool) -> Result<()> {
        let started = Instant::now();
        let unwritten = segment.estimated_bytes() as u64;
        self.operands_left = self.store.ledger().pair_keys_written;
        let (mut sealed, index, mut applied) = segment.seal_staged(&self.store, &self.settings);
        let engine_seconds = started.elapsed().as_secs_f64();
        let list_settings = self.request.config.list_settings();
        let mut unavailable = FxHashSet::default();
        let mut names = NameOrder::of::<&str>(&[]);
        if last {
            unavailable = self.store.unavailable_items()?;
            for (item, status) in &sealed.effects().statuses {
                if status.available {
                    unavailable.remove(item);
                } else {
                    unavailable.insert(*item);
                }
            }
            let all: Vec<&str> = (0..self.store.item_count() as u32)
                .map(|id| self.store.item_name(id))
                .chain(sealed.new_item_names())
                .collect();
            names = NameOrder::of(&all);
        }
        let scoring = last.then_some(ListScoring {
            settings: &list_settings,
            unavailable: &unavailable,
            names: &names,
        });
        let meter = Meter::new("rows", 0, Unit::Items, Display::when(self.request.show_progress));
        let pass = sum_write_and_score(&self.store, &index, sealed.end(), scoring.as_ref(), meter)?;
        tracing::info!(
            rows = index.row_count(),
            pair_updates = pass.updates,
            engine_seconds,
            pass_seconds = started.elapsed().as_secs_f64() - engine_seconds,
            scored = last,
            "segment's rows summed, written and scored"
        );
        drop(index);
        sealed.note_rating_rows(pass.updates, pass.rows_written);
        applied.pair_updates += pass.updates;
        sealed.write(&mut self.store, PairWrite::Ingested)?;
        let (records, rejects) = (
            std::mem::take(&mut self.staged_records),
            std::mem::take(&mut self.staged_rejects),
        );
        self.note_applied(&applied, records, &rejects, started, unwritten);
        if last {
            self.scored_in_pass = Some(pass.lists);
        }
        Ok(())
    }

    /// Publishes every dirty list (stored only), with a progress display, and returns
    /// the run's summary.
    pub fn finish(mut self) -> Result<BackfillSummary> {
        self.commit_segment(true)?;
        self.summary.apply_seconds = self.started.elapsed().as_secs_f64();
        let publish_started = Instant::now();
        let list_settings = self.request.config.list_settings();
        let mut meter = Meter::new(
            "publish",
            0,
            Unit::Items,
            Display::when(self.request.show_progress),
        );
        let in_memory = self
            .only_pair_segment
            .as_ref()
            .map(|fx| SegmentRows::new(fx, self.store.item_count(), self.store.ledger().buyers));
        if in_memory.is_none() && self.pairs != PairWrite::Ingested && self.summary.segments > 0 {
            tracing::info!("merging the segments' pair sums before scoring");
            self.store.compact_pairs();
        }
        self.store.set_pair_compaction(true)?;
        let rows: &dyn PairRows = match &in_memory {
            Some(rows) => rows,
            None => &self.store,
        };
        let scored = self.scored_in_pass.take().unwrap_or_default();
        self.summary.publication = publish_dirty(
            &self.store,
            rows,
            scored,
            &list_settings,
            now_nanos(),
            |done, total| {
                meter.set_total(total);
                meter.update(done, "lists");
            },
        )?;
        meter.finish();
        if self.operands_left {
            // Every segment after the first, and a run into a store that held pairs, left
            // merge operands; folding them leaves a store of one value per key.
            tracing::info!("merging the segments' row blocks");
            self.store.compact_pairs();
        }
        self.summary.publish_seconds = publish_started.elapsed().as_secs_f64();
        self.summary.users = u64::from(self.store.ledger().next_user);
        self.summary.items = self.store.item_count() as u64;
        Ok(self.summary)
    }
}
