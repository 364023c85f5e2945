//! The sections of the configuration that only the live service reads: where its store
//! lives, how it talks to Kafka, how it batches, publishes and answers HTTP.

use std::collections::BTreeMap;
use std::time::Duration;

use serde::{Deserialize, Serialize};

use super::duration_text;
use super::size_text::ByteSize;

/// `[store]`: where the live service keeps its state.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct StoreConfig {
    /// Store directory of `simtide run` (created if missing).
    pub dir: String,
    /// Where `POST /v1/admin/snapshot` writes snapshots (one new directory each, named
    /// by the time); empty: the endpoint is off. Never a path taken from a request.
    pub snapshot_dir: String,
}

impl Default for StoreConfig {
    fn default() -> Self {
        StoreConfig {
            dir: "simtide-store".to_string(),
            snapshot_dir: String::new(),
        }
    }
}

/// Where a partition without a stored position starts.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum StartPosition {
    /// The oldest retained message.
    #[default]
    Earliest,
    /// Only messages produced after the service joined.
    Latest,
}

/// What the service does with a stored position that the partition's log no longer
/// holds (docs/design.md, "Positions outside the log"): the log was cut by retention, an
/// old snapshot was restored, or the topic was replaced.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum OutsideLogPolicy {
    /// Leave the partition unconsumed and report it (readiness, metric, alert) until an
    /// operator decides: nothing is skipped without someone knowing.
    #[default]
    Refuse,
    /// Resume at the partition's first retained offset, counting what was lost.
    ResumeAtLogStart,
    /// Resume at the partition's end, counting what is skipped.
    ResumeAtLogEnd,
}

/// `[kafka]`: the event bus.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct KafkaConfig {
    /// Bootstrap servers, comma separated.
    pub brokers: String,
    /// Consumer group of the service.
    pub group: String,
    /// Topic the events arrive on (key = user id).
    pub input_topic: String,
    /// Compacted topic that receives rating-signal lists (key = item id).
    pub output_topic: String,
    /// Compacted topic that receives purchase-signal lists (key = item id). A separate
    /// topic, because compaction keeps one record per key and each signal has its own list.
    pub purchase_output_topic: String,
    /// Topic that receives every event that failed validation, with the reason in headers.
    pub dead_letter_topic: String,
    /// How long the dead-letter topic keeps a record (`retention.ms` when simtide creates
    /// it): refused events are personal data too, and an erased user's stay until then.
    #[serde(with = "duration_text")]
    pub dead_letter_retention: Duration,
    /// Where a partition the store holds no position for starts.
    pub start: StartPosition,
    /// What to do when a partition's stored position lies outside its retained log.
    pub position_outside_log: OutsideLogPolicy,
    /// Create missing output and dead-letter topics (compacted outputs) at start-up.
    pub create_topics: bool,
    /// Partitions of topics the service creates.
    pub topic_partitions: i32,
    /// Replication factor of topics the service creates.
    pub topic_replication: i32,
    /// Produce lists and dead letters with Kafka's idempotent producer, so a retried send
    /// never writes a record twice. Off only for a broker that cannot keep producer state
    /// across its own restart (the test broker's case, see tests/live/service.rs): lists
    /// are keyed and compacted, so a duplicate list is harmless; a dead letter may then
    /// appear twice.
    pub idempotent_producer: bool,
    /// librdkafka properties passed unchanged (SASL, TLS, timeouts…). Values whose key
    /// contains password, secret, token or key are masked wherever simtide prints them.
    pub client: BTreeMap<String, String>,
}

impl Default for KafkaConfig {
    fn default() -> Self {
        KafkaConfig {
            brokers: "127.0.0.1:9092".to_string(),
            group: "simtide".to_string(),
            input_topic: "shop-events".to_string(),
            output_topic: "item-lists.rating".to_string(),
            purchase_output_topic: "item-lists.purchase".to_string(),
            dead_letter_topic: "shop-events-dead-letter".to_string(),
            dead_letter_retention: Duration::from_secs(7 * 24 * 3600),
            start: StartPosition::Earliest,
            position_outside_log: OutsideLogPolicy::Refuse,
            create_topics: true,
            topic_partitions: 1,
            topic_replication: 1,
            idempotent_producer: true,
            client: BTreeMap::new(),
        }
    }
}

/// `[live]`: micro-batching and the lifecycle of `simtide run`.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct LiveConfig {
    /// A micro-batch is committed when it holds this many messages…
    pub batch_events: usize,
    /// …or when its first message has waited this long.
    #[serde(with = "duration_text")]
    pub batch_wait: Duration,
    /// Longest time from SIGTERM/SIGINT to exit: finish the batch, publish, leave.
    #[serde(with = "duration_text")]
    pub shutdown_timeout: Duration,
    /// Longest wait for the broker to confirm a batch of produced records before the
    /// attempt counts as failed and is retried.
    #[serde(with = "duration_text")]
    pub delivery_timeout: Duration,
    /// Memory the applied batches may fill between two store writes. They are written
    /// before each publication cycle anyway; this bounds memory when a cycle is far off
    /// or the input arrives faster than usual (a catch-up after downtime).
    pub memory_budget: ByteSize,
    /// `/healthz` fails once the consuming loop has made no progress for this long (a
    /// retry that cannot succeed), so an orchestrator restarts the process; lag alone
    /// never fails it.
    #[serde(with = "duration_text")]
    pub stall_limit: Duration,
}

impl Default for LiveConfig {
    fn default() -> Self {
        LiveConfig {
            batch_events: 5000,
            batch_wait: Duration::from_millis(250),
            shutdown_timeout: Duration::from_secs(30),
            delivery_timeout: Duration::from_secs(10),
            memory_budget: ByteSize(1 << 30),
            stall_limit: Duration::from_secs(300),
        }
    }
}

/// `[publish]`: how often dirty lists are recomputed and produced.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct PublishConfig {
    /// Time between publication cycles.
    #[serde(with = "duration_text")]
    pub interval: Duration,
    /// Candidates each rating row kept in memory keeps between cycles (at least
    /// `similarity.neighbors`): more spare candidates mean fewer rows scored whole again
    /// when members drop out, at a little memory per row (docs/design.md, "Lists kept
    /// incrementally").
    pub kept_candidates: usize,
}

impl Default for PublishConfig {
    fn default() -> Self {
        PublishConfig {
            interval: Duration::from_secs(5),
            kept_candidates: 100,
        }
    }
}

/// `[http]`: the health, metrics and lookup listener.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct HttpConfig {
    /// Address to listen on; loopback unless told otherwise.
    pub listen: String,
    /// Bearer token for the endpoints that change state (republish, compact); empty
    /// turns them off. Best set through SIMTIDE_HTTP__ADMIN_TOKEN.
    pub admin_token: String,
    /// Store lookups served at once; further requests wait for a place until their
    /// timeout. Bounds the memory and threads lookups can take from the service.
    pub max_concurrent_lookups: usize,
    /// Longest time a request may take, waiting for a place included.
    #[serde(with = "duration_text")]
    pub request_timeout: Duration,
    /// Connections served at once; further ones wait until one closes.
    pub max_connections: usize,
    /// Longest time a client may take to send a request's headers.
    #[serde(with = "duration_text")]
    pub header_timeout: Duration,
    /// A file holding the admin token (a mounted Secret); read at start-up, its trailing
    /// newline dropped. Set this or `admin_token`, not both.
    pub admin_token_file: String,
}

impl Default for HttpConfig {
    fn default() -> Self {
        HttpConfig {
            // A port no well-known program claims by default (the exporter ports of
            // the 9xxx range are taken), so simtide can sit beside other exporters.
            listen: "127.0.0.1:7461".to_string(),
            admin_token: String::new(),
            max_concurrent_lookups: 16,
            request_timeout: Duration::from_secs(2),
            max_connections: 256,
            header_timeout: Duration::from_secs(5),
            admin_token_file: String::new(),
        }
    }
}

/// `[readiness]`: when `/readyz` says the service cannot be relied on. Beyond the broker,
/// the store and the assignment, readiness covers what the platform team depends on:
/// fresh lists and working outputs.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct ReadinessConfig {
    /// Not ready while more messages than this wait in the input topic (all partitions);
    /// 0 turns the check off.
    pub max_consumer_lag: u64,
    /// Not ready while the oldest change not yet in a published list is older than this;
    /// "0s" turns the check off.
    #[serde(with = "duration_text")]
    pub max_staleness: Duration,
    /// Not ready once deliveries to a written topic have kept failing for this long.
    #[serde(with = "duration_text")]
    pub max_delivery_failure: Duration,
}

impl Default for ReadinessConfig {
    fn default() -> Self {
        ReadinessConfig {
            max_consumer_lag: 100_000,
            max_staleness: Duration::from_secs(120),
            max_delivery_failure: Duration::from_secs(30),
        }
    }
}

/// How log lines are written.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum LogFormat {
    /// One human-readable line per event.
    #[default]
    Text,
    /// One JSON object per line, for log shippers.
    Json,
}

/// `[log]`: the format of log lines on stderr (the level is `SIMTIDE_LOG`, e.g. `info`).
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct LogConfig {
    /// `text` or `json`.
    pub format: LogFormat,
}
