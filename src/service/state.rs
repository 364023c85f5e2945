//! The service's state behind one lock: the store, the batch being collected, the batches
//! applied in memory since the last store write, the running publication cycle, and the
//! producer. Both the consumer loop and the rebalance callback write through
//! [`Core::flush`], so changes reach the store the same way whoever ends them, and a write
//! always waits for the running cycle first.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::Write;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use anyhow::Result;

use super::cycle::{
    count_catalogue, destination, list_record, measure_store, note_delivery, CycleOutcome, CycleRun,
    CycleWriteFailed,
};
use super::latency::LatencyRecorder;
use super::report::RunCounters;
use super::segment::AppliedSegment;
use crate::backfill::writer::{reject_line, RecordOrigin};
use crate::config::Config;
use crate::decode::Limits;
use crate::engine::EngineSettings;
use crate::event::UnixMillis;
use crate::kafka::message::InMessage;
use crate::kafka::producer::{DeliveryReport, OutRecord, RecordProducer};
use crate::model::PublishedList;
use crate::observability::metrics::Metrics;
use crate::observability::observe::Observation;
use crate::pipeline::messages::{MessageBatch, Rejected};
use crate::runtime::diskspace::describe_store_error;
use crate::runtime::retry::Backoff;
use crate::runtime::shutdown::Shutdown;
use crate::score::ListSettings;
use crate::service::health::Health;
use crate::signal::Signal;
use crate::store::mirror::RowMirror;
use crate::store::{open_rejects, PairWrite, Store};

/// First pause before retrying a failing store write or delivery.
const FIRST_RETRY_WAIT: Duration = Duration::from_millis(200);

/// Longest pause between two retries of a failing store write or delivery.
const LONGEST_RETRY_WAIT: Duration = Duration::from_secs(30);

/// Lists produced per delivery when republishing the whole store.
const REPUBLISH_CHUNK: usize = 2000;

/// What a flush did to the store.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Flushed {
    /// Nothing was written (nothing pending, or the changes stay in memory for now).
    Nothing,
    /// The applied batches are in the store; these are the next offsets of their
    /// partitions.
    Committed(BTreeMap<i32, i64>),
    /// The deadline passed before a batch could be applied or written; it was dropped and
    /// will be consumed again from the store's positions.
    Abandoned,
}

/// What applying the collected batch did.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum BatchApply {
    /// No batch was collected.
    Nothing,
    /// The batch is in the segment.
    Applied,
    /// The deadline passed first; the batch was dropped.
    Abandoned,
}

/// The service state.
pub struct Core {
    /// Shared with a running publication cycle, which only reads and stores lists; a
    /// store write waits for the cycle to end.
    store: Arc<Store>,
    /// The micro-batch being collected.
    collecting: MessageBatch,
    /// Batches applied in memory and not yet written.
    segment: Option<AppliedSegment>,
    /// Rating rows kept in memory for publication cycles, equal to the store's; lent to
    /// the running cycle.
    mirror: RowMirror,
    /// The publication cycle running beside consumption, if any.
    cycle: Option<JoinHandle<CycleOutcome>>,
    /// Why the last cycle stopped, until the service asks.
    cycle_failure: Option<anyhow::Error>,
    counters: RunCounters,
    latency: LatencyRecorder,
    engine: EngineSettings,
    lists: ListSettings,
    limits: Limits,
    config: Config,
    producer: Arc<RecordProducer>,
    health: Arc<Health>,
    metrics: Arc<Metrics>,
    shutdown: Shutdown,
    /// Record timestamps of written messages not yet covered by a publication.
    unpublished_ms: Vec<UnixMillis>,
    /// The store's rejects file: dead letters the broker refused for good are recorded
    /// here (without their content), its length written with the next store write.
    rejects: File,
}

impl Core {
    /// Wraps an open store and its rejects file. Retries end early once shutdown begins.
    pub fn new(
        store: Store,
        config: &Config,
        producer: Arc<RecordProducer>,
        health: Arc<Health>,
        metrics: Arc<Metrics>,
        shutdown: Shutdown,
    ) -> Result<Core> {
        Ok(Core {
            rejects: open_rejects(&store)?,
            store: Arc::new(store),
            collecting: MessageBatch::default(),
            segment: None,
            mirror: empty_mirror(config),
            cycle: None,
            cycle_failure: None,
            counters: RunCounters::default(),
            latency: LatencyRecorder::default(),
            engine: config.engine_settings(),
            lists: config.list_settings(),
            limits: config.limits(),
            config: config.clone(),
            producer,
            health,
            metrics,
            shutdown,
            unpublished_ms: Vec::new(),
        })
    }

    /// Compacts the whole store (an operator asked for it).
    pub fn compact_store(&self) {
        self.store.compact();
    }

    /// What the run did so far, for the report printed at exit.
    pub fn report(&self, seconds: f64) -> super::RunReport {
        super::RunReport {
            counters: self.counters.clone(),
            latency_p50_ms: self.latency.quantile_ms(0.5),
            latency_p99_ms: self.latency.quantile_ms(0.99),
            seconds,
        }
    }

    /// Starts the lag gauge from the stored positions (before any batch of this run).
    pub fn seed_positions(&self) {
        Observation::PositionsReached {
            next_offsets: &self.stored_offsets(),
            changed_lists: false,
        }
        .emit(&self.metrics);
        self.refresh_store_gauges();
    }

    /// Decodes a consumed message into the pending batch.
    pub fn take(&mut self, message: InMessage) {
        self.collecting.take(message, &self.limits);
    }

    /// The store's next offsets for the input topic.
    pub fn stored_offsets(&self) -> BTreeMap<i32, i64> {
        self.store
            .ledger()
            .offsets
            .get(&self.config.kafka.input_topic)
            .cloned()
            .unwrap_or_default()
    }

    /// Whether every partition's applied position (in memory or stored) reached `ends`.
    pub fn has_applied(&self, ends: &BTreeMap<i32, i64>) -> bool {
        let stored = self.store.ledger().offsets.get(&self.config.kafka.input_topic);
        ends.iter().all(|(p, &end)| {
            let applied = self.segment.as_ref().and_then(|s| s.offsets.get(p));
            let position = applied.or_else(|| stored.and_then(|o| o.get(p)));
            position.is_some_and(|&next| next >= end)
        })
    }

    /// Applies the collected batch if it is full or old enough, and writes the applied
    /// batches to the store when they outgrow `live.memory_budget`.
    pub fn flush_if_due(&mut self) -> Flushed {
        if !self.batch_due() {
            return Flushed::Nothing;
        }
        if self.apply_batch(None) == BatchApply::Abandoned {
            return Flushed::Abandoned;
        }
        let over_budget = self
            .segment
            .as_ref()
            .is_some_and(|s| s.changes.estimated_bytes() as u64 >= self.config.live.memory_budget.0);
        if over_budget {
            self.write_segment(None)
        } else {
            Flushed::Nothing
        }
    }

    /// Whether the collected batch should be applied now.
    fn batch_due(&self) -> bool {
        self.collecting.messages >= self.config.live.batch_events
            || self
                .collecting
                .opened
                .is_some_and(|t| t.elapsed() >= self.config.live.batch_wait)
    }

    /// When the collected batch becomes due by age.
    pub fn batch_deadline(&self) -> Option<Instant> {
        self.collecting.opened.map(|t| t + self.config.live.batch_wait)
    }

    /// Applies the collected batch and writes everything applied to the store, with its
    /// next offsets, in one write (before a publication cycle, a revocation, or exit).
    /// The write goes in two steps, rating table files then a WriteBatch, that a store
    /// reopened after a kill between them finishes (`PairWrite::RatingsIngested`).
    /// Failures are retried with backoff until `deadline`; consumption waits meanwhile.
    pub fn flush(&mut self, deadline: Option<Instant>) -> Flushed {
        // A batch whose dead letters could not be delivered is dropped alone: the batches
        // applied before it are still written.
        self.apply_batch(deadline);
        self.write_segment(deadline)
    }

    /// Applies the collected batch to the segment in memory: dead letters delivered first
    /// (a refused message is never lost), then the events.
    fn apply_batch(&mut self, deadline: Option<Instant>) -> BatchApply {
        if self.collecting.is_empty() {
            return BatchApply::Nothing;
        }
        let Some(undeliverable) = self.deliver_dead_letters(deadline) else {
            self.abandon_batch();
            return BatchApply::Abandoned;
        };
        let rejects = self.collecting.reject_counts();
        if !rejects.is_empty() && self.config.cluster.spec().produces_dead_letters() {
            let mut delivered = rejects.clone();
            for (index, _) in &undeliverable {
                let reason = self.collecting.rejected[*index].rejection.reason;
                delivered.entry(reason).and_modify(|n| *n -= 1);
            }
            delivered.retain(|_, n| *n > 0);
            Observation::DeadLettersDelivered {
                by_reason: &delivered,
            }
            .emit(&self.metrics);
        }
        let erasures = self.collecting.rejected_erasures();
        if erasures > 0 {
            Observation::ErasuresRejected { count: erasures }.emit(&self.metrics);
        }
        let started = Instant::now();
        let segment = self
            .segment
            .get_or_insert_with(|| AppliedSegment::new(&self.store));
        let mut backoff = Backoff::new(FIRST_RETRY_WAIT, LONGEST_RETRY_WAIT);
        // Reading histories and ids may fail; a retry of the same batch reuses the ids the
        // failed attempt assigned.
        let summary = loop {
            match segment
                .changes
                .apply(&self.store, &self.engine, &self.collecting.events, &rejects)
            {
                Ok(summary) => break summary,
                Err(e) => {
                    report_store_failure(&self.metrics, &self.health, self.store.dir(), "read", &e);
                    Observation::BatchStalled.emit(&self.metrics);
                    if !backoff.wait(deadline, &self.shutdown) {
                        // The failed attempts may have given ids to names of the batch
                        // now dropped; the whole segment goes with it, and its batches are
                        // consumed again from the stored positions.
                        self.segment = None;
                        self.abandon_batch();
                        return BatchApply::Abandoned;
                    }
                }
            }
        };
        self.health.set_store_error(None);
        Observation::BatchMoving.emit(&self.metrics);
        if !undeliverable.is_empty() {
            let topic = &self.config.kafka.input_topic;
            match record_undeliverable(
                &mut self.rejects,
                topic,
                &self.collecting.rejected,
                &undeliverable,
            ) {
                Ok(len) => segment.changes.ledger_mut().rejects_file_len = len,
                // The refusals were counted and logged; only the file's line is missing.
                Err(e) => tracing::error!(error = %e, "cannot append to the rejects file"),
            }
        }
        let batch = std::mem::take(&mut self.collecting);
        segment.advance(&self.config.kafka.input_topic, &batch.next_offsets);
        segment.timestamps.extend(batch.timestamps);
        let counts = &mut segment.counts;
        counts.messages += batch.messages as u64;
        counts.batches += 1;
        counts.events.absorb(&summary.outcomes);
        for (reason, &n) in &rejects {
            *counts.dead_letters.entry(reason.code().to_string()).or_default() += n;
        }
        Observation::BatchApplied {
            messages: batch.messages,
            summary: &summary,
            rejects: &rejects,
            seconds: started.elapsed().as_secs_f64(),
            unwritten_bytes: segment.changes.estimated_bytes() as u64,
        }
        .emit(&self.metrics);
        Observation::PositionsReached {
            next_offsets: &batch.next_offsets,
            changed_lists: summary.marked_dirty,
        }
        .emit(&self.metrics);
        BatchApply::Applied
    }

    /// Writes the applied batches to the store in one write holding their next
    /// offsets, retrying a failed write with backoff until `deadline`.
    fn write_segment(&mut self, deadline: Option<Instant>) -> Flushed {
        let Some(segment) = self.segment.take() else {
            return Flushed::Nothing;
        };
        // A write must not land while a cycle clears dirty marks, and the rows kept come
        // back with the cycle.
        self.join_cycle();
        let started = Instant::now();
        let sealed = segment.changes.seal();
        let mut backoff = Backoff::new(FIRST_RETRY_WAIT, LONGEST_RETRY_WAIT);
        let store = Arc::get_mut(&mut self.store).expect("no cycle holds the store once it has ended");
        while let Err(e) = sealed.write(store, PairWrite::RatingsIngested) {
            report_store_failure(&self.metrics, &self.health, store.dir(), "write", &e);
            Observation::BatchStalled.emit(&self.metrics);
            if !backoff.wait(deadline, &self.shutdown) {
                Observation::BatchAbandoned {
                    messages: segment.counts.messages as usize,
                }
                .emit(&self.metrics);
                return Flushed::Abandoned;
            }
        }
        self.mirror.absorb(sealed.effects());
        self.health.set_store_error(None);
        Observation::BatchMoving.emit(&self.metrics);
        self.counters.absorb(&segment.counts);
        self.unpublished_ms.extend(segment.timestamps);
        Observation::ChangesWritten {
            batches: segment.counts.batches,
            messages: segment.counts.messages,
            seconds: started.elapsed().as_secs_f64(),
        }
        .emit(&self.metrics);
        // The cheap gauges only: scanning the dirty marks and RocksDB's properties waits
        // for the next publication cycle, off the consuming path.
        self.refresh_counts();
        Flushed::Committed(segment.offsets)
    }

    /// Delivers the pending batch's dead letters, retrying what the broker did not take
    /// until `deadline`. Returns the letters the broker refused for good (index into the
    /// batch's rejected messages, and the reason), which are counted and recorded in the
    /// rejects file instead: retrying them would hold the partition for ever. `None`
    /// when it gave up on the others (deadline or shutdown).
    /// Only shard 0 of a sharded setup delivers (every shard refuses and counts the same
    /// events), so each dead letter reaches the topic once.
    fn deliver_dead_letters(&self, deadline: Option<Instant>) -> Option<Vec<(usize, String)>> {
        let mut refused_for_good = Vec::new();
        if !self.config.cluster.spec().produces_dead_letters() {
            return Some(refused_for_good);
        }
        let kafka = &self.config.kafka;
        // (index among the batch's rejected messages, its dead letter)
        let mut letters: Vec<(usize, OutRecord)> = self
            .collecting
            .rejected
            .iter()
            .map(|r| r.dead_letter(&kafka.input_topic, &kafka.dead_letter_topic))
            .enumerate()
            .collect();
        let mut backoff = Backoff::new(FIRST_RETRY_WAIT, LONGEST_RETRY_WAIT);
        while !letters.is_empty() {
            let records: Vec<OutRecord> = letters.iter().map(|(_, r)| r.clone()).collect();
            let report = self.deliver(&records);
            for &k in &report.refused_for_good {
                let reason = &report
                    .failed
                    .iter()
                    .find(|(i, _)| *i == k)
                    .expect("a refusal is a failure")
                    .1;
                let m = &self.collecting.rejected[letters[k].0].message;
                Observation::DeadLetterUndeliverable {
                    partition: m.partition,
                    offset: m.offset,
                    error: reason,
                }
                .emit(&self.metrics);
                refused_for_good.push((letters[k].0, reason.clone()));
            }
            let retry: Vec<usize> = report
                .failed
                .iter()
                .map(|(k, _)| *k)
                .filter(|k| !report.refused_for_good.contains(k))
                .collect();
            if retry.is_empty() {
                return Some(refused_for_good);
            }
            Observation::DeliveryFailed {
                what: "dead letters",
                count: retry.len(),
                first_reason: &report
                    .failed
                    .iter()
                    .find(|(k, _)| *k == retry[0])
                    .expect("listed")
                    .1,
            }
            .emit(&self.metrics);
            Observation::BatchStalled.emit(&self.metrics);
            letters = retry.iter().map(|&k| letters[k].clone()).collect();
            if !backoff.wait(deadline, &self.shutdown) {
                return None;
            }
        }
        Some(refused_for_good)
    }

    /// Produces `records` and tells readiness, per topic, whether the broker took them.
    fn deliver(&self, records: &[OutRecord]) -> DeliveryReport {
        let report = self.producer.deliver(records, self.config.live.delivery_timeout);
        note_delivery(&self.health, records, &report);
        report
    }

    /// Drops the collected batch; it is consumed again from the stored positions.
    fn abandon_batch(&mut self) {
        Observation::BatchAbandoned {
            messages: self.collecting.messages,
        }
        .emit(&self.metrics);
        self.collecting = MessageBatch::default();
    }

    /// Whether the output topics are known to hold every stored list (false after a
    /// backfill or a change of topics or cluster).
    pub fn outputs_in_sync(&self) -> Result<bool> {
        Ok(self.store.delivered_to()?.as_deref() == Some(destination(&self.config.kafka).as_str()))
    }

    /// Produces every stored list (tombstones for empty ones) and records the outputs as
    /// in sync. Returns false when some delivery failed; it is tried again later.
    pub fn republish_all(&mut self) -> Result<bool> {
        self.join_cycle();
        let stored: Vec<(Signal, u32, PublishedList)> = self.store.all_published().collect::<Result<_>>()?;
        tracing::info!(
            lists = stored.len(),
            "delivering every stored list to the output topics"
        );
        for chunk in stored.chunks(REPUBLISH_CHUNK) {
            let records: Vec<OutRecord> = chunk
                .iter()
                .map(|(signal, item, list)| {
                    list_record(&self.store, &self.config.kafka, *signal, *item, list)
                })
                .collect();
            let report = self.deliver(&records);
            if report.withheld {
                // A standby republishes when it gains the lease.
                return Ok(true);
            }
            if !report.all_delivered() {
                Observation::RepublishIncomplete {
                    undelivered: report.failed.len(),
                    first_reason: &report.failed[0].1,
                }
                .emit(&self.metrics);
                return Ok(false);
            }
            self.counters.lists_delivered += records.len() as u64;
            self.health.beat();
        }
        if let Err(e) = self.store.set_delivered_to(&destination(&self.config.kafka)) {
            // Delivered but not recorded (a full disk): delivered again later.
            report_store_failure(&self.metrics, &self.health, self.store.dir(), "write", &e);
            return Ok(false);
        }
        Ok(true)
    }

    /// Starts a publication cycle beside consumption: rescore dirty items, deliver the
    /// lists that changed, and store as published only what the broker acknowledged (the
    /// rest stays dirty). A cycle still running is waited for first.
    pub fn start_cycle(&mut self) {
        self.join_cycle();
        let run = CycleRun {
            store: self.store.clone(),
            lists: self.lists,
            kafka: self.config.kafka.clone(),
            delivery_timeout: self.config.live.delivery_timeout,
            producer: self.producer.clone(),
            health: self.health.clone(),
            metrics: self.metrics.clone(),
            covered: std::mem::take(&mut self.unpublished_ms),
        };
        self.cycle = Some(run.spawn(std::mem::take(&mut self.mirror)));
    }

    /// Waits for the running cycle, if any; Err when it (or one joined earlier, before a
    /// store write) failed.
    pub fn end_cycle(&mut self) -> Result<()> {
        self.join_cycle();
        match self.cycle_failure.take() {
            Some(e) => Err(e),
            None => Ok(()),
        }
    }

    /// Waits for the running cycle, if any, and takes back what it lent and did; a
    /// failure is kept for [`Core::end_cycle`].
    fn join_cycle(&mut self) {
        let Some(handle) = self.cycle.take() else {
            return;
        };
        let Ok(outcome) = handle.join() else {
            // The rows kept went with the thread; they are read again.
            self.mirror = empty_mirror(&self.config);
            self.cycle_failure = Some(anyhow::anyhow!("the publication cycle panicked"));
            return;
        };
        self.mirror = outcome.mirror;
        match outcome.result {
            Ok(tally) => {
                // Its writes went through: a store error a failed cycle left is over.
                self.health.set_store_error(None);
                self.counters.cycles += 1;
                self.counters.lists_delivered += tally.delivered;
                self.counters.lists_undelivered += tally.undelivered;
                if tally.undelivered == 0 {
                    self.latency.record_all(&outcome.covered, outcome.ended);
                } else {
                    // Not every list reflecting these events went out; keep them for the
                    // next cycle.
                    self.unpublished_ms.extend(outcome.covered);
                }
            }
            Err(e) => {
                self.unpublished_ms.extend(outcome.covered);
                match e.downcast::<CycleWriteFailed>() {
                    // The disk, not the service: the lists stay dirty for the next cycle,
                    // and readiness names the store's error until a write succeeds.
                    Ok(CycleWriteFailed(write)) => {
                        report_store_failure(&self.metrics, &self.health, self.store.dir(), "write", &write);
                    }
                    Err(other) => self.cycle_failure = Some(other),
                }
            }
        }
    }

    /// Items and users, from memory.
    fn refresh_counts(&self) {
        count_catalogue(&self.store, &self.metrics);
    }

    /// Brings the store-derived gauges up to date ([`measure_store`]).
    fn refresh_store_gauges(&self) {
        measure_store(&self.store, &self.metrics);
    }
}

/// No rows kept yet: rows within `live.memory_budget`, each with its best
/// `publish.kept_candidates` candidates.
fn empty_mirror(config: &Config) -> RowMirror {
    RowMirror::within(
        config.live.memory_budget.0 as usize,
        config.list_settings(),
        config.publish.kept_candidates,
    )
}

/// Says that a store operation failed (`what`: "read" or "write"): the error line and
/// metric, and readiness naming the error (the disk, when it is full) until the next
/// store write succeeds.
fn report_store_failure(
    metrics: &Metrics,
    health: &Health,
    dir: &std::path::Path,
    what: &str,
    error: &anyhow::Error,
) {
    let text = format!("store {what} failed: {}", describe_store_error(error, dir));
    Observation::StoreWriteFailed { error: &text }.emit(metrics);
    health.set_store_error(Some(text));
}

/// Appends one line per dead letter the broker refused for good to the rejects file:
/// where the message is and why it was refused twice, never its content (it stays in the
/// input topic's log for as long as the topic retains it). Returns the file's new length
/// for the ledger.
fn record_undeliverable(
    file: &mut File,
    topic: &str,
    rejected: &[Rejected],
    undeliverable: &[(usize, String)],
) -> std::io::Result<u64> {
    let mut lines = String::new();
    for (index, error) in undeliverable {
        let r = &rejected[*index];
        let origin = RecordOrigin::Topic {
            partition: r.message.partition,
            offset: r.message.offset,
        };
        let mut line = reject_line(topic, origin, &r.rejection);
        if let serde_json::Value::Object(fields) = &mut line {
            fields.insert("dead_letter_refused".into(), error.as_str().into());
        }
        lines.push_str(&line.to_string());
        lines.push('\n');
    }
    file.write_all(lines.as_bytes())?;
    file.flush()?;
    Ok(file.metadata()?.len())
}
