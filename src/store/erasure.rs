//! Forgetting erased users (docs/design.md, "Personal data"): a forgotten user leaves a
//! tombstone keyed by a keyed hash of the name instead of the name, the dense id and the
//! history, and the write that forgets users scrubs their old bytes out of the
//! write-ahead log and the table files before it returns.

use anyhow::{bail, Context, Result};
use hmac::{Hmac, Mac};
use rocksdb::{BottommostLevelCompaction, CompactOptions, FlushOptions, WriteBatch, DB};
use sha2::Sha256;

use super::table_files::SEGMENT_MARKER_KEY;
use super::{Store, ALL_CFS, CF_IDS, CF_META, CF_PAIRS, CF_USERS};
use crate::event::UnixNanos;

/// Meta key of the store's secret for tombstone hashes.
pub(super) const META_ERASURE_KEY: &[u8] = b"erasure_key";

/// Meta key present from a write that forgot users until its scrub has finished.
pub(super) const META_SCRUB_PENDING: &[u8] = b"scrub_pending";

/// First byte of a tombstone's key in the `ids` family.
const TOMBSTONE_PREFIX: u8 = b'e';

/// Bytes of the hash kept in a tombstone's key: 128 bits make a collision between two
/// names of one store a non-event.
const TOMBSTONE_HASH_BYTES: usize = 16;

/// Bytes of the store's secret.
const ERASURE_KEY_BYTES: usize = 32;

/// Deleted keys of one family compacted one by one; above this, the span from the first
/// to the last is compacted at once (one rewrite instead of many).
const KEYS_COMPACTED_ONE_BY_ONE: usize = 16;

/// The store's secret for tombstone hashes: without it a tombstone names nobody.
#[derive(Clone)]
pub(super) struct ErasureKey([u8; ERASURE_KEY_BYTES]);

impl ErasureKey {
    /// A new secret from the operating system's random source, for a new store.
    pub(super) fn random() -> Result<ErasureKey> {
        let mut bytes = [0; ERASURE_KEY_BYTES];
        getrandom::fill(&mut bytes)
            .map_err(|e| anyhow::anyhow!("cannot draw the store's erasure key: {e}"))?;
        Ok(ErasureKey(bytes))
    }

    /// The secret stored in `meta` (`None` in a store older than the key).
    pub(super) fn read(db: &DB) -> Result<Option<ErasureKey>> {
        let meta = db.cf_handle(CF_META).expect("meta family exists");
        let Some(bytes) = db.get_cf(meta, META_ERASURE_KEY)? else {
            return Ok(None);
        };
        let Ok(bytes) = <[u8; ERASURE_KEY_BYTES]>::try_from(bytes.as_slice()) else {
            bail!(
                "meta/{} holds {} bytes, not {ERASURE_KEY_BYTES}: the store is damaged",
                String::from_utf8_lossy(META_ERASURE_KEY),
                bytes.len()
            );
        };
        Ok(Some(ErasureKey(bytes)))
    }

    /// Adds the secret to a write (a new store, a migration, a resharded copy).
    pub(super) fn put(&self, db: &DB, wb: &mut WriteBatch) {
        wb.put_cf(
            db.cf_handle(CF_META).expect("meta family exists"),
            META_ERASURE_KEY,
            self.0,
        );
    }

    /// The `ids` key of `name`'s tombstone.
    pub(super) fn tombstone(&self, name: &str) -> [u8; 1 + TOMBSTONE_HASH_BYTES] {
        let mut mac = Hmac::<Sha256>::new_from_slice(&self.0).expect("HMAC takes a key of any length");
        mac.update(name.as_bytes());
        let digest = mac.finalize().into_bytes();
        let mut key = [TOMBSTONE_PREFIX; 1 + TOMBSTONE_HASH_BYTES];
        key[1..].copy_from_slice(&digest[..TOMBSTONE_HASH_BYTES]);
        key
    }
}

/// A user whose history is empty after an erasure, whom a write forgets.
#[derive(Debug, Clone, PartialEq)]
pub struct ForgottenUser {
    /// The dense id the user had (never given out again).
    pub id: u32,
    /// The name, to delete its `ids` entry and hash its tombstone.
    pub name: String,
    /// The erasure time the tombstone keeps.
    pub erased_at: UnixNanos,
    /// Whether the store holds the user's id and history (false: first seen in the same
    /// write, so nothing of the user was ever written).
    pub stored: bool,
}

/// The `ids` key of a user name.
pub(super) fn user_name_key(name: &str) -> Vec<u8> {
    [b"u", name.as_bytes()].concat()
}

/// Encodes a tombstone's erasure time.
pub(super) fn encode_erased_at(at: UnixNanos) -> [u8; 8] {
    at.0.to_be_bytes()
}

impl Store {
    /// When each user name was forgotten, from the tombstones (`None`: never erased, or
    /// still known by its id).
    pub fn erasure_times(&self, names: &[&str]) -> Result<Vec<Option<UnixNanos>>> {
        let ids = self.cf(CF_IDS);
        let keys: Vec<_> = names.iter().map(|n| self.erasure_key.tombstone(n)).collect();
        self.db
            .multi_get_cf(keys.iter().map(|k| (ids, k.as_slice())))
            .into_iter()
            .map(|value| {
                Ok(match value? {
                    Some(v) => Some(UnixNanos(i64::from_be_bytes(
                        v.as_slice().try_into().context("tombstone value")?,
                    ))),
                    None => None,
                })
            })
            .collect()
    }

    /// Removes the old bytes of the users a just-committed write forgot: flushes every
    /// memtable (retiring the write-ahead logs that hold them), compacts their deleted
    /// `ids` and `users` keys to the last level, and the rating pairs' segment marker
    /// (whose old values carried live writes' batches, names and histories included),
    /// and clears the scrub marker.
    pub(super) fn scrub_forgotten(&self, forgotten: &[ForgottenUser]) -> Result<()> {
        let started = std::time::Instant::now();
        let stored = forgotten.iter().filter(|f| f.stored);
        let names: Vec<Vec<u8>> = stored.clone().map(|f| user_name_key(&f.name)).collect();
        let ids: Vec<Vec<u8>> = stored.map(|f| super::codec::id_key(f.id).to_vec()).collect();
        let users = ids.len();
        scrub(
            &self.db,
            &[
                (CF_IDS, Some(names)),
                (CF_USERS, Some(ids)),
                (CF_PAIRS, Some(vec![SEGMENT_MARKER_KEY.to_vec()])),
            ],
        )?;
        tracing::info!(
            users,
            seconds = started.elapsed().as_secs_f64(),
            "store files scrubbed of forgotten users"
        );
        Ok(())
    }
}

/// Finishes a scrub that a stopped process left (its marker is still in `meta`): the
/// deleted keys are not known any more, so the whole `ids` and `users` families are
/// compacted (and the rating pairs' segment marker, as always). Returns whether there was
/// one.
pub(super) fn finish_left_scrub(db: &DB) -> Result<bool> {
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    if db.get_cf(meta, META_SCRUB_PENDING)?.is_none() {
        return Ok(false);
    }
    scrub(
        db,
        &[
            (CF_IDS, None),
            (CF_USERS, None),
            (CF_PAIRS, Some(vec![SEGMENT_MARKER_KEY.to_vec()])),
        ],
    )?;
    Ok(true)
}

/// Flushes every family, compacts the given keys of each named family to the last level
/// (`None`: the whole family), and deletes the scrub marker.
fn scrub(db: &DB, keys_by_family: &[(&str, Option<Vec<Vec<u8>>>)]) -> Result<()> {
    let families: Vec<_> = ALL_CFS
        .iter()
        .map(|name| db.cf_handle(name).expect("all column families are opened"))
        .collect();
    let mut wait = FlushOptions::default();
    wait.set_wait(true);
    db.flush_cfs_opt(&families, &wait)
        .context("cannot flush the store to scrub forgotten users")?;
    let mut options = CompactOptions::default();
    options.set_bottommost_level_compaction(BottommostLevelCompaction::Force);
    options.set_exclusive_manual_compaction(false);
    for (family, keys) in keys_by_family {
        let cf = db.cf_handle(family).expect("all column families are opened");
        match keys {
            None => db.compact_range_cf_opt(cf, None::<&[u8]>, None::<&[u8]>, &options),
            Some(keys) if keys.len() <= KEYS_COMPACTED_ONE_BY_ONE => {
                for key in keys {
                    db.compact_range_cf_opt(cf, Some(key), Some(key), &options);
                }
            }
            Some(keys) => {
                let (first, last) = (keys.iter().min(), keys.iter().max());
                db.compact_range_cf_opt(cf, first, last, &options);
            }
        }
    }
    let mut done = WriteBatch::default();
    done.delete_cf(
        db.cf_handle(CF_META).expect("meta family exists"),
        META_SCRUB_PENDING,
    );
    db.write(done).context("cannot clear the scrub marker")
}
