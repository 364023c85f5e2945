//! The store's size and upkeep: RocksDB's own size figures for the metrics, and a full
//! compaction on an operator's request.

use anyhow::Result;

use crate::store::{Store, ALL_CFS, CF_PAIRS};

/// Size figures of a store.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct StoreStats {
    /// Bytes of SST files over every column family.
    pub sst_bytes: u64,
    /// Bytes compaction still has to rewrite (RocksDB's estimate).
    pub pending_compaction_bytes: u64,
    /// Rating pairs (RocksDB's key estimate, halved: pairs are stored under both orders).
    pub rating_pairs_estimate: u64,
    /// Free bytes on the store's filesystem.
    pub disk_available_bytes: u64,
}

impl Store {
    /// Size and shape of the store, from RocksDB's own properties.
    pub fn stats(&self) -> Result<StoreStats> {
        let mut stats = StoreStats::default();
        for name in ALL_CFS {
            let cf = self.cf(name);
            let int = |p: &str| self.db.property_int_value_cf(cf, p).map(|v| v.unwrap_or(0));
            stats.sst_bytes += int("rocksdb.total-sst-files-size")?;
            stats.pending_compaction_bytes += int("rocksdb.estimate-pending-compaction-bytes")?;
            if name == CF_PAIRS {
                // Every pair is stored under both orders.
                stats.rating_pairs_estimate = int("rocksdb.estimate-num-keys")? / 2;
            }
        }
        stats.disk_available_bytes = crate::runtime::diskspace::available_bytes(&self.dir).unwrap_or(0);
        Ok(stats)
    }

    /// Compacts every column family (an operator action; the store stays usable).
    pub fn compact(&self) {
        for name in ALL_CFS {
            self.db
                .compact_range_cf(self.cf(name), None::<&[u8]>, None::<&[u8]>);
        }
    }
}
