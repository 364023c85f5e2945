//! `simtide recommend`: a user's recommendations as a ranked table.

use std::io::Write;

use anyhow::Result;

use super::args::RecommendArgs;
use simtide::config::Config;
use simtide::recommend::recommend_user;
use simtide::store::Store;

/// Prints up to `--count` items for the user.
pub fn run(args: RecommendArgs, config: &Config, out: &mut dyn Write) -> Result<()> {
    let store = Store::open_read_only(&args.store)?;
    let count = args.count.unwrap_or(config.recommend.count);
    let recs = recommend_user(&store, &args.user, count, config)?;
    if recs.is_empty() {
        writeln!(
            out,
            "no recommendations for {:?}: no rating history, or no neighbors to draw on",
            args.user
        )?;
    }
    writeln!(out, "  {:>4}  {:<36} {:>9}  basis", "rank", "item", "predicted")?;
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
            r.predicted
        )?;
    }
    Ok(())
}
