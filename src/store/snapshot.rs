//! Snapshots (docs/design.md, "Snapshots"): a consistent copy of a store, taken while the
//! service keeps running. The database is copied with a RocksDB checkpoint (memtables
//! flushed, table files hard-linked where the target is on the same filesystem and
//! copied otherwise, a fresh manifest); the rejects file is copied beside it. A snapshot
//! is a store: a service started on it continues from the positions its ledger holds, so
//! nothing is lost and nothing applied twice.

use std::fmt::Write as _;
use std::path::Path;

use anyhow::{Context, Result};
use rocksdb::checkpoint::Checkpoint;

use super::{db_path, rejects_path, Store};

impl Store {
    /// Writes a consistent copy of this store to `to`, a directory that must not exist
    /// yet. Works on the writer and on a view of a running service's store. The copy is
    /// built beside `to` and renamed when whole (`staged`), so a directory that exists
    /// is a whole snapshot, even after a kill.
    pub fn snapshot_to(&self, to: &Path) -> Result<()> {
        super::staged::build_whole(to, "a snapshot", |staging| self.write_snapshot(staging))
    }

    fn write_snapshot(&self, to: &Path) -> Result<()> {
        Checkpoint::new(&self.db)
            .and_then(|c| c.create_checkpoint(db_path(to)))
            .with_context(|| {
                format!(
                    "cannot write a checkpoint of {} to {}",
                    self.dir.display(),
                    to.display()
                )
            })?;
        let rejects = rejects_path(&self.dir);
        if rejects.exists() {
            std::fs::copy(&rejects, rejects_path(to))
                .with_context(|| format!("cannot copy {}", rejects.display()))?;
        }
        Ok(())
    }

    /// What a snapshot (or any store) holds, for `simtide snapshot --verify` and the
    /// admin endpoint's answer: positions, counts, statistics settings and shard.
    pub fn describe(&self) -> String {
        let ledger = self.ledger();
        let mut out = String::new();
        let _ = writeln!(out, "store {}", self.dir.display());
        let _ = writeln!(out, "  events applied     {}", ledger.next_seq);
        for (topic, offsets) in &ledger.offsets {
            let list: Vec<String> = offsets.iter().map(|(p, o)| format!("{p}:{o}")).collect();
            let _ = writeln!(out, "  topic {topic:<12} next offsets {}", list.join(","));
        }
        if !ledger.files.is_empty() {
            let _ = writeln!(out, "  files backfilled   {}", ledger.files.len());
        }
        for (kind, n) in &ledger.events {
            let _ = writeln!(out, "  {kind:<18} {n}");
        }
        let _ = writeln!(
            out,
            "  holds              {} users, {} items",
            ledger.next_user,
            self.item_count()
        );
        let f = &self.fingerprint;
        let _ = writeln!(
            out,
            "  settings           rating scale {}–{}, recenter_tolerance {}, max_items_per_user {}",
            f.rating_min, f.rating_max, f.recenter_tolerance, f.max_items_per_user
        );
        let _ = write!(out, "  shard              {}", self.shard());
        out
    }
}
