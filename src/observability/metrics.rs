//! The Prometheus metrics of simtide (docs/design.md, "Observability"), in one registry of
//! our own. Names carry the `simtide_` prefix and follow Prometheus conventions: base
//! units, `_total` for counters, `_seconds` for durations. Values that depend on "now"
//! (staleness, event-time lag, stalled batch) are computed when scraped from the instants
//! the service records.

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicI64, Ordering};
use std::sync::Mutex;

use prometheus::{
    Encoder, Gauge, GaugeVec, Histogram, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge,
    IntGaugeVec, Opts, Registry, TextEncoder,
};

use crate::cluster::ShardSpec;
use crate::decode::RejectReason;
use crate::event::UnixNanos;
use crate::service::health::Freshness;
use crate::signal::Signal;
use crate::timefmt::now_nanos;

/// Every metric's name, defined once: the registry and `simtide status` both use these.
pub mod names {
    /// `simtide_batch_duration_seconds`.
    pub const BATCH_DURATION_SECONDS: &str = "simtide_batch_duration_seconds";
    /// `simtide_batch_stalled_seconds`.
    pub const BATCH_STALLED_SECONDS: &str = "simtide_batch_stalled_seconds";
    /// `simtide_batches_total`.
    pub const BATCHES_TOTAL: &str = "simtide_batches_total";
    /// `simtide_broker_reachable`.
    pub const BROKER_REACHABLE: &str = "simtide_broker_reachable";
    /// `simtide_build_info`.
    pub const BUILD_INFO: &str = "simtide_build_info";
    /// `simtide_center_gap`.
    pub const CENTER_GAP: &str = "simtide_center_gap";
    /// `simtide_center_gap_max`.
    pub const CENTER_GAP_MAX: &str = "simtide_center_gap_max";
    /// `simtide_consumer_lag_messages`.
    pub const CONSUMER_LAG_MESSAGES: &str = "simtide_consumer_lag_messages";
    /// `simtide_dead_letters_total`.
    pub const DEAD_LETTERS_TOTAL: &str = "simtide_dead_letters_total";
    /// `simtide_dead_letters_undeliverable_total`.
    pub const DEAD_LETTERS_UNDELIVERABLE_TOTAL: &str = "simtide_dead_letters_undeliverable_total";
    /// `simtide_entities`.
    pub const ENTITIES: &str = "simtide_entities";
    /// `simtide_event_time_lag_seconds`.
    pub const EVENT_TIME_LAG_SECONDS: &str = "simtide_event_time_lag_seconds";
    /// `simtide_erasures_rejected_total`.
    pub const ERASURES_REJECTED_TOTAL: &str = "simtide_erasures_rejected_total";
    /// `simtide_events_total`.
    pub const EVENTS_TOTAL: &str = "simtide_events_total";
    /// `simtide_last_publish_timestamp_seconds`.
    pub const LAST_PUBLISH_TIMESTAMP_SECONDS: &str = "simtide_last_publish_timestamp_seconds";
    /// `simtide_list_delivery_failures_total`.
    pub const LIST_DELIVERY_FAILURES_TOTAL: &str = "simtide_list_delivery_failures_total";
    /// `simtide_list_drift_ratio`.
    pub const LIST_DRIFT_RATIO: &str = "simtide_list_drift_ratio";
    /// `simtide_list_rank_biased_overlap_ratio`.
    pub const LIST_RANK_BIASED_OVERLAP_RATIO: &str = "simtide_list_rank_biased_overlap_ratio";
    /// `simtide_lists_published_total`.
    pub const LISTS_PUBLISHED_TOTAL: &str = "simtide_lists_published_total";
    /// `simtide_input_offsets_skipped_total`.
    pub const INPUT_OFFSETS_SKIPPED_TOTAL: &str = "simtide_input_offsets_skipped_total";
    /// `simtide_input_partitions_refused`.
    pub const INPUT_PARTITIONS_REFUSED: &str = "simtide_input_partitions_refused";
    /// `simtide_other_shard_lists`.
    pub const OTHER_SHARD_LISTS: &str = "simtide_other_shard_lists";
    /// `simtide_pair_updates_total`.
    pub const PAIR_UPDATES_TOTAL: &str = "simtide_pair_updates_total";
    /// `simtide_publish_cycle_duration_seconds`.
    pub const PUBLISH_CYCLE_DURATION_SECONDS: &str = "simtide_publish_cycle_duration_seconds";
    /// `simtide_publish_cycles_total`.
    pub const PUBLISH_CYCLES_TOTAL: &str = "simtide_publish_cycles_total";
    /// `simtide_list_sources_total`.
    pub const LIST_SOURCES_TOTAL: &str = "simtide_list_sources_total";
    /// `simtide_publishing`.
    pub const PUBLISHING: &str = "simtide_publishing";
    /// `simtide_ready`.
    pub const READY: &str = "simtide_ready";
    /// `simtide_recenterings_total`.
    pub const RECENTERINGS_TOTAL: &str = "simtide_recenterings_total";
    /// `simtide_rejected_events_total`.
    pub const REJECTED_EVENTS_TOTAL: &str = "simtide_rejected_events_total";
    /// `simtide_staleness_seconds`.
    pub const STALENESS_SECONDS: &str = "simtide_staleness_seconds";
    /// `simtide_store_disk_available_bytes`.
    pub const STORE_DISK_AVAILABLE_BYTES: &str = "simtide_store_disk_available_bytes";
    /// `simtide_store_pending_compaction_bytes`.
    pub const STORE_PENDING_COMPACTION_BYTES: &str = "simtide_store_pending_compaction_bytes";
    /// `simtide_store_size_bytes`.
    pub const STORE_SIZE_BYTES: &str = "simtide_store_size_bytes";
    /// `simtide_store_write_duration_seconds`.
    pub const STORE_WRITE_DURATION_SECONDS: &str = "simtide_store_write_duration_seconds";
    /// `simtide_store_write_failures_total`.
    pub const STORE_WRITE_FAILURES_TOTAL: &str = "simtide_store_write_failures_total";
    /// `simtide_tombstones_published_total`.
    pub const TOMBSTONES_PUBLISHED_TOTAL: &str = "simtide_tombstones_published_total";
    /// `simtide_unwritten_changes_bytes`.
    pub const UNWRITTEN_CHANGES_BYTES: &str = "simtide_unwritten_changes_bytes";
}

/// "Not known yet" for the instants kept as atomics.
const UNSET: i64 = i64::MIN;

/// Every metric, registered once.
pub struct Metrics {
    registry: Registry,
    /// Accepted events by kind and outcome.
    pub(super) events: IntCounterVec,
    /// Refused events by reason.
    pub(super) rejected: IntCounterVec,
    /// Dead letters acknowledged by the broker, by reason.
    pub(super) dead_letters: IntCounterVec,
    /// Dead letters the broker refused for good, recorded in the rejects file instead.
    pub(super) dead_letters_undeliverable: IntCounter,
    /// Refused messages that look like erasures (dead-lettered, not applied).
    pub(super) erasures_rejected: IntCounter,
    /// Input partitions not consumed because their stored position is outside the log.
    pub(super) partitions_refused: IntGauge,
    /// Input offsets never applied because a policy resumed outside the stored position.
    pub(super) offsets_skipped: IntCounter,
    /// Micro-batches applied.
    pub(super) batches: IntCounter,
    /// Time to apply one batch.
    pub(super) batch_seconds: Histogram,
    /// Time to write the live service's applied batches to the store.
    pub(super) write_seconds: Histogram,
    /// Estimated memory of applied changes not yet written to the store.
    pub(super) unwritten_bytes: IntGauge,
    /// Pair contributions added or retracted.
    pub(super) pair_updates: IntCounter,
    /// Users whose center moved.
    pub(super) recenterings: IntCounter,
    /// Largest |mean − center| among the users of the last batch.
    pub(super) center_gap_max: Gauge,
    /// |mean − center| of each user touched, after its batch.
    pub(super) center_gap: Histogram,
    /// Messages behind the end of each input partition (high watermark − stored offset).
    pub(super) consumer_lag: IntGaugeVec,
    /// Publication cycles completed.
    pub(super) cycles: IntCounter,
    /// Rating lists of rows kept in memory, by source: read from the row's kept candidates,
    /// or a refill (the whole row scored again).
    pub(super) list_sources: IntCounterVec,
    /// Duration of one publication cycle.
    pub(super) cycle_seconds: Histogram,
    /// Lists delivered (changed lists and tombstones), by signal.
    pub(super) lists_published: IntCounterVec,
    /// Of those, tombstones.
    pub(super) tombstones: IntCounterVec,
    /// List deliveries the broker did not acknowledge (retried next cycle).
    pub(super) delivery_failures: IntCounter,
    /// 1 − overlap between an item's consecutive lists, by signal.
    pub(super) list_drift: HistogramVec,
    /// Rank-biased overlap (p = 0.9) between an item's consecutive lists, by signal.
    pub(super) list_rbo: HistogramVec,
    /// Failed store writes (each retried).
    pub(super) store_write_failures: IntCounter,
    /// Known items, users and rating pairs (pairs: RocksDB's key estimate / 2).
    pub(super) entities: IntGaugeVec,
    /// Bytes of the store's SST files.
    pub(super) store_bytes: IntGauge,
    /// RocksDB's estimate of bytes compaction still has to rewrite.
    pub(super) pending_compaction_bytes: IntGauge,
    /// Free bytes on the store's filesystem.
    pub(super) disk_available_bytes: IntGauge,
    /// 1 while a broker answered recently.
    pub(super) broker_up: IntGauge,
    /// 1 while every readiness check passes.
    pub(super) ready: IntGauge,
    /// 1 while this instance delivers lists and dead letters; 0 for a standby replica.
    pub(super) publishing: IntGauge,
    /// On a shard: the other shards' lists read from the list topic for recommendations.
    pub(super) other_shard_lists: IntGauge,
    /// Unix time of the last completed publication cycle (process start before the first).
    pub(super) last_publish: Gauge,
    staleness: Gauge,
    event_time_lag: Gauge,
    batch_stalled: Gauge,
    batch_stalled_since_ns: AtomicI64,
    lag_total: AtomicI64,
    oldest_dirty_ns: AtomicI64,
    published_watermark_ns: AtomicI64,
    positions: Mutex<BTreeMap<i32, i64>>,
}

/// Buckets for |mean − center| on a rating scale (the default tolerance is 0.05).
const CENTER_GAP_BUCKETS: [f64; 9] = [0.001, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0];
/// Buckets for drift and overlap ratios in [0, 1].
const RATIO_BUCKETS: [f64; 10] = [0.0, 0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.7, 0.9, 1.0];

/// Seconds from an instant kept as an atomic to `now`; 0 when it is unset.
fn seconds_since(at_ns: i64, now_ns: i64) -> f64 {
    if at_ns == UNSET {
        0.0
    } else {
        (now_ns - at_ns).max(0) as f64 / 1e9
    }
}

/// Registers each metric as it is built, so a metric is declared in one place.
struct Registering(Registry);

impl Registering {
    /// Registers `metric` and hands it back for the struct field.
    fn add<M: prometheus::core::Collector + Clone + 'static>(&self, metric: M) -> M {
        self.0
            .register(Box::new(metric.clone()))
            .expect("metric names are unique");
        metric
    }
}

fn counter_vec(name: &str, help: &str, labels: &[&str]) -> IntCounterVec {
    IntCounterVec::new(Opts::new(name, help), labels).expect("valid metric")
}

fn histogram(name: &str, help: &str, buckets: Vec<f64>) -> Histogram {
    Histogram::with_opts(HistogramOpts::new(name, help).buckets(buckets)).expect("valid metric")
}

impl std::fmt::Debug for Metrics {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Metrics").finish_non_exhaustive()
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}

impl Metrics {
    /// Creates and registers every metric, unlabelled (one instance holds every item).
    pub fn new() -> Metrics {
        Metrics::registered_in(Registry::new())
    }

    /// The metrics of an instance among `shard.shards`: every series carries the label
    /// `shard="<i>"`, so one Prometheus scraping all shards tells them apart (and sums
    /// them with `sum without (shard)`). Unsharded, the same as [`Metrics::new`].
    pub fn for_shard(shard: ShardSpec) -> Metrics {
        if !shard.is_sharded() {
            return Metrics::new();
        }
        let labels = HashMap::from([("shard".to_string(), shard.shard.to_string())]);
        Metrics::registered_in(Registry::new_custom(None, Some(labels)).expect("a valid label name"))
    }

    /// Creates every metric and registers it in `registry`. Long by design: one
    /// declaration per metric, in the order of the struct.
    fn registered_in(registry: Registry) -> Metrics {
        let r = Registering(registry);
        let m = Metrics {
            events: r.add(counter_vec(names::EVENTS_TOTAL, "Accepted events by kind and outcome.", &["kind", "outcome"])),
            rejected: r.add(counter_vec(names::REJECTED_EVENTS_TOTAL, "Events refused by validation, by reason.", &["reason"])),
            dead_letters: r.add(counter_vec(
                names::DEAD_LETTERS_TOTAL,
                "Refused events delivered to the dead-letter topic, by reason.",
                &["reason"],
            )),
            dead_letters_undeliverable: r.add(IntCounter::new(
                names::DEAD_LETTERS_UNDELIVERABLE_TOTAL,
                "Refused events whose dead letter the broker refused for good (too large, not authorised, invalid topic); each is recorded in the store's rejects file without its payload and consumption goes on.",
            )
            .expect("valid")),
            erasures_rejected: r.add(IntCounter::new(
                names::ERASURES_REJECTED_TOTAL,
                "Refused messages that name erase_user: the person's data stays until a corrected erasure arrives.",
            )
            .expect("valid")),
            partitions_refused: r.add(IntGauge::new(
                names::INPUT_PARTITIONS_REFUSED,
                "Input partitions left unconsumed because the store's position is outside the retained log and kafka.position_outside_log is refuse.",
            )
            .expect("valid")),
            offsets_skipped: r.add(IntCounter::new(
                names::INPUT_OFFSETS_SKIPPED_TOTAL,
                "Input offsets never applied because kafka.position_outside_log resumed a partition away from the store's position.",
            )
            .expect("valid")),
            batches: r.add(IntCounter::new(names::BATCHES_TOTAL, "Micro-batches applied.").expect("valid")),
            batch_seconds: r.add(histogram(
                names::BATCH_DURATION_SECONDS,
                "Time to apply one micro-batch (a backfill's includes the segment write it ends).",
                prometheus::exponential_buckets(0.005, 2.0, 12).expect("valid"),
            )),
            write_seconds: r.add(histogram(
                names::STORE_WRITE_DURATION_SECONDS,
                "Time to sum and write the live service's applied batches to the store in one write.",
                prometheus::exponential_buckets(0.005, 2.0, 12).expect("valid"),
            )),
            unwritten_bytes: r.add(IntGauge::new(
                names::UNWRITTEN_CHANGES_BYTES,
                "Estimated memory of applied changes not yet written to the store (bounded by live.memory_budget).",
            )
            .expect("valid")),
            pair_updates: r.add(IntCounter::new(names::PAIR_UPDATES_TOTAL, "Pair contributions added or retracted.")
                .expect("valid")),
            recenterings: r.add(IntCounter::new(names::RECENTERINGS_TOTAL, "Users whose applied center moved.")
                .expect("valid")),
            center_gap_max: r.add(Gauge::new(
                names::CENTER_GAP_MAX,
                "Largest |mean − applied center| among the users of the last batch (rating units).",
            )
            .expect("valid")),
            center_gap: r.add(histogram(
                names::CENTER_GAP,
                "|mean − applied center| of each user touched by a batch (rating units).",
                CENTER_GAP_BUCKETS.to_vec(),
            )),
            consumer_lag: r.add(IntGaugeVec::new(
                Opts::new(
                    names::CONSUMER_LAG_MESSAGES,
                    "Messages between the applied position and the end of each input partition.",
                ),
                &["partition"],
            )
            .expect("valid")),
            cycles: r.add(IntCounter::new(names::PUBLISH_CYCLES_TOTAL, "Publication cycles completed.").expect("valid")),
            list_sources: r.add(
                IntCounterVec::new(
                    Opts::new(
                        names::LIST_SOURCES_TOTAL,
                        "Rating lists of rows kept in memory, by source: kept candidates, or a refill that scored the whole row.",
                    ),
                    &["source"],
                )
                .expect("valid"),
            ),
            cycle_seconds: r.add(histogram(
                names::PUBLISH_CYCLE_DURATION_SECONDS,
                "Duration of one publication cycle (rescore, deliver, store).",
                prometheus::exponential_buckets(0.001, 2.5, 12).expect("valid"),
            )),
            lists_published: r.add(counter_vec(
                names::LISTS_PUBLISHED_TOTAL,
                "Changed lists delivered to the output topics (tombstones included), by signal.",
                &["signal"],
            )),
            tombstones: r.add(counter_vec(
                names::TOMBSTONES_PUBLISHED_TOTAL,
                "Tombstones delivered (a list became empty), by signal.",
                &["signal"],
            )),
            delivery_failures: r.add(IntCounter::new(
                names::LIST_DELIVERY_FAILURES_TOTAL,
                "List deliveries the broker did not acknowledge; each stays dirty and is retried.",
            )
            .expect("valid")),
            list_drift: r.add(HistogramVec::new(
                HistogramOpts::new(
                    names::LIST_DRIFT_RATIO,
                    "1 − |previous ∩ new| / max(|previous|, |new|) between an item's consecutive lists.",
                )
                .buckets(RATIO_BUCKETS.to_vec()),
                &["signal"],
            )
            .expect("valid")),
            list_rbo: r.add(HistogramVec::new(
                HistogramOpts::new(
                    names::LIST_RANK_BIASED_OVERLAP_RATIO,
                    "Rank-biased overlap (Webber, Moffat and Zobel 2010, p = 0.9, extrapolated) of an item's consecutive lists.",
                )
                .buckets(RATIO_BUCKETS.to_vec()),
                &["signal"],
            )
            .expect("valid")),
            store_write_failures: r.add(IntCounter::new(
                names::STORE_WRITE_FAILURES_TOTAL,
                "Store writes that failed and were retried.",
            )
            .expect("valid")),
            entities: r.add(IntGaugeVec::new(
                Opts::new(
                    names::ENTITIES,
                    "Item and user ids given out (forgotten users' included) and rating pairs (estimated by RocksDB).",
                ),
                &["entity"],
            )
            .expect("valid")),
            store_bytes: r.add(IntGauge::new(names::STORE_SIZE_BYTES, "Bytes of the store's SST files.").expect("valid")),
            pending_compaction_bytes: r.add(IntGauge::new(
                names::STORE_PENDING_COMPACTION_BYTES,
                "RocksDB's estimate of the bytes compaction still has to rewrite.",
            )
            .expect("valid")),
            disk_available_bytes: r.add(IntGauge::new(
                names::STORE_DISK_AVAILABLE_BYTES,
                "Free bytes on the filesystem holding the store.",
            )
            .expect("valid")),
            broker_up: r.add(IntGauge::new(names::BROKER_REACHABLE, "1 while a broker answered recently.").expect("valid")),
            ready: r.add(IntGauge::new(names::READY, "1 while every readiness check passes.").expect("valid")),
            publishing: r.add(
                IntGauge::new(
                    names::PUBLISHING,
                    "1 while this instance delivers lists and dead letters, 0 while it stands by (another instance of its shard holds the lease).",
                )
                .expect("valid"),
            ),
            other_shard_lists: r.add(
                IntGauge::new(
                    names::OTHER_SHARD_LISTS,
                    "Lists of other shards' items read from the rating list topic, which recommendations draw on.",
                )
                .expect("valid"),
            ),
            last_publish: r.add(Gauge::new(
                names::LAST_PUBLISH_TIMESTAMP_SECONDS,
                "Unix time at which the last publication cycle completed.",
            )
            .expect("valid")),
            staleness: r.add(Gauge::new(
                names::STALENESS_SECONDS,
                "Age of the oldest change not yet reflected in a published list (0 when none).",
            )
            .expect("valid")),
            event_time_lag: r.add(Gauge::new(
                names::EVENT_TIME_LAG_SECONDS,
                "Now minus the newest event time reflected in the published lists.",
            )
            .expect("valid")),
            batch_stalled: r.add(Gauge::new(
                names::BATCH_STALLED_SECONDS,
                "How long the batch in hand has been failing to commit (dead letters not acknowledged, or the store write failing); 0 when none is.",
            )
            .expect("valid")),
            batch_stalled_since_ns: AtomicI64::new(UNSET),
            lag_total: AtomicI64::new(UNSET),
            oldest_dirty_ns: AtomicI64::new(UNSET),
            published_watermark_ns: AtomicI64::new(UNSET),
            positions: Mutex::new(BTreeMap::new()),
            registry: r.0.clone(),
        };
        let build = GaugeVec::new(
            Opts::new(names::BUILD_INFO, "Always 1; the labels say which build runs."),
            &["version"],
        )
        .expect("valid");
        build.with_label_values(&[env!("CARGO_PKG_VERSION")]).set(1.0);
        r.add(build);
        // Every label value exists from the start, so a rate over a quiet counter is 0,
        // not an absent series that alert rules and dashboards cannot tell from a gap.
        for reason in RejectReason::ALL {
            m.rejected.with_label_values(&[reason.code()]);
            m.dead_letters.with_label_values(&[reason.code()]);
        }
        for signal in Signal::ALL {
            let s = signal.as_str();
            m.lists_published.with_label_values(&[s]);
            m.tombstones.with_label_values(&[s]);
            m.list_drift.with_label_values(&[s]);
            m.list_rbo.with_label_values(&[s]);
        }
        m.last_publish.set(now_nanos().as_secs_f64());
        m.publishing.set(1);
        m
    }

    /// Records when the oldest unpublished change happened (`None`: nothing is dirty).
    pub(super) fn set_oldest_dirty(&self, since: Option<UnixNanos>) {
        self.oldest_dirty_ns
            .store(since.map_or(UNSET, |t| t.0), Ordering::Relaxed);
    }

    /// Records the store's next offsets after a commit (the base of the lag gauge).
    pub(super) fn set_positions(&self, next: &BTreeMap<i32, i64>) {
        self.positions
            .lock()
            .expect("positions lock")
            .extend(next.iter().map(|(&p, &o)| (p, o)));
    }

    /// Sets each partition's lag from its high watermark and the stored position.
    pub(super) fn set_lag_from_watermarks(&self, high: &BTreeMap<i32, i64>) {
        let positions = self.positions.lock().expect("positions lock");
        let mut total = 0;
        for (&p, &h) in high {
            let at = positions.get(&p).copied().unwrap_or(0);
            let lag = (h - at).max(0);
            total += lag;
            self.consumer_lag.with_label_values(&[&p.to_string()]).set(lag);
        }
        self.lag_total.store(total, Ordering::Relaxed);
    }

    /// Records that the batch in hand failed to commit; the first failure of a run of
    /// failures starts the stall clock.
    pub(super) fn note_batch_stalled(&self) {
        let _ = self.batch_stalled_since_ns.compare_exchange(
            UNSET,
            now_nanos().0,
            Ordering::Relaxed,
            Ordering::Relaxed,
        );
    }

    /// Records that the batch in hand was committed (or dropped): nothing is stalled.
    pub(super) fn clear_batch_stalled(&self) {
        self.batch_stalled_since_ns.store(UNSET, Ordering::Relaxed);
    }

    /// Consumer lag and staleness now, for readiness.
    pub fn freshness(&self) -> Freshness {
        let lag = self.lag_total.load(Ordering::Relaxed);
        Freshness {
            consumer_lag: (lag != UNSET).then_some(lag),
            staleness_seconds: seconds_since(self.oldest_dirty_ns.load(Ordering::Relaxed), now_nanos().0),
        }
    }

    /// Records a change at `at` that no list reflects yet; the oldest one is kept.
    pub(super) fn note_unpublished_change(&self, at: UnixNanos) {
        let _ = self
            .oldest_dirty_ns
            .compare_exchange(UNSET, at.0, Ordering::Relaxed, Ordering::Relaxed);
    }

    /// Records the newest event time reflected in published lists.
    pub(super) fn set_published_watermark(&self, watermark: Option<UnixNanos>) {
        if let Some(w) = watermark {
            self.published_watermark_ns.store(w.0, Ordering::Relaxed);
        }
    }

    /// The text exposition of every metric, with the time-dependent gauges brought to now.
    pub fn render(&self) -> String {
        let now = now_nanos().0;
        self.staleness
            .set(seconds_since(self.oldest_dirty_ns.load(Ordering::Relaxed), now));
        self.batch_stalled.set(seconds_since(
            self.batch_stalled_since_ns.load(Ordering::Relaxed),
            now,
        ));
        let watermark = self.published_watermark_ns.load(Ordering::Relaxed);
        if watermark != UNSET {
            self.event_time_lag.set((now - watermark) as f64 / 1e9);
        }
        let mut out = Vec::new();
        TextEncoder::new()
            .encode(&self.registry.gather(), &mut out)
            .expect("text encoding does not fail");
        String::from_utf8(out).expect("the text format is UTF-8")
    }
}
