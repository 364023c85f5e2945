//! `simtide recommend`: a user's recommendations as a ranked table.

use std::io::Write;

use anyhow::{bail, Result};

use super::args::RecommendArgs;
use simtide::config::Config;
use simtide::store::Store;
use simtide::views::recommend::{recommend_user, StoredLists};

/// Prints up to `--count` items for the user.
pub fn run(args: RecommendArgs, config: &Config, out: &mut dyn Write) -> Result<()> {
    let store = Store::open_read_only(&args.store)?;
    let shard = store.shard();
    if shard.is_sharded() {
        bail!(
            "{} holds {shard}: its lists cover only that shard's items. Ask a running shard instead \
             (GET /v1/users/{{user}}/recommendations), which reads the other shards' lists from the list topic",
            args.store.display()
        );
    }
    let count = args.count.unwrap_or(config.recommend.count);
    let recs = recommend_user(&store, &StoredLists, &args.user, count, config)?.unwrap_or_default();
    if recs.is_empty() {
        writeln!(
            out,
            "no recommendations for {:?}: no rating history, or no neighbors to draw on",
            args.user
        )?;
    }
    let ranking = config.recommend.ranking.as_str();
    writeln!(
        out,
        "  {:>4}  {:<36} {:>9}  basis    (score: {ranking})",
        "rank", "item", "score"
    )?;
    for (rank, r) in recs.iter().enumerate() {
        let basis = if r.from_neighbors {
            "neighbors"
        } else {
            "user mean"
        };
        writeln!(
            out,
            "  {:>4}  {:<36} {:>9.3}  {basis}",
            rank + 1,
            store.item_name(r.item),
            r.score
        )?;
    }
    Ok(())
}
