//! Why a store would not open, as types callers and tests can branch on.

use std::path::PathBuf;

/// What to do about a store of another layout version.
fn schema_advice(found: Option<u32>, supported: u32) -> &'static str {
    match found {
        Some(v) if v < supported => {
            "an older layout is migrated forward when the store is opened for writing (simtide run, backfill, or snapshot --store); take a snapshot first"
        }
        Some(_) => "it was written by a newer simtide; run that version, or restore a snapshot taken before the upgrade",
        None => "it was not written by simtide, or its meta family is damaged; restore a snapshot",
    }
}

/// A store that cannot be opened as asked.
#[derive(Debug, thiserror::Error)]
pub enum OpenError {
    /// The directory holds no RocksDB database.
    #[error("{} is not a simtide store (no {} found)", .dir.display(), .marker.display())]
    NotAStore {
        /// The directory given.
        dir: PathBuf,
        /// The file whose absence shows it.
        marker: PathBuf,
    },
    /// A snapshot or reshard was still writing this directory when it stopped.
    #[error("{} is an incomplete copy: a snapshot or reshard stopped while writing it. Delete it and run that command again (it starts over; the final directory never held a partial copy)", .dir.display())]
    Incomplete {
        /// The directory given.
        dir: PathBuf,
    },
    /// The database was created but never initialised by simtide.
    #[error("store {} was never initialised", .dir.display())]
    NeverInitialised {
        /// The store directory.
        dir: PathBuf,
    },
    /// The store's layout version is not the one this build reads.
    #[error("store {} has layout version {}, this build reads version {supported}: {}", .dir.display(), .found.map_or("(none)".to_string(), |v| v.to_string()), schema_advice(*.found, *.supported))]
    SchemaMismatch {
        /// The store directory.
        dir: PathBuf,
        /// The version the store records (`None`: none recorded).
        found: Option<u32>,
        /// The version this build reads.
        supported: u32,
    },
    /// Settings that shape the stored statistics differ from the ones it was built with.
    #[error("store {} refuses these settings:\n  {}\nThese settings shape the stored statistics; to change them, rebuild: backfill into a fresh store directory.", .dir.display(), .differences.join("\n  "))]
    SettingsChanged {
        /// The store directory.
        dir: PathBuf,
        /// One sentence per differing setting.
        differences: Vec<String>,
    },
}
