//! Handover from history to the live stream: a store seeded by a file backfill is given
//! the input topic's positions to start from — the first offset at or after a time, or
//! explicit offsets — so that history and stream neither overlap nor leave a gap.

use std::collections::BTreeMap;
use std::time::Duration;

use anyhow::{bail, Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::{Offset, TopicPartitionList};

use crate::config::{Config, KafkaConfig};
use crate::engine::EngineSettings;
use crate::kafka::client::{base_config, describe_error, BusContext};
use crate::pipeline::apply_and_commit;
use crate::store::Store;

/// How long each metadata or offset request may take.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(15);

/// Where the live stream should begin.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum StartRequest {
    /// The first message of each partition whose record timestamp is at or after this
    /// time (Unix milliseconds).
    AtTime(i64),
    /// These next offsets, by partition; unlisted partitions start at their beginning.
    Offsets(BTreeMap<i32, i64>),
}

/// Parses `--start-offsets 0:1200,1:1187,2:1302`.
pub fn parse_offsets(text: &str) -> Result<BTreeMap<i32, i64>> {
    let mut out = BTreeMap::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (p, o) = part
            .split_once(':')
            .with_context(|| format!("--start-offsets: \"{part}\" is not PARTITION:OFFSET"))?;
        let partition: i32 = p
            .parse()
            .with_context(|| format!("--start-offsets: partition \"{p}\" is not a number"))?;
        let offset: i64 = o
            .parse()
            .with_context(|| format!("--start-offsets: offset \"{o}\" is not a number"))?;
        if partition < 0 || offset < 0 {
            bail!("--start-offsets: \"{part}\" has a negative partition or offset");
        }
        if out.insert(partition, offset).is_some() {
            bail!("--start-offsets: partition {partition} is given twice");
        }
    }
    if out.is_empty() {
        bail!("--start-offsets: no PARTITION:OFFSET given");
    }
    Ok(out)
}

/// The partitions of a topic, from the broker.
pub fn partitions_of(client: &BaseConsumer<BusContext>, topic: &str) -> Result<Vec<i32>> {
    let metadata = client
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

/// A metadata and offset client (no group).
pub fn offsets_client(kafka: &KafkaConfig, bus: &BusContext) -> Result<BaseConsumer<BusContext>> {
    base_config(kafka)
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka offsets client", &e))
}

/// Resolves a start request to a next offset for every partition of the input topic.
pub fn resolve(kafka: &KafkaConfig, bus: &BusContext, request: &StartRequest) -> Result<BTreeMap<i32, i64>> {
    let client = offsets_client(kafka, bus)?;
    let topic = &kafka.input_topic;
    let partitions = partitions_of(&client, topic)?;
    let mut out = BTreeMap::new();
    match request {
        StartRequest::Offsets(given) => {
            for p in given.keys() {
                if !partitions.contains(p) {
                    bail!("--start-offsets: topic {topic} has no partition {p}");
                }
            }
            for &p in &partitions {
                let (low, _) = client.fetch_watermarks(topic, p, REQUEST_TIMEOUT)?;
                out.insert(p, given.get(&p).copied().unwrap_or(low));
            }
        }
        StartRequest::AtTime(ms) => {
            let mut query = TopicPartitionList::new();
            for &p in &partitions {
                query.add_partition_offset(topic, p, Offset::Offset(*ms))?;
            }
            let found = client
                .offsets_for_times(query, REQUEST_TIMEOUT)
                .with_context(|| format!("cannot look up offsets by time on {topic}"))?;
            for element in found.elements() {
                let p = element.partition();
                let next = match element.offset() {
                    Offset::Offset(o) => o,
                    // No message at or after the time: start at the current end.
                    _ => client.fetch_watermarks(topic, p, REQUEST_TIMEOUT)?.1,
                };
                out.insert(p, next);
            }
        }
    }
    Ok(out)
}

/// Writes the start positions into the store. Refused when the store already consumed
/// the topic: moving an existing position could apply events twice or skip some.
pub fn write_start(store: &mut Store, config: &Config, offsets: BTreeMap<i32, i64>) -> Result<()> {
    let topic = config.kafka.input_topic.clone();
    if let Some(existing) = store.progress().offsets.get(&topic) {
        bail!(
            "store {} already holds positions for topic {topic} ({}); a start position is only for a store that never consumed it",
            store.dir().display(),
            existing
                .iter()
                .map(|(p, o)| format!("{p}:{o}"))
                .collect::<Vec<_>>()
                .join(",")
        );
    }
    let settings = EngineSettings::from_config(config);
    tracing::info!(
        topic = %topic,
        positions = %offsets.iter().map(|(p, o)| format!("{p}:{o}")).collect::<Vec<_>>().join(","),
        "live start positions recorded"
    );
    apply_and_commit(store, &settings, &[], &BTreeMap::new(), |p| {
        p.offsets.insert(topic, offsets);
    })?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn offsets_parse_and_bad_ones_are_named() {
        assert_eq!(
            parse_offsets("0:12, 2:7").unwrap(),
            BTreeMap::from([(0, 12), (2, 7)])
        );
        assert!(parse_offsets("0:12,0:13")
            .unwrap_err()
            .to_string()
            .contains("given twice"));
        assert!(parse_offsets("x:1")
            .unwrap_err()
            .to_string()
            .contains("partition \"x\""));
        assert!(parse_offsets("1")
            .unwrap_err()
            .to_string()
            .contains("PARTITION:OFFSET"));
    }
}
