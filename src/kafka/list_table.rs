//! A compacted list topic read as a table: the last list of every item another shard
//! owns, kept in memory, so a shard can recommend from lists it does not publish
//! (docs/design.md, "Recommendations"). The reader joins no group and commits nothing:
//! it assigns itself every partition from the beginning at each start, and follows the
//! topic until the service stops.

use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};
use std::thread::JoinHandle;
use std::time::Duration;

use anyhow::{Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::{Offset, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use super::message::InMessage;
use super::offsets::{OffsetsClient, REQUEST_TIMEOUT};
use crate::config::KafkaConfig;
use crate::observability::log_limit;
use crate::views::record::NeighborRecord;

/// How long one poll waits before the positions are checked against the start's ends.
const POLL_WAIT: Duration = Duration::from_millis(200);

/// How long the reader waits before trying again when it cannot start.
const RETRY_WAIT: Duration = Duration::from_secs(1);

/// Which keys the table keeps: the item names of the other shards.
pub type KeepKey = Box<dyn Fn(&str) -> bool + Send + Sync>;

/// The last list per item read from the topic: item name → (neighbor name, score), best
/// first.
pub struct ListTable {
    lists: RwLock<HashMap<String, Vec<(String, f64)>>>,
    loaded: AtomicBool,
    keep: KeepKey,
}

impl ListTable {
    /// An empty table that will keep the keys `keep` accepts.
    pub fn new(keep: KeepKey) -> ListTable {
        ListTable {
            lists: RwLock::default(),
            loaded: AtomicBool::new(false),
            keep,
        }
    }

    /// The list of `item`, if the topic holds one.
    pub fn list(&self, item: &str) -> Option<Vec<(String, f64)>> {
        self.lists
            .read()
            .unwrap_or_else(|e| e.into_inner())
            .get(item)
            .cloned()
    }

    /// How many lists the table holds.
    pub fn held(&self) -> usize {
        self.lists.read().unwrap_or_else(|e| e.into_inner()).len()
    }

    /// Whether the topic has been read up to the end it had when reading began: until
    /// then, answers drawn from the table could miss lists.
    pub fn loaded(&self) -> bool {
        self.loaded.load(Ordering::Relaxed)
    }

    /// Applies one record: a list replaces the item's last one, a null value (a
    /// tombstone, the item was erased) removes it. A record that is not a list is
    /// refused with the reason; the table is left as it was.
    pub fn apply(&self, key: &[u8], value: Option<&[u8]>) -> Result<(), String> {
        let item = std::str::from_utf8(key).map_err(|_| "the key is not UTF-8".to_string())?;
        if !(self.keep)(item) {
            return Ok(());
        }
        let mut lists = self.lists.write().unwrap_or_else(|e| e.into_inner());
        match value {
            None => {
                lists.remove(item);
            }
            Some(bytes) => {
                let record: NeighborRecord = serde_json::from_slice(bytes)
                    .map_err(|e| format!("the value is not a list record: {e}"))?;
                if record.item != item {
                    return Err(format!("the key {item:?} names another item than the record"));
                }
                lists.insert(
                    record.item,
                    record.neighbors.into_iter().map(|n| (n.item, n.score)).collect(),
                );
            }
        }
        Ok(())
    }
}

/// The thread that keeps a [`ListTable`] current; stopped and joined when dropped.
pub struct TableReader {
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

impl TableReader {
    /// Starts reading `topic` into `table` from the beginning, on a thread of its own. A
    /// broker that does not answer yet is retried every second.
    pub fn start(
        kafka: &KafkaConfig,
        bus: &BusContext,
        topic: &str,
        table: Arc<ListTable>,
    ) -> Result<TableReader> {
        let stop = Arc::new(AtomicBool::new(false));
        let (kafka, bus, topic, stopped) = (kafka.clone(), bus.clone(), topic.to_string(), stop.clone());
        let thread = std::thread::Builder::new()
            .name("simtide-list-table".into())
            .spawn(move || {
                while !stopped.load(Ordering::Relaxed) {
                    match follow(&kafka, &bus, &topic, &table, &stopped) {
                        Ok(()) => return,
                        Err(e) => {
                            if let Some(held) = log_limit::admit("list-table") {
                                tracing::warn!(topic, error = %format!("{e:#}"), suppressed = held, "cannot read the list topic; retrying");
                            }
                            std::thread::sleep(RETRY_WAIT);
                        }
                    }
                }
            })?;
        Ok(TableReader {
            stop,
            thread: Some(thread),
        })
    }
}

impl Drop for TableReader {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Relaxed);
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}

/// Reads `topic` from the beginning into `table` until `stop`; marks the table loaded
/// once every partition has reached the end it had at the start.
fn follow(
    kafka: &KafkaConfig,
    bus: &BusContext,
    topic: &str,
    table: &ListTable,
    stop: &AtomicBool,
) -> Result<()> {
    let mut ends: BTreeMap<i32, i64> =
        OffsetsClient::new(kafka, bus)?.high_watermarks(topic, REQUEST_TIMEOUT)?;
    if ends.is_empty() {
        anyhow::bail!("topic {topic} has no partitions yet");
    }
    let mut config = base_config(kafka);
    config.set("group.id", format!("{}.list-table", kafka.group));
    config.set("enable.auto.commit", "false");
    let consumer: BaseConsumer<BusContext> = config
        .create_with_context(bus.clone())
        .map_err(|e| describe_error(bus.scrubber(), "cannot create the list-table consumer", &e))?;
    let mut assignment = TopicPartitionList::new();
    for &p in ends.keys() {
        assignment.add_partition_offset(topic, p, Offset::Beginning)?;
    }
    consumer
        .assign(&assignment)
        .with_context(|| format!("cannot read {topic}"))?;
    tracing::info!(
        topic,
        partitions = ends.len(),
        "reading the list topic as a table"
    );
    // Partitions still to be read to the end they had now; an empty one has nothing.
    ends.retain(|_, end| *end > 0);
    let mut loading = true;
    while !stop.load(Ordering::Relaxed) {
        match consumer.poll(POLL_WAIT) {
            Some(Ok(received)) => {
                let message = InMessage::copied_from(&received);
                if let Err(reason) = table.apply(
                    message.key.as_deref().unwrap_or_default(),
                    message.value.as_deref(),
                ) {
                    if let Some(held) = log_limit::admit("list-table-record") {
                        tracing::warn!(
                            topic,
                            partition = message.partition,
                            offset = message.offset,
                            reason,
                            suppressed = held,
                            "list record skipped"
                        );
                    }
                }
                if ends
                    .get(&message.partition)
                    .is_some_and(|&end| message.offset + 1 >= end)
                {
                    ends.remove(&message.partition);
                }
            }
            Some(Err(e)) => return Err(e).with_context(|| format!("cannot read {topic}")),
            // Compaction can leave a partition's last offsets without a record: when
            // nothing comes, the position, not the last record, says it is read.
            None if loading => {
                for element in consumer.position()?.elements() {
                    if let (Offset::Offset(at), Some(&end)) =
                        (element.offset(), ends.get(&element.partition()))
                    {
                        if at >= end {
                            ends.remove(&element.partition());
                        }
                    }
                }
            }
            None => {}
        }
        if loading && ends.is_empty() {
            loading = false;
            table.loaded.store(true, Ordering::Relaxed);
            tracing::info!(
                topic,
                lists = table.held(),
                "list topic read to its end; following it"
            );
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn record(item: &str, neighbors: &[(&str, f64)]) -> Vec<u8> {
        serde_json::to_vec(&serde_json::json!({
            "item": item, "signal": "rating", "version": 1,
            "computed_at": "2026-12-03T00:00:00Z", "event_time_watermark": null,
            "neighbors": neighbors.iter().map(|(i, s)| serde_json::json!({"item": i, "score": s, "support": 3})).collect::<Vec<_>>(),
        }))
        .unwrap()
    }

    #[test]
    fn keeps_the_last_list_of_kept_keys_and_forgets_tombstoned_ones() {
        let table = ListTable::new(Box::new(|item| item != "mine"));
        table
            .apply(b"rake", Some(&record("rake", &[("hoe", 0.5)])))
            .unwrap();
        table
            .apply(b"rake", Some(&record("rake", &[("spade", 0.9), ("hoe", 0.4)])))
            .unwrap();
        table
            .apply(b"mine", Some(&record("mine", &[("hoe", 0.5)])))
            .unwrap();
        assert_eq!(
            table.list("rake"),
            Some(vec![("spade".into(), 0.9), ("hoe".into(), 0.4)])
        );
        assert_eq!(table.list("mine"), None, "this shard's own keys are not kept");
        table.apply(b"rake", None).unwrap();
        assert_eq!(table.list("rake"), None);
        assert_eq!(table.held(), 0);
    }

    #[test]
    fn refuses_a_record_that_is_not_a_list_and_keeps_what_it_had() {
        let table = ListTable::new(Box::new(|_| true));
        table
            .apply(b"rake", Some(&record("rake", &[("hoe", 0.5)])))
            .unwrap();
        let bad = table.apply(b"rake", Some(b"{\"item\": 3}")).unwrap_err();
        assert!(bad.contains("not a list record"), "{bad}");
        let other = table.apply(b"rake", Some(&record("hoe", &[]))).unwrap_err();
        assert!(other.contains("another item"), "{other}");
        assert_eq!(table.list("rake"), Some(vec![("hoe".into(), 0.5)]));
    }
}
