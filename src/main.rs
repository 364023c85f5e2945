//! The `simtide` command line.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};

use simtide::backfill::{run_backfill, BackfillRequest};
use simtide::config::Config;
use simtide::demo::run_demo;
use simtide::export::export_lists;
use simtide::inspect::{explain_pair, neighbors_table};
use simtide::record::NeighborRecord;
use simtide::score::ListSettings;
use simtide::signal::Signal;
use simtide::store::Store;

#[derive(Parser)]
#[command(
    name = "simtide",
    version,
    about = "Fresh item-to-item similarities from an event stream"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Replay historical event files (JSON lines or CSV, plain or .gz) into a store.
    Backfill {
        /// Store directory; created if missing, continued if it exists.
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// Input file; repeat for several, applied in the order given.
        #[arg(long, value_name = "PATH", required = true)]
        input: Vec<PathBuf>,
        /// TOML configuration file (defaults apply without one).
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
        /// Records per batch (overrides backfill.batch_events).
        #[arg(long, value_name = "N")]
        batch_events: Option<u64>,
        /// Do not draw a progress display.
        #[arg(long)]
        quiet: bool,
    },
    /// Replay the bundled garden-shop demo events and print some neighbor lists.
    Demo {
        /// Keep the demo store in this directory instead of a temporary one.
        #[arg(long, value_name = "DIR")]
        store: Option<PathBuf>,
    },
    /// Print an item's published neighbor lists.
    Neighbors {
        /// Store directory (may be held open by a running service).
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// The item id.
        item: String,
        /// Only this signal: rating or purchase.
        #[arg(long, value_parser = parse_signal)]
        signal: Option<Signal>,
        /// Print the JSON records instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Show a pair's statistics and how its score follows from them.
    Explain {
        /// Store directory (may be held open by a running service).
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// First item id.
        item_a: String,
        /// Second item id.
        item_b: String,
        /// Configuration whose list settings (min_support, shrinkage…) to apply.
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
    },
    /// Write every published list as JSON lines.
    Export {
        /// Store directory (may be held open by a running service).
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// Output file; standard output when absent.
        #[arg(long, value_name = "FILE")]
        output: Option<PathBuf>,
    },
}

fn parse_signal(text: &str) -> Result<Signal, String> {
    Signal::parse(text).ok_or_else(|| format!("unknown signal {text:?}: expected rating or purchase"))
}

fn run(cli: Cli) -> Result<()> {
    let stdout = &mut std::io::stdout().lock();
    match cli.command {
        Command::Backfill {
            store,
            input,
            config,
            batch_events,
            quiet,
        } => {
            let mut config = Config::load(config.as_deref())?;
            if let Some(n) = batch_events {
                config.backfill.batch_events = n;
                config.validate()?;
            }
            let summary = run_backfill(&BackfillRequest {
                store_dir: store,
                inputs: input,
                config,
                show_progress: !quiet,
            })?;
            writeln!(stdout, "{summary}")?;
        }
        Command::Demo { store } => run_demo(store, stdout)?,
        Command::Neighbors {
            store,
            item,
            signal,
            json,
        } => {
            let store = Store::open_read_only(&store)?;
            if json {
                let id = store
                    .item_id(&item)
                    .with_context(|| format!("item {item:?} is not in the store"))?;
                for s in Signal::ALL.into_iter().filter(|s| signal.is_none_or(|o| o == *s)) {
                    if let Some(list) = store.published(s, id)? {
                        writeln!(
                            stdout,
                            "{}",
                            serde_json::to_string(&NeighborRecord::from_stored(&store, s, id, &list))?
                        )?;
                    }
                }
            } else {
                write!(stdout, "{}", neighbors_table(&store, &item, signal)?)?;
            }
        }
        Command::Explain {
            store,
            item_a,
            item_b,
            config,
        } => {
            let settings = ListSettings::from_config(&Config::load(config.as_deref())?);
            let store = Store::open_read_only(&store)?;
            write!(stdout, "{}", explain_pair(&store, &item_a, &item_b, &settings)?)?;
        }
        Command::Export { store, output } => {
            let store = Store::open_read_only(&store)?;
            let written = match output {
                Some(path) => {
                    let file = std::fs::File::create(&path)
                        .with_context(|| format!("cannot create {}", path.display()))?;
                    let n = export_lists(&store, &mut std::io::BufWriter::new(file), true)?;
                    eprintln!("exported {n} lists to {}", path.display());
                    n
                }
                None => export_lists(&store, stdout, false)?,
            };
            tracing::debug!(written, "export finished");
        }
    }
    Ok(())
}

fn main() -> ExitCode {
    tracing_subscriber::fmt()
        .with_env_filter(
            tracing_subscriber::EnvFilter::try_from_env("SIMTIDE_LOG")
                .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info")),
        )
        .with_writer(std::io::stderr)
        .init();
    match run(Cli::parse()) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {e:#}");
            ExitCode::FAILURE
        }
    }
}
