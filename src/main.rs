//! The `simtide` binary: parses the command line, loads the configuration once, sets up
//! logging from it, and hands the command to its module under `cli/`. Exit codes are
//! named in `simtide::runtime::exit`.

mod cli;

use std::process::ExitCode;

use clap::Parser;

use cli::args::{Cli, Command};
use simtide::config::secrets::Scrubber;
use simtide::config::{Config, LogFormat};

fn main() -> ExitCode {
    let cli = Cli::parse();
    let config_file = cli.command.config_file().map(std::path::Path::to_path_buf);
    let config = cli
        .command
        .uses_config()
        .then(|| Config::load(config_file.as_deref()));
    // The demo's own output is the show; its service logs only warnings unless asked.
    let default_level = if matches!(cli.command, Command::Demo(_)) {
        "warn"
    } else {
        "info"
    };
    // A configuration that does not load is reported after logging is set up.
    let format = match &config {
        Some(Ok(c)) => c.log.format,
        _ => LogFormat::Text,
    };
    let filter = tracing_subscriber::EnvFilter::try_from_env("SIMTIDE_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default_level));
    let logs = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    match format {
        LogFormat::Json => logs.json().init(),
        LogFormat::Text => logs.init(),
    }
    let outcome = config
        .transpose()
        .and_then(|config| cli::dispatch(cli.command, config, &mut std::io::stdout().lock()));
    match outcome {
        Ok(()) => ExitCode::from(simtide::runtime::exit::SUCCESS),
        Err(e) => {
            let scrubber = Scrubber::of_sources(config_file.as_deref(), std::env::vars());
            eprintln!("error: {}", scrubber.scrub(&format!("{e:#}")));
            ExitCode::from(simtide::runtime::exit::FAILED)
        }
    }
}
