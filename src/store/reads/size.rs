//! The store's size and upkeep: RocksDB's own size figures for the metrics, and a full
//! compaction on an operator's request.

use anyhow::Result;

use crate::store::row_blocks::{decode_block_into, split_block_key};
use crate::store::{Store, ALL_CFS, CF_PAIRS};

/// Rows at which [`Store::stats`] samples the rating blocks, and blocks sampled in all.
const SAMPLE_ROWS: u64 = 16;
const SAMPLED_BLOCKS: u64 = 64;

/// Size figures of a store.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct StoreStats {
    /// Bytes of SST files over every column family.
    pub sst_bytes: u64,
    /// Bytes compaction still has to rewrite (RocksDB's estimate).
    pub pending_compaction_bytes: u64,
    /// Rating pairs, estimated: RocksDB's estimate of the row blocks, times the partners
    /// per block in a sample of blocks spread over the rows, halved (pairs are stored
    /// under both orders).
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
                let blocks = int("rocksdb.estimate-num-keys")?;
                stats.rating_pairs_estimate = (blocks as f64 * self.partners_per_block()? / 2.0) as u64;
            }
        }
        stats.disk_available_bytes = crate::runtime::diskspace::available_bytes(&self.dir).unwrap_or(0);
        Ok(stats)
    }

    /// Mean partners per rating row block over up to [`SAMPLED_BLOCKS`] blocks read at
    /// rows spread evenly over the item ids (0 for a store without blocks).
    fn partners_per_block(&self) -> Result<f64> {
        let items = self.item_count() as u64;
        let (mut blocks, mut partners) = (0u64, 0u64);
        let mut entries = Vec::new();
        let mut iter = self.db.raw_iterator_cf(self.cf(CF_PAIRS));
        for probe in 0..SAMPLE_ROWS {
            iter.seek(((items * probe / SAMPLE_ROWS) as u32).to_be_bytes());
            for _ in 0..SAMPLED_BLOCKS / SAMPLE_ROWS {
                let (Some(key), Some(value)) = (iter.key(), iter.value()) else {
                    break;
                };
                let Ok((_, first)) = split_block_key(key) else {
                    break;
                };
                entries.clear();
                decode_block_into(first, value, &mut entries)?;
                blocks += 1;
                partners += entries.len() as u64;
                iter.next();
            }
        }
        iter.status()?;
        Ok(if blocks == 0 {
            0.0
        } else {
            partners as f64 / blocks as f64
        })
    }

    /// Compacts every column family (an operator action; the store stays usable).
    pub fn compact(&self) {
        for name in ALL_CFS {
            self.db
                .compact_range_cf(self.cf(name), None::<&[u8]>, None::<&[u8]>);
        }
    }
}
