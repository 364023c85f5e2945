//! Handover from history to the live stream: a store seeded by a file backfill is given
//! the input topic's positions to start from — the first offset at or after a time, or
//! explicit offsets — so that history and stream neither overlap nor leave a gap.

use std::collections::BTreeMap;

use anyhow::{bail, Context, Result};

use crate::config::{Config, KafkaConfig};
use crate::event::UnixMillis;
use crate::kafka::client::BusContext;
use crate::kafka::offsets::{OffsetsClient, REQUEST_TIMEOUT};
use crate::pipeline::segment::apply_and_commit;
use crate::store::Store;

/// Where the live stream should begin.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum StartRequest {
    /// The first message of each partition whose record timestamp is at or after this
    /// time (Unix milliseconds).
    AtTime(UnixMillis),
    /// These next offsets, by partition; unlisted partitions start at their beginning.
    Offsets(BTreeMap<i32, i64>),
}

/// Parses a list of next offsets given to `flag` (`--start-offsets 0:1200,1:1187,2:1302`,
/// `--stop-at-offsets …`), naming the flag in its errors.
pub fn parse_offsets(flag: &str, text: &str) -> Result<BTreeMap<i32, i64>> {
    let mut out = BTreeMap::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (p, o) = part
            .split_once(':')
            .with_context(|| format!("{flag}: \"{part}\" is not PARTITION:OFFSET"))?;
        let partition: i32 = p
            .parse()
            .with_context(|| format!("{flag}: partition \"{p}\" is not a number"))?;
        let offset: i64 = o
            .parse()
            .with_context(|| format!("{flag}: offset \"{o}\" is not a number"))?;
        if partition < 0 || offset < 0 {
            bail!("{flag}: \"{part}\" has a negative partition or offset");
        }
        if out.insert(partition, offset).is_some() {
            bail!("{flag}: partition {partition} is given twice");
        }
    }
    if out.is_empty() {
        bail!("{flag}: no PARTITION:OFFSET given");
    }
    Ok(out)
}

/// Resolves a start request to a next offset for every partition of the input topic.
pub fn resolve(kafka: &KafkaConfig, bus: &BusContext, request: &StartRequest) -> Result<BTreeMap<i32, i64>> {
    let client = OffsetsClient::new(kafka, bus)?;
    let topic = &kafka.input_topic;
    match request {
        StartRequest::Offsets(given) => {
            let partitions = client.partitions(topic)?;
            for p in given.keys() {
                if !partitions.contains(p) {
                    bail!("--start-offsets: topic {topic} has no partition {p}");
                }
            }
            let mut out = BTreeMap::new();
            for &p in &partitions {
                let (low, _) = client.watermarks(topic, p, REQUEST_TIMEOUT)?;
                out.insert(p, given.get(&p).copied().unwrap_or(low));
            }
            Ok(out)
        }
        // No message at or after the time: a partition starts at its current end.
        StartRequest::AtTime(ms) => client.offsets_at_time(topic, *ms),
    }
}

/// Writes the start positions into the store. Refused when the store already consumed
/// the topic: moving an existing position could apply events twice or skip some.
pub fn write_start(store: &mut Store, config: &Config, offsets: BTreeMap<i32, i64>) -> Result<()> {
    let topic = config.kafka.input_topic.clone();
    if let Some(existing) = store.ledger().offsets.get(&topic) {
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
    let settings = config.engine_settings();
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
            parse_offsets("--start-offsets", "0:12, 2:7").unwrap(),
            BTreeMap::from([(0, 12), (2, 7)])
        );
        assert!(parse_offsets("--start-offsets", "0:12,0:13")
            .unwrap_err()
            .to_string()
            .contains("given twice"));
        assert!(parse_offsets("--start-offsets", "x:1")
            .unwrap_err()
            .to_string()
            .contains("partition \"x\""));
        assert!(parse_offsets("--start-offsets", "1")
            .unwrap_err()
            .to_string()
            .contains("PARTITION:OFFSET"));
    }
}
