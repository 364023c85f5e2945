//! The store as HTTP lookups see it: one long-lived read-only (secondary) view, opened on
//! first use and caught up with the service's writes at most every [`REFRESH_EVERY`].
//! Opening a RocksDB instance per request costs a temp directory, file handles and block
//! cache each time; under concurrent lookups that grew the service by gigabytes. One view
//! shared by every request keeps memory flat and a lookup down to a few reads.

use std::path::PathBuf;
use std::sync::{Mutex, RwLock};
use std::time::{Duration, Instant};

use anyhow::Result;

use crate::store::Store;

/// Longest time a lookup's view may lag the last committed batch (plus the catch-up).
pub const REFRESH_EVERY: Duration = Duration::from_secs(1);

/// A shared read-only view of one store directory.
pub struct LookupStore {
    dir: PathBuf,
    view: RwLock<Option<Store>>,
    refreshed: Mutex<Option<Instant>>,
}

impl LookupStore {
    /// A view of the store in `dir`; nothing is opened until the first lookup.
    pub fn new(dir: PathBuf) -> LookupStore {
        LookupStore {
            dir,
            view: RwLock::new(None),
            refreshed: Mutex::new(None),
        }
    }

    /// Runs `read` against the view, opening or catching it up first when due. Blocking:
    /// call it off the async threads.
    pub fn read<T>(&self, read: impl FnOnce(&Store) -> Result<T>) -> Result<T> {
        self.refresh_if_due()?;
        let view = self.view.read().unwrap_or_else(|e| e.into_inner());
        read(view.as_ref().expect("the view is open after a refresh"))
    }

    fn due(&self) -> bool {
        self.refreshed
            .lock()
            .unwrap_or_else(|e| e.into_inner())
            .is_none_or(|at| at.elapsed() >= REFRESH_EVERY)
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
        match view.as_mut() {
            Some(store) => store.catch_up()?,
            None => *view = Some(Store::open_read_only(&self.dir)?),
        }
        *self.refreshed.lock().unwrap_or_else(|e| e.into_inner()) = Some(Instant::now());
        Ok(())
    }
}
