//! Opening a store: RocksDB options and column families, the schema version, the
//! statistics fingerprint, and the three ways a handle holds the database (the writer, a
//! secondary instance for another process's reader, a view inside this process).

use std::path::Path;
use std::sync::Arc;

use anyhow::{bail, Context, Result};
use rocksdb::{WriteBatch, DB};

use super::erasure::{finish_left_scrub, ErasureKey};
use super::errors::OpenError;
use super::fingerprint::StatsFingerprint;
use super::ids::{load_items_from, ItemDirectory};
use super::ledger::Ledger;
use super::options::{cf_descriptors, db_options};
use super::{db_path, Access, Store, CF_META, META_FINGERPRINT, META_LEDGER, META_SCHEMA, SCHEMA_VERSION};
use crate::config::Config;

pub(super) fn read_ledger(db: &DB) -> Result<Ledger> {
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    Ok(match db.get_cf(meta, META_LEDGER)? {
        Some(bytes) => serde_json::from_slice(&bytes).context("stored ledger is unreadable")?,
        None => Ledger::default(),
    })
}

/// The erasure key of a store at [`SCHEMA_VERSION`], which every such store holds.
fn stored_erasure_key(db: &DB, dir: &Path) -> Result<ErasureKey> {
    ErasureKey::read(db)?.with_context(|| {
        format!(
            "{} has no erasure key (meta/erasure_key), which every store of layout version {SCHEMA_VERSION} holds: the store is damaged; restore a snapshot",
            dir.display()
        )
    })
}

/// Refuses a store whose layout version is not [`SCHEMA_VERSION`].
fn check_schema(db: &DB, dir: &Path) -> Result<()> {
    let meta = db.cf_handle(CF_META).expect("meta family exists");
    let found = db
        .get_cf(meta, META_SCHEMA)?
        .map(|v| <[u8; 4]>::try_from(v.as_slice()).map_or(u32::MAX, u32::from_le_bytes));
    if found != Some(SCHEMA_VERSION) {
        return Err(OpenError::SchemaMismatch {
            dir: dir.to_path_buf(),
            found,
            supported: SCHEMA_VERSION,
        }
        .into());
    }
    Ok(())
}

impl Store {
    /// Opens (creating if needed) a store for writing. Refuses a store whose statistics
    /// were shaped by other settings, naming each differing setting.
    pub fn open(dir: &Path, config: &Config) -> Result<Store> {
        super::staged::refuse_incomplete(dir)?;
        Store::open_creating(dir, config)
    }

    /// [`Store::open`] without refusing a directory still being built: only for the
    /// command building it (`simtide reshard`, in its staging directory).
    pub(super) fn open_creating(dir: &Path, config: &Config) -> Result<Store> {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("cannot create store directory {}", dir.display()))?;
        Store::open_primary(dir, Some(StatsFingerprint::from_config(config)))
    }

    /// Opens an existing store for writing with the settings it holds (`simtide
    /// snapshot`, which copies whatever the store is). Refused while a service holds it.
    pub fn open_as_stored(dir: &Path) -> Result<Store> {
        super::staged::refuse_incomplete(dir)?;
        let marker = db_path(dir).join("CURRENT");
        if !marker.exists() {
            return Err(OpenError::NotAStore {
                dir: dir.to_path_buf(),
                marker,
            }
            .into());
        }
        Store::open_primary(dir, None)
    }

    /// Opens the database as its writer; `asked` settings are checked against the stored
    /// ones, or written into a new store (without them, the store must exist).
    fn open_primary(dir: &Path, asked: Option<StatsFingerprint>) -> Result<Store> {
        super::migrate::prepare_layout(dir)?;
        let path = db_path(dir);
        let db = DB::open_cf_descriptors(&db_options(), &path, cf_descriptors())
            .with_context(|| format!("cannot open store {}", path.display()))?;
        let meta = db.cf_handle(CF_META).expect("meta family exists");
        let (fingerprint, erasure_key) = match (db.get_cf(meta, META_FINGERPRINT)?, asked) {
            (Some(bytes), asked) => {
                check_schema(&db, dir)?;
                let stored: StatsFingerprint =
                    serde_json::from_slice(&bytes).context("stored fingerprint is unreadable")?;
                let differences = asked.map_or_else(Vec::new, |asked| stored.differences(&asked));
                if !differences.is_empty() {
                    return Err(OpenError::SettingsChanged {
                        dir: dir.to_path_buf(),
                        differences,
                    }
                    .into());
                }
                (stored, stored_erasure_key(&db, dir)?)
            }
            (None, Some(asked)) => {
                let key = ErasureKey::random()?;
                let mut wb = WriteBatch::default();
                wb.put_cf(meta, META_SCHEMA, SCHEMA_VERSION.to_le_bytes());
                wb.put_cf(meta, META_FINGERPRINT, serde_json::to_vec(&asked)?);
                key.put(&db, &mut wb);
                db.write(wb)?;
                (asked, key)
            }
            (None, None) => {
                return Err(OpenError::NeverInitialised {
                    dir: dir.to_path_buf(),
                }
                .into())
            }
        };
        super::table_files::clear_leftovers(dir)?;
        if let Some(end) = super::table_files::finish_carried_write(&db)? {
            tracing::info!(
                segment_end = end,
                "finished a store write that a stopped process left after its table files"
            );
        }
        if finish_left_scrub(&db)? {
            tracing::info!("finished scrubbing forgotten users, which a stopped process left");
        }
        Store::finish_open(db, dir, fingerprint, erasure_key, Access::Primary)
    }

    /// Opens a store for reading while a writer may hold it open, as a RocksDB secondary
    /// instance caught up with the primary at open time.
    pub fn open_read_only(dir: &Path) -> Result<Store> {
        super::staged::refuse_incomplete(dir)?;
        let path = db_path(dir);
        let marker = path.join("CURRENT");
        if !marker.exists() {
            return Err(OpenError::NotAStore {
                dir: dir.to_path_buf(),
                marker,
            }
            .into());
        }
        let secondary = std::env::temp_dir().join(format!(
            "simtide-reader-{}-{}",
            std::process::id(),
            crate::timefmt::now_nanos().0
        ));
        let mut opts = db_options();
        opts.set_max_open_files(-1);
        let db = DB::open_cf_descriptors_as_secondary(&opts, &path, &secondary, cf_descriptors())
            .with_context(|| format!("cannot open store {} for reading", path.display()))?;
        db.try_catch_up_with_primary()?;
        check_schema(&db, dir)?;
        let meta = db.cf_handle(CF_META).expect("meta family exists");
        let fingerprint = match db.get_cf(meta, META_FINGERPRINT)? {
            Some(bytes) => serde_json::from_slice(&bytes).context("stored fingerprint is unreadable")?,
            None => {
                return Err(OpenError::NeverInitialised {
                    dir: dir.to_path_buf(),
                }
                .into())
            }
        };
        let erasure_key = stored_erasure_key(&db, dir)?;
        Store::finish_open(db, dir, fingerprint, erasure_key, Access::Secondary(secondary))
    }

    fn finish_open(
        db: DB,
        dir: &Path,
        fingerprint: StatsFingerprint,
        erasure_key: ErasureKey,
        access: Access,
    ) -> Result<Store> {
        let ledger = read_ledger(&db)?;
        let items = ItemDirectory::new(fingerprint.shard_spec());
        load_items_from(&db, &items)?;
        Ok(Store {
            db: Arc::new(db),
            dir: dir.to_path_buf(),
            fingerprint,
            ledger,
            items: Arc::new(items),
            erasure_key,
            access,
        })
    }

    /// A read-only view of this store for readers in the same process (HTTP lookups): it
    /// shares the open database, so reads see every committed batch without a second
    /// instance replaying the write-ahead log; [`Store::catch_up`] refreshes its positions
    /// (the item names are shared with the writer, which adds them). A view refuses
    /// writes.
    pub fn view(&self) -> Store {
        Store {
            db: self.db.clone(),
            dir: self.dir.clone(),
            fingerprint: self.fingerprint,
            ledger: self.ledger.clone(),
            items: Arc::clone(&self.items),
            erasure_key: self.erasure_key.clone(),
            access: Access::View,
        }
    }

    /// Brings a reader up to the writer's latest committed batch: for a secondary
    /// instance RocksDB's catch-up and the items added since, then the positions (a view
    /// shares the writer's item names). Long-lived readers (HTTP lookups) call it
    /// periodically instead of reopening.
    pub fn catch_up(&mut self) -> Result<()> {
        match self.access {
            Access::Primary => bail!("the writer is always current; only readers catch up"),
            Access::Secondary(_) => {
                self.db.try_catch_up_with_primary()?;
                load_items_from(&self.db, &self.items)?;
            }
            Access::View => {}
        }
        self.ledger = read_ledger(&self.db)?;
        Ok(())
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
