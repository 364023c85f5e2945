//! The settings that shape stored statistics, remembered by a store so that reopening it
//! with other ones is refused.

use serde::{Deserialize, Serialize};

use crate::cluster::ShardSpec;
use crate::config::Config;

/// The settings that shape stored statistics. A store remembers them; reopening it with
/// different ones is refused, because the sums already stored would not match.
#[derive(Debug, Clone, Copy, Serialize, Deserialize, PartialEq)]
pub struct StatsFingerprint {
    /// similarity.rating_min
    pub rating_min: f64,
    /// similarity.rating_max
    pub rating_max: f64,
    /// similarity.recenter_tolerance
    pub recenter_tolerance: f64,
    /// similarity.max_items_per_user
    pub max_items_per_user: usize,
    /// cluster.shards (stores written before shards existed hold every item: 1)
    #[serde(default = "one_shard")]
    pub shards: u32,
    /// cluster.shard
    #[serde(default)]
    pub shard: u32,
}

fn one_shard() -> u32 {
    1
}

impl StatsFingerprint {
    /// The fingerprint a configuration asks for.
    pub fn from_config(config: &Config) -> StatsFingerprint {
        let s = &config.similarity;
        StatsFingerprint {
            rating_min: s.rating_min,
            rating_max: s.rating_max,
            recenter_tolerance: s.recenter_tolerance,
            max_items_per_user: s.max_items_per_user,
            shards: config.cluster.spec().shards,
            shard: config.cluster.spec().shard,
        }
    }

    /// The shard whose items the store holds.
    pub fn shard_spec(&self) -> ShardSpec {
        ShardSpec {
            shards: self.shards,
            shard: self.shard,
        }
    }

    /// One sentence per setting that differs between the stored and the asked-for values.
    pub fn differences(&self, asked: &StatsFingerprint) -> Vec<String> {
        let mut found = self.similarity_differences(asked);
        if self.shard_spec() != asked.shard_spec() {
            found.push(format!(
                "cluster: the store holds the items of {}, the configuration says {}",
                self.shard_spec(),
                asked.shard_spec()
            ));
        }
        found
    }

    /// [`StatsFingerprint::differences`] of the statistics settings alone.
    pub(crate) fn similarity_differences(&self, asked: &StatsFingerprint) -> Vec<String> {
        [
            (
                "rating_min",
                self.rating_min.to_string(),
                asked.rating_min.to_string(),
            ),
            (
                "rating_max",
                self.rating_max.to_string(),
                asked.rating_max.to_string(),
            ),
            (
                "recenter_tolerance",
                self.recenter_tolerance.to_string(),
                asked.recenter_tolerance.to_string(),
            ),
            (
                "max_items_per_user",
                self.max_items_per_user.to_string(),
                asked.max_items_per_user.to_string(),
            ),
        ]
        .into_iter()
        .filter(|(_, stored, wanted)| stored != wanted)
        .map(|(name, stored, wanted)| {
            format!("similarity.{name}: the store was built with {stored}, the configuration says {wanted}")
        })
        .collect()
    }
}
