//! Every flag of every command, declared in one place (clap derive). Each command's module
//! under `cli/` receives its variant's fields.

use std::path::{Path, PathBuf};

use clap::{Args, Parser, Subcommand};

use simtide::signal::Signal;

/// The `simtide` command line.
#[derive(Parser)]
#[command(
    name = "simtide",
    version,
    about = "Fresh item-to-item similarities from an event stream"
)]
pub struct Cli {
    #[command(subcommand)]
    /// The command to run.
    pub command: Command,
}

/// The commands, one module each under `cli/`.
#[derive(Subcommand)]
pub enum Command {
    /// Replay historical event files (JSON lines or CSV, plain or .gz), or the input
    /// topic itself, into a store.
    Backfill(BackfillArgs),
    /// Run the live service: consume the input topic, keep the store, publish lists.
    Run(RunArgs),
    /// One screen on a running service: readiness, freshness, lag, throughput, dead
    /// letters, drift, store.
    Status(StatusArgs),
    /// Validate a configuration and print the effective settings, secrets masked.
    CheckConfig(CheckConfigArgs),
    /// Replay the bundled garden-shop demo events and print some neighbor lists.
    Demo(DemoArgs),
    /// Print an item's published neighbor lists.
    Neighbors(NeighborsArgs),
    /// Show a pair's statistics and how its score follows from them.
    Explain(ExplainArgs),
    /// Write every published list as JSON lines.
    Export(ExportArgs),
    /// Recommend items for a user from the published rating lists.
    Recommend(RecommendArgs),
    /// Evaluate settings offline on held-out ratings and write a report.
    Evaluate(EvaluateArgs),
    /// Build one shard of a new shard count from the stores of every old shard, all
    /// stopped at the same input positions.
    Reshard(ReshardArgs),
    /// Copy a store consistently (hard links where possible), or check a copy.
    Snapshot(SnapshotArgs),
}

/// The flags of `simtide snapshot`.
#[derive(Args)]
pub struct SnapshotArgs {
    /// The store to copy, when no service holds it (ask a running service instead: POST
    /// /v1/admin/snapshot).
    #[arg(long, value_name = "DIR", requires = "to", conflicts_with = "verify")]
    pub store: Option<PathBuf>,
    /// Where the snapshot goes: a directory that does not exist yet.
    #[arg(long, value_name = "DIR", requires = "store")]
    pub to: Option<PathBuf>,
    /// Open a snapshot (or any store) read-only and print its positions, counts, settings
    /// and shard.
    #[arg(long, value_name = "DIR", required_unless_present = "store")]
    pub verify: Option<PathBuf>,
}

/// The flags of `simtide reshard`.
#[derive(Args)]
pub struct ReshardArgs {
    /// Store of an old shard; repeat for every old shard.
    #[arg(long = "from", value_name = "DIR", required = true)]
    pub from: Vec<PathBuf>,
    /// Directory of the new shard's store; must not hold a store yet.
    #[arg(long, value_name = "DIR")]
    pub to: PathBuf,
    /// The new shard count.
    #[arg(long, value_name = "M")]
    pub shards: u32,
    /// The new shard to build, 0 to M − 1.
    #[arg(long, value_name = "J")]
    pub shard: u32,
    /// Configuration file; its statistics settings must be the old stores'.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
}

/// The flags of `simtide backfill`.
#[derive(Args)]
pub struct BackfillArgs {
    /// Store directory; created if missing, continued if it exists.
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// Input file; repeat for several, applied in the order given.
    #[arg(
        long,
        value_name = "PATH",
        required_unless_present = "from_topic",
        conflicts_with = "from_topic"
    )]
    pub input: Vec<PathBuf>,
    /// Replay kafka.input_topic from the store's positions (or the earliest offsets)
    /// to its current end, then exit; `run` continues from there.
    #[arg(long)]
    pub from_topic: bool,
    /// TOML configuration file (defaults apply without one).
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// Records per batch (overrides backfill.batch_events).
    #[arg(long, value_name = "N")]
    pub batch_events: Option<u64>,
    /// Serve the run's metrics on this address (GET /metrics) while it works.
    #[arg(long, value_name = "ADDR")]
    pub metrics_listen: Option<String>,
    /// Do not draw a progress display.
    #[arg(long)]
    pub quiet: bool,
}

/// The flags of `simtide run`.
#[derive(Args)]
pub struct RunArgs {
    /// TOML configuration file.
    #[arg(long, value_name = "FILE")]
    pub config: PathBuf,
    /// Store directory instead of store.dir.
    #[arg(long, value_name = "DIR")]
    pub store: Option<PathBuf>,
    /// For a store that never consumed the topic (e.g. after a file backfill): start
    /// each partition at its first message at or after this time (RFC 3339).
    #[arg(long, value_name = "TIME", conflicts_with = "start_offsets")]
    pub start_at: Option<String>,
    /// For a store that never consumed the topic: start at these offsets
    /// (PARTITION:OFFSET,…; unlisted partitions start at their beginning).
    #[arg(long, value_name = "LIST")]
    pub start_offsets: Option<String>,
    /// Consume up to the input topic's end offsets as they are at start, write, publish and
    /// exit 0 (for one instance that holds every partition, e.g. to bring stores to the
    /// same positions).
    #[arg(long, conflicts_with = "stop_at_offsets")]
    pub stop_at_end: bool,
    /// Consume exactly up to these next offsets (PARTITION:OFFSET,…; nothing from an
    /// unlisted partition), write, publish and exit 0: shards given the same list stop at
    /// the same positions while producers go on (resharding).
    #[arg(long, value_name = "LIST")]
    pub stop_at_offsets: Option<String>,
}

/// The flags of `simtide status`.
#[derive(Args)]
pub struct StatusArgs {
    /// The service's HTTP address.
    #[arg(long, default_value = "http://127.0.0.1:7461")]
    pub url: String,
    /// Time between the two scrapes that rates are taken over (e.g. 2s).
    #[arg(long, default_value = "2s", value_parser = parse_duration)]
    pub window: std::time::Duration,
}

/// The flags of `simtide check-config`.
#[derive(Args)]
pub struct CheckConfigArgs {
    /// TOML configuration file (defaults and environment only without one).
    pub file: Option<PathBuf>,
}

/// The flags of `simtide demo`.
#[derive(Args)]
pub struct DemoArgs {
    /// Keep the demo store in this directory instead of a temporary one.
    #[arg(long, value_name = "DIR")]
    pub store: Option<PathBuf>,
}

/// The flags of `simtide neighbors`.
#[derive(Args)]
pub struct NeighborsArgs {
    /// Store directory (may be held open by a running service).
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// The item id.
    pub item: String,
    /// Only this signal: rating or purchase.
    #[arg(long, value_parser = parse_signal)]
    pub signal: Option<Signal>,
    /// Print the JSON records instead of a table.
    #[arg(long)]
    pub json: bool,
}

/// The flags of `simtide explain`.
#[derive(Args)]
pub struct ExplainArgs {
    /// Store directory (may be held open by a running service).
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// First item id.
    pub item_a: String,
    /// Second item id.
    pub item_b: String,
    /// Configuration whose list settings (min_common_users, damping…) to apply.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
}

/// The flags of `simtide export`.
#[derive(Args)]
pub struct ExportArgs {
    /// Store directory (may be held open by a running service).
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// Output file; standard output when absent.
    #[arg(long, value_name = "FILE")]
    pub output: Option<PathBuf>,
}

/// The flags of `simtide recommend`.
#[derive(Args)]
pub struct RecommendArgs {
    /// Store directory (may be held open by a running service).
    #[arg(long, value_name = "DIR")]
    pub store: PathBuf,
    /// The user id.
    #[arg(long)]
    pub user: String,
    /// How many items (default: recommend.count).
    #[arg(long)]
    pub count: Option<usize>,
    /// Configuration whose [recommend] settings to apply.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
}

/// The flags of `simtide evaluate`.
#[derive(Args)]
pub struct EvaluateArgs {
    /// Event file; repeat for several.
    #[arg(long, value_name = "PATH", required = true)]
    pub input: Vec<PathBuf>,
    /// Base configuration.
    #[arg(long, value_name = "FILE")]
    pub config: Option<PathBuf>,
    /// A swept key of [similarity] or [recommend], e.g. neighbors=10,20,30; repeatable.
    #[arg(long, value_name = "KEY=V1,V2")]
    pub sweep: Vec<String>,
    /// Hold out this most recent fraction of each user's ratings.
    #[arg(long, default_value_t = 0.2, conflicts_with = "cutoff")]
    pub holdout: f64,
    /// Hold out a seeded pseudo-random fraction (--holdout) of each user's ratings
    /// instead of the most recent ones.
    #[arg(long, value_name = "SEED", conflicts_with = "cutoff")]
    pub random_split: Option<u64>,
    /// Hold out every rating at or after this time (RFC 3339) instead.
    #[arg(long, value_name = "TIME")]
    pub cutoff: Option<String>,
    /// Length of the lists that catalogue coverage and head share count (precision,
    /// recall, nDCG and hit rate are at 5, 10 and 20).
    #[arg(long, default_value_t = 10, value_parser = clap::builder::RangedU64ValueParser::<usize>::new().range(1..=1000))]
    pub top_n: usize,
    /// Held-out ratings at or above this are relevant for precision, recall, nDCG and hit
    /// rate.
    #[arg(long, default_value_t = 4.0)]
    pub relevant: f64,
    /// Directory for report.html, results.csv and the plots.
    #[arg(long, value_name = "DIR")]
    pub report: PathBuf,
    /// Do not draw a progress display.
    #[arg(long)]
    pub quiet: bool,
}

/// Parses a duration such as `2s` or `500ms`.
pub fn parse_duration(text: &str) -> Result<std::time::Duration, String> {
    simtide::config::duration_text::parse(text)
}

/// Parses a signal name: `rating` or `purchase`.
pub fn parse_signal(text: &str) -> Result<Signal, String> {
    Signal::parse(text).ok_or_else(|| format!("unknown signal {text:?}: expected rating or purchase"))
}

impl Command {
    /// Whether the command reads a configuration (file, defaults and environment).
    pub fn uses_config(&self) -> bool {
        !matches!(
            self,
            Command::Status(_)
                | Command::Demo(_)
                | Command::Neighbors(_)
                | Command::Export(_)
                | Command::Snapshot(_)
        )
    }

    /// The configuration file the command was given, if any.
    pub fn config_file(&self) -> Option<&Path> {
        match self {
            Command::Backfill(a) => a.config.as_deref(),
            Command::Run(a) => Some(&a.config),
            Command::CheckConfig(a) => a.file.as_deref(),
            Command::Explain(a) => a.config.as_deref(),
            Command::Recommend(a) => a.config.as_deref(),
            Command::Evaluate(a) => a.config.as_deref(),
            Command::Reshard(a) => a.config.as_deref(),
            Command::Status(_)
            | Command::Demo(_)
            | Command::Neighbors(_)
            | Command::Export(_)
            | Command::Snapshot(_) => None,
        }
    }
}
