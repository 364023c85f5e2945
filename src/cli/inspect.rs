//! `simtide neighbors`, `explain` and `export`: read-only views of a store (which a
//! running service may hold open).

use std::io::Write;

use anyhow::{Context, Result};

use super::args::{ExplainArgs, ExportArgs, NeighborsArgs};
use simtide::config::Config;
use simtide::signal::Signal;
use simtide::store::Store;
use simtide::views::export::export_lists;
use simtide::views::inspect::{explain_pair, neighbors_table};
use simtide::views::record::NeighborRecord;

/// Prints an item's lists as a table, or as the JSON records the output topics carry.
pub fn neighbors(args: NeighborsArgs, out: &mut dyn Write) -> Result<()> {
    let store = Store::open_read_only(&args.store)?;
    if !args.json {
        write!(out, "{}", neighbors_table(&store, &args.item, args.signal)?)?;
        return Ok(());
    }
    let id = store
        .item_id(&args.item)
        .with_context(|| format!("item {:?} is not in the store", args.item))?;
    for signal in Signal::ALL
        .into_iter()
        .filter(|s| args.signal.is_none_or(|o| o == *s))
    {
        if let Some(list) = store.published(signal, id)? {
            let record = NeighborRecord::from_stored(&store, signal, id, &list);
            writeln!(out, "{}", serde_json::to_string(&record)?)?;
        }
    }
    Ok(())
}

/// Prints a pair's sums and how its score follows from them.
pub fn explain(args: ExplainArgs, config: &Config, out: &mut dyn Write) -> Result<()> {
    let store = Store::open_read_only(&args.store)?;
    let text = explain_pair(&store, &args.item_a, &args.item_b, &config.list_settings())?;
    write!(out, "{text}")?;
    Ok(())
}

/// Writes every list as JSON lines, to a file or to `out`.
pub fn export(args: ExportArgs, out: &mut dyn Write) -> Result<()> {
    let store = Store::open_read_only(&args.store)?;
    let written = match args.output {
        Some(path) => {
            let file =
                std::fs::File::create(&path).with_context(|| format!("cannot create {}", path.display()))?;
            let n = export_lists(&store, &mut std::io::BufWriter::new(file), true)?;
            eprintln!("exported {n} lists to {}", path.display());
            n
        }
        None => export_lists(&store, out, false)?,
    };
    tracing::debug!(written, "export finished");
    Ok(())
}
