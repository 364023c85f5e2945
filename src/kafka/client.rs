//! librdkafka clients as simtide builds them: the `[kafka.client]` table passed unchanged,
//! and one client context that routes librdkafka's logs and errors into tracing at a
//! bounded rate, scrubbed of secrets, while tracking whether the brokers are reachable.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use rdkafka::config::RDKafkaLogLevel;
use rdkafka::consumer::ConsumerContext;
use rdkafka::error::{KafkaError, RDKafkaErrorCode};
use rdkafka::{ClientConfig, ClientContext};

use crate::config::secrets::Scrubber;
use crate::config::KafkaConfig;
use crate::observability::log_limit;

/// Whether the brokers answered recently: cleared by librdkafka's "all brokers down"
/// and transport errors, set again by a successful metadata request.
#[derive(Debug)]
pub struct BrokerState {
    reachable: AtomicBool,
}

impl Default for BrokerState {
    fn default() -> Self {
        BrokerState {
            reachable: AtomicBool::new(true),
        }
    }
}

impl BrokerState {
    /// Whether the last word from the brokers was good.
    pub fn reachable(&self) -> bool {
        self.reachable.load(Ordering::Relaxed)
    }

    /// Records the outcome of a request or an error report; logs the transitions.
    pub fn set_reachable(&self, now_reachable: bool) {
        let before = self.reachable.swap(now_reachable, Ordering::Relaxed);
        if before != now_reachable {
            if now_reachable {
                tracing::info!("brokers reachable again");
            } else {
                tracing::warn!("brokers unreachable; retrying in the background");
            }
        }
    }
}

/// The client context every simtide Kafka client uses.
#[derive(Clone)]
pub struct BusContext {
    brokers: Arc<BrokerState>,
    scrubber: Arc<Scrubber>,
}

impl BusContext {
    /// A context reporting into `brokers`, masking the secrets `scrubber` knows.
    pub fn new(brokers: Arc<BrokerState>, scrubber: Arc<Scrubber>) -> BusContext {
        BusContext { brokers, scrubber }
    }

    /// The shared broker reachability.
    pub fn brokers(&self) -> &Arc<BrokerState> {
        &self.brokers
    }

    /// The scrubber for text from librdkafka.
    pub fn scrubber(&self) -> &Scrubber {
        &self.scrubber
    }

    /// `Some(held back)` when a librdkafka line of `kind` may be written now.
    fn admit(&self, kind: &str) -> Option<u64> {
        log_limit::admit(&format!("librdkafka/{kind}"))
    }
}

impl ClientContext for BusContext {
    fn log(&self, level: RDKafkaLogLevel, facility: &str, message: &str) {
        // One [kafka.client] table serves consumer, producer and admin clients, so
        // librdkafka warns of every property a client type ignores: not news.
        let level = if facility == "CONFWARN" {
            RDKafkaLogLevel::Debug
        } else {
            level
        };
        let Some(held) = self.admit(facility) else {
            return;
        };
        let message = self.scrubber.scrub(message);
        match level {
            RDKafkaLogLevel::Emerg
            | RDKafkaLogLevel::Alert
            | RDKafkaLogLevel::Critical
            | RDKafkaLogLevel::Error => {
                tracing::error!(target: "librdkafka", facility, suppressed = held, "{message}")
            }
            RDKafkaLogLevel::Warning => {
                tracing::warn!(target: "librdkafka", facility, suppressed = held, "{message}")
            }
            RDKafkaLogLevel::Notice | RDKafkaLogLevel::Info => {
                tracing::info!(target: "librdkafka", facility, suppressed = held, "{message}")
            }
            RDKafkaLogLevel::Debug => {
                tracing::debug!(target: "librdkafka", facility, suppressed = held, "{message}")
            }
        }
    }

    fn error(&self, error: KafkaError, reason: &str) {
        let code = error.rdkafka_error_code();
        if matches!(
            code,
            Some(RDKafkaErrorCode::AllBrokersDown | RDKafkaErrorCode::BrokerTransportFailure)
        ) {
            self.brokers.set_reachable(false);
        }
        let kind = format!("{code:?}");
        if let Some(held) = self.admit(&kind) {
            let text = self.scrubber.scrub(&format!("{error}: {reason}"));
            tracing::warn!(target: "librdkafka", suppressed = held, "{text}");
        }
    }
}

/// Plain consumers (metadata, offsets, topic backfill) use the default rebalance handling.
impl ConsumerContext for BusContext {}

/// The base client configuration: brokers, then `[kafka.client]` unchanged (so it may
/// override anything simtide sets, SASL and TLS included).
pub fn base_config(kafka: &KafkaConfig) -> ClientConfig {
    let mut c = ClientConfig::new();
    c.set("bootstrap.servers", &kafka.brokers);
    c.set_log_level(RDKafkaLogLevel::Warning);
    for (key, value) in &kafka.client {
        c.set(key, value);
    }
    c
}

/// A client-creation error as text without secrets: librdkafka quotes the offending
/// value when a property is invalid.
pub fn describe_error(scrubber: &Scrubber, what: &str, error: &KafkaError) -> anyhow::Error {
    anyhow::anyhow!("{what}: {}", scrubber.scrub(&error.to_string()))
}
