//! Liveness and readiness of the service: the facts `/readyz` reports, each check with the
//! reason it fails, so the on-call engineer reads why, not only that. Liveness means "the
//! consuming loop still comes round": `/healthz` fails once neither the loop nor a
//! publication has made progress for `live.stall_limit`, so an orchestrator restarts a
//! process wedged in a retry that cannot succeed (lag alone never fails it). Readiness means
//! "the lists on the output topics can be relied on": the broker answers, the store takes
//! writes, partitions are assigned, every written topic exists and takes records, and the
//! lists are fresh (consumer lag and staleness within `[readiness]`).

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use serde::Serialize;

use crate::cluster::ShardSpec;
use crate::config::ReadinessConfig;
use crate::kafka::client::BrokerState;

/// Shared health facts, updated by the service loop, the topic checker and the broker
/// probe.
#[derive(Debug)]
pub struct Health {
    brokers: Arc<BrokerState>,
    /// Which item shard this instance is, named in every answer when sharded.
    shard: ShardSpec,
    limits: ReadinessConfig,
    store_error: Mutex<Option<String>>,
    consuming: AtomicBool,
    /// Whether this instance delivers (false for a standby whose lease another holds).
    publishing: AtomicBool,
    stopping: AtomicBool,
    /// One sentence per written topic that is missing or could not be checked.
    topic_problems: Mutex<Vec<String>>,
    /// Topic → (first failure of the current run of failed deliveries, last reason).
    failing_deliveries: Mutex<BTreeMap<String, (Instant, String)>>,
    /// One sentence per input partition left unconsumed because its stored position is
    /// outside the log (`kafka.position_outside_log = "refuse"`).
    refused_positions: Mutex<Vec<String>>,
    /// What the times of [`Health::beat`] count from.
    born: Instant,
    /// Milliseconds after `born` of the last progress of the loop or a publication;
    /// [`NOT_STARTED`] until the loop first comes round (opening or migrating a large
    /// store is not a stall).
    last_beat_ms: AtomicU64,
    /// Longest time without progress before `/healthz` fails.
    stall_limit: Duration,
}

/// `last_beat_ms` before the first beat.
const NOT_STARTED: u64 = u64::MAX;

/// Why `/healthz` fails: the loop made no progress for longer than the limit.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Stalled {
    /// Seconds since the last progress.
    pub seconds: u64,
    /// The limit, seconds.
    pub limit_seconds: u64,
}

impl std::fmt::Display for Stalled {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "the consuming loop has made no progress for {}s, more than live.stall_limit = {}s; \
             /readyz and the log say what it waits for",
            self.seconds, self.limit_seconds
        )
    }
}

/// How fresh the published lists are, read from the metrics when readiness is asked.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Freshness {
    /// Messages waiting in the input topic, all partitions (`None` before the first
    /// watermark reading).
    pub consumer_lag: Option<i64>,
    /// Age in seconds of the oldest change not yet in a published list.
    pub staleness_seconds: f64,
}

/// One readiness check.
#[derive(Debug, Clone, Serialize, PartialEq, Eq)]
pub struct Check {
    /// What is checked.
    pub name: &'static str,
    /// Whether it passes.
    pub ok: bool,
    /// Why it fails (empty when it passes).
    pub detail: String,
}

impl Check {
    fn new(name: &'static str, problem: Option<String>) -> Check {
        Check {
            name,
            ok: problem.is_none(),
            detail: problem.unwrap_or_default(),
        }
    }
}

/// The `/readyz` answer.
#[derive(Debug, Clone, Serialize, PartialEq, Eq)]
pub struct Readiness {
    /// All checks pass.
    pub ready: bool,
    /// Which shard answers, in a sharded setup (absent otherwise), so a probe or an
    /// engineer reading one answer knows which instance it describes.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub shard: Option<ShardPlace>,
    /// Whether this instance delivers lists; false for a standby replica, which keeps its
    /// store current and answers lookups while another instance publishes.
    pub publishing: bool,
    /// Each check.
    pub checks: Vec<Check>,
}

/// A shard's place in a `/readyz` answer.
#[derive(Debug, Clone, Copy, Serialize, PartialEq, Eq)]
pub struct ShardPlace {
    /// This instance's shard index.
    pub index: u32,
    /// How many shards share the items.
    pub of: u32,
}

impl Health {
    /// Health tied to the shared broker state, judged by `limits`, of `shard`; alive
    /// while the loop makes progress at least every `stall_limit`.
    pub fn new(
        brokers: Arc<BrokerState>,
        limits: ReadinessConfig,
        shard: ShardSpec,
        stall_limit: Duration,
    ) -> Health {
        Health {
            refused_positions: Mutex::new(Vec::new()),
            born: Instant::now(),
            last_beat_ms: AtomicU64::new(NOT_STARTED),
            stall_limit,
            brokers,
            shard,
            limits,
            store_error: Mutex::new(None),
            consuming: AtomicBool::new(false),
            publishing: AtomicBool::new(true),
            stopping: AtomicBool::new(false),
            topic_problems: Mutex::new(vec!["the written topics have not been checked yet".to_string()]),
            failing_deliveries: Mutex::new(BTreeMap::new()),
        }
    }

    /// Records progress: the loop came round, or a publication chunk was settled.
    pub fn beat(&self) {
        self.last_beat_ms
            .store(self.born.elapsed().as_millis() as u64, Ordering::Relaxed);
    }

    /// `Err` once no progress was recorded for longer than the stall limit.
    pub fn liveness(&self, now: Instant) -> Result<(), Stalled> {
        let last = self.last_beat_ms.load(Ordering::Relaxed);
        if last == NOT_STARTED {
            return Ok(());
        }
        let since_born = now.saturating_duration_since(self.born).as_millis() as u64;
        let quiet = Duration::from_millis(since_born.saturating_sub(last));
        if quiet > self.stall_limit {
            Err(Stalled {
                seconds: quiet.as_secs(),
                limit_seconds: self.stall_limit.as_secs(),
            })
        } else {
            Ok(())
        }
    }

    /// Replaces the sentences naming the partitions refused for a position outside the
    /// log (empty: none).
    pub fn set_refused_positions(&self, refused: Vec<String>) {
        *self.refused_positions.lock().expect("health lock") = refused;
    }

    /// Records a failed store write (`Some`) or a good one (`None`).
    pub fn set_store_error(&self, error: Option<String>) {
        *self.store_error.lock().expect("health lock") = error;
    }

    /// Records whether this instance publishes (it holds the lease, or has none to hold)
    /// or stands by.
    pub fn set_publishing(&self, publishing: bool) {
        self.publishing.store(publishing, Ordering::Relaxed);
    }

    /// Records that the consumer holds an assignment and is fetching.
    pub fn set_consuming(&self, consuming: bool) {
        self.consuming.store(consuming, Ordering::Relaxed);
    }

    /// Records that shutdown began.
    pub fn set_stopping(&self) {
        self.stopping.store(true, Ordering::Relaxed);
    }

    /// Replaces the written-topic problems with the latest check's (empty: all fine).
    pub fn set_topic_problems(&self, problems: Vec<String>) {
        *self.topic_problems.lock().expect("health lock") = problems;
    }

    /// Records the outcome of one delivery attempt to `topic`: a failure starts (or
    /// continues) the topic's run of failures, a success ends it.
    pub fn note_delivery(&self, topic: &str, failure: Option<&str>) {
        let mut failing = self.failing_deliveries.lock().expect("health lock");
        match failure {
            None => {
                failing.remove(topic);
            }
            Some(reason) => {
                let entry = failing
                    .entry(topic.to_string())
                    .or_insert_with(|| (Instant::now(), String::new()));
                entry.1 = reason.to_string();
            }
        }
    }

    /// The current checks, with freshness judged against the configured limits.
    pub fn readiness(&self, freshness: &Freshness) -> Readiness {
        let checks = vec![
            Check::new("store", self.store_problem()),
            Check::new(
                "broker",
                (!self.brokers.reachable())
                    .then(|| "no broker answered recently; librdkafka keeps retrying".to_string()),
            ),
            Check::new(
                "consuming",
                (!self.consuming.load(Ordering::Relaxed))
                    .then(|| "no partitions of the input topic are assigned yet".to_string()),
            ),
            Check::new("topics", self.topics_problem()),
            Check::new("deliveries", self.delivery_problem(Instant::now())),
            Check::new("lag", self.lag_problem(freshness)),
            Check::new("staleness", self.staleness_problem(freshness)),
            Check::new("positions", self.positions_problem()),
            Check::new(
                "running",
                self.stopping
                    .load(Ordering::Relaxed)
                    .then(|| "shutting down".to_string()),
            ),
        ];
        Readiness {
            ready: checks.iter().all(|c| c.ok),
            shard: self.shard.is_sharded().then_some(ShardPlace {
                index: self.shard.shard,
                of: self.shard.shards,
            }),
            publishing: self.publishing.load(Ordering::Relaxed),
            checks,
        }
    }

    /// The last store write's error, and a malformed value the store's merge operators
    /// met (reported by RocksDB as corruption; it stays until the process restarts).
    fn store_problem(&self) -> Option<String> {
        let error = self.store_error.lock().expect("health lock").clone();
        let Some(place) = crate::store::merge::malformed_operand() else {
            return error;
        };
        let corruption =
            format!("the store holds a value its merge operator cannot read (corruption) at {place}");
        Some(match error {
            Some(e) => format!("{corruption}; {e}"),
            None => corruption,
        })
    }

    fn positions_problem(&self) -> Option<String> {
        let refused = self.refused_positions.lock().expect("health lock");
        (!refused.is_empty()).then(|| {
            format!(
                "not consumed until an operator decides (kafka.position_outside_log): {}",
                refused.join("; ")
            )
        })
    }

    fn topics_problem(&self) -> Option<String> {
        let problems = self.topic_problems.lock().expect("health lock");
        (!problems.is_empty()).then(|| problems.join("; "))
    }

    fn delivery_problem(&self, now: Instant) -> Option<String> {
        let failing = self.failing_deliveries.lock().expect("health lock");
        let limit = self.limits.max_delivery_failure;
        let stuck: Vec<String> = failing
            .iter()
            .filter(|(_, (since, _))| now.duration_since(*since) >= limit)
            .map(|(topic, (since, reason))| {
                format!(
                    "deliveries to topic {topic} have failed for {}s: {reason}",
                    now.duration_since(*since).as_secs()
                )
            })
            .collect();
        (!stuck.is_empty()).then(|| stuck.join("; "))
    }

    fn lag_problem(&self, f: &Freshness) -> Option<String> {
        let limit = self.limits.max_consumer_lag;
        match f.consumer_lag {
            Some(lag) if limit > 0 && lag > limit as i64 => Some(format!(
                "{lag} messages wait in the input topic, more than readiness.max_consumer_lag = {limit}"
            )),
            _ => None,
        }
    }

    fn staleness_problem(&self, f: &Freshness) -> Option<String> {
        let limit = self.limits.max_staleness;
        (limit > Duration::ZERO && f.staleness_seconds > limit.as_secs_f64()).then(|| {
            format!(
                "the oldest unpublished change is {:.0}s old, more than readiness.max_staleness = {}s",
                f.staleness_seconds,
                limit.as_secs()
            )
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn health(limits: ReadinessConfig) -> Health {
        let h = Health::new(
            Arc::new(BrokerState::default()),
            limits,
            ShardSpec::SINGLE,
            Duration::from_secs(60),
        );
        h.set_consuming(true);
        h.set_topic_problems(Vec::new());
        h
    }

    fn fresh() -> Freshness {
        Freshness {
            consumer_lag: Some(0),
            staleness_seconds: 0.0,
        }
    }

    fn failing(r: &Readiness) -> Vec<&str> {
        r.checks.iter().filter(|c| !c.ok).map(|c| c.name).collect()
    }

    #[test]
    fn a_healthy_service_is_ready_and_topics_start_unchecked() {
        assert!(health(ReadinessConfig::default()).readiness(&fresh()).ready);
        let new = Health::new(
            Arc::new(BrokerState::default()),
            ReadinessConfig::default(),
            ShardSpec { shards: 3, shard: 2 },
            Duration::from_secs(60),
        );
        new.set_consuming(true);
        assert_eq!(failing(&new.readiness(&fresh())), ["topics"]);
        // A shard names itself; one instance holding every item does not.
        let answer = serde_json::to_value(new.readiness(&fresh())).unwrap();
        assert_eq!(answer["shard"], serde_json::json!({"index": 2, "of": 3}));
        let single = serde_json::to_value(health(ReadinessConfig::default()).readiness(&fresh())).unwrap();
        assert!(single.get("shard").is_none(), "{single}");
    }

    #[test]
    fn lag_and_staleness_limits_name_the_setting() {
        let h = health(ReadinessConfig::default());
        let r = h.readiness(&Freshness {
            consumer_lag: Some(100_001),
            staleness_seconds: 121.0,
        });
        assert_eq!(failing(&r), ["lag", "staleness"]);
        assert!(r.checks[5].detail.contains("readiness.max_consumer_lag = 100000"));
        assert!(r.checks[6].detail.contains("readiness.max_staleness = 120s"));
        let off = health(ReadinessConfig {
            max_consumer_lag: 0,
            max_staleness: Duration::ZERO,
            ..ReadinessConfig::default()
        });
        assert!(
            off.readiness(&Freshness {
                consumer_lag: Some(i64::MAX),
                staleness_seconds: 1e9,
            })
            .ready
        );
    }

    #[test]
    fn deliveries_fail_readiness_only_after_the_limit_and_recover_on_success() {
        let h = health(ReadinessConfig {
            max_delivery_failure: Duration::from_secs(30),
            ..ReadinessConfig::default()
        });
        h.note_delivery("dead", Some("Broker: Unknown topic or partition"));
        assert!(h.readiness(&fresh()).ready, "a fresh failure is retried first");
        let later = Instant::now() + Duration::from_secs(31);
        let problem = h.delivery_problem(later).unwrap();
        assert!(
            problem.starts_with("deliveries to topic dead have failed for 3")
                && problem.contains("Unknown topic"),
            "{problem}"
        );
        h.note_delivery("dead", None);
        assert_eq!(h.delivery_problem(later), None);
    }

    #[test]
    fn a_refused_partition_fails_readiness_naming_it() {
        let h = health(ReadinessConfig::default());
        h.set_refused_positions(vec!["partition 0: the stored next offset 1000 is outside".into()]);
        let r = h.readiness(&fresh());
        assert_eq!(failing(&r), ["positions"]);
        let detail = &r.checks.iter().find(|c| c.name == "positions").unwrap().detail;
        assert!(
            detail.contains("kafka.position_outside_log") && detail.contains("partition 0"),
            "{detail}"
        );
        h.set_refused_positions(Vec::new());
        assert!(h.readiness(&fresh()).ready);
    }

    #[test]
    fn liveness_fails_only_after_the_stall_limit_without_progress() {
        let h = health(ReadinessConfig::default());
        let now = Instant::now();
        let much_later = now + Duration::from_secs(3600);
        assert_eq!(
            h.liveness(much_later),
            Ok(()),
            "not started yet: opening a store is no stall"
        );
        h.beat();
        assert_eq!(h.liveness(now), Ok(()));
        let stalled = h.liveness(now + Duration::from_secs(61)).unwrap_err();
        assert!(
            stalled.seconds >= 61 && stalled.limit_seconds == 60,
            "{stalled:?}"
        );
        assert!(
            stalled.to_string().contains("live.stall_limit = 60s"),
            "{stalled}"
        );
    }
}
