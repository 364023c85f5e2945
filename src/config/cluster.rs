//! `[cluster]`: which item shard this instance is (docs/design.md, "Shards").

use std::time::Duration;

use anyhow::{bail, Result};
use serde::{Deserialize, Serialize};

use super::duration_text;
use crate::cluster::{host_ordinal, ShardSpec};

/// `[cluster]`: how many instances share the items, and which one this is.
#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
#[serde(default, deny_unknown_fields)]
pub struct ClusterConfig {
    /// Instances sharing the items; 1 keeps every item in this instance.
    pub shards: u32,
    /// This instance's index (0-based). When unset with more than one shard, taken from
    /// the ordinal at the end of the host name, as a Kubernetes StatefulSet names pods.
    pub shard: Option<u32>,
    /// A one-partition topic whose consumer-group lease decides which of the instances
    /// of this shard publishes (standby replicas); empty: this instance publishes alone.
    pub lease_topic: String,
    /// How long the lease outlives a holder that stopped answering: the session timeout
    /// of the lease group, and so the failover time after a crash.
    #[serde(with = "duration_text")]
    pub lease_timeout: Duration,
}

/// Shortest `cluster.lease_timeout`: librdkafka heartbeats every third of it, and a
/// shorter session would expire on an ordinary pause.
const SHORTEST_LEASE_TIMEOUT: Duration = Duration::from_secs(1);

impl Default for ClusterConfig {
    fn default() -> Self {
        ClusterConfig {
            shards: 1,
            shard: None,
            lease_topic: String::new(),
            lease_timeout: Duration::from_secs(10),
        }
    }
}

impl ClusterConfig {
    /// Fills an unset `shard` of a sharded setup from `host`'s ordinal, then checks both
    /// keys, naming the one at fault.
    pub fn resolve(&mut self, host: Option<&str>) -> Result<()> {
        if self.shards == 0 {
            bail!("cluster.shards must be at least 1, got 0");
        }
        if self.shard.is_none() && self.shards > 1 {
            let Some(ordinal) = host.and_then(host_ordinal) else {
                bail!(
                    "cluster.shard is not set and the host name {} does not end in -<number>: set \
                     cluster.shard (0 to {}) or SIMTIDE_CLUSTER__SHARD",
                    host.map_or("(unknown)".to_string(), |h| format!("{h:?}")),
                    self.shards - 1
                );
            };
            self.shard = Some(ordinal);
        }
        if self.lease_timeout < SHORTEST_LEASE_TIMEOUT {
            bail!(
                "cluster.lease_timeout must be at least {:?}, got {:?}",
                SHORTEST_LEASE_TIMEOUT,
                self.lease_timeout
            );
        }
        if let Some(shard) = self.shard {
            if shard >= self.shards {
                bail!(
                    "cluster.shard is {shard}, but cluster.shards is {}: shards are numbered 0 to {}",
                    self.shards,
                    self.shards - 1
                );
            }
        }
        Ok(())
    }

    /// This instance's place among the shards (after [`ClusterConfig::resolve`]).
    pub fn spec(&self) -> ShardSpec {
        ShardSpec {
            shards: self.shards,
            shard: self.shard.unwrap_or(0),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn resolved(shards: u32, shard: Option<u32>, host: Option<&str>) -> Result<ShardSpec> {
        let mut c = ClusterConfig {
            shards,
            shard,
            ..ClusterConfig::default()
        };
        c.resolve(host)?;
        Ok(c.spec())
    }

    #[test]
    fn the_shard_comes_from_the_key_or_the_host_name() {
        assert_eq!(resolved(1, None, None).unwrap(), ShardSpec::SINGLE);
        assert_eq!(
            resolved(3, Some(2), Some("box-0")).unwrap(),
            ShardSpec { shards: 3, shard: 2 }
        );
        assert_eq!(
            resolved(3, None, Some("simtide-1")).unwrap(),
            ShardSpec { shards: 3, shard: 1 }
        );
        let no_ordinal = resolved(3, None, Some("laptop")).unwrap_err().to_string();
        assert!(no_ordinal.contains("cluster.shard is not set") && no_ordinal.contains("\"laptop\""));
        let too_big = resolved(3, None, Some("simtide-3")).unwrap_err().to_string();
        assert!(
            too_big.starts_with("cluster.shard is 3, but cluster.shards is 3"),
            "{too_big}"
        );
        assert!(resolved(0, None, None)
            .unwrap_err()
            .to_string()
            .starts_with("cluster.shards"));
    }
}
