//! The consumer of the input topic, polled from the service thread. It takes partitions
//! one of two ways ([`Membership`]): subscribed in the consumer group, whose rebalances
//! share the partitions, or (a sharded instance) every partition by explicit assignment,
//! adding partitions as the topic grows. Either way the store is the truth for
//! positions: an assigned partition starts at the store's next offset (not the group's
//! committed one), and before partitions are revoked the batch in flight is committed and
//! the group offsets are brought up to date. A stored position the partition's log no
//! longer holds is judged by `kafka.position_outside_log` ([`super::outside_log`]) at
//! assignment, and again whenever the client reports a position out of range: the
//! client's own reset never moves a position silently. What the store holds is asked of
//! a [`PositionKeeper`], so this module knows no store.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::Mutex;
use std::time::Duration;

use anyhow::Result;
use rdkafka::consumer::{BaseConsumer, CommitMode, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::error::{KafkaError, RDKafkaErrorCode};
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, Offset, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use super::message::InMessage;
use super::offsets::{partition_list, OffsetsClient};
use super::outside_log::{decide, OutsidePosition, StartDecision};
use crate::config::{KafkaConfig, OutsideLogPolicy, StartPosition};

/// How long the watermarks of one partition may take to read at assignment.
const WATERMARK_WAIT: Duration = Duration::from_secs(5);

/// What the rebalance handler needs from the owner of the positions (the live service).
pub trait PositionKeeper: Send + Sync + 'static {
    /// The next offset stored for each partition of the input topic.
    fn stored_offsets(&self) -> BTreeMap<i32, i64>;
    /// Commits the batch in flight before partitions go away, within `grace`; the next
    /// offsets it stored, if it stored any.
    fn commit_before_revoke(&self, grace: Duration) -> Option<BTreeMap<i32, i64>>;
    /// Whether any partition is assigned now (readiness).
    fn set_consuming(&self, consuming: bool);
    /// The partitions left unconsumed because their stored position is outside the log
    /// and the policy refuses (all of them, each time the set changes).
    fn set_refused(&self, refused: &BTreeMap<i32, OutsidePosition>);
    /// A partition whose stored position was outside the log resumes at `at` by policy,
    /// never applying `skipped` offsets.
    fn note_resumed(&self, outside: &OutsidePosition, at: i64, skipped: u64);
}

/// A consume error as the loop sees it: the text, scrubbed of secrets, and whether the
/// client found a fetch position outside the partition's log.
#[derive(Debug, Clone)]
pub struct ConsumeError {
    /// The client's error, scrubbed.
    pub text: String,
    /// The position of some assigned partition is outside its log
    /// (`auto.offset.reset=error`): [`GroupConsumer::recheck_positions`] finds which.
    pub position_out_of_range: bool,
}

/// Consumer context: the bus context plus the position keeper.
pub struct GroupContext<K: PositionKeeper> {
    bus: BusContext,
    keeper: K,
    topic: String,
    start: StartPosition,
    revoke_grace: Duration,
    /// Reads watermarks (a client of its own: the consumer is inside its callback).
    watermarks: OffsetsClient,
    policy: OutsideLogPolicy,
    /// Partitions assigned to this member but not consumed, by policy.
    refused: Mutex<BTreeMap<i32, OutsidePosition>>,
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
    /// Sets each partition of `tpl` to start where [`start_offset`] says, judging a
    /// stored position against the partition's log first; returns the list to assign
    /// (without the partitions refused) and the store's positions it read.
    fn seed_offsets(&self, tpl: &TopicPartitionList) -> (TopicPartitionList, BTreeMap<i32, i64>) {
        let stored = self.keeper.stored_offsets();
        let mut described = Vec::new();
        let mut admitted = TopicPartitionList::new();
        let mut refused_now = false;
        for element in tpl.elements() {
            let (topic, partition) = (element.topic(), element.partition());
            let mut offset = start_offset(&stored, partition, self.start);
            if let Offset::Offset(next) = offset {
                match self.judge(partition, next) {
                    StartDecision::Inside(at) | StartDecision::Resumed { at, .. } => {
                        offset = Offset::Offset(at)
                    }
                    StartDecision::Refused(outside) => {
                        described.push(format!("{partition}@refused"));
                        self.refused
                            .lock()
                            .expect("refused lock")
                            .insert(partition, outside);
                        refused_now = true;
                        continue;
                    }
                }
            }
            described.push(format!("{partition}@{offset:?}"));
            // Adding a partition to a fresh list cannot fail.
            let _ = admitted.add_partition_offset(topic, partition, offset);
        }
        if refused_now {
            self.keeper
                .set_refused(&self.refused.lock().expect("refused lock"));
        }
        tracing::info!(topic = %self.topic, partitions = %described.join(" "), "partitions assigned; starting at the store's positions");
        (admitted, stored)
    }

    /// Judges a position against the partition's watermarks under the policy, telling
    /// the keeper of a resumption. A position whose watermarks cannot be read is taken as
    /// inside: the client's out-of-range error is the backstop.
    fn judge(&self, partition: i32, next: i64) -> StartDecision {
        let Ok(marks) = self.watermarks.watermarks(&self.topic, partition, WATERMARK_WAIT) else {
            return StartDecision::Inside(next);
        };
        let decision = decide(partition, next, marks, self.policy);
        if let StartDecision::Resumed { at, skipped, outside } = &decision {
            self.keeper.note_resumed(outside, *at, *skipped);
        }
        decision
    }

    /// Forgets the refusals of partitions this member no longer holds.
    fn forget_refused(&self, revoked: &TopicPartitionList) {
        let mut refused = self.refused.lock().expect("refused lock");
        let before = refused.len();
        for element in revoked.elements() {
            refused.remove(&element.partition());
        }
        if refused.len() != before {
            self.keeper.set_refused(&refused);
        }
    }

    fn assign(&self, consumer: &BaseConsumer<Self>, tpl: &TopicPartitionList) {
        let (admitted, stored) = self.seed_offsets(tpl);
        let result = match consumer.rebalance_protocol() {
            RebalanceProtocol::Cooperative => consumer.incremental_assign(&admitted),
            _ => consumer.assign(&admitted),
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
            .filter(|(p, _)| admitted.elements().iter().any(|e| e.partition() == *p))
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
        self.forget_refused(tpl);
        let result = match consumer.rebalance_protocol() {
            RebalanceProtocol::Cooperative => consumer.incremental_unassign(&held_of(consumer, tpl)),
            _ => consumer.unassign(),
        };
        if let Err(e) = result {
            tracing::warn!(error = %e, "unassign failed");
        }
        let still_assigned = consumer.assignment().map(|a| a.count() > 0).unwrap_or(false);
        self.keeper.set_consuming(still_assigned);
    }
}

/// The partitions of `tpl` the consumer really has assigned (a refused partition was
/// never assigned, so it is not unassigned either).
fn held_of<C: ConsumerContext>(consumer: &BaseConsumer<C>, tpl: &TopicPartitionList) -> TopicPartitionList {
    let assigned = consumer.assignment().unwrap_or_default();
    let mut held = TopicPartitionList::new();
    for e in tpl.elements() {
        if assigned.find_partition(e.topic(), e.partition()).is_some() {
            held.add_partition(e.topic(), e.partition());
        }
    }
    held
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
        // A fetch position outside the log is an error for the loop to judge, never a
        // silent jump (docs/design.md, "Positions outside the log").
        config.set("auto.offset.reset", "error");
        let scrubber = bus.scrubber().clone();
        let context = GroupContext {
            watermarks: OffsetsClient::new(kafka, &bus)?,
            bus,
            keeper,
            topic: kafka.input_topic.clone(),
            start: kafka.start,
            revoke_grace,
            policy: kafka.position_outside_log,
            refused: Mutex::new(BTreeMap::new()),
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
        let (admitted, _) = context.seed_offsets(&partition_list(&self.topic, &new));
        match self.consumer.incremental_assign(&admitted) {
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
    pub fn poll(&self, timeout: Duration) -> Option<Result<InMessage, ConsumeError>> {
        self.consumer.poll(timeout).map(|received| {
            received
                .map(|m| InMessage::copied_from(&m))
                .map_err(|e| ConsumeError {
                    text: self.consumer.context().bus.scrubber().scrub(&e.to_string()),
                    position_out_of_range: e.rdkafka_error_code() == Some(RDKafkaErrorCode::AutoOffsetReset),
                })
        })
    }

    /// After the client found a fetch position outside a partition's log: judges every
    /// assigned partition's position (the client's, or the store's before the first
    /// message) against its watermarks; a refused partition is paused, a resumed one
    /// moved to where the policy says, one found inside fetched again from there.
    pub fn recheck_positions(&self) {
        let context = self.consumer.context();
        let stored = context.keeper.stored_offsets();
        let Ok(positions) = self.consumer.position() else {
            return;
        };
        let mut refused_now = false;
        for element in positions.elements() {
            let partition = element.partition();
            if context
                .refused
                .lock()
                .expect("refused lock")
                .contains_key(&partition)
            {
                continue;
            }
            let next = match element.offset() {
                Offset::Offset(at) => at,
                _ => match stored.get(&partition) {
                    Some(&at) => at,
                    None => continue,
                },
            };
            match context.judge(partition, next) {
                StartDecision::Inside(at) | StartDecision::Resumed { at, .. } => {
                    if let Err(e) =
                        self.consumer
                            .seek(&self.topic, partition, Offset::Offset(at), WATERMARK_WAIT)
                    {
                        tracing::warn!(partition, error = %e, "cannot move the fetch position; the client reports again");
                    }
                }
                StartDecision::Refused(outside) => {
                    let single = partition_list(&self.topic, &BTreeMap::from([(partition, next)]));
                    if let Err(e) = self.consumer.pause(&single) {
                        tracing::warn!(partition, error = %e, "cannot pause the partition");
                    }
                    context
                        .refused
                        .lock()
                        .expect("refused lock")
                        .insert(partition, outside);
                    refused_now = true;
                }
            }
        }
        if refused_now {
            context
                .keeper
                .set_refused(&context.refused.lock().expect("refused lock"));
        }
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
