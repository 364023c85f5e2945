//! The group consumer of the input topic, polled from the service thread. Its rebalance
//! handler makes the store the truth for positions: an assigned partition starts at the
//! store's next offset (not the group's committed one), and before partitions are revoked
//! the batch in flight is committed and the group offsets are brought up to date. What
//! the store holds is asked of a [`PositionKeeper`], so this module knows no store.

use std::collections::BTreeMap;
use std::time::Duration;

use anyhow::Result;
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::error::KafkaError;
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use super::message::InMessage;
use super::offsets::partition_list;
use crate::config::{KafkaConfig, StartPosition};

/// What the rebalance handler needs from the owner of the positions (the live service).
pub trait PositionKeeper: Send + Sync + 'static {
    /// The next offset stored for each partition of the input topic.
    fn stored_offsets(&self) -> BTreeMap<i32, i64>;
    /// Commits the batch in flight before partitions go away, within `grace`; the next
    /// offsets it stored, if it stored any.
    fn commit_before_revoke(&self, grace: Duration) -> Option<BTreeMap<i32, i64>>;
    /// Whether any partition is assigned now (readiness).
    fn set_consuming(&self, consuming: bool);
}

/// Consumer context: the bus context plus the position keeper.
pub struct GroupContext<K: PositionKeeper> {
    bus: BusContext,
    keeper: K,
    topic: String,
    start: StartPosition,
    revoke_grace: Duration,
}

impl<K: PositionKeeper> ClientContext for GroupContext<K> {
    fn log(&self, level: rdkafka::config::RDKafkaLogLevel, fac: &str, message: &str) {
        self.bus.log(level, fac, message);
    }

    fn error(&self, error: KafkaError, reason: &str) {
        self.bus.error(error, reason);
    }
}

impl<K: PositionKeeper> GroupContext<K> {
    fn assign(&self, consumer: &BaseConsumer<Self>, tpl: &mut TopicPartitionList) {
        let stored = self.keeper.stored_offsets();
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
            Ok(()) => self.keeper.set_consuming(true),
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
            if let Err(e) = consumer.commit(&partition_list(&self.topic, &known), CommitMode::Async) {
                tracing::debug!(error = %e, "group offsets not committed at assignment");
            }
        }
    }

    fn revoke(&self, consumer: &BaseConsumer<Self>, tpl: &TopicPartitionList) {
        if let Some(offsets) = self.keeper.commit_before_revoke(self.revoke_grace) {
            let list = partition_list(&self.topic, &offsets);
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
        self.keeper.set_consuming(still_assigned);
    }
}

impl<K: PositionKeeper> ConsumerContext for GroupContext<K> {
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
/// the truth; group offsets are committed after each store write for external tools.
pub struct GroupConsumer<K: PositionKeeper> {
    consumer: BaseConsumer<GroupContext<K>>,
    topic: String,
}

impl<K: PositionKeeper> GroupConsumer<K> {
    /// Joins the group and subscribes to the input topic.
    pub fn subscribe(
        kafka: &KafkaConfig,
        bus: BusContext,
        keeper: K,
        revoke_grace: Duration,
    ) -> Result<Self> {
        let mut config = base_config(kafka);
        config.set("group.id", &kafka.group);
        config.set("enable.auto.commit", "false");
        config.set("enable.auto.offset.store", "false");
        config.set("enable.partition.eof", "false");
        let scrubber = bus.scrubber().clone();
        let context = GroupContext {
            bus,
            keeper,
            topic: kafka.input_topic.clone(),
            start: kafka.start,
            revoke_grace,
        };
        let consumer: BaseConsumer<GroupContext<K>> = config
            .create_with_context(context)
            .map_err(|e| describe_error(&scrubber, "cannot create the Kafka consumer", &e))?;
        consumer
            .subscribe(&[&kafka.input_topic])
            .map_err(|e| describe_error(&scrubber, "cannot subscribe to the input topic", &e))?;
        Ok(GroupConsumer {
            consumer,
            topic: kafka.input_topic.clone(),
        })
    }

    /// The next message within `timeout` (rebalance callbacks run inside this call, on
    /// the caller's thread); `None` when none came; an error's text is scrubbed.
    pub fn poll(&self, timeout: Duration) -> Option<Result<InMessage, String>> {
        self.consumer.poll(timeout).map(|received| {
            received
                .map(|m| InMessage::copied_from(&m))
                .map_err(|e| self.consumer.context().bus.scrubber().scrub(&e.to_string()))
        })
    }

    /// Commits group offsets after a store write (asynchronously: they only inform
    /// external lag tools; the store holds the truth).
    pub fn commit_positions(&self, offsets: &BTreeMap<i32, i64>) {
        if let Err(e) = self
            .consumer
            .commit(&partition_list(&self.topic, offsets), CommitMode::Async)
        {
            tracing::debug!(error = %e, "group offset commit not sent");
        }
    }
}
