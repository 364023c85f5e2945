//! Dense ids for user and item names. Item names are kept in memory (publication needs a
//! name for every neighbor, and the catalogue is small next to the pair table); user ids
//! are looked up per batch.

use std::collections::HashMap;

use anyhow::{bail, Context, Result};
use rocksdb::{Direction, IteratorMode, DB};

use super::{Store, CF_IDS};
use crate::cluster::ShardSpec;

/// Item names by dense id and back, kept in memory: publication needs names for every
/// neighbor (ties are broken by name) and the catalogue is small next to the pair table.
/// Also whether the store's shard owns each item, decided once when the name arrives.
#[derive(Debug, Clone)]
pub(super) struct ItemDirectory {
    pub(super) names: Vec<String>,
    pub(super) ids: HashMap<String, u32>,
    shard: ShardSpec,
    owned: Vec<bool>,
}

impl ItemDirectory {
    /// An empty directory of a store holding `shard`.
    pub(super) fn new(shard: ShardSpec) -> ItemDirectory {
        ItemDirectory {
            names: Vec::new(),
            ids: HashMap::new(),
            shard,
            owned: Vec::new(),
        }
    }

    /// Records the next dense id's name.
    pub(super) fn push(&mut self, id: u32, name: String) {
        debug_assert_eq!(id as usize, self.names.len());
        self.owned
            .push(!self.shard.is_sharded() || self.shard.owns(&name));
        self.ids.insert(name.clone(), id);
        self.names.push(name);
    }
}

/// Appends to `items` the item names stored with ids from `items.names.len()` on (ids
/// are dense, so what is already loaded never changes).
pub(super) fn load_items_from(db: &DB, items: &mut ItemDirectory) -> Result<()> {
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
        items.push(id, name);
    }
    Ok(())
}

impl Store {
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

    /// Whether the store's shard owns the stored item `id` (always, unsharded;
    /// docs/design.md, "Shards").
    pub fn owns(&self, id: u32) -> bool {
        self.items.owned.get(id as usize).copied().unwrap_or(false)
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
}
