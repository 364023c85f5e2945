//! Writing to a store: one micro-batch as one atomic WriteBatch (ids, user states, pair
//! deltas under both orders, statuses, dirty marks, the ledger), and the lists a
//! publication cycle stores with the dirty marks they answer.

use std::collections::HashSet;

use anyhow::{bail, Context, Result};
use rocksdb::{ColumnFamily, WriteBatch, WriteOptions};

use super::erasure::{encode_erased_at, user_name_key, ForgottenUser, META_SCRUB_PENDING};
use super::ledger::Ledger;
use super::oriented::OrientedRows;
use super::table_files::{write_rating_rows, SEGMENT_MARKER_KEY};
use super::{
    codec, Access, Store, CF_DIRTY, CF_IDS, CF_ITEMS, CF_META, CF_PAIRS, CF_PUBLISHED, CF_PURCHASE_PAIRS,
    CF_USERS, META_DELIVERED_TO, META_LEDGER,
};
use crate::engine::user_state::UserState;
use crate::engine::BatchEffects;
use crate::event::UnixNanos;
use crate::model::{DirtyMark, DirtyScope, PublishedList};
use crate::signal::Signal;

/// Bytes one rating pair merge takes in a WriteBatch: tag, column family, lengths, key, value.
const RATING_PAIR_RECORD_BYTES: usize = 1 + 4 + 2 + 8 + codec::RATING_PAIR_MAX_LEN;

/// Bytes one co-buyer count merge takes in a WriteBatch (rounded up).
const COUNT_RECORD_BYTES: usize = 32;

/// Bytes of a user state record, fixed part and per rating or purchase (rounded up).
const USER_RECORD_BYTES: usize = 64;
const USER_RATING_BYTES: usize = 28;
const USER_PURCHASE_BYTES: usize = 20;

/// Slack for the ledger and small records of a batch.
const BATCH_SLACK_BYTES: usize = 4096;

/// Everything one micro-batch writes, persisted atomically by [`Store::commit`].
pub struct BatchCommit<'a> {
    /// Users first seen in this batch (the forgotten ones among them are not written).
    pub new_users: &'a [(u32, String)],
    /// Items first seen in this batch.
    pub new_items: &'a [(u32, String)],
    /// Users whose state changed and who are not forgotten.
    pub users: Vec<(u32, &'a UserState)>,
    /// Users whose history an erasure emptied: their ids and histories are deleted and
    /// a tombstone keeps the erasure time (docs/design.md, "Personal data").
    pub forgotten: &'a [ForgottenUser],
    /// The engine's deltas, dirty marks and statuses.
    pub effects: &'a BatchEffects,
    /// How the pair deltas reach the store.
    pub pairs: PairWrite,
    /// The ledger after this batch.
    pub ledger: &'a Ledger,
    /// Wall-clock time for new dirty marks.
    pub dirty_since: UnixNanos,
}

/// How a commit's pair deltas reach the store.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PairWrite {
    /// In the commit's WriteBatch (a live micro-batch: few pairs, one atomic write).
    InBatch,
    /// Both families ingested as table files first ([`Store::ingest_pairs`], a file
    /// backfill's segment); the commit deletes the segment markers. A kill between the two
    /// steps is finished by a rerun that cuts the same batches.
    Ingested,
    /// Rating pair sums ingested as table files whose segment marker carries the rest of
    /// the write (the WriteBatch's bytes, co-buyer counts included); the commit writes
    /// that batch, which deletes the marker. A kill between the two steps is finished
    /// when the store next opens, whatever the next run consumes (the live service,
    /// whose batches depend on timing).
    RatingsIngested,
}

/// A list to store after publication, with the dirty mark it clears.
pub struct PublicationWrite {
    /// Which signal.
    pub signal: Signal,
    /// Which item.
    pub item: u32,
    /// The new list, or `None` when the list is unchanged and only the mark is cleared.
    pub list: Option<PublishedList>,
    /// What happens to the item's dirty mark.
    pub mark: MarkAfterWrite,
}

/// What a publication write does with the item's dirty mark.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MarkAfterWrite {
    /// The item was rescored because a neighbor's mark expanded to its row; it has no
    /// mark of its own to clear.
    Keep,
    /// The mark this write answers is deleted.
    Clear,
    /// The list could not be delivered: keep (or set) a mark so the next cycle tries
    /// again, and store nothing.
    Renew,
}

/// Whether the lists of a publication write have reached the output topics.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delivery<'a> {
    /// Stored only (backfill): the output topics no longer hold every stored list.
    StoredOnly,
    /// Delivered to the output topics named by this destination label.
    Delivered(&'a str),
}

impl Store {
    /// Persists one micro-batch atomically (long: one WriteBatch, filled family by family
    /// in key order): ids, user states, pair deltas (as merges, under
    /// both orders), statuses, dirty marks and the ledger.
    pub fn commit(&mut self, c: BatchCommit<'_>) -> Result<()> {
        let (wb, ledger) = self.commit_batch(&c)?;
        match c.pairs {
            PairWrite::InBatch => {}
            PairWrite::Ingested => self.ingest_pairs(c.effects, c.ledger.next_seq)?,
            PairWrite::RatingsIngested => {
                self.ingest_rating_pairs(c.effects, c.ledger.next_seq, wb.data())?
            }
        }
        self.write(wb)?;
        self.ledger = ledger;
        for (id, name) in c.new_items {
            self.items.push(*id, name.clone());
        }
        if c.forgotten.iter().any(|f| f.stored) {
            self.scrub_forgotten(c.forgotten)?;
        }
        Ok(())
    }

    /// The first step of a [`PairWrite::RatingsIngested`] commit alone: what a process
    /// killed between ingesting the table files and writing the batch leaves behind.
    #[cfg(test)]
    pub(crate) fn ingest_rating_pairs_only(&self, c: BatchCommit<'_>) -> Result<()> {
        let (wb, _) = self.commit_batch(&c)?;
        self.ingest_rating_pairs(c.effects, c.ledger.next_seq, wb.data())
    }

    /// The WriteBatch of a commit (everything but the pair sums that go in as table
    /// files) and the ledger the store holds after it.
    fn commit_batch(&self, c: &BatchCommit<'_>) -> Result<(WriteBatch, Ledger)> {
        // Reserve the batch's bytes up front: a bulk batch holds millions of pair merges and
        // growing the buffer by doubling would copy it over and over.
        let rating_pairs_in_batch = match c.pairs {
            PairWrite::InBatch => c.effects.rating_pairs.len(),
            PairWrite::Ingested | PairWrite::RatingsIngested => 0,
        };
        let estimate = rating_pairs_in_batch * 2 * RATING_PAIR_RECORD_BYTES
            + c.effects.purchase_pairs.len() * 2 * COUNT_RECORD_BYTES
            + c.users
                .iter()
                .map(|(_, u)| {
                    USER_RECORD_BYTES
                        + USER_RATING_BYTES * u.ratings.len()
                        + USER_PURCHASE_BYTES * u.purchases.len()
                })
                .sum::<usize>()
            + BATCH_SLACK_BYTES;
        let mut wb = WriteBatch::with_capacity_bytes(estimate);
        let ids = self.cf(CF_IDS);
        let users = self.cf(CF_USERS);
        let forgotten: HashSet<u32> = c.forgotten.iter().map(|f| f.id).collect();
        for (id, name) in c.new_users {
            if !forgotten.contains(id) {
                wb.put_cf(ids, user_name_key(name), id.to_be_bytes());
            }
        }
        for f in c.forgotten {
            if f.stored {
                wb.delete_cf(ids, user_name_key(&f.name));
                wb.delete_cf(users, codec::id_key(f.id));
            }
            wb.put_cf(
                ids,
                self.erasure_key.tombstone(&f.name),
                encode_erased_at(f.erased_at),
            );
        }
        if c.forgotten.iter().any(|f| f.stored) {
            wb.put_cf(self.cf(CF_META), META_SCRUB_PENDING, []);
        }
        for (id, name) in c.new_items {
            wb.put_cf(ids, [b"i", name.as_bytes()].concat(), id.to_be_bytes());
            wb.put_cf(ids, [&b"I"[..], &id.to_be_bytes()].concat(), name.as_bytes());
        }
        for (id, state) in &c.users {
            wb.put_cf(users, codec::id_key(*id), codec::encode_user(state));
        }
        // Keys go into the batch in sorted order: RocksDB's skiplist memtable inserts
        // sorted runs far faster than random ones, and a bulk batch holds millions.
        // Into a store that never held a pair, a put equals a merge and spares RocksDB a
        // merge-operator call for every key on each later read, flush and compaction.
        match c.pairs {
            PairWrite::InBatch => {
                self.write_rating_pairs(&mut wb, c.effects);
                self.write_purchase_pairs(&mut wb, c.effects);
            }
            PairWrite::Ingested => {
                wb.delete_cf(self.cf(CF_PAIRS), SEGMENT_MARKER_KEY);
                wb.delete_cf(self.cf(CF_PURCHASE_PAIRS), SEGMENT_MARKER_KEY);
            }
            PairWrite::RatingsIngested => {
                wb.delete_cf(self.cf(CF_PAIRS), SEGMENT_MARKER_KEY);
                self.write_purchase_pairs(&mut wb, c.effects);
            }
        }
        let items = self.cf(CF_ITEMS);
        for (item, status) in &c.effects.statuses {
            wb.put_cf(items, codec::id_key(*item), codec::encode_status(status));
        }
        let dirty = self.cf(CF_DIRTY);
        for (signal, set) in [
            (Signal::Rating, &c.effects.dirty_rating),
            (Signal::Purchase, &c.effects.dirty_purchase),
        ] {
            for (&item, &scope) in set {
                let mark = DirtyMark {
                    since: c.dirty_since,
                    scope,
                };
                wb.merge_cf(
                    dirty,
                    codec::signal_item_key(signal, item),
                    codec::encode_dirty_mark(&mark),
                );
            }
        }
        let mut ledger = c.ledger.clone();
        ledger.erasure_tombstones |= !c.forgotten.is_empty();
        ledger.pair_keys_written |=
            !c.effects.rating_pairs.is_empty() || !c.effects.purchase_pairs.is_empty();
        wb.put_cf(self.cf(CF_META), META_LEDGER, serde_json::to_vec(&ledger)?);
        Ok((wb, ledger))
    }

    /// Adds the rating pair deltas to a WriteBatch in key order, under both orders. Keys
    /// go in sorted: RocksDB's skiplist memtable inserts sorted runs far faster than
    /// random ones. Into a store that never held a pair, a put equals a merge and spares
    /// RocksDB a merge-operator call for every key on each later read, flush and
    /// compaction.
    fn write_rating_pairs(&self, wb: &mut WriteBatch, effects: &BatchEffects) {
        let fresh = !self.ledger.pair_keys_written;
        let pairs = self.cf(CF_PAIRS);
        let rating = OrientedRows::of(&effects.rating_pairs, 0);
        let mut emit = |key: &[u8], value: &[u8]| {
            add_pair(wb, pairs, fresh, key, value);
            Ok(())
        };
        let all = write_rating_rows(&rating, 0..rating.row_count(), &mut emit);
        all.expect("a write batch takes every key");
    }

    /// Adds the co-buyer count deltas to a WriteBatch, as [`Store::write_rating_pairs`].
    fn write_purchase_pairs(&self, wb: &mut WriteBatch, effects: &BatchEffects) {
        let fresh = !self.ledger.pair_keys_written;
        let purchases = self.cf(CF_PURCHASE_PAIRS);
        let purchase = OrientedRows::of(&effects.purchase_pairs, 0);
        purchase.each(|row, other, d| {
            add_pair(
                wb,
                purchases,
                fresh,
                &codec::pair_row_key(row, other),
                &d.to_le_bytes(),
            );
        });
    }

    /// Stores recomputed lists and clears the dirty marks they answer, in one write.
    /// A write that was stored only forgets which output topics hold every list, so a live
    /// service starting on this store republishes them all first.
    pub fn write_publications(
        &self,
        writes: &[PublicationWrite],
        delivery: Delivery<'_>,
        now: UnixNanos,
    ) -> Result<()> {
        let mut wb = WriteBatch::default();
        let published = self.cf(CF_PUBLISHED);
        let dirty = self.cf(CF_DIRTY);
        for w in writes {
            let key = codec::signal_item_key(w.signal, w.item);
            if w.mark == MarkAfterWrite::Renew {
                let mark = DirtyMark {
                    since: now,
                    scope: DirtyScope::OwnList,
                };
                wb.merge_cf(dirty, key, codec::encode_dirty_mark(&mark));
                continue;
            }
            if let Some(list) = &w.list {
                wb.put_cf(published, key, codec::encode_published(list));
            }
            if w.mark == MarkAfterWrite::Clear {
                wb.delete_cf(dirty, key);
            }
        }
        if delivery == Delivery::StoredOnly
            && writes
                .iter()
                .any(|w| w.list.is_some() && w.mark != MarkAfterWrite::Renew)
        {
            wb.delete_cf(self.cf(CF_META), META_DELIVERED_TO);
        }
        self.write(wb)
    }

    /// Records that every stored list has been delivered to `destination`'s topics.
    pub fn set_delivered_to(&self, destination: &str) -> Result<()> {
        let mut wb = WriteBatch::default();
        wb.put_cf(self.cf(CF_META), META_DELIVERED_TO, destination.as_bytes());
        self.write(wb)
    }

    fn write(&self, wb: WriteBatch) -> Result<()> {
        if !matches!(self.access, Access::Primary) {
            bail!("store {} is open for reading only", self.dir.display());
        }
        let mut opts = WriteOptions::default();
        opts.set_sync(false);
        self.db.write_opt(wb, &opts).context("store write failed")
    }
}

/// Writes a pair delta: as a plain value into a store that never held a pair (where a put
/// equals a merge), as a merge operand otherwise.
fn add_pair(wb: &mut WriteBatch, cf: &ColumnFamily, fresh: bool, key: &[u8], value: &[u8]) {
    if fresh {
        wb.put_cf(cf, key, value);
    } else {
        wb.merge_cf(cf, key, value);
    }
}
