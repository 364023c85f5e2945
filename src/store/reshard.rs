//! Offline resharding (docs/design.md, "Shards"): a new shard's store built from the
//! stores of the old shards, stopped at the same input positions. Every old shard holds
//! every user's history and id, so those come from any one; each pair row, list and
//! dirty mark comes from the old shard that owned its item, where it is complete.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};
use rocksdb::{IteratorMode, WriteBatch};

use super::codec::{self, decode_dirty_mark};
use super::row_blocks::{decode_block_into, encode_block, split_block_key};
use super::{Ledger, Store, CF_DIRTY, CF_IDS, CF_ITEMS, CF_META, CF_PAIRS, CF_PUBLISHED};
use super::{CF_PURCHASE_PAIRS, CF_USERS, META_LEDGER};
use crate::cluster::{owner, ShardSpec};
use crate::config::Config;
use crate::model::DirtyScope;

/// Keys copied per store write.
const KEYS_PER_WRITE: usize = 100_000;

/// What a reshard did.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct ReshardSummary {
    /// Keys copied into the new store, per column family.
    pub keys: Vec<(&'static str, u64)>,
}

/// Builds the store of shard `config.cluster` at `to` from the stores of every old shard
/// at `from`. Refuses, naming what differs, unless the sources are one whole set of
/// shards, built with the configuration's statistics settings, at the same input
/// positions, with no unfinished segment; refuses a `to` that already holds a store.
pub fn reshard(from: &[PathBuf], to: &Path, config: &Config) -> Result<ReshardSummary> {
    let sources: Vec<Store> = from
        .iter()
        .map(|dir| Store::open_read_only(dir))
        .collect::<Result<_>>()?;
    let old = check_sources(&sources, config)?;
    if super::db_path(to).join("CURRENT").exists() {
        bail!(
            "{} already holds a store: reshard into a new directory",
            to.display()
        );
    }
    // Built beside `to` and renamed when whole: a killed reshard leaves no store that
    // `run` would open with an empty ledger.
    super::staged::build_whole(to, "a resharded store", |staging| {
        fill_new_shard(&sources, old, staging, config)
    })
}

/// Copies into the fresh store at `to` what shard `config.cluster` of the new layout
/// keeps from the checked `sources` (one whole set of `old` shards).
fn fill_new_shard(sources: &[Store], old: ShardSpec, to: &Path, config: &Config) -> Result<ReshardSummary> {
    let target = Store::open_creating(to, config)?;
    let new = target.shard();
    let by_shard: Vec<&Store> = (0..old.shards)
        .map(|i| {
            sources
                .iter()
                .find(|s| s.shard().shard == i)
                .expect("checked: every shard")
        })
        .collect();
    let mut summary = ReshardSummary::default();
    for family in [CF_IDS, CF_USERS, CF_ITEMS] {
        let n = copy_family(by_shard[0], &target, family, |_, value| Ok(Some(value.to_vec())))?;
        summary.keys.push((family, n));
    }
    // Ids are the same in every shard (each applied every event in the same order); each
    // source knows which items it owned, and `kept` says which the new shard keeps.
    let names = by_shard[0];
    let kept: Vec<bool> = (0..names.item_count() as u32)
        .map(|i| owner(names.item_name(i), new.shards) == new.shard)
        .collect();
    let kept_after = |item: u32| kept.get(item as usize) == Some(&true);
    // A row is complete on the old owner of the row item; the new shard keeps pairs
    // touching its items and every diagonal (BatchEffects::keep_shard).
    let mut ratings = 0;
    let mut purchases = 0;
    for source in &by_shard {
        ratings += copy_family(source, &target, CF_PAIRS, |key, value| {
            let Ok((row, first)) = split_block_key(key) else {
                return Ok(None);
            };
            if !source.owns(row) {
                return Ok(None);
            }
            let mut entries = Vec::new();
            decode_block_into(first, value, &mut entries)?;
            entries.retain(|&(other, _)| kept_after(row) || kept_after(other));
            let mut block = Vec::new();
            encode_block(&entries, &mut block);
            Ok((!entries.is_empty()).then_some(block))
        })?;
        purchases += copy_family(source, &target, CF_PURCHASE_PAIRS, |key, value| {
            let Ok((row, other)) = codec::split_pair_key(key) else {
                return Ok(None);
            };
            let keep = source.owns(row) && (row == other || kept_after(row) || kept_after(other));
            Ok(keep.then(|| value.to_vec()))
        })?;
    }
    summary.keys.push((CF_PAIRS, ratings));
    summary.keys.push((CF_PURCHASE_PAIRS, purchases));
    let mut published = 0;
    let mut dirty = 0;
    for source in &by_shard {
        published += copy_family(source, &target, CF_PUBLISHED, |key, value| {
            let keep = codec::split_signal_item_key(key)
                .is_ok_and(|(_, item)| source.owns(item) && kept_after(item));
            Ok(keep.then(|| value.to_vec()))
        })?;
        // Own-list marks of the new shard's items from their old owners; a mark that
        // expands to neighbors from wherever it is still pending (rescoring twice is
        // harmless, missing one is not). The family's merge keeps the earliest time.
        dirty += copy_family(source, &target, CF_DIRTY, |key, value| {
            let (Ok((_, item)), Ok(mark)) = (codec::split_signal_item_key(key), decode_dirty_mark(value))
            else {
                return Ok(None);
            };
            let keep = mark.scope == DirtyScope::WithNeighbors || (source.owns(item) && kept_after(item));
            Ok(keep.then(|| value.to_vec()))
        })?;
    }
    summary.keys.push((CF_PUBLISHED, published));
    summary.keys.push((CF_DIRTY, dirty));
    let mut wb = WriteBatch::default();
    wb.put_cf(
        target.cf(CF_META),
        META_LEDGER,
        serde_json::to_vec(by_shard[0].ledger())?,
    );
    // The tombstones copied with `ids` are hashed with the source's key.
    by_shard[0].erasure_key.put(&target.db, &mut wb);
    target
        .db
        .write(wb)
        .context("cannot write the new store's ledger")?;
    let rejects = super::rejects_path(by_shard[0].dir());
    if rejects.exists() {
        std::fs::copy(&rejects, super::rejects_path(to))
            .with_context(|| format!("cannot copy {}", rejects.display()))?;
    }
    Ok(summary)
}

/// Copies the entries of `family` for which `pick(key, value)` gives a value to write
/// (the value itself, or what of it the new shard keeps), as plain values (the target is
/// fresh, and what a source iterator returns is already merged); returns how many.
fn copy_family(
    source: &Store,
    target: &Store,
    family: &'static str,
    pick: impl Fn(&[u8], &[u8]) -> Result<Option<Vec<u8>>>,
) -> Result<u64> {
    let cf = target.cf(family);
    let mut wb = WriteBatch::default();
    let mut copied = 0u64;
    for entry in source.db.iterator_cf(source.cf(family), IteratorMode::Start) {
        let (key, value) =
            entry.with_context(|| format!("cannot read {family} of {}", source.dir().display()))?;
        let Some(value) = pick(&key, &value)? else {
            continue;
        };
        if family == CF_DIRTY {
            wb.merge_cf(cf, &key, &value);
        } else {
            wb.put_cf(cf, &key, &value);
        }
        copied += 1;
        if wb.len() >= KEYS_PER_WRITE {
            target
                .db
                .write(std::mem::take(&mut wb))
                .context("cannot write the new store")?;
        }
    }
    target.db.write(wb).context("cannot write the new store")?;
    Ok(copied)
}

/// The old shard count, after checking that the sources can be resharded.
fn check_sources(sources: &[Store], config: &Config) -> Result<ShardSpec> {
    let Some(first) = sources.first() else {
        bail!("--from names no store");
    };
    let old = first.shard();
    let mut seen = vec![false; old.shards as usize];
    let asked = super::StatsFingerprint::from_config(config);
    for source in sources {
        let shard = source.shard();
        if shard.shards != old.shards {
            bail!(
                "{} holds {}, {} holds {}: the sources must be one set of shards",
                first.dir().display(),
                old,
                source.dir().display(),
                shard
            );
        }
        if std::mem::replace(&mut seen[shard.shard as usize], true) {
            bail!("two sources hold {shard}");
        }
        if let Some(end) = source.uncommitted_segment_end()? {
            bail!(
                "{} holds an unfinished backfill segment (up to event {end}): rerun that backfill first",
                source.dir().display()
            );
        }
        let settings = source.fingerprint().similarity_differences(&asked);
        if !settings.is_empty() {
            bail!("{}: {}", source.dir().display(), settings.join("; "));
        }
        let positions = position_differences(first.ledger(), source.ledger());
        if !positions.is_empty() {
            bail!(
                "{} and {} stopped at different input positions ({}): bring every shard to \
                 the same positions first (simtide run --stop-at-end, or the same backfill)",
                first.dir().display(),
                source.dir().display(),
                positions.join("; ")
            );
        }
    }
    if let Some(missing) = seen.iter().position(|s| !s) {
        bail!(
            "no source holds shard {missing} of {}: every old shard's store is needed",
            old.shards
        );
    }
    Ok(old)
}

/// What differs between two ledgers' input positions.
fn position_differences(a: &Ledger, b: &Ledger) -> Vec<String> {
    let mut out = Vec::new();
    if a.next_seq != b.next_seq {
        out.push(format!("events applied {} vs {}", a.next_seq, b.next_seq));
    }
    if a.files != b.files {
        out.push(format!("file positions {:?} vs {:?}", a.files, b.files));
    }
    if a.offsets != b.offsets {
        out.push(format!("topic offsets {:?} vs {:?}", a.offsets, b.offsets));
    }
    out
}
