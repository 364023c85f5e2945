//! The one batch writer of every backfill, whatever it reads: each batch's rejected
//! records are appended to the rejects file, then its events, counters and source
//! position are committed in one store write (with the rejects file's new length, so a
//! crash never leaves rejects of an uncommitted batch behind), and the run's tallies,
//! metrics and progress move. At the end every dirty list is published.

use std::collections::BTreeMap;
use std::fs::{File, OpenOptions};
use std::io::{Seek, SeekFrom, Write};
use std::time::Instant;

use anyhow::{Context, Result};
use serde_json::{json, Value};

use super::summary::BackfillSummary;
use super::BackfillRequest;
use crate::decode::{RejectReason, Rejection};
use crate::engine::EngineSettings;
use crate::event::Event;
use crate::meter::{Display, Meter, Unit};
use crate::observe::Observation;
use crate::pipeline::apply_and_commit;
use crate::publish::publish_dirty;
use crate::store::{rejects_path, Ledger, Store};
use crate::timefmt::now_nanos;

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
    /// Records a refused record from `source`.
    pub fn reject(&mut self, source: &str, origin: RecordOrigin, rejection: &Rejection, raw: &str) {
        tracing::debug!(%rejection, "rejected record");
        *self.rejects.entry(rejection.reason).or_default() += 1;
        let mut line = json!({
            "source": source,
            "field": rejection.field,
            "reason": rejection.reason.code(),
            "detail": rejection.detail,
            "raw": raw,
        });
        let position = match origin {
            RecordOrigin::File { line, record } => json!({ "line": line, "record": record }),
            RecordOrigin::Topic { partition, offset } => json!({ "partition": partition, "offset": offset }),
        };
        if let (Value::Object(fields), Value::Object(at)) = (&mut line, position) {
            fields.extend(at);
        }
        self.reject_lines.push_str(&line.to_string());
        self.reject_lines.push('\n');
    }
}

/// Commits batches into one store for one backfill run.
pub struct BatchWriter<'a> {
    request: &'a BackfillRequest,
    store: Store,
    settings: EngineSettings,
    rejects_file: File,
    summary: BackfillSummary,
    started: Instant,
}

impl<'a> BatchWriter<'a> {
    /// Opens the request's store and its rejects file.
    pub fn open(request: &'a BackfillRequest) -> Result<BatchWriter<'a>> {
        let started = Instant::now();
        let store = Store::open(&request.store_dir, &request.config)?;
        let rejects_file = open_rejects(&store)?;
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

    /// Writes the batch's rejects, then commits it; `advance` records the source position
    /// it consumed in the progress state written with it.
    pub fn commit(&mut self, batch: ReadBatch, advance: impl FnOnce(&mut Ledger)) -> Result<()> {
        self.rejects_file.write_all(batch.reject_lines.as_bytes())?;
        self.rejects_file.flush()?;
        let rejects_len = self.rejects_file.metadata()?.len();
        let commit_started = Instant::now();
        let committed = apply_and_commit(
            &mut self.store,
            &self.settings,
            &batch.events,
            &batch.rejects,
            |p| {
                advance(p);
                p.rejects_file_len = rejects_len;
            },
        )?;
        self.summary.absorb(&committed);
        if let Some(m) = &self.request.metrics {
            Observation::BatchCommitted {
                messages: batch.records,
                summary: &committed,
                rejects: &batch.rejects,
                seconds: commit_started.elapsed().as_secs_f64(),
            }
            .emit(m);
        }
        for (reason, n) in batch.rejects {
            *self.summary.rejects.entry(reason).or_default() += n;
        }
        Ok(())
    }

    /// Publishes every dirty list (stored only), with a progress display, and returns
    /// the run's summary.
    pub fn finish(mut self) -> Result<BackfillSummary> {
        self.summary.apply_seconds = self.started.elapsed().as_secs_f64();
        let publish_started = Instant::now();
        let list_settings = self.request.config.list_settings();
        let mut meter = Meter::new(
            "publish",
            0,
            Unit::Items,
            Display::when(self.request.show_progress),
        );
        self.summary.publication = publish_dirty(&self.store, &list_settings, now_nanos(), |done, total| {
            meter.set_total(total);
            meter.update(done, "lists");
        })?;
        meter.finish();
        self.summary.publish_seconds = publish_started.elapsed().as_secs_f64();
        self.summary.users = u64::from(self.store.ledger().next_user);
        self.summary.items = self.store.item_count() as u64;
        Ok(self.summary)
    }
}

/// Opens the rejects file, cutting off anything a crashed run wrote after its last commit.
fn open_rejects(store: &Store) -> Result<File> {
    let path = rejects_path(store.dir());
    let mut file = OpenOptions::new()
        .create(true)
        .truncate(false)
        .read(true)
        .write(true)
        .open(&path)
        .with_context(|| format!("cannot open rejects file {}", path.display()))?;
    // Only ever shorten: an operator may have deleted or emptied the file after handling it.
    let committed = store.ledger().rejects_file_len;
    if file.metadata()?.len() > committed {
        file.set_len(committed)?;
    }
    file.seek(SeekFrom::End(0))?;
    Ok(file)
}
