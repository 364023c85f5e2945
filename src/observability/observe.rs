//! Observable events: each is one value that both writes its log line (tracing) and
//! moves its metrics, so what the logs say and what the metrics count cannot disagree.
//! Events that repeat while something stays broken (a broker away, a topic missing, a
//! full disk) write at most one line per kind every [`log_limit::REPEAT_EVERY`], carrying
//! the number of lines held back; their metrics count every occurrence.

use std::collections::BTreeMap;

use crate::decode::RejectReason;
use crate::event::UnixNanos;
use crate::kafka::outside_log::OutsidePosition;
use crate::observability::log_limit;
use crate::observability::metrics::Metrics;
use crate::pipeline::publish::{CycleReport, ListDrift};
use crate::pipeline::segment::BatchSummary;
use crate::signal::Signal;
use crate::store::mirror::ListSources;
use crate::store::StoreStats;

/// One delivered list, for the cycle's metrics.
#[derive(Debug, Clone, Copy)]
pub struct DeliveredList {
    /// Which signal.
    pub signal: Signal,
    /// Whether it was a tombstone.
    pub tombstone: bool,
    /// Drift from the list it replaced.
    pub drift: Option<ListDrift>,
}

/// Something worth a log line and a metric.
pub enum Observation<'a> {
    /// A micro-batch was applied (a backfill's or a live one, in memory until written).
    BatchApplied {
        /// Messages or records it held.
        messages: usize,
        /// What the engine did.
        summary: &'a BatchSummary,
        /// Refused records by reason.
        rejects: &'a BTreeMap<RejectReason, u64>,
        /// Apply time (a backfill's includes the segment write it triggered).
        seconds: f64,
        /// Estimated memory of the applied changes not yet written to the store.
        unwritten_bytes: u64,
    },
    /// The live service wrote its applied batches to the store in one write.
    ChangesWritten {
        /// Batches written.
        batches: u64,
        /// Messages they held.
        messages: u64,
        /// Time to sum and write them.
        seconds: f64,
    },
    /// Dead letters were acknowledged by the broker.
    DeadLettersDelivered {
        /// By reason.
        by_reason: &'a BTreeMap<RejectReason, u64>,
    },
    /// Records were not acknowledged; they are retried.
    DeliveryFailed {
        /// What was being delivered (`lists`, `dead letters`).
        what: &'static str,
        /// How many.
        count: usize,
        /// The first reason the client gave.
        first_reason: &'a str,
    },
    /// A store write failed; it is retried.
    StoreWriteFailed {
        /// The error, without event content.
        error: &'a str,
    },
    /// Reading from the input topic failed; librdkafka keeps retrying.
    ConsumeFailed {
        /// The client's error, scrubbed of secrets.
        error: &'a str,
    },
    /// A topic the service writes is missing or misconfigured, or could not be checked.
    TopicProblem {
        /// The topic.
        topic: &'a str,
        /// What is wrong and what to do.
        problem: &'a str,
    },
    /// Delivering every stored list stopped part way; it is tried again later.
    RepublishIncomplete {
        /// Lists not acknowledged.
        undelivered: usize,
        /// The first reason the client gave.
        first_reason: &'a str,
    },
    /// The input partitions left unconsumed because their stored position is outside
    /// the log (all of them; the set changed).
    PositionsRefused {
        /// Each refused partition's finding.
        refused: &'a [&'a OutsidePosition],
    },
    /// A partition whose stored position was outside the log resumed elsewhere by policy.
    OffsetsSkipped {
        /// What was found.
        outside: &'a OutsidePosition,
        /// Where consumption resumes.
        at: i64,
        /// Offsets of the current log never applied.
        skipped: u64,
    },
    /// Refused messages that look like erasures were dead-lettered.
    ErasuresRejected {
        /// How many.
        count: usize,
    },
    /// The broker refused a dead letter for good; it is recorded in the rejects file.
    DeadLetterUndeliverable {
        /// Where the refused message came from.
        partition: i32,
        /// Its offset.
        offset: i64,
        /// The broker's reason.
        error: &'a str,
    },
    /// A state-changing HTTP request came without the right token.
    AdminRefused,
    /// The dirty marks could not be read for the staleness gauge.
    PendingChangesUnreadable {
        /// The store's error.
        error: &'a str,
    },
    /// A batch could not be committed before its deadline and was dropped; it is consumed
    /// again from the stored positions.
    BatchAbandoned {
        /// Messages it held.
        messages: usize,
    },
    /// The catalogue's size, known from memory after every batch.
    CatalogueCounted {
        /// Items ever seen.
        items: u64,
        /// Users ever seen.
        users: u64,
    },
    /// The store's size figures were read (after each publication cycle).
    StoreMeasured {
        /// RocksDB's figures and the free disk space.
        stats: &'a StoreStats,
    },
    /// A publication cycle completed.
    CycleCompleted {
        /// Counts of the cycle.
        report: &'a CycleReport,
        /// Lists delivered.
        delivered: &'a [DeliveredList],
        /// Deliveries left for the next cycle.
        undelivered: u64,
        /// Where the lists of rows kept in memory came from.
        sources: ListSources,
        /// Duration.
        seconds: f64,
    },
    /// The live service reached these next offsets (a batch applied in memory, or the
    /// stored positions at start); `changed_lists` when the batch marked a list dirty.
    PositionsReached {
        /// Next offset by partition.
        next_offsets: &'a BTreeMap<i32, i64>,
        /// Whether a list went out of date.
        changed_lists: bool,
    },
    /// The batch in hand cannot move on (a store or dead-letter write is being retried).
    BatchStalled,
    /// The batch in hand moved on after a stall, or without one.
    BatchMoving,
    /// The oldest dirty mark was read (after each publication cycle).
    OldestDirtyMeasured {
        /// When the oldest pending change was made; `None` when nothing is pending.
        since: Option<UnixNanos>,
    },
    /// Every list of a cycle reached the list topics, up to this event time.
    PublishedUpTo {
        /// The newest event time the published lists include.
        watermark: Option<UnixNanos>,
    },
    /// The broker probe asked for the input topic's high watermarks.
    BrokerProbed {
        /// Whether the brokers are reachable, as the bus now says.
        reachable: bool,
        /// The watermarks by partition, or `None` when the broker did not answer.
        high_watermarks: Option<&'a BTreeMap<i32, i64>>,
    },
    /// `/readyz` (or the status page) computed readiness.
    ReadinessAnswered {
        /// Whether the service is ready.
        ready: bool,
    },
    /// A shard counted the other shards' lists it holds for recommendations.
    OtherShardListsHeld {
        /// How many lists.
        lists: usize,
    },
    /// A standby gained or lost the right to publish.
    PublishingRole {
        /// Whether this instance now publishes.
        publishing: bool,
    },
}

impl Observation<'_> {
    /// Logs the event and moves its metrics. Long by design: one match arm per observation,
    /// so every log line and the metrics it moves sit side by side.
    pub fn emit(&self, m: &Metrics) {
        match self {
            Observation::BatchApplied {
                messages,
                summary,
                rejects,
                seconds,
                unwritten_bytes,
            } => {
                tracing::debug!(
                    messages,
                    pair_updates = summary.pair_updates,
                    recenterings = summary.recenterings,
                    rejected = rejects.values().sum::<u64>(),
                    seconds,
                    unwritten_bytes,
                    "batch applied"
                );
                m.unwritten_bytes.set(*unwritten_bytes as i64);
                for (&(kind, outcome), &n) in summary.outcomes.iter() {
                    m.events
                        .with_label_values(&[kind.as_str(), outcome.as_str()])
                        .inc_by(n);
                }
                for (reason, &n) in rejects.iter() {
                    m.rejected.with_label_values(&[reason.code()]).inc_by(n);
                }
                m.batches.inc();
                m.batch_seconds.observe(*seconds);
                m.pair_updates.inc_by(summary.pair_updates);
                m.recenterings.inc_by(summary.recenterings);
                m.center_gap_max.set(summary.max_center_gap);
                for &gap in &summary.center_gaps {
                    m.center_gap.observe(gap);
                }
            }
            Observation::ChangesWritten {
                batches,
                messages,
                seconds,
            } => {
                tracing::debug!(batches, messages, seconds, "applied batches written to the store");
                m.write_seconds.observe(*seconds);
                m.unwritten_bytes.set(0);
            }
            Observation::DeadLettersDelivered { by_reason } => {
                for (reason, &n) in by_reason.iter() {
                    tracing::info!(
                        reason = reason.code(),
                        count = n,
                        "refused events sent to the dead-letter topic"
                    );
                    m.dead_letters.with_label_values(&[reason.code()]).inc_by(n);
                }
            }
            Observation::DeliveryFailed {
                what,
                count,
                first_reason,
            } => {
                if let Some(suppressed) = log_limit::admit(&format!("delivery/{what}")) {
                    tracing::warn!(
                        what,
                        count,
                        first_reason,
                        suppressed,
                        "not acknowledged by the broker; retrying"
                    );
                }
                if *what == "lists" {
                    m.delivery_failures.inc_by(*count as u64);
                }
            }
            Observation::StoreWriteFailed { error } => {
                if let Some(suppressed) = log_limit::admit("store_write") {
                    tracing::error!(
                        error,
                        suppressed,
                        "store write failed; consumption paused, retrying"
                    );
                }
                m.store_write_failures.inc();
            }
            Observation::ConsumeFailed { error } => {
                if let Some(suppressed) = log_limit::admit("consume") {
                    tracing::warn!(error, suppressed, "consume error; librdkafka keeps retrying");
                }
            }
            Observation::TopicProblem { topic, problem } => {
                if let Some(suppressed) = log_limit::admit(&format!("topic/{topic}")) {
                    tracing::warn!(topic, suppressed, "{problem}");
                }
            }
            Observation::RepublishIncomplete {
                undelivered,
                first_reason,
            } => {
                if let Some(suppressed) = log_limit::admit("republish") {
                    tracing::warn!(
                        undelivered,
                        first_reason,
                        suppressed,
                        "republication incomplete; retrying later"
                    );
                }
                m.delivery_failures.inc_by(*undelivered as u64);
            }
            Observation::PositionsRefused { refused } => {
                for outside in refused.iter() {
                    tracing::error!(
                        partition = outside.partition,
                        "input partition not consumed: {outside}; set kafka.position_outside_log to resume_at_log_start or resume_at_log_end to accept the loss"
                    );
                }
                m.partitions_refused.set(refused.len() as i64);
            }
            Observation::OffsetsSkipped { outside, at, skipped } => {
                tracing::warn!(
                    partition = outside.partition,
                    resumed_at = at,
                    skipped,
                    "{outside}; resuming by kafka.position_outside_log"
                );
                m.offsets_skipped.inc_by(*skipped);
            }
            Observation::ErasuresRejected { count } => {
                tracing::error!(
                    count,
                    "erase_user events were refused and dead-lettered: the users' data stays until a corrected erasure is sent"
                );
                m.erasures_rejected.inc_by(*count as u64);
            }
            Observation::DeadLetterUndeliverable {
                partition,
                offset,
                error,
            } => {
                tracing::error!(
                    partition,
                    offset,
                    error,
                    "the broker refused a dead letter for good; recorded in the rejects file, consumption goes on"
                );
                m.dead_letters_undeliverable.inc();
            }
            Observation::AdminRefused => {
                if let Some(suppressed) = log_limit::admit("admin_refused") {
                    tracing::warn!(suppressed, "admin request refused: missing or wrong bearer token");
                }
            }
            Observation::BatchAbandoned { messages } => {
                m.clear_batch_stalled();
                tracing::warn!(
                    messages,
                    "batch dropped before commit; it will be consumed again from the stored positions"
                );
            }
            Observation::CatalogueCounted { items, users } => {
                m.entities.with_label_values(&["items"]).set(*items as i64);
                m.entities.with_label_values(&["users"]).set(*users as i64);
            }
            Observation::StoreMeasured { stats } => {
                m.store_bytes.set(stats.sst_bytes as i64);
                m.pending_compaction_bytes
                    .set(stats.pending_compaction_bytes as i64);
                m.disk_available_bytes.set(stats.disk_available_bytes as i64);
                m.entities
                    .with_label_values(&["rating_pairs"])
                    .set(stats.rating_pairs_estimate as i64);
            }
            Observation::PendingChangesUnreadable { error } => {
                if let Some(suppressed) = log_limit::admit("pending_changes") {
                    tracing::warn!(error, suppressed, "cannot read pending changes");
                }
            }
            Observation::CycleCompleted {
                report,
                delivered,
                undelivered,
                sources,
                seconds,
            } => {
                tracing::debug!(
                    rescored = report.rescored,
                    changed = report.changed,
                    delivered = delivered.len(),
                    undelivered,
                    from_candidates = sources.from_candidates,
                    refills = sources.refills,
                    seconds,
                    "publication cycle"
                );
                m.cycles.inc();
                m.list_sources
                    .with_label_values(&["candidates"])
                    .inc_by(sources.from_candidates);
                m.list_sources
                    .with_label_values(&["refill"])
                    .inc_by(sources.refills);
                m.cycle_seconds.observe(*seconds);
                for d in delivered.iter() {
                    let signal = d.signal.as_str();
                    m.lists_published.with_label_values(&[signal]).inc();
                    if d.tombstone {
                        m.tombstones.with_label_values(&[signal]).inc();
                    }
                    if let Some(drift) = d.drift {
                        m.list_drift
                            .with_label_values(&[signal])
                            .observe(drift.changed_share);
                        m.list_rbo.with_label_values(&[signal]).observe(drift.rbo);
                    }
                }
                m.last_publish.set(crate::timefmt::now_nanos().as_secs_f64());
            }
            Observation::PositionsReached {
                next_offsets,
                changed_lists,
            } => {
                m.set_positions(next_offsets);
                if *changed_lists {
                    m.note_unpublished_change(crate::timefmt::now_nanos());
                }
            }
            Observation::BatchStalled => m.note_batch_stalled(),
            Observation::BatchMoving => m.clear_batch_stalled(),
            Observation::OldestDirtyMeasured { since } => m.set_oldest_dirty(*since),
            Observation::PublishedUpTo { watermark } => m.set_published_watermark(*watermark),
            Observation::BrokerProbed {
                reachable,
                high_watermarks,
            } => {
                m.broker_up.set(i64::from(*reachable));
                if let Some(high) = high_watermarks {
                    m.set_lag_from_watermarks(high);
                }
            }
            Observation::ReadinessAnswered { ready } => m.ready.set(i64::from(*ready)),
            Observation::OtherShardListsHeld { lists } => m.other_shard_lists.set(*lists as i64),
            Observation::PublishingRole { publishing } => m.publishing.set(i64::from(*publishing)),
        }
    }
}
