//! The group consumer of the input topic. Its rebalance handler makes the store the
//! truth for positions: an assigned partition starts at the store's next offset (not the
//! group's committed one), and before partitions are revoked the batch in flight is
//! committed and the group offsets are brought up to date.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use anyhow::Result;
use rdkafka::consumer::{
    BaseConsumer, CommitMode, Consumer, ConsumerContext, RebalanceProtocol, StreamConsumer,
};
use rdkafka::error::KafkaError;
use rdkafka::message::{BorrowedMessage, Headers, Message};
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::batch::InMessage;
use super::core::{Core, Flushed};
use crate::config::{KafkaConfig, StartPosition};
use crate::health::Health;
use crate::kafka::client::{base_config, describe_error, BusContext};

/// Consumer context: the bus context plus the state the rebalance handler needs.
pub struct LiveContext {
    bus: BusContext,
    core: Arc<Mutex<Core>>,
    health: Arc<Health>,
    topic: String,
    start: StartPosition,
    revoke_grace: Duration,
}

impl ClientContext for LiveContext {
    fn log(&self, level: rdkafka::config::RDKafkaLogLevel, fac: &str, message: &str) {
        self.bus.log(level, fac, message);
    }

    fn error(&self, error: KafkaError, reason: &str) {
        self.bus.error(error, reason);
    }
}

/// The offsets as a partition list of one topic.
pub fn offsets_list(topic: &str, offsets: &BTreeMap<i32, i64>) -> TopicPartitionList {
    let mut tpl = TopicPartitionList::new();
    for (&partition, &next) in offsets {
        tpl.add_partition_offset(topic, partition, Offset::Offset(next))
            .expect("a fresh list accepts any offset");
    }
    tpl
}

impl LiveContext {
    fn assign(&self, consumer: &BaseConsumer<Self>, tpl: &mut TopicPartitionList) {
        let stored = self.core.lock().expect("core lock").stored_offsets();
        let fallback = match self.start {
            StartPosition::Earliest => Offset::Beginning,
            StartPosition::Latest => Offset::End,
        };
        let mut described = Vec::new();
        let partitions: Vec<(String, i32)> = tpl
            .elements()
            .iter()
            .map(|e| (e.topic().to_string(), e.partition()))
            .collect();
        for (topic, partition) in partitions {
            let offset = stored
                .get(&partition)
                .map_or(fallback, |&next| Offset::Offset(next));
            described.push(format!("{partition}@{offset:?}"));
            // Setting an offset on a partition the list holds cannot fail.
            let _ = tpl.set_partition_offset(&topic, partition, offset);
        }
        tracing::info!(topic = %self.topic, partitions = %described.join(" "), "partitions assigned; starting at the store's positions");
        let result = match consumer.rebalance_protocol() {
            RebalanceProtocol::Cooperative => consumer.incremental_assign(tpl),
            _ => consumer.assign(tpl),
        };
        match result {
            Ok(()) => self.health.set_consuming(true),
            Err(e) => {
                tracing::error!(error = %self.bus.scrubber().scrub(&e.to_string()), "cannot take the assignment")
            }
        }
        // Tell the group where the store is, so external lag tools are right even for a
        // partition that stays idle (or a group that never committed before).
        let known: BTreeMap<i32, i64> = stored
            .into_iter()
            .filter(|(p, _)| tpl.elements().iter().any(|e| e.partition() == *p))
            .collect();
        if !known.is_empty() {
            if let Err(e) = consumer.commit(&offsets_list(&self.topic, &known), CommitMode::Async) {
                tracing::debug!(error = %e, "group offsets not committed at assignment");
            }
        }
    }

    fn revoke(&self, consumer: &BaseConsumer<Self>, tpl: &TopicPartitionList) {
        let flushed = self
            .core
            .lock()
            .expect("core lock")
            .flush(Some(Instant::now() + self.revoke_grace));
        if let Flushed::Committed(offsets) = flushed {
            let list = offsets_list(&self.topic, &offsets);
            if let Err(e) = consumer.commit(&list, CommitMode::Sync) {
                tracing::warn!(error = %e, "group offsets not committed at revocation (the store holds the positions)");
            }
        }
        tracing::info!(
            partitions = tpl.count(),
            "partitions revoked after committing the batch in flight"
        );
        let result = match consumer.rebalance_protocol() {
            RebalanceProtocol::Cooperative => consumer.incremental_unassign(tpl),
            _ => consumer.unassign(),
        };
        if let Err(e) = result {
            tracing::warn!(error = %e, "unassign failed");
        }
        let still_assigned = consumer.assignment().map(|a| a.count() > 0).unwrap_or(false);
        self.health.set_consuming(still_assigned);
    }
}

impl ConsumerContext for LiveContext {
    fn rebalance(&self, consumer: &BaseConsumer<Self>, err: RDKafkaRespErr, tpl: &mut TopicPartitionList) {
        match err {
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS => self.assign(consumer, tpl),
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS => self.revoke(consumer, tpl),
            other => {
                tracing::warn!(error = ?other, "rebalance error; dropping the assignment");
                self.revoke(consumer, tpl);
            }
        }
    }
}

/// The group consumer, subscribed to the input topic. Auto-commit is off: the store is
/// the truth, group offsets are committed after each store write for external tools.
pub fn subscribe(
    kafka: &KafkaConfig,
    bus: BusContext,
    core: Arc<Mutex<Core>>,
    health: Arc<Health>,
    revoke_grace: Duration,
) -> Result<StreamConsumer<LiveContext>> {
    let mut config = base_config(kafka);
    config.set("group.id", &kafka.group);
    config.set("enable.auto.commit", "false");
    config.set("enable.auto.offset.store", "false");
    config.set("enable.partition.eof", "false");
    let scrubber = bus.scrubber().clone();
    let context = LiveContext {
        bus,
        core,
        health,
        topic: kafka.input_topic.clone(),
        start: kafka.start,
        revoke_grace,
    };
    let consumer: StreamConsumer<LiveContext> = config
        .create_with_context(context)
        .map_err(|e| describe_error(&scrubber, "cannot create the Kafka consumer", &e))?;
    consumer
        .subscribe(&[&kafka.input_topic])
        .map_err(|e| describe_error(&scrubber, "cannot subscribe to the input topic", &e))?;
    Ok(consumer)
}

/// Copies a consumed message out of the client's buffer.
pub fn copy_message(m: &BorrowedMessage<'_>) -> InMessage {
    let headers = m
        .headers()
        .map(|h| {
            h.iter()
                .map(|header| (header.key.to_string(), header.value.unwrap_or_default().to_vec()))
                .collect()
        })
        .unwrap_or_default();
    InMessage {
        partition: m.partition(),
        offset: m.offset(),
        key: m.key().map(<[u8]>::to_vec),
        value: m.payload().map(<[u8]>::to_vec),
        headers,
        timestamp_ms: m.timestamp().to_millis(),
    }
}
