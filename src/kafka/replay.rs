//! Reading a topic from given offsets to the end it had when reading began, by explicit
//! assignment (no group membership): what `backfill --from-topic` replays.

use std::collections::BTreeMap;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::{Offset, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use super::message::InMessage;
use super::offsets::{OffsetsClient, REQUEST_TIMEOUT};
use super::outside_log::{decide, StartDecision};
use crate::config::{KafkaConfig, OutsideLogPolicy};

/// How long one poll waits for a message before the positions are checked.
const POLL_WAIT: Duration = Duration::from_millis(500);

/// Where each partition of a replay starts and ends.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ReplayPlan {
    /// Partition → (first offset to read, offset to stop before).
    pub ranges: BTreeMap<i32, (i64, i64)>,
    /// Offsets that will never be applied because a stored position was outside its
    /// partition's log and the policy resumed elsewhere.
    pub skipped: u64,
}

impl ReplayPlan {
    /// Every partition of `topic` from its stored next offset (or its first retained
    /// one, for a partition the store never read) to its current end. A stored position
    /// outside the partition's log is judged by `policy`, as the live service judges it
    /// (docs/design.md, "Positions outside the log"): refused, the plan fails naming it.
    pub fn to_current_end(
        client: &OffsetsClient,
        topic: &str,
        stored: &BTreeMap<i32, i64>,
        policy: OutsideLogPolicy,
    ) -> Result<ReplayPlan> {
        let mut ranges = BTreeMap::new();
        let mut skipped = 0;
        for p in client.partitions(topic)? {
            let (low, high) = client.watermarks(topic, p, REQUEST_TIMEOUT)?;
            let start = match stored.get(&p) {
                None => low,
                Some(&next) => match decide(p, next, (low, high), policy) {
                    StartDecision::Inside(at) => at,
                    StartDecision::Refused(outside) => bail!(
                        "{topic} {outside}. Nothing was applied. To accept the loss, run again with \
                         kafka.position_outside_log = \"resume_at_log_start\" or \"resume_at_log_end\""
                    ),
                    StartDecision::Resumed {
                        at,
                        skipped: n,
                        outside,
                    } => {
                        tracing::warn!(
                            partition = p,
                            resumed_at = at,
                            skipped = n,
                            "{outside}; resuming by kafka.position_outside_log"
                        );
                        skipped += n;
                        at
                    }
                },
            };
            ranges.insert(p, (start, high));
        }
        Ok(ReplayPlan { ranges, skipped })
    }

    /// Messages the replay will read (at most; compaction may have removed some).
    pub fn messages(&self) -> u64 {
        self.ranges.values().map(|(s, e)| (e - s).max(0) as u64).sum()
    }
}

/// A topic being replayed to the end of its plan.
pub struct TopicReplay {
    consumer: BaseConsumer<BusContext>,
    topic: String,
    /// Partitions not yet read to their end → their end offset.
    remaining: BTreeMap<i32, i64>,
}

impl TopicReplay {
    /// Assigns every partition of the plan that has something to read.
    pub fn start(
        kafka: &KafkaConfig,
        bus: &BusContext,
        topic: &str,
        plan: &ReplayPlan,
    ) -> Result<TopicReplay> {
        let mut config = base_config(kafka);
        config.set("group.id", format!("{}-backfill", kafka.group));
        config.set("enable.auto.commit", "false");
        // The plan judged every start; a position that leaves the log while reading is
        // an error, never a silent jump.
        config.set("auto.offset.reset", "error");
        let consumer: BaseConsumer<BusContext> = config
            .create_with_context(bus.clone())
            .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka consumer", &e))?;
        let mut assignment = TopicPartitionList::new();
        let mut remaining = BTreeMap::new();
        for (&p, &(start, end)) in &plan.ranges {
            if start < end {
                assignment.add_partition_offset(topic, p, Offset::Offset(start))?;
                remaining.insert(p, end);
            }
        }
        consumer
            .assign(&assignment)
            .with_context(|| format!("cannot read {topic}"))?;
        Ok(TopicReplay {
            consumer,
            topic: topic.to_string(),
            remaining,
        })
    }

    /// Whether every partition was read to its end.
    pub fn finished(&self) -> bool {
        self.remaining.is_empty()
    }

    /// The next message inside the plan; `None` when none came within a poll (or the
    /// replay is finished).
    pub fn next_message(&mut self) -> Result<Option<InMessage>> {
        if self.finished() {
            return Ok(None);
        }
        let Some(received) = self.consumer.poll(POLL_WAIT) else {
            // Compaction or transaction markers can leave a partition's last offsets
            // without a message: the position, not the last message, says it is done.
            for element in self.consumer.position()?.elements() {
                if let (Offset::Offset(at), Some(&end)) =
                    (element.offset(), self.remaining.get(&element.partition()))
                {
                    if at >= end {
                        self.remaining.remove(&element.partition());
                    }
                }
            }
            return Ok(None);
        };
        let message =
            InMessage::copied_from(&received.with_context(|| format!("cannot read {}", self.topic))?);
        let end = self.remaining.get(&message.partition).copied();
        if end.is_some_and(|end| message.offset + 1 >= end) {
            self.remaining.remove(&message.partition);
        }
        Ok(end.filter(|&end| message.offset < end).map(|_| message))
    }
}
