//! The RocksDB store: the only module that touches the database (docs/design.md, "Storage").
//!
//! Column families:
//! - `ids`: `u`/`i` + name → dense id, `I` + id → item name, `e` + keyed hash of a
//!   forgotten user's name → erasure time (`erasure`).
//! - `users`: user id → history and applied center ([`codec::encode_user`]); none for a
//!   forgotten user.
//! - `items`: item id → availability status.
//! - `pairs`: rating pair sums. Each unordered pair is written under BOTH orders, key =
//!   (row, other) big-endian with the norms oriented to the key, so a prefix scan on an
//!   item's 4 bytes lists its whole row at the cost of twice the writes.
//! - `purchase_pairs`: co-buyer counts, same two-order layout; key (a, a) holds a's buyers.
//! - `dirty`: signal + item → first time its list went out of date.
//! - `published`: signal + item → the last list computed for it.
//! - `meta`: schema version, statistics fingerprint, and the ledger (positions, counters,
//!   id allocators) that every batch rewrites in the same WriteBatch.
//!
//! Opening (`open`), ids (`ids`), writes (`commit`) and reads (`reads`) are split by
//! responsibility; `codec` and `merge` hold the byte formats and merge operators.

#[cfg(test)]
mod carried_write_tests;
pub mod codec;
mod commit;
mod erasure;
pub mod errors;
pub mod fingerprint;
mod ids;
pub mod ledger;
pub mod merge;
mod migrate;
pub mod mirror;
mod open;
mod options;
mod oriented;
mod reads;
pub mod reshard;
pub mod row_blocks;
mod rows;
mod snapshot;
pub mod staged;
mod table_files;

use std::fs::{File, OpenOptions};
use std::io::{Seek, SeekFrom};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::{Context, Result};
use rocksdb::{ColumnFamily, DB};

pub use commit::{BatchCommit, Delivery, MarkAfterWrite, PairWrite, PublicationWrite};
pub use erasure::ForgottenUser;
pub use errors::OpenError;
pub use fingerprint::StatsFingerprint;
use ids::ItemDirectory;
pub use ledger::{FilePosition, Ledger};
pub use reads::StoreStats;
pub use rows::{PairRows, SegmentRows};
pub use table_files::{rating_table_options, RatingTable};

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
/// The ledger's key (named "progress" since the first layout).
const META_LEDGER: &[u8] = b"progress";
const META_DELIVERED_TO: &[u8] = b"delivered_to";

/// Layout version of this build's store. 4: rating pairs kept as row blocks
/// (`row_blocks`); 3: forgotten users leave only a tombstone, and
/// users have no id → name entry; 2: compact rating pair values
/// ([`codec::encode_rating_pair`]); version 1 stored them in 56 fixed bytes.
pub const SCHEMA_VERSION: u32 = 4;

/// An open store.
pub struct Store {
    db: Arc<DB>,
    dir: PathBuf,
    fingerprint: StatsFingerprint,
    ledger: Ledger,
    items: Arc<ItemDirectory>,
    erasure_key: erasure::ErasureKey,
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

/// Where RocksDB lives inside a store directory.
pub fn db_path(dir: &Path) -> PathBuf {
    dir.join("db")
}

/// Where rejected records are written inside a store directory: a backfill's, and the
/// live service's dead letters the broker refused for good.
pub fn rejects_path(dir: &Path) -> PathBuf {
    dir.join("rejects.jsonl")
}

/// Opens the rejects file for appending, cutting off anything a crashed run wrote after
/// its last commit (the ledger records the file's length with every write).
pub fn open_rejects(store: &Store) -> Result<File> {
    let path = rejects_path(store.dir());
    let mut file = OpenOptions::new()
        .create(true)
        .truncate(false)
        .read(true)
        .write(true)
        .open(&path)
        .with_context(|| format!("cannot open rejects file {}", path.display()))?;
    // Only ever shorten: an operator may have deleted or emptied the file after handling it.
    let committed = store.ledger().rejects_file_len;
    if file.metadata()?.len() > committed {
        file.set_len(committed)?;
    }
    file.seek(SeekFrom::End(0))?;
    Ok(file)
}

impl Store {
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

    /// The item shard whose pairs and lists the store holds (docs/design.md, "Shards").
    pub fn shard(&self) -> crate::cluster::ShardSpec {
        self.fingerprint.shard_spec()
    }

    /// The ledger as of the last committed batch.
    pub fn ledger(&self) -> &Ledger {
        &self.ledger
    }
}
