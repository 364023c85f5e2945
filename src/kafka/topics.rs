//! The topics the service writes: created when missing (the list topics compacted, so the
//! serving layer can rebuild every list from the topic alone), and checked for compaction
//! when they already exist. The check reports what it found; the caller decides what is a
//! readiness problem and logs the rest.

use std::time::Duration;

use anyhow::Result;
use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, ResourceSpecifier, TopicReplication};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::error::RDKafkaErrorCode;

use super::client::{base_config, describe_error, BusContext};
use crate::config::KafkaConfig;

/// How long each admin request may take.
const ADMIN_TIMEOUT: Duration = Duration::from_secs(5);

/// Topics the service produces to, with whether each must be compacted.
fn written_topics(kafka: &KafkaConfig) -> [(&str, bool); 3] {
    [
        (kafka.output_topic.as_str(), true),
        (kafka.purchase_output_topic.as_str(), true),
        (kafka.dead_letter_topic.as_str(), false),
    ]
}

/// The topics [`ensure_topics`] sees to: the written ones (`kafka.topic_partitions`
/// partitions) and the lease topic, if any, which must have one partition (its holder is
/// the one instance that publishes). Each with whether it is compacted and its partitions.
fn needed_topics<'a>(kafka: &'a KafkaConfig, lease_topic: Option<&'a str>) -> Vec<(&'a str, bool, i32)> {
    written_topics(kafka)
        .into_iter()
        .map(|(topic, compacted)| (topic, compacted, kafka.topic_partitions))
        .chain(lease_topic.map(|topic| (topic, false, 1)))
        .collect()
}

/// What one check of the topics found, one sentence per finding, each with its topic.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct TopicCheck {
    /// Written topics that are missing and were not created: nothing can be delivered
    /// to them.
    pub missing: Vec<(String, String)>,
    /// Findings that do not stop delivery (the input topic not there yet).
    pub warnings: Vec<(String, String)>,
    /// Written topics this check created.
    pub created: Vec<String>,
}

fn admin_client(kafka: &KafkaConfig, bus: &BusContext) -> Result<AdminClient<BusContext>> {
    base_config(kafka)
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka admin client", &e))
}

fn admin_options() -> AdminOptions {
    AdminOptions::new()
        .operation_timeout(Some(ADMIN_TIMEOUT))
        .request_timeout(Some(ADMIN_TIMEOUT))
}

/// Creates missing written topics and the lease topic (when `kafka.create_topics`) and
/// reports the ones still missing. An error means the topics could not be listed at all
/// (no broker answered).
pub async fn ensure_topics(
    kafka: &KafkaConfig,
    lease_topic: Option<&str>,
    bus: &BusContext,
) -> Result<TopicCheck> {
    let admin = admin_client(kafka, bus)?;
    let probe: BaseConsumer<BusContext> = base_config(kafka)
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka metadata client", &e))?;
    let kafka_owned = kafka.clone();
    let existing: Vec<String> = tokio::task::spawn_blocking(move || {
        probe.fetch_metadata(None, ADMIN_TIMEOUT).map(|m| {
            m.topics()
                .iter()
                .map(|t| t.name().to_string())
                .collect::<Vec<_>>()
        })
    })
    .await?
    .map_err(|e| describe_error(bus.scrubber(), "cannot read topic metadata", &e))?;

    let mut found = TopicCheck::default();
    if !existing.contains(&kafka_owned.input_topic) {
        found.warnings.push((
            kafka_owned.input_topic.clone(),
            format!(
                "input topic {} does not exist yet; the service waits for it",
                kafka_owned.input_topic
            ),
        ));
    }
    let options = admin_options();
    for (topic, compacted, partitions) in needed_topics(&kafka_owned, lease_topic) {
        if existing.iter().any(|t| t == topic) {
            continue;
        }
        let missing = |why: String| (topic.to_string(), why);
        if !kafka_owned.create_topics {
            found.missing.push(missing(format!(
                "topic {topic} does not exist and kafka.create_topics is off: create it{}",
                if compacted {
                    " with cleanup.policy=compact"
                } else if partitions == 1 {
                    " with one partition"
                } else {
                    ""
                }
            )));
            continue;
        }
        let mut new = NewTopic::new(
            topic,
            partitions,
            TopicReplication::Fixed(kafka_owned.topic_replication),
        );
        if compacted {
            new = new.set("cleanup.policy", "compact");
        }
        // Dead letters hold refused events, personal data included: they expire.
        let retention_ms = kafka_owned.dead_letter_retention.as_millis().to_string();
        if topic == kafka_owned.dead_letter_topic {
            new = new.set("retention.ms", &retention_ms);
        }
        let outcome = admin.create_topics([&new], &options).await;
        match outcome.map(|mut results| results.pop()) {
            Ok(Some(Ok(_))) => {
                tracing::info!(topic, compacted, "created topic");
                found.created.push(topic.to_string());
            }
            Ok(Some(Err((_, RDKafkaErrorCode::TopicAlreadyExists)))) => {}
            Ok(Some(Err((_, code)))) => found.missing.push(missing(format!(
                "topic {topic} is missing and the broker refused to create it ({code}); create it{} or grant the right",
                if compacted { " compacted" } else { "" }
            ))),
            Ok(None) => found.missing.push(missing(format!(
                "topic {topic} is missing and the broker gave no answer creating it"
            ))),
            Err(e) => found
                .missing
                .push(missing(format!("topic {topic} is missing and cannot be created: {e}"))),
        }
    }
    Ok(found)
}

/// Warnings for the existing list topics (other than `skip`) that are not compacted, or
/// whose setting cannot be read: a serving layer could not rebuild every list from them.
pub async fn compaction_warnings(
    kafka: &KafkaConfig,
    bus: &BusContext,
    skip: &[String],
) -> Result<Vec<(String, String)>> {
    let admin = admin_client(kafka, bus)?;
    let options = admin_options();
    let mut warnings = Vec::new();
    for (topic, compacted) in written_topics(kafka) {
        if !compacted || skip.iter().any(|t| t == topic) {
            continue;
        }
        let described = admin
            .describe_configs([&ResourceSpecifier::Topic(topic)], &options)
            .await;
        let policy = described
            .ok()
            .and_then(|mut r| r.pop())
            .and_then(|r| r.ok())
            .and_then(|r| r.get("cleanup.policy").and_then(|e| e.value.clone()));
        match policy {
            Some(p) if p.contains("compact") => {}
            Some(p) => warnings.push((
                topic.to_string(),
                format!(
                    "topic {topic} has cleanup.policy={p}: readers cannot rebuild every list from it; set cleanup.policy=compact"
                ),
            )),
            None => warnings.push((
                topic.to_string(),
                format!("cannot tell whether topic {topic} is compacted"),
            )),
        }
    }
    Ok(warnings)
}
