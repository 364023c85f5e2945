//! `simtide run`: the long-running service (docs/design.md: "Data flow", "Storage",
//! "Publication", "Failure model"). One loop consumes micro-batches (bounded by count and
//! age), commits each as one store write holding its next offsets, commits group offsets
//! after it for external lag tools, and runs a publication cycle every `publish.interval`.
//! SIGTERM/SIGINT end it cleanly: stop fetching, commit the batch in flight, publish what
//! is pending, leave.

pub mod batch;
pub mod consumer;
pub mod core;
pub mod handover;
pub mod latency;

use std::fmt;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::Result;
use rdkafka::consumer::{CommitMode, Consumer};
use tokio::sync::{watch, Semaphore};

use self::core::{Core, Flushed, RunCounters};
use crate::config::secrets::Scrubber;
use crate::config::Config;
use crate::health::Health;
use crate::http::{AdminRequests, HttpState};
use crate::kafka::client::{BrokerState, BusContext};
use crate::kafka::producer::RecordProducer;
use crate::kafka::topics::{compaction_warnings, ensure_topics};
use crate::lookup::LookupStore;
use crate::metrics::Metrics;
use crate::observe::Observation;
use crate::score::ListSettings;
use crate::store::Store;
use handover::StartRequest;

/// How often the broker probe asks for metadata.
const PROBE_EVERY: Duration = Duration::from_secs(2);

/// Longest idle wait for a message before the loop looks at its timers again.
const IDLE_WAIT: Duration = Duration::from_millis(500);

/// What `run` was asked beyond the configuration.
#[derive(Debug, Clone, Default)]
pub struct RunOptions {
    /// Store directory instead of `store.dir`.
    pub store_dir: Option<PathBuf>,
    /// Where the stream starts for a store that never consumed the input topic.
    pub start: Option<StartRequest>,
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
        for (key, n) in &c.events {
            writeln!(f, "    {key:<24}{n:>10}")?;
        }
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

/// Keeps the broker flag current by asking for metadata every [`PROBE_EVERY`], and the
/// per-partition lag gauge from the input topic's high watermarks.
fn spawn_broker_probe(
    config: &Config,
    bus: &BusContext,
    metrics: Arc<Metrics>,
    stop: watch::Receiver<bool>,
) -> Result<()> {
    let client = handover::offsets_client(&config.kafka, bus)?;
    let topic = config.kafka.input_topic.clone();
    let brokers = bus.brokers().clone();
    std::thread::Builder::new()
        .name("simtide-broker-probe".into())
        .spawn(move || {
            while !*stop.borrow() {
                let partitions = handover::partitions_of(&client, &topic);
                brokers.set_reachable(partitions.is_ok());
                metrics.broker_up.set(i64::from(brokers.reachable()));
                if let Ok(partitions) = partitions {
                    let high: std::collections::BTreeMap<i32, i64> = partitions
                        .into_iter()
                        .filter_map(|p| {
                            client
                                .fetch_watermarks(&topic, p, PROBE_EVERY)
                                .ok()
                                .map(|(_, h)| (p, h))
                        })
                        .collect();
                    metrics.set_lag_from_watermarks(&high);
                }
                std::thread::sleep(PROBE_EVERY);
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

/// Checks (and where allowed creates) the written topics until all exist, then again every
/// [`TOPIC_CHECK_MAX_WAIT`], keeping the readiness check current; once they all exist,
/// checks once that the list topics are compacted. Ends at shutdown.
async fn keep_topics_checked(
    kafka: crate::config::KafkaConfig,
    bus: BusContext,
    health: Arc<Health>,
    metrics: Arc<Metrics>,
    mut stop: watch::Receiver<bool>,
) {
    let mut backoff = TOPIC_CHECK_FIRST_WAIT;
    let mut compaction_checked = false;
    while !*stop.borrow() {
        let checked = tokio::time::timeout(TOPIC_CHECK_MAX_WAIT, ensure_topics(&kafka, &bus))
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
            backoff = TOPIC_CHECK_FIRST_WAIT;
            TOPIC_CHECK_MAX_WAIT
        } else {
            let pause = backoff;
            backoff = (backoff * 2).min(TOPIC_CHECK_MAX_WAIT);
            pause
        };
        if let Ok(Err(_)) = tokio::time::timeout(pause, stop.changed()).await {
            break; // the service is gone
        }
    }
}

/// Exits the process if shutdown overruns its bound. The store needs no cleanup: every
/// committed batch is in its write-ahead log, and an uncommitted one is consumed again.
fn arm_shutdown_watchdog(limit: Duration) {
    std::thread::spawn(move || {
        std::thread::sleep(limit);
        tracing::error!(
            seconds = limit.as_secs_f64(),
            "shutdown did not finish within live.shutdown_timeout; exiting now (committed state is safe)"
        );
        std::process::exit(3);
    });
}

/// Runs the service until `stop` turns true. Returns what the run did.
pub async fn run_service(
    config: &Config,
    options: RunOptions,
    mut stop: watch::Receiver<bool>,
) -> Result<RunReport> {
    let started = Instant::now();
    let scrubber = Arc::new(Scrubber::of(config));
    let brokers = Arc::new(BrokerState::default());
    let bus = BusContext::new(brokers.clone(), scrubber);
    let health = Arc::new(Health::new(brokers, config.readiness.clone()));
    let metrics = Arc::new(Metrics::new());
    let admin = Arc::new(AdminRequests::default());
    let store_dir = options
        .store_dir
        .clone()
        .unwrap_or_else(|| PathBuf::from(&config.store.dir));
    let lookups = Arc::new(LookupStore::new());
    let listener = crate::http::bind(&config.http.listen).await?;
    tracing::info!(listen = %config.http.listen, "HTTP listener up (/healthz, /readyz, /metrics, /v1/…)");
    let http = tokio::spawn(crate::http::serve(
        listener,
        HttpState {
            health: health.clone(),
            metrics: metrics.clone(),
            lookups: lookups.clone(),
            lookup_places: Arc::new(Semaphore::new(config.http.max_concurrent_lookups)),
            request_timeout: config.http.request_timeout,
            max_id_bytes: config.input.max_id_bytes,
            lists: ListSettings::from_config(config),
            admin_token: config.http.admin_token.clone(),
            admin: admin.clone(),
        },
    ));

    let mut store = Store::open(&store_dir, config)?;
    lookups.attach(store.view());
    if let Some(request) = &options.start {
        let (kafka, b, r) = (config.kafka.clone(), bus.clone(), request.clone());
        let offsets = tokio::task::spawn_blocking(move || handover::resolve(&kafka, &b, &r)).await??;
        handover::write_start(&mut store, config, offsets)?;
    }
    // Topic checks run beside consumption, so a broker that is away or slow never delays
    // start-up; until every written topic exists, readiness names the missing ones.
    tokio::spawn(keep_topics_checked(
        config.kafka.clone(),
        bus.clone(),
        health.clone(),
        metrics.clone(),
        stop.clone(),
    ));
    spawn_broker_probe(config, &bus, metrics.clone(), stop.clone())?;

    // Retry loops (store writes, deliveries) give up once shutdown begins.
    let stopping = Arc::new(AtomicBool::new(false));
    {
        let (mut stop, stopping) = (stop.clone(), stopping.clone());
        tokio::spawn(async move {
            while !*stop.borrow() {
                if stop.changed().await.is_err() {
                    break;
                }
            }
            stopping.store(true, Ordering::Relaxed);
        });
    }
    let producer = Arc::new(RecordProducer::new(&config.kafka, bus.clone())?);
    let core = Arc::new(Mutex::new(Core::new(
        store,
        config,
        producer,
        health.clone(),
        metrics.clone(),
        stopping,
    )));
    core.lock().expect("core lock").seed_positions();
    let consumer = consumer::subscribe(
        &config.kafka,
        bus.clone(),
        core.clone(),
        health.clone(),
        config.live.shutdown_timeout,
    )?;
    tracing::info!(
        store = %store_dir.display(),
        topic = %config.kafka.input_topic,
        group = %config.kafka.group,
        "consuming"
    );

    let interval = config.publish.interval;
    let mut next_publish = Instant::now() + interval;
    let mut in_sync = core.lock().expect("core lock").outputs_in_sync()?;
    loop {
        let wake = {
            let c = core.lock().expect("core lock");
            c.batch_deadline()
                .unwrap_or(Instant::now() + IDLE_WAIT)
                .min(next_publish)
        };
        tokio::select! {
            changed = stop.changed() => {
                if changed.is_err() || *stop.borrow() {
                    break;
                }
            }
            received = tokio::time::timeout_at(wake.into(), consumer.recv()) => match received {
                Ok(Ok(message)) => core.lock().expect("core lock").take(consumer::copy_message(&message)),
                Ok(Err(e)) => Observation::ConsumeFailed {
                    error: &bus.scrubber().scrub(&e.to_string()),
                }
                .emit(&metrics),
                Err(_) => {}
            },
        }
        let flushed = core.lock().expect("core lock").flush_if_due();
        commit_group_offsets(&consumer, &config.kafka.input_topic, flushed);
        if admin.compact.swap(false, Ordering::Relaxed) {
            tracing::info!("compacting the store on request");
            core.lock().expect("core lock").store.compact();
        }
        if admin.republish.swap(false, Ordering::Relaxed) {
            in_sync = false;
            next_publish = Instant::now();
        }
        if admin.publish.swap(false, Ordering::Relaxed) {
            next_publish = Instant::now();
        }
        if Instant::now() >= next_publish {
            let mut c = core.lock().expect("core lock");
            if !in_sync {
                in_sync = c.republish_all()?;
            }
            c.publish()?;
            next_publish = Instant::now() + interval;
        }
    }

    tracing::info!("stopping: committing the batch in flight and publishing pending lists");
    health.set_stopping();
    arm_shutdown_watchdog(config.live.shutdown_timeout);
    let deadline = Instant::now() + config.live.shutdown_timeout;
    {
        let flushed = core.lock().expect("core lock").flush(Some(deadline));
        commit_group_offsets(&consumer, &config.kafka.input_topic, flushed);
        let mut c = core.lock().expect("core lock");
        if !in_sync {
            c.republish_all()?;
        }
        c.publish()?;
    }
    drop(consumer);
    http.abort();
    let c = core.lock().expect("core lock");
    Ok(RunReport {
        counters: c.counters.clone(),
        latency_p50_ms: c.latency.quantile_ms(0.5),
        latency_p99_ms: c.latency.quantile_ms(0.99),
        seconds: started.elapsed().as_secs_f64(),
    })
}

/// Commits group offsets after a store write (asynchronously: they only inform external
/// lag tools; the store holds the truth).
fn commit_group_offsets<C: Consumer<X>, X: rdkafka::consumer::ConsumerContext>(
    consumer: &C,
    topic: &str,
    flushed: Flushed,
) {
    if let Flushed::Committed(offsets) = flushed {
        let list = consumer::offsets_list(topic, &offsets);
        if let Err(e) = consumer.commit(&list, CommitMode::Async) {
            tracing::debug!(error = %e, "group offset commit not sent");
        }
    }
}
