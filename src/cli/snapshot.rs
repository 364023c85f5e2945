//! `simtide snapshot`: a consistent copy of a store, or a check of one.

use std::io::Write;

use anyhow::{Context, Result};

use super::args::SnapshotArgs;
use simtide::store::Store;

/// Copies the store and prints what the copy holds, or prints what `--verify` names.
pub fn run(args: SnapshotArgs, out: &mut dyn Write) -> Result<()> {
    if let (Some(store), Some(to)) = (&args.store, &args.to) {
        let source = Store::open_as_stored(store).with_context(|| {
            format!(
                "{} cannot be opened for a snapshot; if a running service holds it, ask the \
                 service instead: POST /v1/admin/snapshot with the admin token (snapshots go \
                 under store.snapshot_dir)",
                store.display()
            )
        })?;
        source.snapshot_to(to)?;
        writeln!(out, "snapshot of {} written to {}", store.display(), to.display())?;
    }
    let check = args.verify.or(args.to).expect("clap requires --verify or --to");
    let snapshot = Store::open_read_only(&check)
        .with_context(|| format!("{} is not a readable snapshot", check.display()))?;
    writeln!(out, "{}", snapshot.describe())?;
    Ok(())
}
