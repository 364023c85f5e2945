//! `simtide run`: the long-running service (docs/design.md: "Data flow", "Storage",
//! "Publication", "Failure model"). Its state machine runs on the calling thread, never on
//! an async worker: one loop polls the group consumer, collects micro-batches (bounded by
//! count and age) and applies each in memory; before every publication cycle (every
//! `publish.interval`), and sooner past `live.memory_budget`, it writes the applied batches
//! with their next offsets (one write that a reopened store finishes if it was cut in
//! two), commits group offsets for external lag tools, and starts the publication cycle
//! on a thread of its own (`cycle`) while it goes on consuming; the next write waits for
//! that cycle. Store writes, dead-letter deliveries and retry back-offs happen on this
//! thread. A small tokio runtime serves HTTP, signals and the topic checks (the Kafka
//! admin API is async). Shutdown (SIGTERM/SIGINT or the caller) ends the loop; draining
//! commits the batch in flight and publishes what is pending.

pub mod batch;
pub mod core;
mod cycle;
pub mod handover;
pub mod latency;
mod lease_role;
pub mod positions;
pub mod segment;

use std::collections::BTreeMap;
use std::fmt;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::Result;
use tokio::sync::Semaphore;

use self::core::{Core, Flushed, RunCounters};
use self::lease_role::PublishingRole;
use self::positions::StorePositions;
use crate::config::secrets::Scrubber;
use crate::config::Config;
use crate::exit::SHUTDOWN_OVERRAN;
use crate::health::Health;
use crate::http::{AdminRequests, HttpState};
use crate::kafka::client::{BrokerState, BusContext};
use crate::kafka::group::{GroupConsumer, Membership};
use crate::kafka::lease::{Lease, LeaseTerms};
use crate::kafka::list_table::{ListTable, TableReader};
use crate::kafka::offsets::OffsetsClient;
use crate::kafka::producer::RecordProducer;
use crate::kafka::topics::{compaction_warnings, ensure_topics};
use crate::lookup::LookupStore;
use crate::metrics::Metrics;
use crate::observe::Observation;
use crate::recommend::OtherShardLists;
use crate::retry::Backoff;
use crate::shutdown::Shutdown;
use crate::store::Store;
use handover::StartRequest;

/// How often the broker probe asks for metadata.
const PROBE_EVERY: Duration = Duration::from_secs(2);

/// Longest idle wait for a message before the loop looks at its timers again.
const IDLE_WAIT: Duration = Duration::from_millis(500);

/// How often the loop looks for partitions the probe listed and the consumer has not
/// assigned yet (a sharded instance reads every partition).
const LISTING_LOOK_EVERY: Duration = Duration::from_millis(250);

/// Longest single poll: how soon the loop notices that shutdown began.
const LONGEST_POLL: Duration = Duration::from_millis(100);

/// What `run` was asked beyond the configuration.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Store directory instead of `store.dir`.
    pub store_dir: Option<PathBuf>,
    /// Where the stream starts for a store that never consumed the input topic.
    pub start: Option<StartRequest>,
    /// Whether SIGTERM and SIGINT begin shutdown.
    pub signals: SignalHandling,
    /// Where to stop (then write, publish and return as after a signal); `None`: run
    /// until shutdown.
    pub stop: Option<StopAt>,
    /// Whether to skip the check that the list topics are compacted: the demo's
    /// in-process cluster cannot report topic settings, so the check could only warn
    /// that it cannot tell (the demo says so once instead).
    pub skip_compaction_check: bool,
}

/// Where `--stop-at-end` or `--stop-at-offsets` stops consumption.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum StopAt {
    /// The input topic's end offsets as they are at start.
    End,
    /// These next offsets, by partition, exactly: instances given the same list stop at
    /// the same positions, whatever their batches (the resharding procedure).
    Offsets(BTreeMap<i32, i64>),
}

/// Whether `message` lies at or past the stop: on a partition the stop does not list, or
/// at or after its offset there. Such a message is left for the next run, so the stored
/// positions end exactly at the stop.
fn past_the_stop(stop: &BTreeMap<i32, i64>, partition: i32, offset: i64) -> bool {
    stop.get(&partition).is_none_or(|&end| offset >= end)
}

/// Whether the service listens for SIGTERM and SIGINT itself.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum SignalHandling {
    /// SIGTERM and SIGINT begin shutdown (`simtide run`).
    #[default]
    Listen,
    /// The caller begins shutdown (the demo, which runs the service on a thread).
    Ignore,
}

/// What a run did, printed when it ends.
#[derive(Debug, Clone)]
pub struct RunReport {
    /// This run's counters.
    pub counters: RunCounters,
    /// Median event-to-publication latency, milliseconds.
    pub latency_p50_ms: Option<f64>,
    /// 99th percentile of the same.
    pub latency_p99_ms: Option<f64>,
    /// Seconds from start to exit.
    pub seconds: f64,
}

impl fmt::Display for RunReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let c = &self.counters;
        let secs = self.seconds.max(1e-9);
        writeln!(f, "simtide run ended after {:.1}s", self.seconds)?;
        writeln!(
            f,
            "  messages committed {:>10}   {:>8.0}/s",
            c.messages,
            c.messages as f64 / secs
        )?;
        write!(f, "{}", c.events)?;
        let dead: u64 = c.dead_letters.values().sum();
        writeln!(f, "  dead letters       {dead:>10}")?;
        for (reason, n) in &c.dead_letters {
            writeln!(f, "    {reason:<24}{n:>10}")?;
        }
        writeln!(f, "  batches            {:>10}", c.batches)?;
        writeln!(
            f,
            "  publication cycles {:>10}   ({} lists delivered, {} retried later)",
            c.cycles, c.lists_delivered, c.lists_undelivered
        )?;
        let ms = |v: Option<f64>| v.map_or("-".to_string(), |v| format!("{v:.0} ms"));
        write!(
            f,
            "  event → published  p50 {}, p99 {}",
            ms(self.latency_p50_ms),
            ms(self.latency_p99_ms)
        )
    }
}

/// The input topic's partitions as the broker probe last listed them, for a consumer
/// that assigns itself every partition.
type ListedPartitions = Arc<Mutex<Vec<i32>>>;

/// Keeps the broker flag current by asking for metadata every [`PROBE_EVERY`], and the
/// per-partition lag gauge and `listed` from the input topic's high watermarks, until
/// shutdown.
fn spawn_broker_probe(
    config: &Config,
    bus: &BusContext,
    metrics: Arc<Metrics>,
    listed: ListedPartitions,
    shutdown: Shutdown,
) -> Result<()> {
    let client = OffsetsClient::new(&config.kafka, bus)?;
    let topic = config.kafka.input_topic.clone();
    let brokers = bus.brokers().clone();
    std::thread::Builder::new()
        .name("simtide-broker-probe".into())
        .spawn(move || loop {
            let high = client.high_watermarks(&topic, PROBE_EVERY);
            brokers.set_reachable(high.is_ok());
            metrics.broker_up.set(i64::from(brokers.reachable()));
            if let Ok(high) = high {
                metrics.set_lag_from_watermarks(&high);
                *listed.lock().expect("partitions lock") = high.keys().copied().collect();
            }
            if !shutdown.sleep(PROBE_EVERY) {
                break;
            }
        })?;
    Ok(())
}

/// First wait between two topic checks that found a problem; doubled up to
/// [`TOPIC_CHECK_MAX_WAIT`].
const TOPIC_CHECK_FIRST_WAIT: Duration = Duration::from_secs(1);

/// Longest wait between two topic checks that found a problem, and the period of the
/// checks once every topic exists (a topic deleted under a running service is noticed).
const TOPIC_CHECK_MAX_WAIT: Duration = Duration::from_secs(30);

/// Checks (and where allowed creates) the written topics and the lease topic until all
/// exist, then again every [`TOPIC_CHECK_MAX_WAIT`], keeping the readiness check current;
/// once they all exist, checks once that the list topics are compacted (unless
/// `compaction_checked` says not to). Ends at shutdown.
async fn keep_topics_checked(
    kafka: crate::config::KafkaConfig,
    lease_topic: Option<String>,
    bus: BusContext,
    health: Arc<Health>,
    metrics: Arc<Metrics>,
    shutdown: Shutdown,
    mut compaction_checked: bool,
) {
    let mut backoff = Backoff::new(TOPIC_CHECK_FIRST_WAIT, TOPIC_CHECK_MAX_WAIT);
    while !shutdown.is_begun() {
        let checked = tokio::time::timeout(
            TOPIC_CHECK_MAX_WAIT,
            ensure_topics(&kafka, lease_topic.as_deref(), &bus),
        )
        .await
        .unwrap_or_else(|_| Err(anyhow::anyhow!("no answer within {TOPIC_CHECK_MAX_WAIT:?}")));
        let (problems, created) = match checked {
            Ok(found) => {
                for (topic, problem) in found.missing.iter().chain(&found.warnings) {
                    Observation::TopicProblem { topic, problem }.emit(&metrics);
                }
                let problems: Vec<String> = found.missing.into_iter().map(|(_, p)| p).collect();
                (problems, found.created)
            }
            Err(e) => {
                let problem = format!("the written topics could not be checked: {e:#}");
                Observation::TopicProblem {
                    topic: "*",
                    problem: &problem,
                }
                .emit(&metrics);
                (vec![problem], Vec::new())
            }
        };
        let all_exist = problems.is_empty();
        health.set_topic_problems(problems);
        if all_exist && !compaction_checked {
            compaction_checked = true;
            if let Ok(warnings) = compaction_warnings(&kafka, &bus, &created).await {
                for (topic, problem) in &warnings {
                    Observation::TopicProblem { topic, problem }.emit(&metrics);
                }
            }
        }
        let pause = if all_exist {
            backoff.reset();
            TOPIC_CHECK_MAX_WAIT
        } else {
            backoff.next_delay()
        };
        if !shutdown.sleep_async(pause).await {
            break;
        }
    }
}

/// A started service: the store open, HTTP listening, the consumer subscribed.
pub struct Service {
    config: Config,
    shutdown: Shutdown,
    started: Instant,
    /// Serves HTTP, signals and the topic checks; dropped (and stopped) with the service.
    runtime: tokio::runtime::Runtime,
    core: Arc<Mutex<Core>>,
    consumer: GroupConsumer<StorePositions>,
    /// The input partitions the probe listed, assigned as they appear when this instance
    /// reads every partition (a shard).
    listed_partitions: ListedPartitions,
    health: Arc<Health>,
    metrics: Arc<Metrics>,
    admin: Arc<AdminRequests>,
    /// Whether the output topics hold every stored list.
    in_sync: bool,
    /// With `--stop-at-end` or `--stop-at-offsets`: the next offsets to stop at.
    stop_at: Option<BTreeMap<i32, i64>>,
    /// The publishing lease, with `cluster.lease_topic`; released after the last
    /// publication at shutdown.
    lease: Option<Lease>,
    /// A shard's readers of the list topics, which feed recommendations the other
    /// shards' lists; stopped when the service drops.
    _list_readers: Vec<TableReader>,
}

/// With `cluster.lease_topic`: stands by (nothing produced) and joins the lease group,
/// which decides when this instance publishes.
fn join_lease(
    config: &Config,
    bus: &BusContext,
    producer: &Arc<RecordProducer>,
    admin: &Arc<AdminRequests>,
    health: &Arc<Health>,
    metrics: &Arc<Metrics>,
) -> Result<Option<Lease>> {
    if config.cluster.lease_topic.is_empty() {
        return Ok(None);
    }
    let role = PublishingRole {
        producer: producer.clone(),
        admin: admin.clone(),
        health: health.clone(),
        metrics: metrics.clone(),
    };
    role.stand_by();
    let terms = LeaseTerms {
        topic: config.cluster.lease_topic.clone(),
        group: config.cluster.spec().lease_group(&config.kafka.group),
        timeout: config.cluster.lease_timeout,
    };
    Ok(Some(Lease::join(&config.kafka, bus.clone(), &terms, role)?))
}

/// Opens the store, starts HTTP, the probes and (with [`SignalHandling::Listen`]) the
/// signal listener, and subscribes to the input topic.
pub fn start(config: &Config, options: RunOptions, shutdown: Shutdown) -> Result<Service> {
    let started = Instant::now();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .thread_name("simtide-async")
        .enable_all()
        .build()?;
    if options.signals == SignalHandling::Listen {
        runtime.spawn(begin_shutdown_on_signal(shutdown.clone()));
    }
    let scrubber = Arc::new(Scrubber::of(config));
    let brokers = Arc::new(BrokerState::default());
    let bus = BusContext::new(brokers.clone(), scrubber);
    let shard = config.cluster.spec();
    let health = Arc::new(Health::new(
        brokers,
        config.readiness.clone(),
        shard,
        config.live.stall_limit,
    ));
    let metrics = Arc::new(Metrics::for_shard(shard));
    let admin = Arc::new(AdminRequests::default());
    let store_dir = options
        .store_dir
        .clone()
        .unwrap_or_else(|| PathBuf::from(&config.store.dir));
    let lookups = Arc::new(LookupStore::new());
    let others = move || Arc::new(ListTable::new(Box::new(move |item: &str| !shard.owns(item))));
    let other_lists = shard.is_sharded().then(|| OtherShardLists {
        rating: others(),
        purchase: (config.recommend.purchase_weight > 0.0).then(others),
    });
    start_http(
        &runtime,
        config,
        Served {
            health: health.clone(),
            metrics: metrics.clone(),
            lookups: lookups.clone(),
            admin: admin.clone(),
            other_lists: other_lists.clone(),
        },
    )?;
    let mut store = Store::open(&store_dir, config)?;
    lookups.attach(store.view());
    if let Some(request) = &options.start {
        let offsets = handover::resolve(&config.kafka, &bus, request)?;
        handover::write_start(&mut store, config, offsets)?;
    }
    // Topic checks run beside consumption, so a broker that is away or slow never delays
    // start-up; until every written topic exists, readiness names the missing ones.
    runtime.spawn(keep_topics_checked(
        config.kafka.clone(),
        Some(config.cluster.lease_topic.clone()).filter(|t| !t.is_empty()),
        bus.clone(),
        health.clone(),
        metrics.clone(),
        shutdown.clone(),
        options.skip_compaction_check,
    ));
    let mut list_readers = Vec::new();
    if let Some(others) = other_lists {
        let k = &config.kafka;
        list_readers.push(TableReader::start(k, &bus, &k.output_topic, others.rating)?);
        if let Some(purchase) = others.purchase {
            list_readers.push(TableReader::start(k, &bus, &k.purchase_output_topic, purchase)?);
        }
    }
    let listed_partitions = ListedPartitions::default();
    spawn_broker_probe(
        config,
        &bus,
        metrics.clone(),
        listed_partitions.clone(),
        shutdown.clone(),
    )?;
    let stop_at = match options.stop {
        Some(StopAt::End) => {
            let ends = OffsetsClient::new(&config.kafka, &bus)?.end_offsets(&config.kafka.input_topic)?;
            tracing::info!(topic = %config.kafka.input_topic, offsets = ?ends, "will stop at these end offsets");
            Some(ends)
        }
        Some(StopAt::Offsets(offsets)) => {
            tracing::info!(topic = %config.kafka.input_topic, offsets = ?offsets, "will stop at these offsets");
            Some(offsets)
        }
        None => None,
    };

    let producer = Arc::new(RecordProducer::new(&config.kafka, bus.clone())?);
    let lease = join_lease(config, &bus, &producer, &admin, &health, &metrics)?;
    let core = Arc::new(Mutex::new(Core::new(
        store,
        config,
        producer,
        health.clone(),
        metrics.clone(),
        shutdown.clone(),
    )?));
    let in_sync = {
        let c = core.lock().expect("core lock");
        c.seed_positions();
        c.outputs_in_sync()?
    };
    let membership = if shard.is_sharded() {
        Membership::EveryPartition {
            offsets_group: shard.offsets_group(&config.kafka.group),
        }
    } else {
        Membership::Subscribed
    };
    tracing::info!(
        store = %store_dir.display(),
        topic = %config.kafka.input_topic,
        membership = ?membership,
        %shard,
        "consuming"
    );
    let consumer = GroupConsumer::join(
        &config.kafka,
        bus,
        StorePositions::new(core.clone(), health.clone(), metrics.clone()),
        config.live.shutdown_timeout,
        membership,
    )?;
    Ok(Service {
        config: config.clone(),
        shutdown,
        started,
        runtime,
        core,
        consumer,
        listed_partitions,
        health,
        metrics,
        admin,
        in_sync,
        stop_at,
        lease,
        _list_readers: list_readers,
    })
}

/// What the HTTP listener serves from, shared with the service.
struct Served {
    health: Arc<Health>,
    metrics: Arc<Metrics>,
    lookups: Arc<LookupStore>,
    admin: Arc<AdminRequests>,
    other_lists: Option<OtherShardLists>,
}

/// Binds the HTTP listener and serves it on the runtime.
fn start_http(runtime: &tokio::runtime::Runtime, config: &Config, served: Served) -> Result<()> {
    let listener = runtime.block_on(crate::http::bind(&config.http.listen))?;
    tracing::info!(listen = %config.http.listen, "HTTP listener up (/healthz, /readyz, /metrics, /v1/…)");
    if !config.store.snapshot_dir.is_empty() {
        for leftover in crate::store::staged::leftovers_under(Path::new(&config.store.snapshot_dir)) {
            tracing::warn!(
                path = %leftover.display(),
                "an admin snapshot a stopped run left unfinished: it is not a snapshot; delete it"
            );
        }
    }
    runtime.spawn(crate::http::serve(
        listener,
        HttpState {
            health: served.health,
            metrics: served.metrics,
            lookups: served.lookups,
            lookup_places: Arc::new(Semaphore::new(config.http.max_concurrent_lookups)),
            request_timeout: config.http.request_timeout,
            max_id_bytes: config.input.max_id_bytes,
            lists: config.list_settings(),
            admin_token: config.http.admin_token.clone(),
            shard: config.cluster.spec(),
            snapshots: Some(PathBuf::from(&config.store.snapshot_dir)).filter(|d| !d.as_os_str().is_empty()),
            admin: served.admin,
            config: Arc::new(config.clone()),
            other_lists: served.other_lists,
        },
        crate::http::ConnectionLimits {
            max_connections: config.http.max_connections,
            header_timeout: config.http.header_timeout,
        },
    ));
    Ok(())
}

/// Begins shutdown at the first SIGTERM or SIGINT.
async fn begin_shutdown_on_signal(shutdown: Shutdown) {
    let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
        Ok(s) => s,
        Err(e) => {
            tracing::error!(error = %e, "cannot listen for SIGTERM");
            return;
        }
    };
    tokio::select! {
        _ = term.recv() => tracing::info!("SIGTERM received"),
        _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received"),
    }
    shutdown.begin();
}

/// When the next publication starts: one interval after this one started, so lists are
/// refreshed at the configured rate however long the write before the cycle took, but
/// never sooner than a quarter interval after that write ended (the cycle itself runs
/// beside consumption), so that consumption goes on when writes take most of the
/// interval.
fn next_cycle_start(started: Instant, ended: Instant, interval: Duration) -> Instant {
    (started + interval).max(ended + interval / 4)
}

impl Service {
    fn core(&self) -> std::sync::MutexGuard<'_, Core> {
        self.core.lock().expect("core lock")
    }

    /// Consumes, commits and publishes until shutdown begins.
    pub fn run(&mut self) -> Result<()> {
        let interval = self.config.publish.interval;
        let mut next_publish = Instant::now() + interval;
        let mut next_listing_look = Instant::now();
        while !self.shutdown.is_begun() {
            self.health.beat();
            if Instant::now() >= next_listing_look {
                let listed = self.listed_partitions.lock().expect("partitions lock").clone();
                self.consumer.assign_new_partitions(&listed);
                next_listing_look = Instant::now() + LISTING_LOOK_EVERY;
            }
            let now = Instant::now();
            let wake = self
                .core()
                .batch_deadline()
                .unwrap_or(now + IDLE_WAIT)
                .min(next_publish);
            // The core is not locked here: rebalance callbacks run inside poll and lock it.
            match self
                .consumer
                .poll(wake.saturating_duration_since(now).min(LONGEST_POLL))
            {
                Some(Ok(message)) => {
                    let past = self
                        .stop_at
                        .as_ref()
                        .is_some_and(|stop| past_the_stop(stop, message.partition, message.offset));
                    if !past {
                        self.core().take(message);
                    }
                }
                Some(Err(error)) => {
                    Observation::ConsumeFailed { error: &error.text }.emit(&self.metrics);
                    if error.position_out_of_range {
                        self.consumer.recheck_positions();
                    }
                }
                None => {}
            }
            let flushed = self.core().flush_if_due();
            self.commit_group_offsets(flushed);
            if let Some(ends) = &self.stop_at {
                if self.core().has_applied(ends) {
                    tracing::info!("every message before the stop offsets is applied; stopping");
                    self.shutdown.begin();
                }
            }
            if self.admin.compact.swap(false, Ordering::Relaxed) {
                tracing::info!("compacting the store on request");
                self.core().compact_store();
            }
            if self.admin.republish.swap(false, Ordering::Relaxed) {
                self.in_sync = false;
                next_publish = Instant::now();
            }
            if self.admin.publish.swap(false, Ordering::Relaxed) {
                next_publish = Instant::now();
            }
            if Instant::now() >= next_publish {
                let started = Instant::now();
                self.publish()?;
                next_publish = next_cycle_start(started, Instant::now(), interval);
            }
        }
        Ok(())
    }

    /// Writes the applied batches to the store, republishes everything first when the
    /// outputs are not in sync, then runs one publication cycle.
    fn publish(&mut self) -> Result<()> {
        let flushed = self.core().flush(None);
        self.commit_group_offsets(flushed);
        let mut c = self.core.lock().expect("core lock");
        c.end_cycle()?;
        if !self.in_sync {
            self.in_sync = c.republish_all()?;
        }
        c.start_cycle();
        Ok(())
    }

    /// Commits group offsets after a store write.
    fn commit_group_offsets(&self, flushed: Flushed) {
        if let Flushed::Committed(offsets) = flushed {
            self.consumer.commit_positions(&offsets);
        }
    }

    /// Stops consuming, writes the applied batches and publishes what is pending, within
    /// `live.shutdown_timeout` (a watchdog ends the process past it); returns what the
    /// run did.
    pub fn drain(mut self) -> Result<RunReport> {
        tracing::info!("stopping: writing the applied batches and publishing pending lists");
        self.shutdown.begin();
        self.health.set_stopping();
        let limit = self.config.live.shutdown_timeout;
        let _watchdog = self.shutdown.arm_watchdog(limit, SHUTDOWN_OVERRAN);
        let flushed = self.core().flush(Some(Instant::now() + limit));
        self.commit_group_offsets(flushed);
        self.publish()?;
        let report = {
            let mut c = self.core();
            c.end_cycle()?;
            c.report(self.started.elapsed().as_secs_f64())
        };
        let Service {
            runtime,
            consumer,
            lease,
            ..
        } = self;
        drop(consumer);
        // Only after the last publication: a standby takes over at once.
        drop(lease);
        runtime.shutdown_background();
        Ok(report)
    }
}

/// Runs the service until `shutdown` begins: [`start`], [`Service::run`],
/// [`Service::drain`].
pub fn run_service(config: &Config, options: RunOptions, shutdown: Shutdown) -> Result<RunReport> {
    let mut service = start(config, options, shutdown)?;
    service.run()?;
    service.drain()
}

#[cfg(test)]
mod tests {
    use std::time::{Duration, Instant};

    use super::{next_cycle_start, past_the_stop};

    #[test]
    fn messages_at_or_past_the_stop_are_left_for_the_next_run() {
        let stop = std::collections::BTreeMap::from([(0, 10), (1, 0)]);
        assert!(!past_the_stop(&stop, 0, 9));
        assert!(past_the_stop(&stop, 0, 10));
        assert!(past_the_stop(&stop, 1, 0));
        assert!(past_the_stop(&stop, 2, 0), "a partition the stop does not list");
    }

    #[test]
    fn publications_start_one_interval_apart_unless_a_write_ran_long() {
        let t0 = Instant::now();
        let interval = Duration::from_secs(5);
        // A 2 s write: the next publication starts 5 s after this one started, 3 s after
        // the write ended.
        let next = next_cycle_start(t0, t0 + Duration::from_secs(2), interval);
        assert_eq!(next, t0 + interval);
        // A 4.5 s write: consumption still gets a quarter interval before the next.
        let ended = t0 + Duration::from_millis(4500);
        assert_eq!(next_cycle_start(t0, ended, interval), ended + interval / 4);
        // A 9 s write: the same, not a publication right after the other.
        let ended = t0 + Duration::from_secs(9);
        assert_eq!(next_cycle_start(t0, ended, interval), ended + interval / 4);
    }
}
