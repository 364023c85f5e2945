//! `simtide run`: the live service on this thread until SIGTERM or SIGINT (or, with
//! `--stop-at-end`, the input's end offsets at start), then its report.

use std::io::Write;

use anyhow::{Context, Result};

use super::args::RunArgs;
use simtide::config::Config;
use simtide::runtime::shutdown::Shutdown;
use simtide::service::handover::{parse_offsets, StartRequest};
use simtide::service::{run_service, RunOptions, SignalHandling, StopAt};
use simtide::timefmt::parse_event_time;

/// Runs the service and prints what it did.
pub fn run(args: RunArgs, config: Config, out: &mut dyn Write) -> Result<()> {
    let start = match (args.start_at, args.start_offsets) {
        (Some(text), _) => Some(StartRequest::AtTime(
            parse_event_time(&text)
                .with_context(|| format!("--start-at {text:?}: expected RFC 3339"))?
                .to_millis(),
        )),
        (None, Some(text)) => Some(StartRequest::Offsets(parse_offsets("--start-offsets", &text)?)),
        (None, None) => None,
    };
    let options = RunOptions {
        store_dir: args.store,
        start,
        signals: SignalHandling::Listen,
        stop: match (args.stop_at_end, args.stop_at_offsets) {
            (true, _) => Some(StopAt::End),
            (false, Some(text)) => Some(StopAt::Offsets(parse_offsets("--stop-at-offsets", &text)?)),
            (false, None) => None,
        },
        skip_compaction_check: false,
    };
    let report = run_service(&config, options, Shutdown::new())?;
    writeln!(out, "{report}")?;
    Ok(())
}
