//! Producing records and knowing which ones the broker acknowledged. One idempotent
//! producer serves the output and dead-letter topics; [`RecordProducer::deliver`] produces
//! a set of records and waits, within a deadline, for the broker's answer on each, so the
//! caller only records as delivered what really was; [`RecordProducer::send`] lets the
//! caller work while the broker answers.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, MutexGuard};
use std::time::{Duration, Instant};

use anyhow::Result;
use rdkafka::error::{KafkaError, RDKafkaErrorCode};
use rdkafka::message::{DeliveryResult, Header, OwnedHeaders};
use rdkafka::producer::{BaseRecord, Producer, ProducerContext, PurgeConfig, ThreadedProducer};
use rdkafka::ClientContext;

use super::client::{base_config, describe_error, BusContext};
use crate::config::KafkaConfig;

/// One record to produce.
#[derive(Debug, Clone)]
pub struct OutRecord {
    /// Destination topic.
    pub topic: String,
    /// Record key.
    pub key: Vec<u8>,
    /// Value; `None` is a tombstone.
    pub value: Option<Vec<u8>>,
    /// Headers, in order.
    pub headers: Vec<(String, Vec<u8>)>,
}

/// Acknowledgements of the current [`RecordProducer::deliver`] call. The opaque of each
/// record carries the call's generation, so a late answer to an earlier, timed-out call
/// is ignored rather than credited to the wrong record.
#[derive(Default)]
struct Acks {
    generation: AtomicU64,
    state: Mutex<AckState>,
}

#[derive(Default)]
struct AckState {
    answered: Vec<Option<std::result::Result<(), Refusal>>>,
}

/// Why the client or the broker did not take a record.
#[derive(Debug, Clone)]
struct Refusal {
    /// The error, scrubbed.
    reason: String,
    /// Whether sending it again can never succeed.
    for_good: bool,
}

/// Whether a produce error means the record will never be taken however often it is
/// sent: it is too large, malformed or not allowed, or the topic's name is invalid.
/// Everything else (a broker away, a leader moving, a topic not yet created, a timeout)
/// may pass on a later attempt.
fn refused_for_good(error: &KafkaError) -> bool {
    matches!(
        error.rdkafka_error_code(),
        Some(
            RDKafkaErrorCode::MessageSizeTooLarge
                | RDKafkaErrorCode::InvalidMessageSize
                | RDKafkaErrorCode::MessageBatchTooLarge
                | RDKafkaErrorCode::InvalidMessage
                | RDKafkaErrorCode::InvalidRecord
                | RDKafkaErrorCode::InvalidTopic
                | RDKafkaErrorCode::TopicAuthorizationFailed
                | RDKafkaErrorCode::ClusterAuthorizationFailed
                | RDKafkaErrorCode::UnsupportedForMessageFormat
                | RDKafkaErrorCode::PolicyViolation
        )
    )
}

/// Producer context: the shared bus context plus delivery bookkeeping.
#[derive(Clone)]
pub struct DeliveryContext {
    bus: BusContext,
    acks: Arc<Acks>,
}

impl ClientContext for DeliveryContext {
    fn log(&self, level: rdkafka::config::RDKafkaLogLevel, fac: &str, message: &str) {
        self.bus.log(level, fac, message);
    }

    fn error(&self, error: KafkaError, reason: &str) {
        self.bus.error(error, reason);
    }
}

/// Bits of the opaque that hold the record's index within its call.
const INDEX_BITS: u32 = 32;

impl ProducerContext for DeliveryContext {
    type DeliveryOpaque = usize;

    fn delivery(&self, result: &DeliveryResult<'_>, opaque: usize) {
        let generation = (opaque as u64) >> INDEX_BITS;
        let index = opaque & ((1usize << INDEX_BITS) - 1);
        if generation != self.acks.generation.load(Ordering::Acquire) {
            return;
        }
        let outcome = match result {
            Ok(_) => {
                self.bus.brokers().set_reachable(true);
                Ok(())
            }
            Err((e, _)) => Err(Refusal {
                reason: self.bus.scrubber().scrub(&e.to_string()),
                for_good: refused_for_good(e),
            }),
        };
        let mut state = self.acks.state.lock().expect("ack lock");
        if let Some(slot) = state.answered.get_mut(index) {
            *slot = Some(outcome);
        }
    }
}

/// The idempotent producer of output lists and dead letters.
pub struct RecordProducer {
    producer: ThreadedProducer<DeliveryContext>,
    acks: Arc<Acks>,
    serial: Mutex<()>,
    /// Whether records are withheld instead of sent ([`RecordProducer::set_muted`]).
    muted: AtomicBool,
}

/// What became of a set of records.
#[derive(Debug, Default)]
pub struct DeliveryReport {
    /// Indexes of records the broker did not acknowledge, with the reason.
    pub failed: Vec<(usize, String)>,
    /// Those of `failed` that can never be delivered (too large, not authorised,
    /// invalid): sending them again would only repeat the refusal.
    pub refused_for_good: Vec<usize>,
    /// The producer was muted (a standby): nothing was sent, nothing failed.
    pub withheld: bool,
}

impl DeliveryReport {
    /// Whether every record was acknowledged.
    pub fn all_delivered(&self) -> bool {
        self.failed.is_empty()
    }
}

impl RecordProducer {
    /// Creates the producer. Full acknowledgement is forced and idempotence is on unless
    /// `kafka.idempotent_producer` turns it off: together they make a retried delivery safe.
    pub fn new(kafka: &KafkaConfig, bus: BusContext) -> Result<RecordProducer> {
        let mut config = base_config(kafka);
        config.set("enable.idempotence", kafka.idempotent_producer.to_string());
        config.set("acks", "all");
        config.set("compression.type", "none");
        let acks = Arc::new(Acks::default());
        let context = DeliveryContext {
            bus: bus.clone(),
            acks: acks.clone(),
        };
        let producer: ThreadedProducer<DeliveryContext> = config
            .create_with_context(context)
            .map_err(|e| describe_error(bus.scrubber(), "cannot create the Kafka producer", &e))?;
        Ok(RecordProducer {
            producer,
            acks,
            serial: Mutex::new(()),
            muted: AtomicBool::new(false),
        })
    }

    /// Mutes or unmutes the producer. A muted producer sends nothing and reports every
    /// record withheld (a standby instance, docs/design.md "Standby replicas"). Returns
    /// only after a sending in flight has been settled, so once a mute returns nothing
    /// more reaches the broker.
    pub fn set_muted(&self, muted: bool) {
        let _no_sending = self.serial.lock().expect("producer call lock");
        self.muted.store(muted, Ordering::Release);
    }

    /// Produces every record and waits up to `timeout` for the broker's answers
    /// ([`RecordProducer::send`] then [`Sending::settle`]).
    pub fn deliver(&self, records: &[OutRecord], timeout: Duration) -> DeliveryReport {
        self.send(records, timeout).settle()
    }

    /// Hands every record to librdkafka and returns at once; the caller may work while
    /// the broker answers, then settles. One sending at a time: a second waits for the
    /// first to be settled.
    pub fn send(&self, records: &[OutRecord], timeout: Duration) -> Sending<'_> {
        let guard = self.serial.lock().expect("producer call lock");
        if self.muted.load(Ordering::Acquire) {
            return Sending {
                producer: self,
                _one_at_a_time: guard,
                deadline: Instant::now(),
                failed: Vec::new(),
                not_sent: vec![true; records.len()],
                withheld: true,
            };
        }
        let generation = self.acks.generation.fetch_add(1, Ordering::AcqRel) + 1;
        self.acks.state.lock().expect("ack lock").answered = vec![None; records.len()];
        let deadline = Instant::now() + timeout;
        let mut failed = Vec::new();
        let mut not_sent = vec![false; records.len()];
        for (index, r) in records.iter().enumerate() {
            let opaque = ((generation << INDEX_BITS) as usize) | index;
            let mut headers = OwnedHeaders::new_with_capacity(r.headers.len());
            for (name, value) in &r.headers {
                headers = headers.insert(Header {
                    key: name,
                    value: Some(value),
                });
            }
            let mut record = BaseRecord::with_opaque_to(&r.topic, opaque)
                .key(&r.key[..])
                .headers(headers);
            if let Some(v) = &r.value {
                record = record.payload(&v[..]);
            }
            loop {
                match self.producer.send(record) {
                    Ok(()) => break,
                    Err((KafkaError::MessageProduction(RDKafkaErrorCode::QueueFull), back))
                        if Instant::now() < deadline =>
                    {
                        record = back;
                        std::thread::sleep(Duration::from_millis(5));
                    }
                    Err((e, _)) => {
                        failed.push((
                            index,
                            Refusal {
                                reason: self.producer.context().bus.scrubber().scrub(&e.to_string()),
                                for_good: refused_for_good(&e),
                            },
                        ));
                        not_sent[index] = true;
                        break;
                    }
                }
            }
        }
        Sending {
            producer: self,
            _one_at_a_time: guard,
            deadline,
            failed,
            not_sent,
            withheld: false,
        }
    }
}

/// Records handed to librdkafka whose answers are not yet collected.
pub struct Sending<'a> {
    producer: &'a RecordProducer,
    _one_at_a_time: MutexGuard<'a, ()>,
    deadline: Instant,
    failed: Vec<(usize, Refusal)>,
    not_sent: Vec<bool>,
    /// Nothing was sent: the producer is muted.
    withheld: bool,
}

impl Sending<'_> {
    /// Waits until the deadline for the broker's answers; records not acknowledged by
    /// then are reported failed, those not yet sent are withdrawn, the ones already in
    /// flight may still arrive (every record simtide produces is safe to see twice).
    pub fn settle(self) -> DeliveryReport {
        if self.withheld {
            return DeliveryReport {
                withheld: true,
                ..DeliveryReport::default()
            };
        }
        let producer = self.producer;
        let left = self.deadline.saturating_duration_since(Instant::now());
        // A flush that times out leaves the unanswered records to be reported below. The
        // ones librdkafka still holds unsent (a missing topic keeps them queued) are
        // purged: the caller sends them again, and a queued copy delivered later as well
        // would make a duplicate of every retry.
        if producer.producer.flush(left).is_err() {
            producer.producer.purge(PurgeConfig::default().queue());
        }
        let mut refusals = self.failed;
        let state = producer.acks.state.lock().expect("ack lock");
        for (index, answer) in state.answered.iter().enumerate() {
            if self.not_sent[index] {
                continue;
            }
            match answer {
                Some(Ok(())) => {}
                Some(Err(refusal)) => refusals.push((index, refusal.clone())),
                None => refusals.push((
                    index,
                    Refusal {
                        reason: "no acknowledgement before the deadline".into(),
                        for_good: false,
                    },
                )),
            }
        }
        refusals.sort_by_key(|(i, _)| *i);
        let mut report = DeliveryReport::default();
        for (index, refusal) in refusals {
            if refusal.for_good {
                report.refused_for_good.push(index);
            }
            report.failed.push((index, refusal.reason));
        }
        report
    }
}
