//! `simtide reshard`: one shard of a new shard count from the old shards' stores.

use std::io::Write;

use anyhow::Result;

use super::args::ReshardArgs;
use simtide::config::Config;
use simtide::store::reshard::reshard;

/// Builds the new shard's store and prints what it copied.
pub fn run(args: ReshardArgs, mut config: Config, out: &mut dyn Write) -> Result<()> {
    config.cluster.shards = args.shards;
    config.cluster.shard = Some(args.shard);
    config
        .cluster
        .resolve(None)
        .map_err(|e| anyhow::anyhow!("{}", e.to_string().replace("cluster.", "--")))?;
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
