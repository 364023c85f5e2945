//! Reading a store: user states and item statuses for a batch, pair rows for scoring,
//! dirty marks and published lists for publication, and size figures for the metrics.

use std::collections::HashMap;

use anyhow::{Context, Result};
use rocksdb::{IteratorMode, ReadOptions};
use rustc_hash::FxHashSet;

use super::{
    codec, Store, ALL_CFS, CF_DIRTY, CF_ITEMS, CF_META, CF_PAIRS, CF_PUBLISHED, CF_PURCHASE_PAIRS, CF_USERS,
    META_DELIVERED_TO,
};
use crate::engine::user_state::UserState;
use crate::engine::ItemStatus;
use crate::event::UnixNanos;
use crate::model::{DirtyMark, PublishedList, RatingPairStats};
use crate::signal::Signal;

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
    /// Stored states of the given users (absent ones are left out).
    pub fn load_users(&self, users: &[u32]) -> Result<HashMap<u32, UserState>> {
        let cf = self.cf(CF_USERS);
        let keys: Vec<[u8; 4]> = users.iter().map(|&u| codec::id_key(u)).collect();
        let mut out = HashMap::with_capacity(users.len());
        for (user, value) in users
            .iter()
            .zip(self.db.multi_get_cf(keys.iter().map(|k| (cf, k.as_slice()))))
        {
            if let Some(bytes) = value? {
                out.insert(
                    *user,
                    codec::decode_user(&bytes).with_context(|| format!("user {user}"))?,
                );
            }
        }
        Ok(out)
    }

    /// Stored statuses of the given items (absent ones are left out).
    pub fn load_statuses(&self, items: &[u32]) -> Result<HashMap<u32, ItemStatus>> {
        let cf = self.cf(CF_ITEMS);
        let mut out = HashMap::new();
        for &item in items {
            if let Some(bytes) = self.db.get_cf(cf, codec::id_key(item))? {
                out.insert(item, codec::decode_status(&bytes)?);
            }
        }
        Ok(out)
    }

    /// Items currently marked unavailable.
    pub fn unavailable_items(&self) -> Result<FxHashSet<u32>> {
        let mut out = FxHashSet::default();
        for entry in self.db.iterator_cf(self.cf(CF_ITEMS), IteratorMode::Start) {
            let (key, value) = entry?;
            if !codec::decode_status(&value)?.available {
                out.insert(u32::from_be_bytes(key[..4].try_into().context("item key")?));
            }
        }
        Ok(out)
    }

    /// Calls `visit` with (other item, stored value) for every pair in an item's row, in
    /// key order. A raw iterator lends each key and value in place: a row of thousands of
    /// pairs costs no allocation per entry.
    fn visit_row(&self, cf: &str, item: u32, mut visit: impl FnMut(u32, &[u8]) -> Result<()>) -> Result<()> {
        let mut ro = ReadOptions::default();
        if let Some(next) = item.checked_add(1) {
            ro.set_iterate_upper_bound(next.to_be_bytes().to_vec());
        }
        let mut rows = self.db.raw_iterator_cf_opt(self.cf(cf), ro);
        rows.seek(codec::pair_row_key(item, 0));
        while let (Some(key), Some(value)) = (rows.key(), rows.value()) {
            let (_, other) = codec::split_pair_key(key)?;
            visit(other, value)?;
            rows.next();
        }
        rows.status()?;
        Ok(())
    }

    /// The rating row of an item: every other item with non-empty pair sums.
    pub fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>> {
        let mut out = Vec::new();
        self.visit_row(CF_PAIRS, item, |other, value| {
            let stats = codec::decode_rating_pair(value)?;
            if stats.n != 0 {
                out.push((other, stats));
            }
            Ok(())
        })?;
        Ok(out)
    }

    /// The purchase row of an item, including its own buyer count under its own id.
    pub fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        let mut out = Vec::new();
        self.visit_row(CF_PURCHASE_PAIRS, item, |other, value| {
            let count = codec::decode_count(value)?;
            if count != 0 {
                out.push((other, count));
            }
            Ok(())
        })?;
        Ok(out)
    }

    /// Buyer counts of the given items.
    pub fn buyer_counts(&self, items: &[u32]) -> Result<Vec<i64>> {
        let cf = self.cf(CF_PURCHASE_PAIRS);
        let keys: Vec<[u8; 8]> = items.iter().map(|&i| codec::pair_row_key(i, i)).collect();
        self.db
            .multi_get_cf(keys.iter().map(|k| (cf, k.as_slice())))
            .into_iter()
            .map(|r| Ok(r?.map(|v| codec::decode_count(&v)).transpose()?.unwrap_or(0)))
            .collect()
    }

    /// The sums of one rating pair, oriented (a, b); `None` when no user rated both.
    pub fn rating_pair(&self, a: u32, b: u32) -> Result<Option<RatingPairStats>> {
        Ok(self.rating_pairs_of(a, &[b])?.pop().flatten())
    }

    /// The sums of the pairs (a, b) for every b in `others`, in order.
    pub fn rating_pairs_of(&self, a: u32, others: &[u32]) -> Result<Vec<Option<RatingPairStats>>> {
        let cf = self.cf(CF_PAIRS);
        let keys: Vec<[u8; 8]> = others.iter().map(|&b| codec::pair_row_key(a, b)).collect();
        self.db
            .multi_get_cf(keys.iter().map(|k| (cf, k.as_slice())))
            .into_iter()
            .map(|r| match r? {
                Some(v) => Ok(Some(codec::decode_rating_pair(&v)?).filter(|s| s.n != 0)),
                None => Ok(None),
            })
            .collect()
    }

    /// Co-buyers of a pair (a, b), or a's buyers when a = b.
    pub fn purchase_pair(&self, a: u32, b: u32) -> Result<i64> {
        match self
            .db
            .get_cf(self.cf(CF_PURCHASE_PAIRS), codec::pair_row_key(a, b))?
        {
            Some(v) => codec::decode_count(&v),
            None => Ok(0),
        }
    }

    /// Stored state of one user by name.
    pub fn user_state(&self, name: &str) -> Result<Option<UserState>> {
        let Some(id) = self.user_ids(&[name])?[0] else {
            return Ok(None);
        };
        Ok(self.load_users(&[id])?.remove(&id))
    }

    /// Pending dirty marks of a signal.
    pub fn dirty_marks(&self, signal: Signal) -> Result<Vec<(u32, DirtyMark)>> {
        let mut out = Vec::new();
        for entry in self
            .db
            .prefix_iterator_cf(self.cf(CF_DIRTY), [codec::signal_key_byte(signal)])
        {
            let (key, value) = entry?;
            if key.first() != Some(&codec::signal_key_byte(signal)) {
                break;
            }
            let (_, item) = codec::split_signal_item_key(&key)?;
            out.push((item, codec::decode_dirty_mark(&value)?));
        }
        Ok(out)
    }

    /// The last list published for an item.
    pub fn published(&self, signal: Signal, item: u32) -> Result<Option<PublishedList>> {
        match self
            .db
            .get_cf(self.cf(CF_PUBLISHED), codec::signal_item_key(signal, item))?
        {
            Some(v) => Ok(Some(codec::decode_published(&v)?)),
            None => Ok(None),
        }
    }

    /// Every published list, in (signal, item id) order.
    pub fn all_published(&self) -> impl Iterator<Item = Result<(Signal, u32, PublishedList)>> + '_ {
        self.db
            .iterator_cf(self.cf(CF_PUBLISHED), IteratorMode::Start)
            .map(|entry| {
                let (key, value) = entry?;
                let (signal, item) = codec::split_signal_item_key(&key)?;
                Ok((signal, item, codec::decode_published(&value)?))
            })
    }

    /// When the oldest pending change happened (the earliest dirty mark), if any.
    pub fn oldest_dirty_since(&self) -> Result<Option<UnixNanos>> {
        let mut oldest: Option<UnixNanos> = None;
        for entry in self.db.iterator_cf(self.cf(CF_DIRTY), IteratorMode::Start) {
            let (_, value) = entry?;
            let since = codec::decode_dirty_mark(&value)?.since;
            oldest = Some(oldest.map_or(since, |o| o.min(since)));
        }
        Ok(oldest)
    }

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

    /// The destination label whose topics hold every stored list, if any.
    pub fn delivered_to(&self) -> Result<Option<String>> {
        let value = self.db.get_cf(self.cf(CF_META), META_DELIVERED_TO)?;
        Ok(value.map(|v| String::from_utf8_lossy(&v).into_owned()))
    }
}
