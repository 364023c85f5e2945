//! The RocksDB store: the only module that touches the database (docs/design.md, "Storage").
//!
//! Column families:
//! - `ids`: `u`/`i` + name → dense id, `U`/`I` + id → name (users, items).
//! - `users`: user id → history and applied center ([`codec::encode_user`]).
//! - `items`: item id → availability status.
//! - `pairs`: rating pair sums. Each unordered pair is written under BOTH orders, key =
//!   (row, other) big-endian with the norms oriented to the key, so a prefix scan on an
//!   item's 4 bytes lists its whole row at the cost of twice the writes.
//! - `purchase_pairs`: co-buyer counts, same two-order layout; key (a, a) holds a's buyers.
//! - `dirty`: signal + item → first time its list went out of date.
//! - `published`: signal + item → the last list computed for it.
//! - `meta`: schema version, statistics fingerprint, and the progress state (positions,
//!   counters, id allocators) that every batch rewrites in the same WriteBatch.

pub mod codec;
pub mod merge;

use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::{bail, Context, Result};
use rocksdb::{
    ColumnFamily, ColumnFamilyDescriptor, DBCompressionType, Direction, IteratorMode, Options, ReadOptions,
    WriteBatch, WriteOptions, DB,
};
use rustc_hash::FxHashSet;
use serde::{Deserialize, Serialize};

use crate::config::Config;
use crate::engine::user_state::UserState;
use crate::engine::{BatchEffects, ItemStatus};
use crate::signal::Signal;
use codec::{DirtyMark, PublishedList, RatingPairStats};

const CF_IDS: &str = "ids";
const CF_USERS: &str = "users";
const CF_ITEMS: &str = "items";
const CF_PAIRS: &str = "pairs";
const CF_PURCHASE_PAIRS: &str = "purchase_pairs";
const CF_DIRTY: &str = "dirty";
const CF_PUBLISHED: &str = "published";
const CF_META: &str = "meta";
const ALL_CFS: [&str; 8] = [
    CF_IDS,
    CF_USERS,
    CF_ITEMS,
    CF_PAIRS,
    CF_PURCHASE_PAIRS,
    CF_DIRTY,
    CF_PUBLISHED,
    CF_META,
];

const META_SCHEMA: &[u8] = b"schema_version";
const META_FINGERPRINT: &[u8] = b"stats_fingerprint";
const META_PROGRESS: &[u8] = b"progress";
const META_DELIVERED_TO: &[u8] = b"delivered_to";

/// Bytes one rating pair merge takes in a WriteBatch: tag, column family, lengths, key, value.
const RATING_PAIR_RECORD_BYTES: usize = 1 + 4 + 2 + 8 + codec::RATING_PAIR_LEN;

/// Layout version of this build's store.
pub const SCHEMA_VERSION: u32 = 1;

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
        }
    }

    /// One sentence per setting that differs between the stored and the asked-for values.
    pub fn differences(&self, asked: &StatsFingerprint) -> Vec<String> {
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

/// How far a file input has been applied.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
pub struct FilePosition {
    /// Index of the first record not yet applied.
    pub next_record: u64,
    /// True once the whole file has been applied.
    pub done: bool,
}

/// Progress state rewritten by every batch in the same WriteBatch as its changes, so that
/// positions and statistics can never disagree after a crash.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct Progress {
    /// Next store-wide source position.
    pub next_seq: u64,
    /// Next dense user id.
    pub next_user: u32,
    /// Next dense item id.
    pub next_item: u32,
    /// Users with at least one active purchase (N of the log-likelihood ratio).
    pub buyers: i64,
    /// Newest event time applied.
    pub event_time_watermark: Option<i64>,
    /// Accepted events by `kind/outcome`.
    pub events: BTreeMap<String, u64>,
    /// Rejected records by reason code.
    pub rejects: BTreeMap<String, u64>,
    /// Length of the rejects file that matches this state.
    pub rejects_file_len: u64,
    /// Re-centerings performed.
    pub recenterings: u64,
    /// Pair contributions added or retracted.
    pub pair_updates: u64,
    /// Position reached in each input file, by canonical path.
    pub files: BTreeMap<String, FilePosition>,
    /// Whether any pair or buyer-count key was ever written (until then a put equals a
    /// merge).
    pub pair_keys_written: bool,
    /// Next offset to consume, by input topic and partition: the live service's position,
    /// which it trusts over the consumer group's committed offsets.
    #[serde(default)]
    pub offsets: BTreeMap<String, BTreeMap<i32, i64>>,
}

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

/// Item names by dense id and back, kept in memory: publication needs names for every
/// neighbor (ties are broken by name) and the catalogue is small next to the pair table.
#[derive(Debug, Default, Clone)]
struct ItemDirectory {
    names: Vec<String>,
    ids: HashMap<String, u32>,
}

/// Everything one micro-batch writes, persisted atomically by [`Store::commit`].
pub struct BatchCommit<'a> {
    /// Users first seen in this batch.
    pub new_users: Vec<(u32, String)>,
    /// Items first seen in this batch.
    pub new_items: Vec<(u32, String)>,
    /// Users whose state changed.
    pub users: Vec<(u32, &'a UserState)>,
    /// The engine's deltas, dirty marks and statuses.
    pub effects: &'a BatchEffects,
    /// Progress state after this batch.
    pub progress: Progress,
    /// Wall-clock time for new dirty marks.
    pub dirty_since: i64,
}

/// A list to store after publication, with the dirty mark it clears.
pub struct PublicationWrite {
    /// Which signal.
    pub signal: Signal,
    /// Which item.
    pub item: u32,
    /// The new list, or `None` when the list is unchanged and only the mark is cleared.
    pub list: Option<PublishedList>,
    /// Whether a dirty mark is stored for this item (expanded neighbors have none).
    pub clears_mark: bool,
    /// The list could not be delivered: keep (or set) a dirty mark so the next cycle
    /// tries again, and store nothing.
    pub redirty: bool,
}

/// Whether the lists of a publication write have reached the output topics.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delivery<'a> {
    /// Stored only (backfill): the output topics no longer hold every stored list.
    StoredOnly,
    /// Delivered to the output topics named by this destination label.
    Delivered(&'a str),
}

/// An open store.
pub struct Store {
    db: Arc<DB>,
    dir: PathBuf,
    fingerprint: StatsFingerprint,
    progress: Progress,
    items: ItemDirectory,
    access: Access,
}

/// How a handle holds the database.
enum Access {
    /// The one writer.
    Primary,
    /// A RocksDB secondary instance of a store another handle or process writes, with a
    /// directory of its own (removed on drop).
    Secondary(PathBuf),
    /// A read-only view sharing the writer's open database in the same process: no copy
    /// of its memtables or caches.
    View,
}

fn db_options() -> Options {
    let mut o = Options::default();
    o.create_if_missing(true);
    o.create_missing_column_families(true);
    o.increase_parallelism(2);
    o.set_max_background_jobs(2);
    o.set_compression_type(DBCompressionType::Lz4);
    o.set_level_compaction_dynamic_level_bytes(true);
    // Small families (meta, users, ids) rarely fill a memtable; without a cap they would
    // pin every WAL file the big pair families have long since flushed.
    o.set_max_total_wal_size(256 << 20);
    o
}

fn cf_descriptors() -> Vec<ColumnFamilyDescriptor> {
    ALL_CFS
        .iter()
        .map(|&name| {
            let mut o = Options::default();
            o.set_compression_type(DBCompressionType::Lz4);
            match name {
                CF_PAIRS => {
                    o.set_merge_operator_associative("simtide_rating_pair_sum", merge::merge_rating_pairs);
                    o.set_compaction_filter("simtide_drop_empty_pairs", merge::drop_empty_pairs);
                    // Room for bursts: flushing merges operands and lags bulk writes.
                    o.set_write_buffer_size(64 << 20);
                    o.set_max_write_buffer_number(4);
                }
                CF_PURCHASE_PAIRS => {
                    o.set_merge_operator_associative("simtide_count_sum", merge::merge_counts);
                    o.set_compaction_filter("simtide_drop_empty_pairs", merge::drop_empty_pairs);
                    o.set_write_buffer_size(64 << 20);
                }
                CF_DIRTY => {
                    o.set_merge_operator_associative("simtide_dirty_earliest", merge::merge_dirty);
                }
                _ => {}
            }
            ColumnFamilyDescriptor::new(name, o)
        })
        .collect()
}

/// Where RocksDB lives inside a store directory.
pub fn db_path(dir: &Path) -> PathBuf {
    dir.join("db")
}

/// Where a backfill's rejected records are written inside a store directory.
pub fn rejects_path(dir: &Path) -> PathBuf {
    dir.join("rejects.jsonl")
}

/// The progress state of the last committed batch (the default for a new store).
fn read_progress(db: &DB) -> Result<Progress> {
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    Ok(match db.get_cf(meta, META_PROGRESS)? {
        Some(bytes) => serde_json::from_slice(&bytes).context("stored progress state is unreadable")?,
        None => Progress::default(),
    })
}

/// Appends to `items` the item names stored with ids from `items.names.len()` on (ids
/// are dense, so what is already loaded never changes).
fn load_items_from(db: &DB, items: &mut ItemDirectory) -> Result<()> {
    let ids = db.cf_handle(CF_IDS).expect("ids family exists");
    let first = u32::try_from(items.names.len()).context("item count")?;
    let start = [&b"I"[..], &first.to_be_bytes()].concat();
    for entry in db.iterator_cf(ids, IteratorMode::From(&start, Direction::Forward)) {
        let (key, value) = entry?;
        if key.first() != Some(&b'I') {
            break;
        }
        let id = u32::from_be_bytes(key[1..5].try_into().context("item id key")?);
        if id as usize != items.names.len() {
            bail!(
                "item ids are not dense: found {id} after {} names",
                items.names.len()
            );
        }
        let name = String::from_utf8(value.to_vec()).context("item name is not UTF-8")?;
        items.ids.insert(name.clone(), id);
        items.names.push(name);
    }
    Ok(())
}

impl Store {
    /// Opens (creating if needed) a store for writing. Refuses a store whose statistics
    /// were shaped by other settings, naming each differing setting.
    pub fn open(dir: &Path, config: &Config) -> Result<Store> {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("cannot create store directory {}", dir.display()))?;
        let path = db_path(dir);
        let db = DB::open_cf_descriptors(&db_options(), &path, cf_descriptors())
            .with_context(|| format!("cannot open store {}", path.display()))?;
        let asked = StatsFingerprint::from_config(config);
        let meta = db.cf_handle(CF_META).expect("meta family exists");
        let fingerprint = match db.get_cf(meta, META_FINGERPRINT)? {
            Some(bytes) => {
                check_schema(&db)?;
                let stored: StatsFingerprint =
                    serde_json::from_slice(&bytes).context("stored fingerprint is unreadable")?;
                let diffs = stored.differences(&asked);
                if !diffs.is_empty() {
                    bail!(
                        "store {} refuses these settings:\n  {}\nThese settings shape the stored statistics; to change them, rebuild: backfill into a fresh store directory.",
                        dir.display(),
                        diffs.join("\n  ")
                    );
                }
                stored
            }
            None => {
                let mut wb = WriteBatch::default();
                wb.put_cf(meta, META_SCHEMA, SCHEMA_VERSION.to_le_bytes());
                wb.put_cf(meta, META_FINGERPRINT, serde_json::to_vec(&asked)?);
                db.write(wb)?;
                asked
            }
        };
        Store::finish_open(db, dir, fingerprint, Access::Primary)
    }

    /// Opens a store for reading while a writer may hold it open, as a RocksDB secondary
    /// instance caught up with the primary at open time.
    pub fn open_read_only(dir: &Path) -> Result<Store> {
        let path = db_path(dir);
        if !path.join("CURRENT").exists() {
            bail!(
                "{} is not a simtide store (no {} found)",
                dir.display(),
                path.join("CURRENT").display()
            );
        }
        let secondary = std::env::temp_dir().join(format!(
            "simtide-reader-{}-{}",
            std::process::id(),
            crate::timefmt::now_nanos()
        ));
        let mut opts = db_options();
        opts.set_max_open_files(-1);
        let db = DB::open_cf_descriptors_as_secondary(&opts, &path, &secondary, cf_descriptors())
            .with_context(|| format!("cannot open store {} for reading", path.display()))?;
        db.try_catch_up_with_primary()?;
        check_schema(&db)?;
        let meta = db.cf_handle(CF_META).expect("meta family exists");
        let fingerprint = match db.get_cf(meta, META_FINGERPRINT)? {
            Some(bytes) => serde_json::from_slice(&bytes).context("stored fingerprint is unreadable")?,
            None => bail!("store {} was never initialised", dir.display()),
        };
        Store::finish_open(db, dir, fingerprint, Access::Secondary(secondary))
    }

    fn finish_open(db: DB, dir: &Path, fingerprint: StatsFingerprint, access: Access) -> Result<Store> {
        let progress = read_progress(&db)?;
        let mut items = ItemDirectory::default();
        load_items_from(&db, &mut items)?;
        Ok(Store {
            db: Arc::new(db),
            dir: dir.to_path_buf(),
            fingerprint,
            progress,
            items,
            access,
        })
    }

    /// A read-only view of this store for readers in the same process (HTTP lookups): it
    /// shares the open database, so reads see every committed batch without a second
    /// instance replaying the write-ahead log; [`Store::catch_up`] refreshes its positions
    /// and item names. A view refuses writes.
    pub fn view(&self) -> Store {
        Store {
            db: self.db.clone(),
            dir: self.dir.clone(),
            fingerprint: self.fingerprint,
            progress: self.progress.clone(),
            items: self.items.clone(),
            access: Access::View,
        }
    }

    /// Brings a reader up to the writer's latest committed batch: for a secondary
    /// instance RocksDB's catch-up first, then the positions and the items added since.
    /// Long-lived readers (HTTP lookups) call it periodically instead of reopening.
    pub fn catch_up(&mut self) -> Result<()> {
        match self.access {
            Access::Primary => bail!("the writer is always current; only readers catch up"),
            Access::Secondary(_) => self.db.try_catch_up_with_primary()?,
            Access::View => {}
        }
        self.progress = read_progress(&self.db)?;
        load_items_from(&self.db, &mut self.items)
    }

    fn cf(&self, name: &str) -> &ColumnFamily {
        self.db.cf_handle(name).expect("all column families are opened")
    }

    /// The store directory.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The statistics-shaping settings this store was built with.
    pub fn fingerprint(&self) -> &StatsFingerprint {
        &self.fingerprint
    }

    /// Progress state as of the last committed batch.
    pub fn progress(&self) -> &Progress {
        &self.progress
    }

    /// Dense id of an item name, if known.
    pub fn item_id(&self, name: &str) -> Option<u32> {
        self.items.ids.get(name).copied()
    }

    /// Name of a dense item id.
    pub fn item_name(&self, id: u32) -> &str {
        self.items.names.get(id as usize).map_or("?", String::as_str)
    }

    /// Number of items ever seen.
    pub fn item_count(&self) -> usize {
        self.items.names.len()
    }

    /// Dense ids of user names; `None` for users never seen.
    pub fn user_ids(&self, names: &[&str]) -> Result<Vec<Option<u32>>> {
        let ids = self.cf(CF_IDS);
        let keys: Vec<Vec<u8>> = names.iter().map(|n| [b"u", n.as_bytes()].concat()).collect();
        self.db
            .multi_get_cf(keys.iter().map(|k| (ids, k.as_slice())))
            .into_iter()
            .map(|r| {
                Ok(match r? {
                    Some(v) => Some(u32::from_be_bytes(
                        v.as_slice().try_into().context("user id value")?,
                    )),
                    None => None,
                })
            })
            .collect()
    }

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

    /// Persists one micro-batch atomically: ids, user states, pair deltas (as merges, under
    /// both orders), statuses, dirty marks and the progress state.
    pub fn commit(&mut self, c: BatchCommit<'_>) -> Result<()> {
        // Reserve the batch's bytes up front: a bulk batch holds millions of pair merges and
        // growing the buffer by doubling would copy it over and over.
        let estimate = c.effects.rating_pairs.len() * 2 * (RATING_PAIR_RECORD_BYTES)
            + c.effects.purchase_pairs.len() * 2 * 32
            + c.users
                .iter()
                .map(|(_, u)| 64 + 28 * u.ratings.len() + 20 * u.purchases.len())
                .sum::<usize>()
            + 4096;
        let mut wb = WriteBatch::with_capacity_bytes(estimate);
        let ids = self.cf(CF_IDS);
        for (id, name) in &c.new_users {
            wb.put_cf(ids, [b"u", name.as_bytes()].concat(), id.to_be_bytes());
            wb.put_cf(ids, [&b"U"[..], &id.to_be_bytes()].concat(), name.as_bytes());
        }
        for (id, name) in &c.new_items {
            wb.put_cf(ids, [b"i", name.as_bytes()].concat(), id.to_be_bytes());
            wb.put_cf(ids, [&b"I"[..], &id.to_be_bytes()].concat(), name.as_bytes());
        }
        let users = self.cf(CF_USERS);
        for (id, state) in &c.users {
            wb.put_cf(users, codec::id_key(*id), codec::encode_user(state));
        }
        // Keys go into the batch in sorted order: RocksDB's skiplist memtable inserts
        // sorted runs far faster than random ones, and a bulk batch holds millions.
        // Into a store that never held a pair, a put equals a merge and spares RocksDB a
        // merge-operator call for every key on each later read, flush and compaction.
        let fresh = !self.progress.pair_keys_written;
        let pairs = self.cf(CF_PAIRS);
        for (row, other, d) in oriented_sorted(&c.effects.rating_pairs) {
            let stats = if row < other {
                RatingPairStats {
                    n: d.n,
                    dot: d.dot,
                    s_row: d.s_lo,
                    s_other: d.s_hi,
                }
            } else {
                RatingPairStats {
                    n: d.n,
                    dot: d.dot,
                    s_row: d.s_hi,
                    s_other: d.s_lo,
                }
            };
            add_pair(
                &mut wb,
                pairs,
                fresh,
                codec::pair_row_key(row, other),
                &stats.encode(),
            );
        }
        let purchases = self.cf(CF_PURCHASE_PAIRS);
        for (row, other, d) in oriented_sorted(&c.effects.purchase_pairs) {
            add_pair(
                &mut wb,
                purchases,
                fresh,
                codec::pair_row_key(row, other),
                &d.to_le_bytes(),
            );
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
            for (&item, &with_neighbors) in set {
                let mark = DirtyMark {
                    since: c.dirty_since,
                    with_neighbors,
                };
                wb.merge_cf(dirty, codec::signal_item_key(signal, item), mark.encode());
            }
        }
        let mut progress = c.progress;
        progress.pair_keys_written |=
            !c.effects.rating_pairs.is_empty() || !c.effects.purchase_pairs.is_empty();
        wb.put_cf(self.cf(CF_META), META_PROGRESS, serde_json::to_vec(&progress)?);
        self.write(wb)?;
        self.progress = progress;
        for (id, name) in c.new_items {
            debug_assert_eq!(id as usize, self.items.names.len());
            self.items.ids.insert(name.clone(), id);
            self.items.names.push(name);
        }
        Ok(())
    }

    fn write(&self, wb: WriteBatch) -> Result<()> {
        if !matches!(self.access, Access::Primary) {
            bail!("store {} is open for reading only", self.dir.display());
        }
        let mut opts = WriteOptions::default();
        opts.set_sync(false);
        self.db.write_opt(wb, &opts).context("store write failed")
    }

    fn row_iter(&self, cf: &str, item: u32) -> impl Iterator<Item = Result<(u32, Box<[u8]>)>> + '_ {
        let mut ro = ReadOptions::default();
        if let Some(next) = item.checked_add(1) {
            ro.set_iterate_upper_bound(next.to_be_bytes().to_vec());
        }
        let start = codec::pair_row_key(item, 0);
        self.db
            .iterator_cf_opt(self.cf(cf), ro, IteratorMode::From(&start, Direction::Forward))
            .map(|entry| {
                let (key, value) = entry?;
                let (_, other) = codec::split_pair_key(&key)?;
                Ok((other, value))
            })
    }

    /// The rating row of an item: every other item with non-empty pair sums.
    pub fn rating_row(&self, item: u32) -> Result<Vec<(u32, RatingPairStats)>> {
        let mut out = Vec::new();
        for entry in self.row_iter(CF_PAIRS, item) {
            let (other, value) = entry?;
            let stats = RatingPairStats::decode(&value)?;
            if stats.n != 0 {
                out.push((other, stats));
            }
        }
        Ok(out)
    }

    /// The purchase row of an item, including its own buyer count under its own id.
    pub fn purchase_row(&self, item: u32) -> Result<Vec<(u32, i64)>> {
        let mut out = Vec::new();
        for entry in self.row_iter(CF_PURCHASE_PAIRS, item) {
            let (other, value) = entry?;
            let count = codec::decode_count(&value)?;
            if count != 0 {
                out.push((other, count));
            }
        }
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
                Some(v) => Ok(Some(RatingPairStats::decode(&v)?).filter(|s| s.n != 0)),
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

    /// Every non-empty rating pair, both orders, in key order.
    pub fn all_rating_pairs(&self) -> Result<Vec<((u32, u32), RatingPairStats)>> {
        let mut out = Vec::new();
        for entry in self.db.iterator_cf(self.cf(CF_PAIRS), IteratorMode::Start) {
            let (key, value) = entry?;
            let stats = RatingPairStats::decode(&value)?;
            if stats.n != 0 {
                out.push((codec::split_pair_key(&key)?, stats));
            }
        }
        Ok(out)
    }

    /// Every non-zero co-buyer count (and diagonal buyer count), both orders.
    pub fn all_purchase_pairs(&self) -> Result<Vec<((u32, u32), i64)>> {
        let mut out = Vec::new();
        for entry in self
            .db
            .iterator_cf(self.cf(CF_PURCHASE_PAIRS), IteratorMode::Start)
        {
            let (key, value) = entry?;
            let count = codec::decode_count(&value)?;
            if count != 0 {
                out.push((codec::split_pair_key(&key)?, count));
            }
        }
        Ok(out)
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
        for entry in self.db.prefix_iterator_cf(self.cf(CF_DIRTY), [signal.key_byte()]) {
            let (key, value) = entry?;
            if key.first() != Some(&signal.key_byte()) {
                break;
            }
            let (_, item) = codec::split_signal_item_key(&key)?;
            out.push((item, DirtyMark::decode(&value)?));
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

    /// Stores recomputed lists and clears the dirty marks they answer, in one write.
    /// A write that was stored only forgets which output topics hold every list, so a live
    /// service starting on this store republishes them all first.
    pub fn write_publications(
        &self,
        writes: &[PublicationWrite],
        delivery: Delivery<'_>,
        now: i64,
    ) -> Result<()> {
        let mut wb = WriteBatch::default();
        let published = self.cf(CF_PUBLISHED);
        let dirty = self.cf(CF_DIRTY);
        for w in writes {
            let key = codec::signal_item_key(w.signal, w.item);
            if w.redirty {
                let mark = DirtyMark {
                    since: now,
                    with_neighbors: false,
                };
                wb.merge_cf(dirty, key, mark.encode());
                continue;
            }
            if let Some(list) = &w.list {
                wb.put_cf(published, key, codec::encode_published(list));
            }
            if w.clears_mark {
                wb.delete_cf(dirty, key);
            }
        }
        if delivery == Delivery::StoredOnly && writes.iter().any(|w| w.list.is_some()) {
            wb.delete_cf(self.cf(CF_META), META_DELIVERED_TO);
        }
        self.write(wb)
    }

    /// When the oldest pending change happened (the earliest dirty mark), if any.
    pub fn oldest_dirty_since(&self) -> Result<Option<i64>> {
        let mut oldest: Option<i64> = None;
        for entry in self.db.iterator_cf(self.cf(CF_DIRTY), IteratorMode::Start) {
            let (_, value) = entry?;
            let since = DirtyMark::decode(&value)?.since;
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
        stats.disk_available_bytes = crate::diskspace::available_bytes(&self.dir).unwrap_or(0);
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

    /// Records that every stored list has been delivered to `destination`'s topics.
    pub fn set_delivered_to(&self, destination: &str) -> Result<()> {
        let mut wb = WriteBatch::default();
        wb.put_cf(self.cf(CF_META), META_DELIVERED_TO, destination.as_bytes());
        self.write(wb)
    }
}

/// Writes a pair delta: as a plain value into a store that never held a pair (where a put
/// equals a merge), as a merge operand otherwise.
fn add_pair(wb: &mut WriteBatch, cf: &ColumnFamily, fresh: bool, key: [u8; 8], value: &[u8]) {
    if fresh {
        wb.put_cf(cf, key, value);
    } else {
        wb.merge_cf(cf, key, value);
    }
}

/// Both orientations (row, other) of every unordered pair (lo, hi) in `deltas`, sorted
/// by key; a diagonal key (a, a) appears once.
fn oriented_sorted<T>(deltas: &[(u32, u32, T)]) -> Vec<(u32, u32, &T)> {
    let mut out = Vec::with_capacity(deltas.len() * 2);
    for (lo, hi, d) in deltas {
        let (lo, hi) = (*lo, *hi);
        out.push((lo, hi, d));
        if lo != hi {
            out.push((hi, lo, d));
        }
    }
    out.sort_unstable_by_key(|&(row, other, _)| (row, other));
    out
}

fn check_schema(db: &DB) -> Result<()> {
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    match db.get_cf(meta, META_SCHEMA)? {
        Some(v) if v.as_slice() == SCHEMA_VERSION.to_le_bytes() => Ok(()),
        Some(v) => bail!("store schema version {v:?} is not the {SCHEMA_VERSION} this build reads"),
        None => bail!("store has no schema version"),
    }
}

impl Drop for Store {
    fn drop(&mut self) {
        match &self.access {
            Access::Secondary(dir) => {
                let _ = std::fs::remove_dir_all(dir);
            }
            // Everything committed is in the WAL; there is no need to wait for a flush or
            // compaction in progress before closing.
            Access::Primary => self.db.cancel_all_background_work(false),
            Access::View => {}
        }
    }
}
