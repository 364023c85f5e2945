//! The one TOML configuration file, its documented defaults and its environment overrides.
//!
//! Every key has a default, so an empty file (or no file) is a valid configuration. Any key
//! can be overridden by an environment variable named `SIMTIDE_<SECTION>__<KEY>`, e.g.
//! `SIMTIDE_SIMILARITY__NEIGHBORS=20`. Unknown keys are refused by name, so a typo never
//! silently falls back to a default.

pub mod cluster;
pub mod duration_text;
pub mod secrets;
pub mod service;
pub mod size_text;

use std::path::Path;

use anyhow::{bail, Context, Result};
use serde::{Deserialize, Serialize};

use simtide_core::decode::Limits;
use simtide_core::engine::EngineSettings;
use simtide_core::score::ListSettings;
pub use simtide_core::score::PurchaseScore;
use size_text::ByteSize;

pub use service::{
    HttpConfig, KafkaConfig, LiveConfig, LogConfig, LogFormat, OutsideLogPolicy, PublishConfig,
    ReadinessConfig, StartPosition, StoreConfig,
};

/// Prefix of the environment variables that override configuration keys.
pub const ENV_PREFIX: &str = "SIMTIDE_";

/// The whole configuration, one field per TOML section.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct Config {
    /// How statistics are kept and how scores become published lists.
    pub similarity: SimilarityConfig,
    /// Limits applied when decoding events.
    pub input: InputConfig,
    /// How a backfill cuts its input into batches.
    pub backfill: BackfillConfig,
    /// How recommendations are predicted from the lists.
    pub recommend: RecommendConfig,
    /// Where the live service keeps its store.
    pub store: StoreConfig,
    /// The event bus and its topics.
    pub kafka: KafkaConfig,
    /// Micro-batching and lifecycle of the live service.
    pub live: LiveConfig,
    /// Publication cycles of the live service.
    pub publish: PublishConfig,
    /// The HTTP listener.
    pub http: HttpConfig,
    /// What `/readyz` requires.
    pub readiness: ReadinessConfig,
    /// Log line format.
    pub log: LogConfig,
    /// Which item shard this instance is.
    pub cluster: cluster::ClusterConfig,
}

/// `[similarity]`: the maths (docs/design.md, "Adjusted cosine over co-raters") and the shape of
/// published lists ("Publication").
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct SimilarityConfig {
    /// Length of each published list (top-k).
    pub neighbors: usize,
    /// Pairs with fewer co-raters (or co-buyers) than this are not published.
    pub min_common_users: u64,
    /// Largest allowed |mean − applied center| of a user after a batch; 0 means exact.
    pub recenter_tolerance: f64,
    /// How many of a user's most recent items take part in pairs; 0 means no cut.
    pub max_items_per_user: usize,
    /// Damping λ of sim·n/(n+λ) (significance weighting: a pair seen by few co-raters
    /// counts for less); 0 turns it off. The default, 100, was chosen by measurement
    /// (README, "Choosing a ranking").
    pub damping: f64,
    /// Lowest valid rating value.
    pub rating_min: f64,
    /// Highest valid rating value.
    pub rating_max: f64,
    /// Only neighbors scoring strictly above this are published.
    pub min_score: f64,
    /// Score used for the purchase signal.
    pub purchase_score: PurchaseScore,
}

impl Default for SimilarityConfig {
    fn default() -> Self {
        SimilarityConfig {
            neighbors: 50,
            min_common_users: 3,
            recenter_tolerance: 0.05,
            max_items_per_user: 500,
            damping: 100.0,
            rating_min: 1.0,
            rating_max: 5.0,
            min_score: 0.0,
            purchase_score: PurchaseScore::Cosine,
        }
    }
}

/// `[input]`: limits on incoming events.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct InputConfig {
    /// Longest accepted user or item id, in bytes of UTF-8.
    pub max_id_bytes: usize,
    /// Largest accepted Kafka message (key, value and headers). A larger one is
    /// dead-lettered as a description without its content, which could not be
    /// produced again anyway.
    pub max_message_bytes: ByteSize,
    /// Longest time an event's `at` may lie after the record's broker timestamp (the
    /// clock, for files); a later one is refused as `too_far_ahead`.
    #[serde(with = "duration_text")]
    pub max_future_skew: std::time::Duration,
}

impl Default for InputConfig {
    fn default() -> Self {
        InputConfig {
            max_id_bytes: 256,
            max_message_bytes: ByteSize(1 << 20),
            max_future_skew: std::time::Duration::from_secs(3600),
        }
    }
}

/// `[backfill]`: batching of historical replays.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct BackfillConfig {
    /// Records per batch. Batches start at fixed multiples of this from the start of each
    /// file, so an interrupted run resumes on the same boundaries.
    pub batch_events: u64,
    /// Memory a backfill may fill with applied batches before it writes them out as one
    /// segment (pair sums, user histories, ids). A larger budget means fewer, larger
    /// segments: fewer merges for RocksDB and, when everything fits, lists scored from one
    /// sorted set of files. The result does not depend on it.
    pub memory_budget: ByteSize,
    /// Whether the rejects file keeps each refused record's text. Off by default: the
    /// text is personal data that erasure does not reach; the file and line (or
    /// partition and offset) find the record in its source.
    pub rejects_keep_text: bool,
}

/// Smallest accepted `backfill.memory_budget` and `live.memory_budget`: with less, every
/// batch is written on its own anyway (tests use it to cut many segments from small files).
pub const MIN_MEMORY_BUDGET: ByteSize = ByteSize(1 << 20);

impl Default for BackfillConfig {
    fn default() -> Self {
        BackfillConfig {
            batch_events: 50_000,
            memory_budget: ByteSize(2 << 30),
            rejects_keep_text: false,
        }
    }
}

/// Which of an item's neighbors a prediction draws on.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "lowercase")]
pub enum Neighborhood {
    /// The user's items that appear in the item's published list (what serving has).
    #[default]
    List,
    /// The `similarity.neighbors` most similar items among those the user rated, scored
    /// from the stored pair sums (the neighborhood of Sarwar et al. 2001).
    Rated,
}

/// How recommendations rank their candidates (docs/design.md, "Recommendations").
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum Ranking {
    /// Σ s(i,j)^ρ over the user's items j whose list holds the candidate i.
    #[default]
    SimilarityMass,
    /// The weighted-sum predicted rating (for rating prediction).
    PredictedRating,
}

impl Ranking {
    /// The name used in the configuration and in answers.
    pub fn as_str(&self) -> &'static str {
        match self {
            Ranking::SimilarityMass => "similarity_mass",
            Ranking::PredictedRating => "predicted_rating",
        }
    }
}

/// `[recommend]`: ranking and prediction from published lists.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct RecommendConfig {
    /// Exponent ρ applied to similarities in the weighted sum (case amplification;
    /// 1 = off). The sign of a similarity is kept.
    pub amplification: f64,
    /// How many items a recommendation returns by default.
    pub count: usize,
    /// Which neighbors predictions draw on.
    pub neighborhood: Neighborhood,
    /// How candidates are ranked.
    pub ranking: Ranking,
    /// Similarity mass only: divide each list's weights by their sum first (on by
    /// default, chosen by measurement: README, "Choosing a ranking").
    pub normalise_lists: bool,
    /// Weight of the purchase lists of the user's bought items in the similarity mass (and
    /// whether they add candidates at all): 0 leaves them out.
    pub purchase_weight: f64,
}

impl Default for RecommendConfig {
    fn default() -> Self {
        RecommendConfig {
            amplification: 1.0,
            count: 10,
            neighborhood: Neighborhood::List,
            ranking: Ranking::default(),
            normalise_lists: true,
            purchase_weight: 0.0,
        }
    }
}

/// Largest rating range accepted: it keeps the fixed-point pair sums far from overflow
/// (see `engine::fixed`).
pub const MAX_RATING_RANGE: f64 = 1000.0;

impl Config {
    /// The settings that shape the stored statistics (part of the store's fingerprint).
    pub fn engine_settings(&self) -> EngineSettings {
        EngineSettings {
            recenter_tolerance: self.similarity.recenter_tolerance,
            max_items_per_user: self.similarity.max_items_per_user,
        }
    }

    /// The settings that turn stored sums into published lists.
    pub fn list_settings(&self) -> ListSettings {
        let s = &self.similarity;
        ListSettings {
            neighbors: s.neighbors,
            min_common_users: s.min_common_users,
            damping: s.damping,
            min_score: s.min_score,
            purchase_score: s.purchase_score,
        }
    }

    /// The limits every incoming event is validated against.
    pub fn limits(&self) -> Limits {
        Limits {
            max_id_bytes: self.input.max_id_bytes,
            rating_min: self.similarity.rating_min,
            rating_max: self.similarity.rating_max,
            max_record_bytes: self.input.max_message_bytes.0 as usize,
            max_future_skew_ns: i64::try_from(self.input.max_future_skew.as_nanos()).unwrap_or(i64::MAX),
        }
    }

    /// Loads the file (if given), applies `SIMTIDE_*` overrides from the process
    /// environment, and validates the result.
    pub fn load(path: Option<&Path>) -> Result<Config> {
        let text = match path {
            Some(p) => std::fs::read_to_string(p)
                .with_context(|| format!("cannot read configuration file {}", p.display()))?,
            None => String::new(),
        };
        let origin = path.map_or("<defaults>".to_string(), |p| p.display().to_string());
        Config::from_toml_and_env(&text, &origin, std::env::vars())
    }

    /// Parses TOML text, applies overrides from the given `(name, value)` pairs and
    /// validates. Separate from `load` so tests can pass their own environment.
    pub fn from_toml_and_env(
        text: &str,
        origin: &str,
        env: impl IntoIterator<Item = (String, String)>,
    ) -> Result<Config> {
        let mut table: toml::Table =
            toml::from_str(text).with_context(|| format!("{origin}: not valid TOML"))?;
        for (name, value) in env {
            let Some(rest) = name.strip_prefix(ENV_PREFIX) else {
                continue;
            };
            let Some((section, key)) = rest.split_once("__") else {
                continue;
            };
            let section = section.to_ascii_lowercase();
            let key = key.to_ascii_lowercase();
            // `SIMTIDE_KAFKA__CLIENT__SASL_PASSWORD` sets `sasl.password` in [kafka.client]:
            // librdkafka's property names use dots where environment names cannot.
            let (path, key, parsed) = match key.strip_prefix("client__") {
                Some(property) if section == "kafka" => (
                    vec![section, "client".to_string()],
                    property.replace('_', "."),
                    toml::Value::String(value),
                ),
                _ => (vec![section], key, parse_env_value(&value)),
            };
            let mut target = &mut table;
            for part in &path {
                let entry = target
                    .entry(part.clone())
                    .or_insert_with(|| toml::Value::Table(toml::Table::new()));
                target = match entry {
                    toml::Value::Table(t) => t,
                    _ => bail!("{name}: [{}] is not a table in {origin}", path.join(".")),
                };
            }
            target.insert(key, parsed);
        }
        // The path of the offending key goes into the message: toml's own error loses it
        // once environment overrides have been merged into the table.
        let mut config: Config = serde_path_to_error::deserialize(toml::Value::Table(table)).map_err(
            |e: serde_path_to_error::Error<toml::de::Error>| {
                anyhow::anyhow!("{origin}: {}: {}", e.path(), e.inner().message())
            },
        )?;
        config.cluster.resolve(crate::cluster::host_name().as_deref())?;
        config.read_admin_token_file()?;
        config.validate()?;
        Ok(config)
    }

    /// Reads `http.admin_token` from `http.admin_token_file` when that is set (a mounted
    /// Secret), so the token never sits in the configuration file or the environment.
    fn read_admin_token_file(&mut self) -> Result<()> {
        let path = &self.http.admin_token_file;
        if path.is_empty() {
            return Ok(());
        }
        if !self.http.admin_token.is_empty() {
            bail!("http.admin_token and http.admin_token_file are both set: keep one");
        }
        let text = std::fs::read_to_string(path)
            .with_context(|| format!("http.admin_token_file: cannot read {path}"))?;
        let token = text.trim_end_matches(['\n', '\r']);
        if token.is_empty() {
            bail!("http.admin_token_file: {path} is empty");
        }
        self.http.admin_token = token.to_string();
        Ok(())
    }

    /// Refuses values that would make the maths meaningless, naming the key.
    pub fn validate(&self) -> Result<()> {
        let s = &self.similarity;
        if !(s.rating_min.is_finite() && s.rating_max.is_finite() && s.rating_min < s.rating_max) {
            bail!(
                "similarity.rating_min ({}) must be a finite number below similarity.rating_max ({})",
                s.rating_min,
                s.rating_max
            );
        }
        if s.rating_max - s.rating_min > MAX_RATING_RANGE {
            bail!(
                "similarity.rating_max − similarity.rating_min is {}, more than the supported range {MAX_RATING_RANGE}",
                s.rating_max - s.rating_min
            );
        }
        if !(s.recenter_tolerance.is_finite() && s.recenter_tolerance >= 0.0) {
            bail!(
                "similarity.recenter_tolerance must be a finite number ≥ 0, got {}",
                s.recenter_tolerance
            );
        }
        if !(s.damping.is_finite() && s.damping >= 0.0) {
            bail!(
                "similarity.damping must be a finite number ≥ 0, got {}",
                s.damping
            );
        }
        if !s.min_score.is_finite() {
            bail!("similarity.min_score must be finite, got {}", s.min_score);
        }
        if s.neighbors == 0 {
            bail!("similarity.neighbors must be at least 1");
        }
        if !(self.recommend.amplification.is_finite() && self.recommend.amplification > 0.0) {
            bail!(
                "recommend.amplification must be a finite number > 0, got {}",
                self.recommend.amplification
            );
        }
        let w = self.recommend.purchase_weight;
        if !(w.is_finite() && w >= 0.0) {
            bail!("recommend.purchase_weight must be a finite number ≥ 0 (0 = purchase lists take no part), got {w}");
        }
        if self.input.max_id_bytes == 0 {
            bail!("input.max_id_bytes must be at least 1");
        }
        if self.input.max_message_bytes.0 < 1024 {
            bail!(
                "input.max_message_bytes must be at least 1KiB, got {}",
                self.input.max_message_bytes
            );
        }
        if self.backfill.batch_events == 0 {
            bail!("backfill.batch_events must be at least 1");
        }
        for (key, budget) in [
            ("backfill.memory_budget", self.backfill.memory_budget),
            ("live.memory_budget", self.live.memory_budget),
        ] {
            if budget < MIN_MEMORY_BUDGET {
                bail!("{key} must be at least {MIN_MEMORY_BUDGET}, got {budget}");
            }
        }
        self.validate_service()
    }

    /// The live-service sections: names that must be set, counts that must be positive.
    fn validate_service(&self) -> Result<()> {
        let k = &self.kafka;
        for (key, value) in [
            ("kafka.brokers", &k.brokers),
            ("kafka.group", &k.group),
            ("kafka.input_topic", &k.input_topic),
            ("kafka.output_topic", &k.output_topic),
            ("kafka.purchase_output_topic", &k.purchase_output_topic),
            ("kafka.dead_letter_topic", &k.dead_letter_topic),
            ("store.dir", &self.store.dir),
        ] {
            if value.trim().is_empty() {
                bail!("{key} must not be empty");
            }
        }
        let topics = [
            &k.input_topic,
            &k.output_topic,
            &k.purchase_output_topic,
            &k.dead_letter_topic,
        ];
        for (i, a) in topics.iter().enumerate() {
            if topics[i + 1..].contains(a) {
                bail!("kafka topics must differ from each other: \"{a}\" is used twice");
            }
        }
        if k.topic_partitions < 1 || k.topic_replication < 1 {
            bail!("kafka.topic_partitions and kafka.topic_replication must be at least 1");
        }
        if self.live.batch_events == 0 {
            bail!("live.batch_events must be at least 1");
        }
        if self.publish.kept_candidates < self.similarity.neighbors {
            bail!(
                "publish.kept_candidates ({}) must be at least similarity.neighbors ({}): a row keeps more candidates than its list holds",
                self.publish.kept_candidates,
                self.similarity.neighbors
            );
        }
        if self.http.max_concurrent_lookups == 0 {
            bail!("http.max_concurrent_lookups must be at least 1");
        }
        if self.http.max_connections == 0 {
            bail!("http.max_connections must be at least 1");
        }
        for (key, d) in [
            ("publish.interval", self.publish.interval),
            ("live.shutdown_timeout", self.live.shutdown_timeout),
            ("live.delivery_timeout", self.live.delivery_timeout),
            ("live.stall_limit", self.live.stall_limit),
            ("http.request_timeout", self.http.request_timeout),
            ("http.header_timeout", self.http.header_timeout),
            ("kafka.dead_letter_retention", self.kafka.dead_letter_retention),
            (
                "readiness.max_delivery_failure",
                self.readiness.max_delivery_failure,
            ),
        ] {
            if d.is_zero() {
                bail!("{key} must be longer than 0");
            }
        }
        if self.http.listen.parse::<std::net::SocketAddr>().is_err() {
            bail!(
                "http.listen: \"{}\" is not an address:port such as 127.0.0.1:7461",
                self.http.listen
            );
        }
        Ok(())
    }
}

/// Environment values are strings; read them as TOML scalars where they parse as one
/// (numbers, booleans), otherwise as plain strings.
fn parse_env_value(raw: &str) -> toml::Value {
    let wrapped = format!("v = {raw}");
    match toml::from_str::<toml::Table>(&wrapped) {
        Ok(mut t) => t.remove("v").unwrap_or_else(|| toml::Value::String(raw.into())),
        Err(_) => toml::Value::String(raw.to_string()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn env(pairs: &[(&str, &str)]) -> Vec<(String, String)> {
        pairs
            .iter()
            .map(|(a, b)| (a.to_string(), b.to_string()))
            .collect()
    }

    #[test]
    fn empty_file_gives_documented_defaults() {
        let c = Config::from_toml_and_env("", "t", env(&[])).unwrap();
        assert_eq!(c.similarity.neighbors, 50);
        assert_eq!(c.similarity.min_common_users, 3);
        assert_eq!(c.similarity.recenter_tolerance, 0.05);
        assert_eq!(c.similarity.max_items_per_user, 500);
        assert_eq!(c.input.max_id_bytes, 256);
    }

    #[test]
    fn environment_overrides_file() {
        let c = Config::from_toml_and_env(
            "[similarity]\nneighbors = 30\n",
            "t",
            env(&[
                ("SIMTIDE_SIMILARITY__NEIGHBORS", "20"),
                ("SIMTIDE_SIMILARITY__PURCHASE_SCORE", "log_likelihood"),
                ("OTHER_VAR", "x"),
            ]),
        )
        .unwrap();
        assert_eq!(c.similarity.neighbors, 20);
        assert_eq!(c.similarity.purchase_score, PurchaseScore::LogLikelihood);
    }

    #[test]
    fn unknown_key_is_named() {
        let err = Config::from_toml_and_env("[similarity]\nneigbors = 3\n", "t", env(&[]))
            .unwrap_err()
            .to_string();
        assert!(err.contains("neigbors"), "{err}");
    }

    #[test]
    fn kafka_client_properties_come_from_the_environment_with_dots() {
        let c = Config::from_toml_and_env(
            "[kafka.client]\n\"security.protocol\" = \"SASL_SSL\"\n",
            "t",
            env(&[
                ("SIMTIDE_KAFKA__CLIENT__SASL_PASSWORD", "quillwort-7-harrow"),
                ("SIMTIDE_PUBLISH__INTERVAL", "2s"),
            ]),
        )
        .unwrap();
        assert_eq!(c.kafka.client["security.protocol"], "SASL_SSL");
        assert_eq!(c.kafka.client["sasl.password"], "quillwort-7-harrow");
        assert_eq!(c.publish.interval, std::time::Duration::from_secs(2));
    }

    #[test]
    fn fewer_kept_candidates_than_neighbors_are_refused_by_name() {
        let err = Config::from_toml_and_env(
            "[similarity]\nneighbors = 20\n[publish]\nkept_candidates = 10\n",
            "t",
            [],
        )
        .unwrap_err()
        .to_string();
        assert!(
            err.contains("publish.kept_candidates (10) must be at least similarity.neighbors (20)"),
            "{err}"
        );
    }

    #[test]
    fn a_topic_used_twice_is_refused() {
        let err = Config::from_toml_and_env("[kafka]\noutput_topic = \"shop-events\"\n", "t", [])
            .unwrap_err()
            .to_string();
        assert!(err.contains("\"shop-events\" is used twice"), "{err}");
    }

    #[test]
    fn inverted_scale_is_refused_by_name() {
        let err = Config::from_toml_and_env("[similarity]\nrating_min = 5\nrating_max = 1\n", "t", [])
            .unwrap_err()
            .to_string();
        assert!(err.contains("similarity.rating_min"), "{err}");
    }
}
