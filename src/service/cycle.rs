//! A publication cycle on a thread of its own (docs/design.md, "Publication"), so that the
//! service goes on consuming and applying batches in memory while lists are scored and
//! delivered. The cycle owns what it needs — a shared handle on the store, the rows kept
//! in memory, the producer — and never touches the service state; the service joins it
//! before its next store write, since a write must not land while a cycle clears dirty
//! marks, and the rows kept come back with it.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use anyhow::Result;

use crate::config::KafkaConfig;
use crate::event::{UnixMillis, UnixNanos};
use crate::kafka::producer::{DeliveryReport, OutRecord, RecordProducer, Sending};
use crate::model::PublishedList;
use crate::observability::metrics::Metrics;
use crate::observability::observe::{DeliveredList, Observation};
use crate::pipeline::publish::{Cycle, ListDrift};
use crate::score::ListSettings;
use crate::service::health::Health;
use crate::signal::Signal;
use crate::store::mirror::{MirroredRows, RowMirror};
use crate::store::{Delivery, MarkAfterWrite, PublicationWrite, Store};
use crate::timefmt::now_nanos;
use crate::views::record::NeighborRecord;

/// Which output topics hold every stored list once they are all delivered.
pub fn destination(kafka: &KafkaConfig) -> String {
    format!(
        "{} {} {}",
        kafka.brokers, kafka.output_topic, kafka.purchase_output_topic
    )
}

/// The record of one list: key = item name, value = the JSON list (none for an empty
/// list, a tombstone), on the topic of its signal.
pub fn list_record(
    store: &Store,
    kafka: &KafkaConfig,
    signal: Signal,
    item: u32,
    list: &PublishedList,
) -> OutRecord {
    let topic = match signal {
        Signal::Rating => &kafka.output_topic,
        Signal::Purchase => &kafka.purchase_output_topic,
    };
    let value = (!list.neighbors.is_empty()).then(|| {
        serde_json::to_vec(&NeighborRecord::from_stored(store, signal, item, list))
            .expect("a record serializes")
    });
    OutRecord {
        topic: topic.clone(),
        key: store.item_name(item).as_bytes().to_vec(),
        value,
        headers: Vec::new(),
    }
}

/// Tells readiness, per topic of `records`, whether the broker took them (nothing when a
/// standby withheld them).
pub fn note_delivery(health: &Health, records: &[OutRecord], report: &DeliveryReport) {
    if report.withheld {
        return;
    }
    let mut outcome: BTreeMap<&str, Option<&str>> =
        records.iter().map(|r| (r.topic.as_str(), None)).collect();
    for (i, reason) in &report.failed {
        outcome.insert(records[*i].topic.as_str(), Some(reason.as_str()));
    }
    for (topic, failure) in outcome {
        health.note_delivery(topic, failure);
    }
}

/// Items and users, from memory.
pub fn count_catalogue(store: &Store, metrics: &Metrics) {
    Observation::CatalogueCounted {
        items: store.item_count() as u64,
        users: u64::from(store.ledger().next_user),
    }
    .emit(metrics);
}

/// Brings the store-derived gauges up to date: pending changes (a scan of the dirty
/// marks), sizes and counts. At start-up and after each publication cycle.
pub fn measure_store(store: &Store, metrics: &Metrics) {
    match store.oldest_dirty_since() {
        Ok(since) => Observation::OldestDirtyMeasured { since }.emit(metrics),
        Err(e) => Observation::PendingChangesUnreadable {
            error: &format!("{e:#}"),
        }
        .emit(metrics),
    }
    if let Ok(stats) = store.stats() {
        Observation::StoreMeasured { stats: &stats }.emit(metrics);
    }
    count_catalogue(store, metrics);
}

/// What a cycle needs from the service, owned so that it can run beside consumption.
pub struct CycleRun {
    /// The store, shared with the consuming thread (reads only there while a cycle runs).
    pub store: Arc<Store>,
    /// Scores and publication rules.
    pub lists: ListSettings,
    /// Output topics.
    pub kafka: KafkaConfig,
    /// How long to wait for the broker's answers on one chunk.
    pub delivery_timeout: Duration,
    /// The producer of lists.
    pub producer: Arc<RecordProducer>,
    /// Readiness, told about deliveries.
    pub health: Arc<Health>,
    /// Metrics of cycles and deliveries.
    pub metrics: Arc<Metrics>,
    /// Record timestamps of the written events this cycle covers.
    pub covered: Vec<UnixMillis>,
}

/// What a finished cycle hands back to the service.
pub struct CycleOutcome {
    /// The rows kept in memory, with the rows this cycle read.
    pub mirror: RowMirror,
    /// Record timestamps the cycle covered, and when it ended: recorded as latencies when
    /// every list went out, kept for the next cycle otherwise.
    pub covered: Vec<UnixMillis>,
    /// When the cycle ended.
    pub ended: UnixMillis,
    /// What it did, or why it stopped.
    pub result: Result<CycleTally>,
}

/// Counts of a completed cycle.
#[derive(Debug, Clone, Copy)]
pub struct CycleTally {
    /// Lists the broker acknowledged.
    pub delivered: u64,
    /// Lists it did not (left dirty for the next cycle).
    pub undelivered: u64,
}

/// A store write of a cycle failed (a full disk, most often). The cycle ends there; the
/// lists it could not store keep their dirty marks, and the next cycle tries again, so
/// the service waits for the disk as a failed segment write does (docs/design.md,
/// "Publication") instead of stopping.
#[derive(Debug)]
pub struct CycleWriteFailed(pub anyhow::Error);

impl std::fmt::Display for CycleWriteFailed {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{:#}", self.0)
    }
}

impl std::error::Error for CycleWriteFailed {}

/// Stores a chunk's lists; a failure is a [`CycleWriteFailed`].
fn store_lists(
    store: &Store,
    writes: &[PublicationWrite],
    delivery: Delivery<'_>,
    now: UnixNanos,
) -> Result<()> {
    store
        .write_publications(writes, delivery, now)
        .map_err(|e| anyhow::Error::new(CycleWriteFailed(e)))
}

/// A publication chunk whose changed lists are with the broker.
struct ChunkInFlight {
    /// The chunk's store writes, in plan order.
    writes: Vec<PublicationWrite>,
    /// Drift of each write's list from the one it replaces.
    drifts: Vec<Option<ListDrift>>,
    /// Which writes hold a changed list, in the order of `records`.
    changed: Vec<usize>,
    /// The records sent for them.
    records: Vec<OutRecord>,
}

/// What a cycle's deliveries did so far.
#[derive(Default)]
struct CycleDeliveries {
    /// Lists the broker acknowledged.
    delivered: Vec<DeliveredList>,
    /// Lists it did not, left dirty for the next cycle.
    undelivered: u64,
}

impl CycleRun {
    /// Starts the cycle on its own thread with the rows kept in `mirror`.
    pub fn spawn(self, mirror: RowMirror) -> JoinHandle<CycleOutcome> {
        std::thread::Builder::new()
            .name("simtide-cycle".into())
            .spawn(move || self.run(mirror))
            .expect("a thread starts")
    }

    fn run(self, mut mirror: RowMirror) -> CycleOutcome {
        let result = self.publish(&mut mirror);
        measure_store(&self.store, &self.metrics);
        CycleOutcome {
            mirror,
            covered: self.covered,
            ended: now_nanos().to_millis(),
            result,
        }
    }

    /// Rescores dirty items, delivers the lists that changed, and stores as published only
    /// what the broker acknowledged; the rest stays dirty.
    fn publish(&self, mirror: &mut RowMirror) -> Result<CycleTally> {
        let started = Instant::now();
        let now = now_nanos();
        let store = &*self.store;
        let rows = MirroredRows::new(mirror, store);
        let mut cycle = Cycle::plan(store, &rows, now)?;
        let destination = destination(&self.kafka);
        let mut outcome = CycleDeliveries::default();
        // The broker stores one chunk while the next is scored: a chunk is sent, the next
        // computed, then the first one's answers are collected and its lists stored.
        let mut in_flight: Option<(ChunkInFlight, Sending<'_>)> = None;
        loop {
            let next = cycle.next_chunk(store, &rows, &self.lists)?;
            if let Some((chunk, sending)) = in_flight.take() {
                let report = sending.settle();
                if !self.settle_chunk(chunk, report, &destination, now, &mut outcome)? {
                    // The broker is away: end the cycle; what was not stored keeps its
                    // dirty marks (marks that expand to a whole row are cleared last).
                    break;
                }
            }
            let Some(rescored) = next else { break };
            let (writes, drifts): (Vec<_>, Vec<_>) = rescored.into_iter().map(|r| (r.write, r.drift)).unzip();
            let changed: Vec<usize> = (0..writes.len()).filter(|&i| writes[i].list.is_some()).collect();
            if changed.is_empty() {
                store_lists(store, &writes, Delivery::Delivered(&destination), now)?;
                continue;
            }
            let records: Vec<OutRecord> = changed
                .iter()
                .map(|&i| {
                    let w = &writes[i];
                    let list = w.list.as_ref().expect("changed lists hold a list");
                    list_record(store, &self.kafka, w.signal, w.item, list)
                })
                .collect();
            let sending = self.producer.send(&records, self.delivery_timeout);
            let chunk = ChunkInFlight {
                writes,
                drifts,
                changed,
                records,
            };
            in_flight = Some((chunk, sending));
        }
        let sources = rows.finish();
        let report = cycle.report();
        Observation::CycleCompleted {
            report: &report,
            delivered: &outcome.delivered,
            undelivered: outcome.undelivered,
            sources,
            seconds: started.elapsed().as_secs_f64(),
        }
        .emit(&self.metrics);
        if outcome.undelivered == 0 {
            Observation::PublishedUpTo {
                watermark: cycle.watermark(),
            }
            .emit(&self.metrics);
        }
        Ok(CycleTally {
            delivered: outcome.delivered.len() as u64,
            undelivered: outcome.undelivered,
        })
    }

    /// Stores a delivered chunk's lists: those the broker acknowledged as published, the
    /// others marked dirty again. False when the broker took none of them.
    fn settle_chunk(
        &self,
        chunk: ChunkInFlight,
        report: DeliveryReport,
        destination: &str,
        now: UnixNanos,
        outcome: &mut CycleDeliveries,
    ) -> Result<bool> {
        let ChunkInFlight {
            mut writes,
            drifts,
            changed,
            records,
        } = chunk;
        if report.withheld {
            // A standby: the lists are stored, not delivered, as a backfill's are; the
            // instance republishes every list when it gains the lease.
            store_lists(&self.store, &writes, Delivery::StoredOnly, now)?;
            self.health.beat();
            return Ok(true);
        }
        note_delivery(&self.health, &records, &report);
        let mut failed = vec![false; changed.len()];
        for (k, _) in &report.failed {
            failed[*k] = true;
            writes[changed[*k]].mark = MarkAfterWrite::Renew;
        }
        for (k, &i) in changed.iter().enumerate().filter(|(k, _)| !failed[*k]) {
            outcome.delivered.push(DeliveredList {
                signal: writes[i].signal,
                tombstone: records[k].value.is_none(),
                drift: drifts[i],
            });
        }
        if !report.all_delivered() {
            Observation::DeliveryFailed {
                what: "lists",
                count: report.failed.len(),
                first_reason: &report.failed[0].1,
            }
            .emit(&self.metrics);
        }
        outcome.undelivered += report.failed.len() as u64;
        store_lists(&self.store, &writes, Delivery::Delivered(destination), now)?;
        let progressed = report.failed.len() < records.len();
        if progressed {
            // A long cycle the loop waits for is progress, not a stall.
            self.health.beat();
        }
        Ok(progressed)
    }
}
