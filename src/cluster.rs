//! Item shards (docs/design.md, "Shards"): which instance owns an item's list and row.
//! Every shard reads every event and keeps every user's history; it keeps only the pairs
//! that touch an item it owns and publishes only its own items' lists.

use std::fmt;

/// One instance's place among the shards: `shard` of `shards` (0-based).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ShardSpec {
    /// How many shards share the items.
    pub shards: u32,
    /// This instance's index, below `shards`.
    pub shard: u32,
}

impl ShardSpec {
    /// The whole catalogue in one instance.
    pub const SINGLE: ShardSpec = ShardSpec { shards: 1, shard: 0 };

    /// Whether more than one instance shares the items.
    pub fn is_sharded(&self) -> bool {
        self.shards > 1
    }

    /// Whether this shard owns the item named `item`.
    pub fn owns(&self, item: &str) -> bool {
        owner(item, self.shards) == self.shard
    }

    /// The consumer group that holds this shard's committed input offsets, read by lag
    /// tools: `<group>.shard-<i>-of-<N>`. A sharded instance joins no group to consume (it
    /// assigns itself every partition), so the name only has to be its own.
    pub fn offsets_group(&self, group: &str) -> String {
        format!("{group}.shard-{}-of-{}", self.shard, self.shards)
    }

    /// The consumer group whose one-partition lease decides which instance of this shard
    /// publishes: `<group>.shard-<i>-lease`.
    pub fn lease_group(&self, group: &str) -> String {
        format!("{group}.shard-{}-lease", self.shard)
    }

    /// Whether this instance produces dead letters: only shard 0 of a sharded setup
    /// does, so each refused event reaches the dead-letter topic once (every shard counts
    /// it).
    pub fn produces_dead_letters(&self) -> bool {
        self.shard == 0
    }
}

impl fmt::Display for ShardSpec {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "shard {} of {}", self.shard, self.shards)
    }
}

/// The shard owning `item`: the 64-bit FNV-1a hash of the item id's UTF-8 bytes, modulo
/// `shards`. Stable across versions, machines and languages (the README gives test
/// vectors), so producers and readers can route by it.
pub fn owner(item: &str, shards: u32) -> u32 {
    (fnv1a_64(item.as_bytes()) % u64::from(shards.max(1))) as u32
}

/// 64-bit FNV-1a (Fowler, Noll and Vo): for each byte, xor it in, then multiply by the
/// FNV prime. Chosen for being a few lines in any language, not for cryptographic use.
fn fnv1a_64(bytes: &[u8]) -> u64 {
    const OFFSET_BASIS: u64 = 0xcbf2_9ce4_8422_2325;
    const PRIME: u64 = 0x0000_0100_0000_01b3;
    bytes
        .iter()
        .fold(OFFSET_BASIS, |h, &b| (h ^ u64::from(b)).wrapping_mul(PRIME))
}

/// The ordinal a Kubernetes StatefulSet puts at the end of a pod's host name
/// (`simtide-2` → 2), if the name ends in `-<digits>`.
pub fn host_ordinal(host: &str) -> Option<u32> {
    let (_, digits) = host.trim().rsplit_once('-')?;
    if digits.is_empty() || !digits.bytes().all(|b| b.is_ascii_digit()) {
        return None;
    }
    digits.parse().ok()
}

/// This machine's host name, as the kernel reports it.
pub fn host_name() -> Option<String> {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .ok()
        .map(|h| h.trim().to_string())
        .filter(|h| !h.is_empty())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fnv1a_matches_published_test_vectors() {
        // 64-bit FNV-1a test vectors of the FNV reference test suite (Noll's FNV page and
        // draft-eastlake-fnv), from memory: "" → cbf29ce484222325, "a" → af63dc4c8601ec8c,
        // "foobar" → 85944171f73967e8.
        assert_eq!(fnv1a_64(b""), 0xcbf29ce484222325);
        assert_eq!(fnv1a_64(b"a"), 0xaf63dc4c8601ec8c);
        assert_eq!(fnv1a_64(b"foobar"), 0x85944171f73967e8);
        // The README's owner column.
        assert_eq!([owner("", 3), owner("a", 3), owner("foobar", 3)], [2, 1, 0]);
    }

    #[test]
    fn owners_spread_and_stay_put() {
        assert_eq!(owner("anything", 1), 0);
        let mut counts = [0u32; 3];
        for i in 0..3000 {
            counts[owner(&format!("item-{i}"), 3) as usize] += 1;
        }
        assert!(counts.iter().all(|&c| (900..=1100).contains(&c)), "{counts:?}");
        let spec = ShardSpec {
            shards: 3,
            shard: owner("foobar", 3),
        };
        assert!(spec.owns("foobar"));
        assert_eq!(spec.to_string(), format!("shard {} of 3", spec.shard));
        assert_eq!(
            ShardSpec { shards: 3, shard: 1 }.offsets_group("simtide"),
            "simtide.shard-1-of-3"
        );
        assert_eq!(
            ShardSpec { shards: 3, shard: 1 }.lease_group("simtide"),
            "simtide.shard-1-lease"
        );
        assert!(ShardSpec::SINGLE.produces_dead_letters());
        assert!(!ShardSpec { shards: 3, shard: 2 }.produces_dead_letters());
    }

    #[test]
    fn ordinals_come_from_the_end_of_the_host_name() {
        assert_eq!(host_ordinal("simtide-0"), Some(0));
        assert_eq!(host_ordinal("simtide-ratings-12\n"), Some(12));
        assert_eq!(host_ordinal("simtide"), None);
        assert_eq!(host_ordinal("simtide-"), None);
        assert_eq!(host_ordinal("simtide-2a"), None);
    }
}
