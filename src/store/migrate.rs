//! Store layout upgrades (docs/design.md, "Upgrades"). A store records its layout version
//! (`meta/schema_version`); this build writes [`SCHEMA_VERSION`] and, when it opens an
//! older store it knows for writing, migrates it forward in place with progress lines. A
//! newer or unknown version is refused before the database is opened for writing, naming
//! both versions.
//!
//! Version 1 held rating pair values in 56 fixed bytes: n as i64, then dot, s_row and
//! s_other as i128, all little-endian; version 2 holds them in the compact form of
//! [`encode_rating_pair`]. Nothing else differs.
//!
//! Version 2 kept a `U` + id → name entry for every user, and an erased user as its name,
//! id and an empty history; version 3 keeps neither ([`forget_erased_users`]).
//!
//! Version 3 held one rating key per ordered pair; version 4 holds row blocks
//! ([`pairs_into_blocks`], docs/design.md "Rows in blocks"). A store is migrated one
//! version at a time.
//!
//! The migration never lets this build's merge operator or compaction filter see a
//! version-1 value: the schema is read from a read-only open (no flush, no compaction),
//! and the migration opens the pair family with a version-1 merge operator, folds every
//! operand by a full compaction, then rewrites the values in key order. Each rewritten
//! batch records the last key it holds, so a migration cut short resumes after it; the
//! last batch sets the version.

use std::collections::HashMap;
use std::path::Path;

use anyhow::{bail, Context, Result};
use rocksdb::{
    ColumnFamilyDescriptor, DBRecoveryMode, Direction, IteratorMode, MergeOperands, Options, WriteBatch, DB,
};

use super::codec::{decode_rating_pair, decode_user, encode_rating_pair, id_key, split_pair_key};
use super::erasure::{encode_erased_at, finish_left_scrub, ErasureKey, META_SCRUB_PENDING};
use super::errors::OpenError;
use super::open::read_ledger;
use super::options::{cf_descriptors, cf_options, db_options};
use super::row_blocks::BlockCutter;
use super::{
    db_path, ALL_CFS, CF_IDS, CF_META, CF_PAIRS, CF_USERS, META_LEDGER, META_SCHEMA, SCHEMA_VERSION,
};
use crate::event::UnixNanos;
use crate::model::RatingPairStats;

/// The layout with fixed rating pair values.
const FIXED_PAIRS_VERSION: u32 = 1;

/// The layout that kept erased users' names, ids and empty histories.
const KEPT_ERASED_USERS_VERSION: u32 = 2;

/// The layout with one rating key per ordered pair.
const PAIR_KEYS_VERSION: u32 = 3;

/// Length of a version-1 rating pair value.
const FIXED_PAIR_LEN: usize = 8 + 3 * 16;

/// Meta key of an unfinished migration: the last pair key already rewritten.
const META_MIGRATED_UP_TO: &[u8] = b"migrated_up_to";

/// Pair values rewritten per write batch (and per progress line).
const BATCH_PAIRS: usize = 200_000;

/// The layout version the store at `path` (its database directory) records, read by a
/// read-only open; `None` when it records none.
fn stored_version(path: &Path) -> Result<Option<u32>> {
    let names = DB::list_cf(&Options::default(), path)
        .with_context(|| format!("cannot list the families of {}", path.display()))?;
    // A store whose writer was killed may end its write-ahead log mid-record, after table
    // files it ingested; the writable open recovers it, and this peek at one key written
    // when the store was created only has to get past it.
    let mut options = Options::default();
    options.set_wal_recovery_mode(DBRecoveryMode::SkipAnyCorruptedRecord);
    let db = DB::open_cf_for_read_only(&options, path, &names, false)
        .with_context(|| format!("cannot read the layout version of {}", path.display()))?;
    let Some(meta) = db.cf_handle(CF_META) else {
        return Ok(None);
    };
    Ok(db
        .get_cf(meta, META_SCHEMA)?
        .map(|v| <[u8; 4]>::try_from(v.as_slice()).map_or(u32::MAX, u32::from_le_bytes)))
}

/// Before a writable open of the store in `dir`: migrates it to [`SCHEMA_VERSION`] when it
/// records an older version this build knows, and refuses any other version, so that
/// this build's merge operators and compaction filters never run on a layout they do
/// not read. A new store, or one without a version yet, is left to the open.
pub(super) fn prepare_layout(dir: &Path) -> Result<()> {
    let path = db_path(dir);
    if !path.join("CURRENT").exists() {
        return Ok(());
    }
    let version = match stored_version(&path) {
        Ok(version) => version,
        Err(e) => {
            // The writable open recovers more than a read-only one; it checks the
            // version itself after opening.
            tracing::debug!(error = %format!("{e:#}"), "layout version not read before opening");
            return Ok(());
        }
    };
    let Some(mut version) = version else {
        return Ok(());
    };
    while version != SCHEMA_VERSION {
        version = match version {
            FIXED_PAIRS_VERSION => migrate_fixed_pairs(dir, &path)?,
            KEPT_ERASED_USERS_VERSION => forget_erased_users(dir, &path)?,
            PAIR_KEYS_VERSION => pairs_into_blocks(dir, &path)?,
            other => {
                return Err(OpenError::SchemaMismatch {
                    dir: dir.to_path_buf(),
                    found: Some(other),
                    supported: SCHEMA_VERSION,
                }
                .into())
            }
        };
    }
    Ok(())
}

/// Decodes a version-1 rating pair value.
fn decode_fixed(bytes: &[u8]) -> Option<RatingPairStats> {
    if bytes.len() != FIXED_PAIR_LEN {
        return None;
    }
    let i128_at = |at: usize| i128::from_le_bytes(bytes[at..at + 16].try_into().expect("16 bytes"));
    Some(RatingPairStats {
        n: i64::from_le_bytes(bytes[..8].try_into().expect("8 bytes")),
        dot: i128_at(8),
        s_row: i128_at(24),
        s_other: i128_at(40),
    })
}

/// The version-1 merge operator: field-wise sums of fixed values.
fn merge_fixed(_key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut sum = RatingPairStats::default();
    for value in existing.into_iter().chain(operands.iter()) {
        sum.add(&decode_fixed(value)?);
    }
    let mut out = Vec::with_capacity(FIXED_PAIR_LEN);
    out.extend_from_slice(&sum.n.to_le_bytes());
    for v in [sum.dot, sum.s_row, sum.s_other] {
        out.extend_from_slice(&v.to_le_bytes());
    }
    Some(out)
}

/// An earlier layout's merge operator of the pair family.
type PairMerge = fn(&[u8], Option<&[u8]>, &MergeOperands) -> Option<Vec<u8>>;

/// Opens the store for a migration of its rating pairs: the pair family with an earlier
/// layout's merge operator (`merge`, named `name`) and auto-compaction off, so that this
/// build's operator and filter never see the old values; the other families as usual.
fn open_with_pair_operator(path: &Path, name: &str, merge: PairMerge) -> Result<DB> {
    let descriptors: Vec<ColumnFamilyDescriptor> = ALL_CFS
        .iter()
        .map(|&family| {
            let options = if family == CF_PAIRS {
                let mut o = Options::default();
                o.set_merge_operator_associative(name, merge);
                o.set_disable_auto_compactions(true);
                o
            } else {
                cf_options(family)
            };
            ColumnFamilyDescriptor::new(family, options)
        })
        .collect();
    DB::open_cf_descriptors(&db_options(), path, descriptors)
        .with_context(|| format!("cannot open {} to migrate it", path.display()))
}

/// Rewrites every version-1 rating pair value in the compact form, then records version
/// 2, which it returns.
fn migrate_fixed_pairs(dir: &Path, path: &Path) -> Result<u32> {
    const TO: u32 = KEPT_ERASED_USERS_VERSION;
    tracing::info!(
        store = %dir.display(),
        "store layout version {FIXED_PAIRS_VERSION} found: migrating it to version {TO} in place (take a snapshot before upgrading: README, \"Upgrades\")"
    );
    let db = open_with_pair_operator(path, "simtide_rating_pair_sum_v1", merge_fixed)?;
    let pairs = db.cf_handle(CF_PAIRS).expect("pair family exists");
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    let resume = db.get_cf(meta, META_MIGRATED_UP_TO)?;
    if resume.is_none() {
        // Every merge operand folded into one fixed value per key, by the version-1
        // operator; a resumed migration did this before its first batch.
        db.compact_range_cf(pairs, None::<&[u8]>, None::<&[u8]>);
    }
    let total = db
        .property_int_value_cf(pairs, "rocksdb.estimate-num-keys")?
        .unwrap_or(0);
    let mode = match &resume {
        Some(last) => IteratorMode::From(last, Direction::Forward),
        None => IteratorMode::Start,
    };
    let (mut batch, mut in_batch, mut done) = (WriteBatch::default(), 0usize, 0u64);
    let mut value = Vec::new();
    for entry in db.iterator_cf(pairs, mode) {
        let (key, fixed) = entry?;
        if resume.as_deref() == Some(&key[..]) {
            continue;
        }
        let Some(stats) = decode_fixed(&fixed) else {
            bail!(
                "{}: rating pair value of {} bytes is not in the version-1 form ({FIXED_PAIR_LEN} bytes); restore the snapshot taken before the upgrade",
                dir.display(),
                fixed.len()
            );
        };
        value.clear();
        encode_rating_pair(&stats, &mut value);
        batch.put_cf(pairs, &key, &value);
        in_batch += 1;
        if in_batch == BATCH_PAIRS {
            batch.put_cf(meta, META_MIGRATED_UP_TO, &key);
            db.write(std::mem::take(&mut batch))?;
            done += in_batch as u64;
            in_batch = 0;
            tracing::info!(done, of_about = total, "migrating rating pair values");
        }
    }
    done += in_batch as u64;
    batch.delete_cf(meta, META_MIGRATED_UP_TO);
    batch.put_cf(meta, META_SCHEMA, TO.to_le_bytes());
    db.write(batch)?;
    db.flush_wal(true)?;
    tracing::info!(pairs = done, "store migrated to layout version {TO}");
    Ok(TO)
}

/// Replaces each erased user with an empty history by a tombstone, deletes every user's
/// id → name entry, makes the store's erasure key and records version 3, in one write;
/// then scrubs the files as a write that forgot users does. Returns 3.
fn forget_erased_users(dir: &Path, path: &Path) -> Result<u32> {
    const TO: u32 = KEPT_ERASED_USERS_VERSION + 1;
    tracing::info!(
        store = %dir.display(),
        "store layout version {KEPT_ERASED_USERS_VERSION} found: migrating it to version {TO} in place (erased users become tombstones)"
    );
    let db = DB::open_cf_descriptors(&db_options(), path, cf_descriptors())
        .with_context(|| format!("cannot open {} to migrate it", path.display()))?;
    let (ids, users, meta) = (
        db.cf_handle(CF_IDS).expect("ids family exists"),
        db.cf_handle(CF_USERS).expect("users family exists"),
        db.cf_handle(CF_META).expect("meta family exists"),
    );
    let mut erased: HashMap<u32, UnixNanos> = HashMap::new();
    for entry in db.iterator_cf(users, IteratorMode::Start) {
        let (key, value) = entry?;
        let id = u32::from_be_bytes(key.as_ref().try_into().context("user key")?);
        let state = decode_user(&value).with_context(|| format!("{}: user {id}", dir.display()))?;
        if let (Some(at), true) = (
            state.erased_at,
            state.ratings.is_empty() && state.purchases.is_empty(),
        ) {
            erased.insert(id, at);
        }
    }
    // A version-2 store holds no key; one that does (relabelled by hand from a later
    // layout) keeps it, so that its tombstones stay readable.
    let key = match ErasureKey::read(&db)? {
        Some(key) => key,
        None => ErasureKey::random()?,
    };
    let mut batch = WriteBatch::default();
    let mut forgotten = 0u64;
    for entry in db.iterator_cf(ids, IteratorMode::From(b"u", Direction::Forward)) {
        let (name_key, id) = entry?;
        if name_key.first() != Some(&b'u') {
            break;
        }
        let id = u32::from_be_bytes(id.as_ref().try_into().context("user id value")?);
        let Some(&at) = erased.get(&id) else {
            continue;
        };
        let name = String::from_utf8_lossy(&name_key[1..]);
        batch.delete_cf(ids, &name_key);
        batch.delete_cf(users, id_key(id));
        batch.put_cf(ids, key.tombstone(&name), encode_erased_at(at));
        forgotten += 1;
    }
    batch.delete_range_cf(ids, b"U", b"V");
    let mut ledger = read_ledger(&db)?;
    ledger.erasure_tombstones |= forgotten > 0;
    batch.put_cf(meta, META_LEDGER, serde_json::to_vec(&ledger)?);
    key.put(&db, &mut batch);
    batch.put_cf(meta, META_SCRUB_PENDING, []);
    batch.put_cf(meta, META_SCHEMA, TO.to_le_bytes());
    db.write(batch)?;
    finish_left_scrub(&db)?;
    tracing::info!(forgotten, "store migrated to layout version {TO}");
    Ok(TO)
}

/// The version-3 merge operator: field-wise sums of compact pair values.
fn merge_pair_values(_key: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
    let mut sum = RatingPairStats::default();
    for value in existing.into_iter().chain(operands.iter()) {
        sum.add(&decode_rating_pair(value).ok()?);
    }
    let mut out = Vec::new();
    encode_rating_pair(&sum, &mut out);
    Some(out)
}

/// Rewrites the version-3 rating pair keys (one per ordered pair) as row blocks, deleting
/// each block's pair keys in the batch that writes it, then records version 4, which it
/// returns. Block keys (7 bytes) never collide with pair keys (8), so a migration cut
/// short resumes by walking the pair keys that are left.
fn pairs_into_blocks(dir: &Path, path: &Path) -> Result<u32> {
    const TO: u32 = PAIR_KEYS_VERSION + 1;
    tracing::info!(
        store = %dir.display(),
        "store layout version {PAIR_KEYS_VERSION} found: migrating it to version {TO} in place (rating pairs become row blocks)"
    );
    let db = open_with_pair_operator(path, "simtide_rating_pair_sum", merge_pair_values)?;
    let pairs = db.cf_handle(CF_PAIRS).expect("pair family exists");
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    // Every merge operand folded into one value per pair key by the version-3 operator
    // (blocks a resumed migration wrote are plain values: nothing to fold).
    db.compact_range_cf(pairs, None::<&[u8]>, None::<&[u8]>);
    let total = db
        .property_int_value_cf(pairs, "rocksdb.estimate-num-keys")?
        .unwrap_or(0);
    let mut batch = WriteBatch::default();
    let (mut block_keys, mut in_batch, mut done) = (Vec::<Box<[u8]>>::new(), 0usize, 0u64);
    let mut cutter = BlockCutter::default();
    let emit = |batch: &mut WriteBatch, block_keys: &mut Vec<Box<[u8]>>, key: &[u8], value: &[u8]| {
        batch.put_cf(pairs, key, value);
        for old in block_keys.drain(..) {
            batch.delete_cf(pairs, old);
        }
    };
    for entry in db.iterator_cf(pairs, IteratorMode::Start) {
        let (key, value) = entry?;
        let Ok((row, other)) = split_pair_key(&key) else {
            continue; // a block already rewritten, or a segment marker
        };
        let stats = decode_rating_pair(&value).with_context(|| {
            format!(
                "{}: rating pair ({row}, {other}) is not in the version-3 form; restore the snapshot taken before the upgrade",
                dir.display()
            )
        })?;
        let mut emitted = false;
        cutter.push(row, other, stats, &mut |k: &[u8], v: &[u8]| {
            emit(&mut batch, &mut block_keys, k, v);
            emitted = true;
            Ok::<(), std::convert::Infallible>(())
        })?;
        block_keys.push(key);
        in_batch += 1;
        if emitted && in_batch >= BATCH_PAIRS {
            db.write(std::mem::take(&mut batch))?;
            done += in_batch as u64;
            in_batch = 0;
            tracing::info!(done, of_about = total, "rewriting rating pairs as row blocks");
        }
    }
    cutter.flush(&mut |k: &[u8], v: &[u8]| {
        emit(&mut batch, &mut block_keys, k, v);
        Ok::<(), std::convert::Infallible>(())
    })?;
    done += in_batch as u64;
    batch.put_cf(meta, META_SCHEMA, TO.to_le_bytes());
    db.write(batch)?;
    db.flush_wal(true)?;
    tracing::info!(pairs = done, "store migrated to layout version {TO}");
    Ok(TO)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn fixed_values_sum_and_decode() {
        let a = RatingPairStats {
            n: 2,
            dot: -5 << 80,
            s_row: 7 << 80,
            s_other: 1,
        };
        let mut fixed = Vec::new();
        fixed.extend_from_slice(&a.n.to_le_bytes());
        for v in [a.dot, a.s_row, a.s_other] {
            fixed.extend_from_slice(&v.to_le_bytes());
        }
        assert_eq!(decode_fixed(&fixed), Some(a));
        assert_eq!(decode_fixed(&fixed[..55]), None);
    }
}
