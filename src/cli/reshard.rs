//! `simtide reshard`: one shard of a new shard count from the old shards' stores.

use std::io::Write;

use anyhow::{bail, Result};

use super::args::ReshardArgs;
use simtide::config::Config;
use simtide::store::reshard::reshard;

/// Builds the new shard's store and prints what it copied.
pub fn run(args: ReshardArgs, mut config: Config, out: &mut dyn Write) -> Result<()> {
    if args.shard >= args.shards {
        bail!(
            "--shard is {}, but --shards is {}: shards are numbered 0 to --shards − 1",
            args.shard,
            args.shards
        );
    }
    config.cluster.shards = args.shards;
    config.cluster.shard = Some(args.shard);
    let summary = reshard(&args.from, &args.to, &config)?;
    writeln!(
        out,
        "built {} in {} from {} store(s)",
        config.cluster.spec(),
        args.to.display(),
        args.from.len()
    )?;
    for (family, keys) in summary.keys {
        writeln!(out, "  {family:<16} {keys:>12} keys")?;
    }
    Ok(())
}
