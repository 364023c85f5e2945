//! `simtide demo`: the embedded default. Replays the bundled Fernwick Garden Supply events
//! (invented; see demo-data/generate.py) into a fresh store and prints a few lists.

use std::io::Write;
use std::path::PathBuf;

use anyhow::{Context, Result};

use crate::backfill::{run_backfill, BackfillRequest};
use crate::config::Config;
use crate::inspect::neighbors_table;
use crate::signal::Signal;
use crate::store::Store;

/// The bundled demo events, gzip-compressed JSON lines.
const DEMO_EVENTS: &[u8] = include_bytes!("../demo-data/garden-events.jsonl.gz");

/// Items whose lists the demo prints: one per customer interest, plus a discontinued one.
const SHOWCASE: [&str; 4] = [
    "heirloom-tomato-seeds",
    "drip-irrigation-kit",
    "bypass-pruning-shears",
    "terracotta-pot-30cm",
];

/// Runs the demo; the store is kept at `keep` when given, otherwise removed afterwards.
pub fn run_demo(keep: Option<PathBuf>, out: &mut dyn Write) -> Result<()> {
    let work = std::env::temp_dir().join(format!("simtide-demo-{}", std::process::id()));
    std::fs::create_dir_all(&work)?;
    let input = work.join("garden-events.jsonl.gz");
    std::fs::write(&input, DEMO_EVENTS).context("cannot write the demo events")?;
    let store_dir = keep.clone().unwrap_or_else(|| work.join("store"));
    writeln!(
        out,
        "Fernwick Garden Supply (an invented shop): replaying {} into {}",
        input.display(),
        store_dir.display()
    )?;
    let summary = run_backfill(&BackfillRequest {
        store_dir: store_dir.clone(),
        inputs: vec![input],
        config: Config::load(None)?,
        show_progress: true,
    })?;
    writeln!(out, "{summary}\n")?;
    let store = Store::open_read_only(&store_dir)?;
    for item in SHOWCASE {
        write!(out, "{}", neighbors_table(&store, item, Some(Signal::Rating))?)?;
        writeln!(out)?;
    }
    write!(
        out,
        "{}",
        neighbors_table(&store, "drip-irrigation-kit", Some(Signal::Purchase))?
    )?;
    writeln!(
        out,
        "\n'reel-mower-blades' was discontinued (item_status available=false): it appears in no list."
    )?;
    drop(store);
    if keep.is_none() {
        std::fs::remove_dir_all(&work)?;
    } else {
        std::fs::remove_dir_all(&work).ok();
        writeln!(
            out,
            "store kept at {}: try `simtide neighbors --store {} spring-lawn-feed`",
            store_dir.display(),
            store_dir.display()
        )?;
    }
    Ok(())
}
