//! The consumer of the input topic, polled from the service thread. It takes partitions
//! one of two ways ([`Membership`]): subscribed in the consumer group, whose rebalances
//! share the partitions, or (a sharded instance) every partition by explicit assignment,
//! adding partitions as the topic grows. Either way the store is the truth for
//! positions: an assigned partition starts at the store's next offset (not the group's
//! committed one), and before partitions are revoked the batch in flight is committed and
//! the group offsets are brought up to date. What the store holds is asked of a
//! [`PositionKeeper`], so this module knows no store.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::Mutex;
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

/// Where a partition's consumption starts: the store's next offset when it has one;
/// otherwise, for a store that already consumed other partitions of the topic (so the
/// partition is new to it: the topic grew), the partition's first offset, so no event of
/// it is skipped; otherwise, for a store that never consumed the topic, `kafka.start`.
fn start_offset(stored: &BTreeMap<i32, i64>, partition: i32, start: StartPosition) -> Offset {
    match stored.get(&partition) {
        Some(&next) => Offset::Offset(next),
        None if !stored.is_empty() => Offset::Beginning,
        None => match start {
            StartPosition::Earliest => Offset::Beginning,
            StartPosition::Latest => Offset::End,
        },
    }
}

impl<K: PositionKeeper> GroupContext<K> {
    /// Sets each partition of `tpl` to start where [`start_offset`] says; returns the
    /// store's positions it read.
    fn seed_offsets(&self, tpl: &mut TopicPartitionList) -> BTreeMap<i32, i64> {
        let stored = self.keeper.stored_offsets();
        let mut described = Vec::new();
        let partitions: Vec<(String, i32)> = tpl
            .elements()
            .iter()
            .map(|e| (e.topic().to_string(), e.partition()))
            .collect();
        for (topic, partition) in partitions {
            let offset = start_offset(&stored, partition, self.start);
            described.push(format!("{partition}@{offset:?}"));
            // Setting an offset on a partition the list holds cannot fail.
            let _ = tpl.set_partition_offset(&topic, partition, offset);
        }
        tracing::info!(topic = %self.topic, partitions = %described.join(" "), "partitions assigned; starting at the store's positions");
        stored
    }

    fn assign(&self, consumer: &BaseConsumer<Self>, tpl: &mut TopicPartitionList) {
        let stored = self.seed_offsets(tpl);
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

/// How the consumer takes partitions of the input topic.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Membership {
    /// Subscribed in `kafka.group`: the group's rebalances share the partitions among
    /// its members (one instance, or one that takes over from another).
    Subscribed,
    /// Every partition, by explicit assignment, as each item shard reads every event;
    /// `offsets_group` only holds the committed offsets that lag tools read.
    EveryPartition {
        /// The group id the offsets are committed under.
        offsets_group: String,
    },
}

/// The consumer of the input topic. Auto-commit is off: the store is the truth; group
/// offsets are committed after each store write for external tools.
pub struct GroupConsumer<K: PositionKeeper> {
    consumer: BaseConsumer<GroupContext<K>>,
    topic: String,
    /// With [`Membership::EveryPartition`]: the partitions assigned so far; `None` when
    /// subscribed (the group assigns).
    assigned: Option<Mutex<BTreeSet<i32>>>,
}

impl<K: PositionKeeper> GroupConsumer<K> {
    /// Creates the consumer and, when subscribed, joins the group; with
    /// [`Membership::EveryPartition`] nothing is consumed until
    /// [`GroupConsumer::assign_new_partitions`] names the partitions.
    pub fn join(
        kafka: &KafkaConfig,
        bus: BusContext,
        keeper: K,
        revoke_grace: Duration,
        membership: Membership,
    ) -> Result<Self> {
        let mut config = base_config(kafka);
        let group = match &membership {
            Membership::Subscribed => kafka.group.as_str(),
            Membership::EveryPartition { offsets_group } => offsets_group.as_str(),
        };
        config.set("group.id", group);
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
        let assigned = match membership {
            Membership::Subscribed => {
                consumer
                    .subscribe(&[&kafka.input_topic])
                    .map_err(|e| describe_error(&scrubber, "cannot subscribe to the input topic", &e))?;
                None
            }
            Membership::EveryPartition { .. } => Some(Mutex::new(BTreeSet::new())),
        };
        Ok(GroupConsumer {
            consumer,
            topic: kafka.input_topic.clone(),
            assigned,
        })
    }

    /// With [`Membership::EveryPartition`]: assigns those of `partitions` (the input
    /// topic's, as the broker last listed them) not assigned yet, each starting where
    /// the store says (a partition the topic gained later starts at its beginning).
    /// Kafka never removes partitions, so nothing is unassigned. Subscribed: nothing.
    pub fn assign_new_partitions(&self, partitions: &[i32]) {
        let Some(assigned) = &self.assigned else {
            return;
        };
        let mut assigned = assigned.lock().expect("assignment lock");
        let new: BTreeMap<i32, i64> = partitions
            .iter()
            .filter(|p| !assigned.contains(p))
            .map(|&p| (p, 0))
            .collect();
        if new.is_empty() {
            return;
        }
        let context = self.consumer.context();
        let mut tpl = partition_list(&self.topic, &new);
        context.seed_offsets(&mut tpl);
        match self.consumer.incremental_assign(&tpl) {
            Ok(()) => {
                assigned.extend(new.keys());
                context.keeper.set_consuming(true);
            }
            Err(e) => {
                tracing::error!(error = %context.bus.scrubber().scrub(&e.to_string()), "cannot assign the new partitions; trying again at the next listing")
            }
        }
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_partition_starts_at_the_store_then_at_its_beginning_once_the_topic_was_consumed() {
        let never = BTreeMap::new();
        assert_eq!(start_offset(&never, 0, StartPosition::Latest), Offset::End);
        assert_eq!(
            start_offset(&never, 0, StartPosition::Earliest),
            Offset::Beginning
        );
        let consumed = BTreeMap::from([(0, 41), (1, 7)]);
        assert_eq!(
            start_offset(&consumed, 1, StartPosition::Latest),
            Offset::Offset(7)
        );
        // Partition 2 came after the store consumed 0 and 1: all of it is new.
        assert_eq!(
            start_offset(&consumed, 2, StartPosition::Latest),
            Offset::Beginning
        );
    }
}
