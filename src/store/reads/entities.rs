//! Reading users and items: the stored states of a batch's users and the statuses of its
//! items, and which items are unavailable.

use std::collections::HashMap;

use anyhow::{Context, Result};
use rocksdb::IteratorMode;
use rustc_hash::FxHashSet;

use crate::engine::user_state::UserState;
use crate::engine::ItemStatus;
use crate::store::{codec, Store, CF_ITEMS, CF_USERS};

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

    /// Stored state of one user by name.
    pub fn user_state(&self, name: &str) -> Result<Option<UserState>> {
        let Some(id) = self.user_ids(&[name])?[0] else {
            return Ok(None);
        };
        Ok(self.load_users(&[id])?.remove(&id))
    }
}
