//! Dense ids for user and item names. Item names are kept in memory (publication needs a
//! name for every neighbor, and the catalogue is small next to the pair table); user ids
//! are looked up per batch.

use std::collections::HashMap;
use std::sync::RwLock;

use anyhow::{bail, Context, Result};
use rocksdb::{Direction, IteratorMode, DB};

use super::{Store, CF_IDS};
use crate::cluster::ShardSpec;

/// Item names by dense id and back, kept in memory: publication needs names for every
/// neighbor (ties are broken by name) and the catalogue is small next to the pair table.
/// Also whether the store's shard owns each item, decided once when the name arrives.
/// Append-only, so the writer and the lookup views of the same process share one copy:
/// the one handle that loads or commits names adds them, the others read.
#[derive(Debug)]
pub(super) struct ItemDirectory {
    entries: boxcar::Vec<ItemEntry>,
    ids: RwLock<HashMap<String, u32>>,
    shard: ShardSpec,
}

/// One item's name and whether the store's shard owns it.
#[derive(Debug)]
struct ItemEntry {
    name: String,
    owned: bool,
}

impl ItemDirectory {
    /// An empty directory of a store holding `shard`.
    pub(super) fn new(shard: ShardSpec) -> ItemDirectory {
        ItemDirectory {
            entries: boxcar::Vec::new(),
            ids: RwLock::new(HashMap::new()),
            shard,
        }
    }

    /// Records the next dense id's name.
    pub(super) fn push(&self, id: u32, name: String) {
        let owned = !self.shard.is_sharded() || self.shard.owns(&name);
        self.ids
            .write()
            .expect("no reader of item ids panics")
            .insert(name.clone(), id);
        let at = self.entries.push(ItemEntry { name, owned });
        debug_assert_eq!(at, id as usize, "item ids are dense");
    }

    /// Number of names held.
    pub(super) fn count(&self) -> usize {
        self.entries.count()
    }
}

/// Appends to `items` the item names stored with ids from `items.count()` on (ids are
/// dense, so what is already loaded never changes).
pub(super) fn load_items_from(db: &DB, items: &ItemDirectory) -> Result<()> {
    let ids = db.cf_handle(CF_IDS).expect("ids family exists");
    let first = u32::try_from(items.count()).context("item count")?;
    let start = [&b"I"[..], &first.to_be_bytes()].concat();
    for entry in db.iterator_cf(ids, IteratorMode::From(&start, Direction::Forward)) {
        let (key, value) = entry?;
        if key.first() != Some(&b'I') {
            break;
        }
        let id = u32::from_be_bytes(key[1..5].try_into().context("item id key")?);
        if id as usize != items.count() {
            bail!("item ids are not dense: found {id} after {} names", items.count());
        }
        let name = String::from_utf8(value.to_vec()).context("item name is not UTF-8")?;
        items.push(id, name);
    }
    Ok(())
}

impl Store {
    /// Dense id of an item name, if known.
    pub fn item_id(&self, name: &str) -> Option<u32> {
        self.items
            .ids
            .read()
            .expect("no writer of item ids panics")
            .get(name)
            .copied()
    }

    /// Name of a dense item id.
    pub fn item_name(&self, id: u32) -> &str {
        self.items
            .entries
            .get(id as usize)
            .map_or("?", |e| e.name.as_str())
    }

    /// Number of items ever seen.
    pub fn item_count(&self) -> usize {
        self.items.count()
    }

    /// Whether the store's shard owns the stored item `id` (always, unsharded;
    /// docs/design.md, "Shards").
    pub fn owns(&self, id: u32) -> bool {
        self.items.entries.get(id as usize).is_some_and(|e| e.owned)
    }

    /// Dense ids of user names; `None` for users never seen.
    pub fn user_ids(&self, names: &[&str]) -> Result<Vec<Option<u32>>> {
        let ids = self.cf(CF_IDS);
        let keys: Vec<Vec<u8>> = names.iter().map(|n| super::erasure::user_name_key(n)).collect();
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
}
