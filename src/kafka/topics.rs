//! The topics the service writes: created at start-up when missing (the neighbor topics
//! compacted, so the serving layer can rebuild every list from the topic alone), and
//! checked for compaction when they already exist. A broker that refuses either gets a
//! clear warning, not a stopped service.

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

/// Creates missing written topics (when `kafka.create_topics`) and checks compaction.
pub async fn ensure_topics(kafka: &KafkaConfig, bus: &BusContext) -> Result<()> {
    let admin: AdminClient<BusContext> = base_config(kafka)
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka admin client", &e))?;
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

    let warn = |text: String| tracing::warn!("{text}");
    if !existing.contains(&kafka_owned.input_topic) {
        warn(format!(
            "input topic {} does not exist yet; the service waits for it",
            kafka_owned.input_topic
        ));
    }
    let options = AdminOptions::new().operation_timeout(Some(ADMIN_TIMEOUT));
    let mut created = Vec::new();
    for (topic, compacted) in written_topics(&kafka_owned) {
        if existing.iter().any(|t| t == topic) {
            continue;
        }
        if !kafka_owned.create_topics {
            warn(format!(
                "topic {topic} does not exist and kafka.create_topics is off: create it{}",
                if compacted {
                    " with cleanup.policy=compact"
                } else {
                    ""
                }
            ));
            continue;
        }
        let mut new = NewTopic::new(
            topic,
            kafka_owned.topic_partitions,
            TopicReplication::Fixed(kafka_owned.topic_replication),
        );
        if compacted {
            new = new.set("cleanup.policy", "compact");
        }
        let outcome = admin.create_topics([&new], &options).await;
        match outcome.map(|mut results| results.pop()) {
            Ok(Some(Ok(_))) => {
                tracing::info!(topic, compacted, "created topic");
                created.push(topic.to_string());
            }
            Ok(Some(Err((_, RDKafkaErrorCode::TopicAlreadyExists)))) => {}
            Ok(Some(Err((_, code)))) => warn(format!(
                "the broker refused to create topic {topic} ({code}); create it{} or grant the right",
                if compacted { " compacted" } else { "" }
            )),
            Ok(None) => warn(format!("the broker gave no answer creating topic {topic}")),
            Err(e) => warn(format!("cannot create topic {topic}: {e}")),
        }
    }
    for (topic, compacted) in written_topics(&kafka_owned) {
        if !compacted || created.iter().any(|t| t == topic) {
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
            Some(p) => warn(format!(
                "topic {topic} has cleanup.policy={p}: readers cannot rebuild every list from it; set cleanup.policy=compact"
            )),
            None => warn(format!("cannot tell whether topic {topic} is compacted")),
        }
    }
    Ok(())
}
