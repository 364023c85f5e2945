//! The store as HTTP lookups see it: one long-lived read-only view that shares the
//! service's open database ([`Store::view`]), its positions and item names refreshed at
//! most every [`REFRESH_EVERY`]. Opening a RocksDB instance per request cost a temp
//! directory, file handles and caches each time, and a secondary instance replays the
//! writer's write-ahead log into memtables of its own; a view of the open database reads
//! what the service itself reads, with no copy.

use std::sync::{Mutex, RwLock};
use std::time::{Duration, Instant};

use anyhow::{bail, Result};

use crate::store::Store;

/// Longest time a lookup's positions and item names may lag the last committed batch.
pub const REFRESH_EVERY: Duration = Duration::from_secs(1);

/// The shared view, empty until the service has opened its store.
#[derive(Default)]
pub struct LookupStore {
    view: RwLock<Option<Store>>,
    refreshed: Mutex<Option<Instant>>,
}

impl LookupStore {
    /// A lookup store with nothing to read yet (the HTTP listener starts first).
    pub fn new() -> LookupStore {
        LookupStore::default()
    }

    /// Serves lookups from `view` from now on.
    pub fn attach(&self, view: Store) {
        *self.view.write().unwrap_or_else(|e| e.into_inner()) = Some(view);
        *self.refreshed.lock().unwrap_or_else(|e| e.into_inner()) = Some(Instant::now());
    }

    /// Runs `read` against the view, refreshing it first when due. Blocking: call it off
    /// the async threads.
    pub fn read<T>(&self, read: impl FnOnce(&Store) -> Result<T>) -> Result<T> {
        self.refresh_if_due()?;
        let view = self.view.read().unwrap_or_else(|e| e.into_inner());
        match view.as_ref() {
            Some(store) => read(store),
            None => bail!("the store is not open yet"),
        }
    }

    fn due(&self) -> bool {
        self.refreshed
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .is_some_and(|at| at.elapsed() >= REFRESH_EVERY)
    }

    fn refresh_if_due(&self) -> Result<()> {
        if !self.due() {
            return Ok(());
        }
        let mut view = self.view.write().unwrap_or_else(|e| e.into_inner());
        // Another request may have refreshed while this one waited for the lock.
        if !self.due() {
            return Ok(());
        }
        if let Some(store) = view.as_mut() {
            store.catch_up()?;
        }
        *self.refreshed.lock().unwrap_or_else(|e| e.into_inner()) = Some(Instant::now());
        Ok(())
    }
}
