//! Reading pair sums: an item's whole row for scoring (one prefix scan over its row
//! blocks, thanks to the two-order layout), and single pairs for lookups.

use anyhow::Result;
use rocksdb::ReadOptions;

use crate::model::RatingPairStats;
use crate::store::row_blocks::{block_key, decode_block_into, split_block_key};
use crate::store::{codec, Store, CF_PAIRS, CF_PURCHASE_PAIRS};

impl Store {
    /// Calls `visit` with (key, stored value) for every key of an item's row, in key
    /// order. A raw iterator lends each key and value in place: a row costs no
    /// allocation per entry.
    fn visit_row(
        &self,
        cf: &str,
        item: u32,
        mut visit: impl FnMut(&[u8], &[u8]) -> Result<()>,
    ) -> Result<()> {
        let mut ro = ReadOptions::default();
        if let Some(next) = item.checked_add(1) {
            ro.set_iterate_upper_bound(next.to_be_bytes().to_vec());
        }
        let mut rows = self.db.raw_iterator_cf_opt(self.cf(cf), ro);
        rows.seek(item.to_be_bytes());
        while let (Some(key), Some(value)) = (rows.key(), rows.value()) {
            visit(key, value)?;
            rows.next();
        }
        rows.status()?;
        Ok(())
    }

    /// The rating row of an item: every other item with non-empty pair sums, one read
    /// per row block.
    pub fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>> {
        let mut out = Vec::new();
        self.visit_row(CF_PAIRS, item, |key, value| {
            let (_, first) = split_block_key(key)?;
            decode_block_into(first, value, &mut out)
        })?;
        out.retain(|(_, s)| s.n != 0);
        Ok(out)
    }

    /// The purchase row of an item, including its own buyer count under its own id.
    pub fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        let mut out = Vec::new();
        self.visit_row(CF_PURCHASE_PAIRS, item, |key, value| {
            let (_, other) = codec::split_pair_key(key)?;
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

    /// The sums of the pairs (a, b) for every b in `others`, in order: one read per
    /// distinct block of row a.
    pub fn rating_pairs_of(&self, a: u32, others: &[u32]) -> Result<Vec<Option<RatingPairStats>>> {
        let cf = self.cf(CF_PAIRS);
        let mut keys: Vec<[u8; 7]> = others.iter().map(|&b| block_key(a, b)).collect();
        keys.sort_unstable();
        keys.dedup();
        let mut entries = Vec::new();
        for (key, value) in keys
            .iter()
            .zip(self.db.multi_get_cf(keys.iter().map(|k| (cf, k.as_slice()))))
        {
            if let Some(v) = value? {
                decode_block_into(split_block_key(key)?.1, &v, &mut entries)?;
            }
        }
        entries.sort_unstable_by_key(|e| e.0);
        Ok(others
            .iter()
            .map(|b| {
                let at = entries.binary_search_by_key(b, |e| e.0).ok()?;
                Some(entries[at].1).filter(|s| s.n != 0)
            })
            .collect())
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
}
