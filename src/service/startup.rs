//! Starting the service: what `run` was asked, opening the store, the bus clients, the
//! lease, HTTP and the background checks, wired into a [`Service`].

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::Instant;

use anyhow::Result;
use tokio::sync::Semaphore;

use super::handover::StartRequest;
use super::health::Health;
use super::http::{AdminRequests, HttpState};
use super::lease_role::PublishingRole;
use super::lookup::LookupStore;
use super::positions::StorePositions;
use super::probes::{keep_topics_checked, spawn_broker_probe, ListedPartitions};
use super::state::Core;
use crate::config::secrets::Scrubber;
use crate::config::Config;
use crate::kafka::client::{BrokerState, BusContext};
use crate::kafka::group::{GroupConsumer, Membership};
use crate::kafka::lease::{Lease, LeaseTerms};
use crate::kafka::list_table::{ListTable, TableReader};
use crate::kafka::offsets::OffsetsClient;
use crate::kafka::producer::RecordProducer;
use crate::observability::metrics::Metrics;
use crate::runtime::shutdown::Shutdown;
use crate::store::Store;
use crate::views::recommend::OtherShardLists;

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

/// Whether the service listens for SIGTERM and SIGINT itself.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub enum SignalHandling {
    /// SIGTERM and SIGINT begin shutdown (`simtide run`).
    #[default]
    Listen,
    /// The caller begins shutdown (the demo, which runs the service on a thread).
    Ignore,
}

/// A started service: the store open, HTTP listening, the consumer subscribed.
pub struct Service {
    pub(super) config: Config,
    pub(super) shutdown: Shutdown,
    pub(super) started: Instant,
    /// Serves HTTP, signals and the topic checks; dropped (and stopped) with the service.
    pub(super) runtime: tokio::runtime::Runtime,
    pub(super) core: Arc<Mutex<Core>>,
    pub(super) consumer: GroupConsumer<StorePositions>,
    /// The input partitions the probe listed, assigned as they appear when this instance
    /// reads every partition (a shard).
    pub(super) listed_partitions: ListedPartitions,
    pub(super) health: Arc<Health>,
    pub(super) metrics: Arc<Metrics>,
    pub(super) admin: Arc<AdminRequests>,
    /// Whether the output topics hold every stored list.
    pub(super) in_sync: bool,
    /// With `--stop-at-end` or `--stop-at-offsets`: the next offsets to stop at.
    pub(super) stop_at: Option<BTreeMap<i32, i64>>,
    /// The publishing lease, with `cluster.lease_topic`; released after the last
    /// publication at shutdown.
    pub(super) lease: Option<Lease>,
    /// A shard's readers of the list topics, which feed recommendations the other
    /// shards' lists; stopped when the service drops.
    pub(super) _list_readers: Vec<TableReader>,
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
        let offsets = super::handover::resolve(&config.kafka, &bus, request)?;
        super::handover::write_start(&mut store, config, offsets)?;
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
    let listener = runtime.block_on(crate::service::http::bind(&config.http.listen))?;
    tracing::info!(listen = %config.http.listen, "HTTP listener up (/healthz, /readyz, /metrics, /v1/…)");
    if !config.store.snapshot_dir.is_empty() {
        for leftover in crate::store::staged::leftovers_under(Path::new(&config.store.snapshot_dir)) {
            tracing::warn!(
                path = %leftover.display(),
                "an admin snapshot a stopped run left unfinished: it is not a snapshot; delete it"
            );
        }
    }
    runtime.spawn(crate::service::http::serve(
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
        crate::service::http::ConnectionLimits {
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
