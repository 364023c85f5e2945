//! The publishing lease of a shard's instances (docs/design.md, "Standby replicas"). Every
//! instance of a shard subscribes to the same one-partition lease topic in the group
//! `<group>.shard-<i>-lease`; the group's coordinator gives the partition to one member,
//! and that member publishes. Nothing is read from the topic: holding its partition is
//! the lease, and Kafka's group membership (heartbeats, session timeout, rebalances) is
//! the whole election. On revocation the holder is told to stop publishing before the
//! partition is given up, so two instances never publish at once unless a holder is cut
//! off from the coordinator without noticing (see the design document).

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use anyhow::Result;
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext, RebalanceProtocol};
use rdkafka::error::KafkaError;
use rdkafka::types::RDKafkaRespErr;
use rdkafka::{ClientContext, TopicPartitionList};

use super::client::{base_config, describe_error, BusContext};
use crate::config::KafkaConfig;

/// What the lease tells the instance.
pub trait LeaseHolder: Send + Sync + 'static {
    /// The lease was given to this instance: publish.
    fn gained(&self);
    /// The lease is being taken away: stop publishing. Nothing may be produced once this
    /// returns; the partition is given up right after.
    fn lost(&self);
}

/// How often the lease thread polls (rebalance callbacks run inside the poll).
const POLL_EVERY: Duration = Duration::from_millis(100);

/// Longest wait, at release, for the group to take the partition back.
const RELEASE_WAIT: Duration = Duration::from_secs(5);

/// Consumer context: the bus context plus the holder told of gains and losses.
struct LeaseContext<H: LeaseHolder> {
    bus: BusContext,
    holder: H,
    topic: String,
}

impl<H: LeaseHolder> ClientContext for LeaseContext<H> {
    fn log(&self, level: rdkafka::config::RDKafkaLogLevel, fac: &str, message: &str) {
        self.bus.log(level, fac, message);
    }

    fn error(&self, error: KafkaError, reason: &str) {
        self.bus.error(error, reason);
    }
}

/// Whether the consumer holds any partition now.
fn holds(consumer: &BaseConsumer<impl ConsumerContext>) -> bool {
    consumer.assignment().map(|a| a.count() > 0).unwrap_or(false)
}

impl<H: LeaseHolder> ConsumerContext for LeaseContext<H> {
    fn rebalance(&self, consumer: &BaseConsumer<Self>, err: RDKafkaRespErr, tpl: &mut TopicPartitionList) {
        let cooperative = matches!(consumer.rebalance_protocol(), RebalanceProtocol::Cooperative);
        match err {
            RDKafkaRespErr::RD_KAFKA_RESP_ERR__ASSIGN_PARTITIONS => {
                let result = if cooperative {
                    consumer.incremental_assign(tpl)
                } else {
                    consumer.assign(tpl)
                };
                if let Err(e) = result {
                    tracing::error!(topic = %self.topic, error = %self.bus.scrubber().scrub(&e.to_string()), "cannot take the lease partition");
                } else if tpl.count() > 0 {
                    tracing::info!(topic = %self.topic, "lease gained: this instance publishes");
                    self.holder.gained();
                }
            }
            other => {
                if other != RDKafkaRespErr::RD_KAFKA_RESP_ERR__REVOKE_PARTITIONS {
                    tracing::warn!(error = ?other, "lease group error; giving the lease up");
                }
                if holds(consumer) {
                    self.holder.lost();
                    tracing::info!(topic = %self.topic, "lease given up: this instance stands by");
                }
                let result = if cooperative {
                    consumer.incremental_unassign(tpl)
                } else {
                    consumer.unassign()
                };
                if let Err(e) = result {
                    tracing::warn!(error = %e, "lease unassign failed");
                }
            }
        }
    }
}

/// A running lease membership: a thread polling the lease consumer until dropped.
pub struct Lease {
    stop: Arc<AtomicBool>,
    thread: Option<JoinHandle<()>>,
}

/// Where and how long a lease is held.
#[derive(Debug, Clone)]
pub struct LeaseTerms {
    /// The one-partition lease topic.
    pub topic: String,
    /// The lease group (`<group>.shard-<i>-lease`).
    pub group: String,
    /// The group's session timeout: how long a silent holder keeps the lease.
    pub timeout: Duration,
}

impl Lease {
    /// Joins the lease group and starts polling it on a thread of its own; `holder` hears
    /// of every gain and loss from that thread.
    pub fn join<H: LeaseHolder>(
        kafka: &KafkaConfig,
        bus: BusContext,
        terms: &LeaseTerms,
        holder: H,
    ) -> Result<Lease> {
        let mut config = base_config(kafka);
        config.set("group.id", &terms.group);
        config.set("enable.auto.commit", "false");
        config.set("session.timeout.ms", terms.timeout.as_millis().to_string());
        config.set(
            "heartbeat.interval.ms",
            (terms.timeout.as_millis() / 3).max(100).to_string(),
        );
        // The holder keeps the partition when another instance joins.
        config.set("partition.assignment.strategy", "cooperative-sticky");
        let scrubber = bus.scrubber().clone();
        let context = LeaseContext {
            bus,
            holder,
            topic: terms.topic.clone(),
        };
        let consumer: BaseConsumer<LeaseContext<H>> = config
            .create_with_context(context)
            .map_err(|e| describe_error(&scrubber, "cannot create the lease consumer", &e))?;
        consumer
            .subscribe(&[&terms.topic])
            .map_err(|e| describe_error(&scrubber, "cannot subscribe to the lease topic", &e))?;
        tracing::info!(topic = %terms.topic, group = %terms.group, timeout = ?terms.timeout, "standing by for the publishing lease");
        let stop = Arc::new(AtomicBool::new(false));
        let stopping = stop.clone();
        let thread = std::thread::Builder::new()
            .name("simtide-lease".into())
            .spawn(move || {
                while !stopping.load(Ordering::Acquire) {
                    // Nothing is ever produced to the lease topic; a message or an error
                    // here changes nothing (errors are logged by the context).
                    let _ = consumer.poll(POLL_EVERY);
                }
                consumer.unsubscribe();
                let deadline = Instant::now() + RELEASE_WAIT;
                while holds(&consumer) && Instant::now() < deadline {
                    let _ = consumer.poll(POLL_EVERY);
                }
            })?;
        Ok(Lease {
            stop,
            thread: Some(thread),
        })
    }
}

/// Dropping the lease leaves the lease group (a held lease goes to a standby at once
/// rather than after the session timeout) and waits for the polling thread.
impl Drop for Lease {
    fn drop(&mut self) {
        self.stop.store(true, Ordering::Release);
        if let Some(thread) = self.thread.take() {
            let _ = thread.join();
        }
    }
}
