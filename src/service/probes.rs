//! The service's background checks: the broker probe (reachability, lag, the listed
//! partitions) and the topic checks that keep readiness current.

use std::sync::{Arc, Mutex};
use std::time::Duration;

use anyhow::Result;

use super::health::Health;
use crate::config::Config;
use crate::kafka::client::BusContext;
use crate::kafka::offsets::OffsetsClient;
use crate::kafka::topics::{compaction_warnings, ensure_topics};
use crate::observability::metrics::Metrics;
use crate::observability::observe::Observation;
use crate::runtime::retry::Backoff;
use crate::runtime::shutdown::Shutdown;

/// How often the broker probe asks for metadata.
const PROBE_EVERY: Duration = Duration::from_secs(2);

/// The input topic's partitions as the broker probe last listed them, for a consumer
/// that assigns itself every partition.
pub(super) type ListedPartitions = Arc<Mutex<Vec<i32>>>;

/// Keeps the broker flag current by asking for metadata every [`PROBE_EVERY`], and the
/// per-partition lag gauge and `listed` from the input topic's high watermarks, until
/// shutdown.
pub(super) fn spawn_broker_probe(
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
            Observation::BrokerProbed {
                reachable: brokers.reachable(),
                high_watermarks: high.as_ref().ok(),
            }
            .emit(&metrics);
            if let Ok(high) = high {
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
pub(super) async fn keep_topics_checked(
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
