//! Backfill: replays historical files through the engine in batches whose boundaries are
//! fixed multiples of `backfill.batch_events` from the start of each file, committing the
//! file position with every batch, then publishes every dirty list. A killed run rerun
//! with the same inputs resumes after its last committed batch and ends in the same state
//! as an uninterrupted run.

use std::collections::BTreeMap;
use std::fmt;
use std::fs::{File, OpenOptions};
use std::io::{Seek, SeekFrom, Write};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Instant;

use anyhow::{Context, Result};
use serde_json::json;

use crate::config::Config;
use crate::decode::{Limits, RejectReason};
use crate::engine::EngineSettings;
use crate::meter::Meter;
use crate::metrics::Metrics;
use crate::observe::Observation;
use crate::pipeline::{apply_and_commit, BatchSummary};
use crate::publish::{publish_dirty, CycleReport};
use crate::score::ListSettings;
use crate::source::{Decoded, InputFile, RecordReader};
use crate::store::{rejects_path, FilePosition, Store};
use crate::timefmt::now_nanos;

/// What to replay, and where.
#[derive(Debug, Clone)]
pub struct BackfillRequest {
    /// Store directory (created if missing).
    pub store_dir: PathBuf,
    /// Input files, applied in this order.
    pub inputs: Vec<PathBuf>,
    /// Effective configuration.
    pub config: Config,
    /// Show a progress display on stderr.
    pub show_progress: bool,
    /// Metrics to move as batches commit (served by `--metrics-listen`).
    pub metrics: Option<Arc<Metrics>>,
}

/// The outcome of one backfill run.
#[derive(Debug, Clone, Default)]
pub struct BackfillSummary {
    /// Accepted events of this run by `kind/outcome`.
    pub events: BTreeMap<String, u64>,
    /// Rejected records of this run by reason.
    pub rejects: BTreeMap<RejectReason, u64>,
    /// Files skipped because an earlier run applied them completely.
    pub skipped_files: Vec<String>,
    /// Pair contributions added or retracted in this run.
    pub pair_updates: u64,
    /// Re-centerings in this run.
    pub recenterings: u64,
    /// Batches committed in this run.
    pub batches: u64,
    /// Seconds spent opening the store, reading and applying events.
    pub apply_seconds: f64,
    /// Seconds spent publishing lists.
    pub publish_seconds: f64,
    /// The publication cycle at the end.
    pub publication: CycleReport,
    /// Users known to the store.
    pub users: u64,
    /// Items known to the store.
    pub items: u64,
    /// Where rejected records were written.
    pub rejects_file: PathBuf,
}

impl BackfillSummary {
    /// Events read in this run, accepted or not.
    pub fn records(&self) -> u64 {
        self.events.values().sum::<u64>() + self.rejects.values().sum::<u64>()
    }

    /// Wall time of the run.
    pub fn wall_seconds(&self) -> f64 {
        self.apply_seconds + self.publish_seconds
    }

    fn absorb(&mut self, batch: &BatchSummary) {
        for (&(kind, outcome), &n) in &batch.outcomes {
            *self
                .events
                .entry(crate::pipeline::event_counter_key(kind, outcome))
                .or_default() += n;
        }
        self.pair_updates += batch.pair_updates;
        self.recenterings += batch.recenterings;
        self.batches += 1;
    }
}

impl fmt::Display for BackfillSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let wall = self.wall_seconds().max(1e-9);
        writeln!(
            f,
            "backfill finished in {:.2}s ({:.2}s applying, {:.2}s publishing)",
            wall, self.apply_seconds, self.publish_seconds
        )?;
        for skipped in &self.skipped_files {
            writeln!(f, "  skipped (already applied): {skipped}")?;
        }
        writeln!(
            f,
            "  records read      {:>12}   {:>10.0}/s over the whole run",
            self.records(),
            self.records() as f64 / wall
        )?;
        for (key, n) in &self.events {
            writeln!(f, "    {key:<24}{n:>10}")?;
        }
        let rejected: u64 = self.rejects.values().sum();
        writeln!(f, "  rejected          {rejected:>12}")?;
        for (reason, n) in &self.rejects {
            writeln!(f, "    {:<24}{n:>10}", reason.code())?;
        }
        if rejected > 0 {
            writeln!(
                f,
                "    (each rejected record, with line and reason: {})",
                self.rejects_file.display()
            )?;
        }
        writeln!(
            f,
            "  pair updates      {:>12}   {:>10.0}/s while applying",
            self.pair_updates,
            self.pair_updates as f64 / self.apply_seconds.max(1e-9)
        )?;
        writeln!(f, "  re-centerings     {:>12}", self.recenterings)?;
        writeln!(f, "  batches           {:>12}", self.batches)?;
        writeln!(
            f,
            "  lists rescored    {:>12}   ({} changed, {} now empty)",
            self.publication.rescored, self.publication.changed, self.publication.tombstones
        )?;
        writeln!(
            f,
            "  rating pairs      {:>12}   (in the {} rescored rows; the whole store after a fresh backfill)",
            self.publication.rating_pairs_seen, self.publication.rescored
        )?;
        write!(
            f,
            "  store now holds   {} users, {} items",
            self.users, self.items
        )
    }
}

/// One record refused, as written to the rejects file.
fn reject_line(
    source: &str,
    line: u64,
    record: u64,
    rejection: &crate::decode::Rejection,
    raw: &str,
) -> String {
    json!({
        "source": source,
        "line": line,
        "record": record,
        "field": rejection.field,
        "reason": rejection.reason.code(),
        "detail": rejection.detail,
        "raw": raw,
    })
    .to_string()
}

/// Opens the rejects file, cutting off anything a crashed run wrote after its last commit.
pub(crate) fn open_rejects(store: &Store) -> Result<File> {
    let path = rejects_path(store.dir());
    let mut file = OpenOptions::new()
        .create(true)
        .truncate(false)
        .read(true)
        .write(true)
        .open(&path)
        .with_context(|| format!("cannot open rejects file {}", path.display()))?;
    // Only ever shorten: an operator may have deleted or emptied the file after handling it.
    let committed = store.progress().rejects_file_len;
    if file.metadata()?.len() > committed {
        file.set_len(committed)?;
    }
    file.seek(SeekFrom::End(0))?;
    Ok(file)
}

/// Runs a backfill to the end of its inputs, then publishes.
pub fn run_backfill(request: &BackfillRequest) -> Result<BackfillSummary> {
    let inputs = request
        .inputs
        .iter()
        .map(|p| InputFile::describe(p))
        .collect::<Result<Vec<_>>>()?;
    let config = &request.config;
    let started = Instant::now();
    let mut store = Store::open(&request.store_dir, config)?;
    let settings = EngineSettings::from_config(config);
    let limits = Limits::from_config(config);
    let batch_len = config.backfill.batch_events;
    let mut rejects_file = open_rejects(&store)?;
    let mut summary = BackfillSummary {
        rejects_file: rejects_path(store.dir()),
        ..BackfillSummary::default()
    };

    let pending_bytes: u64 = inputs
        .iter()
        .filter(|f| !store.progress().files.get(&f.canonical).is_some_and(|p| p.done))
        .map(|f| f.size)
        .sum();
    let mut meter = Meter::new("backfill", pending_bytes, true, request.show_progress);
    let mut bytes_before = 0;
    for input in &inputs {
        let position = store
            .progress()
            .files
            .get(&input.canonical)
            .copied()
            .unwrap_or_default();
        if position.done {
            summary.skipped_files.push(input.canonical.clone());
            continue;
        }
        let mut reader = RecordReader::open(input, limits)?;
        reader.skip_to(position.next_record)?;
        loop {
            let boundary = (reader.ordinal() / batch_len + 1) * batch_len;
            let mut events = Vec::new();
            let mut rejects: BTreeMap<RejectReason, u64> = BTreeMap::new();
            let mut reject_text = String::new();
            let mut at_end = false;
            while reader.ordinal() < boundary {
                let Some(record) = reader.next_record()? else {
                    at_end = true;
                    break;
                };
                match record.decoded {
                    Decoded::Event(e) => events.push(e),
                    Decoded::Blank => {}
                    Decoded::Rejected(rejection, raw) => {
                        tracing::debug!(line = record.line, %rejection, "rejected record");
                        *rejects.entry(rejection.reason).or_default() += 1;
                        reject_text.push_str(&reject_line(
                            &input.canonical,
                            record.line,
                            record.ordinal,
                            &rejection,
                            &raw,
                        ));
                        reject_text.push('\n');
                    }
                }
            }
            // A file that ends exactly on a boundary is only known to be done on the next
            // read, which then commits an empty batch that marks it done.
            rejects_file.write_all(reject_text.as_bytes())?;
            rejects_file.flush()?;
            let rejects_len = rejects_file.metadata()?.len();
            let next_record = reader.ordinal();
            let canonical = input.canonical.clone();
            let commit_started = Instant::now();
            let batch = apply_and_commit(&mut store, &settings, &events, &rejects, |p| {
                p.files.insert(
                    canonical,
                    FilePosition {
                        next_record,
                        done: at_end,
                    },
                );
                p.rejects_file_len = rejects_len;
            })?;
            let records = events.len() + rejects.values().sum::<u64>() as usize;
            record_batch(request, &mut summary, &batch, rejects, records, commit_started);
            let elapsed = started.elapsed().as_secs_f64().max(1e-9);
            meter.update(
                bytes_before + reader.bytes_read(),
                &format!("{:.0} events/s", summary.records() as f64 / elapsed),
            );
            if at_end {
                break;
            }
        }
        bytes_before += input.size;
    }
    meter.finish();
    summary.apply_seconds = started.elapsed().as_secs_f64();
    publish_at_end(&store, request, &mut summary)?;
    Ok(summary)
}

/// Adds a committed batch to the summary and, when metrics are served, to the metrics.
pub(crate) fn record_batch(
    request: &BackfillRequest,
    summary: &mut BackfillSummary,
    batch: &BatchSummary,
    rejects: BTreeMap<RejectReason, u64>,
    records: usize,
    commit_started: Instant,
) {
    summary.absorb(batch);
    if let Some(m) = &request.metrics {
        Observation::BatchCommitted {
            messages: records,
            summary: batch,
            rejects: &rejects,
            seconds: commit_started.elapsed().as_secs_f64(),
        }
        .emit(m);
    }
    for (reason, n) in rejects {
        *summary.rejects.entry(reason).or_default() += n;
    }
}

/// The publication that ends every backfill: every dirty list rescored and stored, with a
/// progress display, and the store's totals for the summary.
pub(crate) fn publish_at_end(
    store: &Store,
    request: &BackfillRequest,
    summary: &mut BackfillSummary,
) -> Result<()> {
    let publish_started = Instant::now();
    let list_settings = ListSettings::from_config(&request.config);
    let mut meter = Meter::new("publish", 0, false, request.show_progress);
    summary.publication = publish_dirty(store, &list_settings, now_nanos(), |done, total| {
        meter.set_total(total);
        meter.update(done, "lists");
    })?;
    meter.finish();
    summary.publish_seconds = publish_started.elapsed().as_secs_f64();
    summary.users = u64::from(store.progress().next_user);
    summary.items = store.item_count() as u64;
    Ok(())
}
