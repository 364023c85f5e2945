//! librdkafka's in-process mock cluster and the plain clients the demo drives it with: a
//! producer that replays messages at an even pace, a reader that follows a topic, and a
//! watcher of a group's committed offsets. Used by `simtide demo` so it needs no broker.

use std::sync::mpsc;
use std::time::{Duration, Instant};

use anyhow::{Context, Result};
use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::message::Message;
use rdkafka::mocking::MockCluster;
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::{ClientConfig, Offset, TopicPartitionList};

/// How long a metadata or offset request of the demo clients may take.
const REQUEST_TIMEOUT: Duration = Duration::from_secs(5);

/// A Kafka cluster inside this process, gone when dropped.
pub struct InProcessCluster {
    mock: MockCluster<'static, DefaultProducerContext>,
}

impl InProcessCluster {
    /// Starts a one-broker cluster holding `topics` as (name, partitions).
    pub fn start(topics: &[(&str, i32)]) -> Result<InProcessCluster> {
        let mock = MockCluster::new(1).context("cannot start the in-process Kafka mock cluster")?;
        for (name, partitions) in topics {
            mock.create_topic(name, *partitions, 1)?;
        }
        Ok(InProcessCluster { mock })
    }

    /// Its bootstrap address.
    pub fn brokers(&self) -> String {
        self.mock.bootstrap_servers()
    }
}

/// Produces `messages` as (key, value) to `topic`, spread evenly over `over`.
pub fn produce_paced(
    brokers: &str,
    topic: &str,
    messages: &[(String, String)],
    over: Duration,
) -> Result<usize> {
    let producer: ThreadedProducer<DefaultProducerContext> = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("enable.idempotence", "true")
        .create()?;
    let started = Instant::now();
    let per_message = over.as_secs_f64() / messages.len().max(1) as f64;
    for (i, (key, value)) in messages.iter().enumerate() {
        let due = Duration::from_secs_f64(per_message * i as f64);
        if let Some(wait) = due.checked_sub(started.elapsed()) {
            std::thread::sleep(wait);
        }
        let mut record = BaseRecord::to(topic).key(key.as_str()).payload(value.as_str());
        while let Err((_, back)) = producer.send(record) {
            record = back;
            std::thread::sleep(Duration::from_millis(5));
        }
    }
    producer.flush(Duration::from_secs(10))?;
    Ok(messages.len())
}

/// Reads partition 0 of `topic` from its beginning, handing each non-empty value to
/// `on_value`, until `stop` receives or hangs up.
pub fn follow_topic(
    brokers: &str,
    topic: &str,
    stop: mpsc::Receiver<()>,
    mut on_value: impl FnMut(&[u8]) -> Result<()>,
) -> Result<()> {
    let consumer: BaseConsumer = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", format!("{topic}.reader"))
        .create()?;
    let mut tpl = TopicPartitionList::new();
    tpl.add_partition_offset(topic, 0, Offset::Beginning)?;
    consumer.assign(&tpl)?;
    while let Err(mpsc::TryRecvError::Empty) = stop.try_recv() {
        let Some(message) = consumer.poll(Duration::from_millis(200)) else {
            continue;
        };
        if let Some(value) = message?.payload() {
            on_value(value)?;
        }
    }
    Ok(())
}

/// Reads a group's committed offsets, which the live service commits after every store
/// write.
pub struct GroupWatcher {
    client: BaseConsumer,
}

impl GroupWatcher {
    /// A client of `group` that only reads its offsets.
    pub fn new(brokers: &str, group: &str) -> Result<GroupWatcher> {
        let client = ClientConfig::new()
            .set("bootstrap.servers", brokers)
            .set("group.id", group)
            .create()?;
        Ok(GroupWatcher { client })
    }

    /// Whether the group's committed offset reached the end of each of `partitions`
    /// partitions of `topic`.
    pub fn caught_up(&self, topic: &str, partitions: i32) -> Result<bool> {
        let mut tpl = TopicPartitionList::new();
        for p in 0..partitions {
            tpl.add_partition(topic, p);
        }
        let committed = self.client.committed_offsets(tpl, REQUEST_TIMEOUT)?;
        for element in committed.elements() {
            let (_, high) = self
                .client
                .fetch_watermarks(topic, element.partition(), REQUEST_TIMEOUT)?;
            if high > 0 && element.offset() != Offset::Offset(high) {
                return Ok(false);
            }
        }
        Ok(true)
    }
}
