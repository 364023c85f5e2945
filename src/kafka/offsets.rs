//! Partitions and offsets of a topic, asked of the broker by a client that joins no group:
//! the partitions, the low and high watermarks, and the first offset at or after a time.
//! Used to plan a topic backfill, to resolve a live start position, and by the probe that
//! keeps the lag gauge current.

use std::collections::BTreeMap;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::{Offset, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use crate::config::KafkaConfig;
use crate::event::UnixMillis;

/// How long each metadata or offset request may take.
pub const REQUEST_TIMEOUT: Duration = Duration::from_secs(15);

/// A metadata and offset client (no group).
pub struct OffsetsClient {
    client: BaseConsumer<BusContext>,
}

impl OffsetsClient {
    /// Connects to the configured cluster.
    pub fn new(kafka: &KafkaConfig, bus: &BusContext) -> Result<OffsetsClient> {
        let client = base_config(kafka)
            .create_with_context(bus.clone())
            .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka offsets client", &e))?;
        Ok(OffsetsClient { client })
    }

    /// The partitions of a topic, from the broker.
    pub fn partitions(&self, topic: &str) -> Result<Vec<i32>> {
        let metadata = self
            .client
            .fetch_metadata(Some(topic), REQUEST_TIMEOUT)
            .with_context(|| format!("cannot read the metadata of topic {topic}"))?;
        let partitions: Vec<i32> = metadata
            .topics()
            .iter()
            .filter(|t| t.name() == topic && t.error().is_none())
            .flat_map(|t| t.partitions().iter().map(|p| p.id()))
            .collect();
        if partitions.is_empty() {
            bail!("topic {topic} does not exist or has no partitions");
        }
        Ok(partitions)
    }

    /// The (low, high) watermarks of one partition: its first retained offset and the
    /// offset the next message will get.
    pub fn watermarks(&self, topic: &str, partition: i32, timeout: Duration) -> Result<(i64, i64)> {
        self.client
            .fetch_watermarks(topic, partition, timeout)
            .with_context(|| format!("cannot read the offsets of {topic} partition {partition}"))
    }

    /// The high watermark of every partition that holds records; fails when any
    /// partition does not answer.
    pub fn end_offsets(&self, topic: &str) -> Result<BTreeMap<i32, i64>> {
        let mut ends = BTreeMap::new();
        for p in self.partitions(topic)? {
            let (low, high) = self.watermarks(topic, p, REQUEST_TIMEOUT)?;
            if low < high {
                ends.insert(p, high);
            }
        }
        Ok(ends)
    }

    /// The high watermark of every partition that answered within `timeout`.
    pub fn high_watermarks(&self, topic: &str, timeout: Duration) -> Result<BTreeMap<i32, i64>> {
        Ok(self
            .partitions(topic)?
            .into_iter()
            .filter_map(|p| self.watermarks(topic, p, timeout).ok().map(|(_, high)| (p, high)))
            .collect())
    }

    /// For every partition, the offset of the first message whose timestamp is at or
    /// after `at`, or the partition's end when there is none.
    pub fn offsets_at_time(&self, topic: &str, at: UnixMillis) -> Result<BTreeMap<i32, i64>> {
        let mut query = TopicPartitionList::new();
        for p in self.partitions(topic)? {
            query.add_partition_offset(topic, p, Offset::Offset(at.0))?;
        }
        let found = self
            .client
            .offsets_for_times(query, REQUEST_TIMEOUT)
            .with_context(|| format!("cannot look up offsets by time on {topic}"))?;
        let mut out = BTreeMap::new();
        for element in found.elements() {
            let p = element.partition();
            let next = match element.offset() {
                Offset::Offset(o) => o,
                _ => self.watermarks(topic, p, REQUEST_TIMEOUT)?.1,
            };
            out.insert(p, next);
        }
        Ok(out)
    }
}

/// The offsets as a partition list of one topic.
pub fn partition_list(topic: &str, offsets: &BTreeMap<i32, i64>) -> TopicPartitionList {
    let mut tpl = TopicPartitionList::new();
    for (&partition, &next) in offsets {
        tpl.add_partition_offset(topic, partition, Offset::Offset(next))
            .expect("a fresh list accepts any offset");
    }
    tpl
}
