//! The `simtide` command line.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};

use simtide::backfill::{run_backfill, BackfillRequest};
use simtide::config::secrets::{masked, Scrubber};
use simtide::config::{Config, LogFormat};
use simtide::demo::run_demo;
use simtide::evaluate::{evaluate, EvaluationRequest, Split, Sweep};
use simtide::export::export_lists;
use simtide::inspect::{explain_pair, neighbors_table};
use simtide::live::handover::{parse_offsets, StartRequest};
use simtide::live::{run_service, RunOptions, RunReport};
use simtide::recommend::recommend_user;
use simtide::record::NeighborRecord;
use simtide::report::write_report;
use simtide::score::ListSettings;
use simtide::signal::Signal;
use simtide::status::show_status;
use simtide::store::Store;
use simtide::topic_backfill::run_topic_backfill;

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
    /// Replay historical event files (JSON lines or CSV, plain or .gz), or the input
    /// topic itself, into a store.
    Backfill {
        /// Store directory; created if missing, continued if it exists.
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// Input file; repeat for several, applied in the order given.
        #[arg(
            long,
            value_name = "PATH",
            required_unless_present = "from_topic",
            conflicts_with = "from_topic"
        )]
        input: Vec<PathBuf>,
        /// Replay kafka.input_topic from the store's positions (or the earliest offsets)
        /// to its current end, then exit; `run` continues from there.
        #[arg(long)]
        from_topic: bool,
        /// TOML configuration file (defaults apply without one).
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
        /// Records per batch (overrides backfill.batch_events).
        #[arg(long, value_name = "N")]
        batch_events: Option<u64>,
        /// Serve the run's metrics on this address (GET /metrics) while it works.
        #[arg(long, value_name = "ADDR")]
        metrics_listen: Option<String>,
        /// Do not draw a progress display.
        #[arg(long)]
        quiet: bool,
    },
    /// Run the live service: consume the input topic, keep the store, publish lists.
    Run {
        /// TOML configuration file.
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
        /// Store directory instead of store.dir.
        #[arg(long, value_name = "DIR")]
        store: Option<PathBuf>,
        /// For a store that never consumed the topic (e.g. after a file backfill): start
        /// each partition at its first message at or after this time (RFC 3339).
        #[arg(long, value_name = "TIME", conflicts_with = "start_offsets")]
        start_at: Option<String>,
        /// For a store that never consumed the topic: start at these offsets
        /// (PARTITION:OFFSET,…; unlisted partitions start at their beginning).
        #[arg(long, value_name = "LIST")]
        start_offsets: Option<String>,
    },
    /// One screen on a running service: readiness, freshness, lag, throughput, dead
    /// letters, drift, store.
    Status {
        /// The service's HTTP address.
        #[arg(long, default_value = "http://127.0.0.1:9464")]
        url: String,
        /// Time between the two scrapes that rates are taken over (e.g. 2s).
        #[arg(long, default_value = "2s", value_parser = parse_duration)]
        window: std::time::Duration,
    },
    /// Validate a configuration and print the effective settings, secrets masked.
    CheckConfig {
        /// TOML configuration file (defaults and environment only without one).
        file: Option<PathBuf>,
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
        /// Configuration whose list settings (min_common_users, damping…) to apply.
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
    /// Recommend items for a user from the published rating lists.
    Recommend {
        /// Store directory (may be held open by a running service).
        #[arg(long, value_name = "DIR")]
        store: PathBuf,
        /// The user id.
        #[arg(long)]
        user: String,
        /// How many items (default: recommend.count).
        #[arg(long)]
        count: Option<usize>,
        /// Configuration whose [recommend] settings to apply.
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
    },
    /// Evaluate settings offline on held-out ratings and write a report.
    Evaluate {
        /// Event file; repeat for several.
        #[arg(long, value_name = "PATH", required = true)]
        input: Vec<PathBuf>,
        /// Base configuration.
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
        /// A swept key of [similarity] or [recommend], e.g. neighbors=10,20,30; repeatable.
        #[arg(long, value_name = "KEY=V1,V2")]
        sweep: Vec<String>,
        /// Hold out this most recent fraction of each user's ratings.
        #[arg(long, default_value_t = 0.2, conflicts_with = "cutoff")]
        holdout: f64,
        /// Hold out a seeded pseudo-random fraction (--holdout) of each user's ratings
        /// instead of the most recent ones.
        #[arg(long, value_name = "SEED", conflicts_with = "cutoff")]
        random_split: Option<u64>,
        /// Hold out every rating at or after this time (RFC 3339) instead.
        #[arg(long, value_name = "TIME")]
        cutoff: Option<String>,
        /// Length of the lists scored for precision and recall.
        #[arg(long, default_value_t = 10)]
        top_n: usize,
        /// Held-out ratings at or above this are relevant for precision and recall.
        #[arg(long, default_value_t = 4.0)]
        relevant: f64,
        /// Directory for report.html, results.csv and the plots.
        #[arg(long, value_name = "DIR")]
        report: PathBuf,
        /// Do not draw a progress display.
        #[arg(long)]
        quiet: bool,
    },
}

fn parse_duration(text: &str) -> Result<std::time::Duration, String> {
    simtide::config::duration_text::parse(text)
}

fn parse_signal(text: &str) -> Result<Signal, String> {
    Signal::parse(text).ok_or_else(|| format!("unknown signal {text:?}: expected rating or purchase"))
}

/// Runs the live service on a multi-threaded runtime until SIGTERM or SIGINT.
fn serve(config: &Config, options: RunOptions) -> Result<RunReport> {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?;
    runtime.block_on(async {
        let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
        tokio::spawn(async move {
            let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                Ok(s) => s,
                Err(e) => {
                    tracing::error!(error = %e, "cannot listen for SIGTERM");
                    return;
                }
            };
            tokio::select! {
                _ = term.recv() => tracing::info!("SIGTERM received"),
                _ = tokio::signal::ctrl_c() => tracing::info!("SIGINT received"),
            }
            let _ = stop_tx.send(true);
        });
        run_service(config, options, stop_rx).await
    })
}

fn run(cli: Cli) -> Result<()> {
    let stdout = &mut std::io::stdout().lock();
    match cli.command {
        Command::Backfill {
            store,
            input,
            from_topic,
            config,
            batch_events,
            metrics_listen,
            quiet,
        } => {
            let mut config = Config::load(config.as_deref())?;
            let metrics = match metrics_listen {
                Some(listen) => {
                    let metrics = std::sync::Arc::new(simtide::metrics::Metrics::new());
                    simtide::http::serve_metrics_in_background(&listen, metrics.clone())?;
                    Some(metrics)
                }
                None => None,
            };
            if let Some(n) = batch_events {
                config.backfill.batch_events = n;
                config.validate()?;
            }
            let request = BackfillRequest {
                store_dir: store,
                inputs: input,
                config,
                show_progress: !quiet,
                metrics,
            };
            let summary = if from_topic {
                run_topic_backfill(&request)?
            } else {
                run_backfill(&request)?
            };
            writeln!(stdout, "{summary}")?;
        }
        Command::Run {
            config,
            store,
            start_at,
            start_offsets,
        } => {
            let config = Config::load(Some(&config))?;
            let start = match (start_at, start_offsets) {
                (Some(text), _) => Some(StartRequest::AtTime(
                    simtide::timefmt::parse_event_time(&text)
                        .with_context(|| format!("--start-at {text:?}: expected RFC 3339"))?
                        / 1_000_000,
                )),
                (None, Some(text)) => Some(StartRequest::Offsets(parse_offsets(&text)?)),
                (None, None) => None,
            };
            let report = serve(
                &config,
                RunOptions {
                    store_dir: store,
                    start,
                },
            )?;
            writeln!(stdout, "{report}")?;
        }
        Command::Status { url, window } => show_status(&url, window, stdout)?,
        Command::CheckConfig { file } => {
            let config = Config::load(file.as_deref())?;
            writeln!(
                stdout,
                "# effective configuration (file, then SIMTIDE_* environment; secrets masked)"
            )?;
            write!(stdout, "{}", toml::to_string(&masked(&config))?)?;
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
        Command::Recommend {
            store,
            user,
            count,
            config,
        } => {
            let config = Config::load(config.as_deref())?;
            let store = Store::open_read_only(&store)?;
            let recs = recommend_user(&store, &user, count.unwrap_or(config.recommend.count), &config)?;
            if recs.is_empty() {
                writeln!(
                    stdout,
                    "no recommendations for {user:?}: no rating history, or no neighbors to draw on"
                )?;
            }
            writeln!(
                stdout,
                "  {:>4}  {:<36} {:>9}  basis",
                "rank", "item", "predicted"
            )?;
            for (rank, r) in recs.iter().enumerate() {
                let basis = if r.from_neighbors {
                    "neighbors"
                } else {
                    "user mean"
                };
                writeln!(
                    stdout,
                    "  {:>4}  {:<36} {:>9.3}  {basis}",
                    rank + 1,
                    store.item_name(r.item),
                    r.predicted
                )?;
            }
        }
        Command::Evaluate {
            input,
            config,
            sweep,
            holdout,
            random_split,
            cutoff,
            top_n,
            relevant,
            report,
            quiet,
        } => {
            let config = Config::load(config.as_deref())?;
            let split = match cutoff {
                Some(text) => Split::Cutoff(
                    simtide::timefmt::parse_event_time(&text)
                        .with_context(|| format!("--cutoff {text:?}: expected RFC 3339"))?,
                ),
                None if !(holdout > 0.0 && holdout < 1.0) => {
                    anyhow::bail!("--holdout must lie strictly between 0 and 1, got {holdout}")
                }
                None => match random_split {
                    Some(seed) => Split::Random {
                        fraction: holdout,
                        seed,
                    },
                    None => Split::LastFraction(holdout),
                },
            };
            let request = EvaluationRequest {
                inputs: input,
                config: config.clone(),
                sweeps: sweep.iter().map(|s| Sweep::parse(s)).collect::<Result<_>>()?,
                split,
                top_n,
                relevant_rating: relevant,
                show_progress: !quiet,
            };
            let work = report.join("training-stores");
            let result = evaluate(&request, &work);
            std::fs::remove_dir_all(&work).ok();
            let result = result?;
            let command: Vec<String> = std::env::args().collect();
            let html = write_report(&report, &result, &config, &command.join(" "))?;
            for p in &result.points {
                let setting: Vec<String> = p.setting.iter().map(|(k, v)| format!("{k}={v}")).collect();
                writeln!(
                    stdout,
                    "{:<32} MAE {:.4}  RMSE {:.4}  predicted {:.3}  P@{top_n} {:.4}  R@{top_n} {:.4}  coverage {:.3}",
                    setting.join(" "), p.mae, p.rmse, p.predicted_share, p.precision, p.recall, p.coverage
                )?;
            }
            writeln!(
                stdout,
                "{} held out, {} for training, {:.1}s; report: {}",
                result.test_ratings,
                result.train_ratings,
                result.seconds,
                html.display()
            )?;
        }
    }
    Ok(())
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    // The demo's own output is the show; its service logs only warnings unless asked.
    let default_level = if matches!(cli.command, Command::Demo { .. }) {
        "warn"
    } else {
        "info"
    };
    // The log format comes from the configuration (or SIMTIDE_LOG__FORMAT); a file that
    // does not load is reported by the command itself, after logging is set up.
    let config_path = match &cli.command {
        Command::Run { config, .. } => Some(config.clone()),
        Command::CheckConfig { file } => file.clone(),
        Command::Backfill { config, .. } => config.clone(),
        _ => None,
    };
    let format = Config::load(config_path.as_deref()).map_or(LogFormat::Text, |c| c.log.format);
    let filter = tracing_subscriber::EnvFilter::try_from_env("SIMTIDE_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default_level));
    let logs = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    match format {
        LogFormat::Json => logs.json().init(),
        LogFormat::Text => logs.init(),
    }
    match run(cli) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            let scrubber = Scrubber::of_sources(config_path.as_deref(), std::env::vars());
            eprintln!("error: {}", scrubber.scrub(&format!("{e:#}")));
            ExitCode::FAILURE
        }
    }
}
