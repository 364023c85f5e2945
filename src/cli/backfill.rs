//! `simtide backfill`: files or the input topic into a store, then the summary.

use std::io::Write;
use std::sync::Arc;

use anyhow::Result;

use super::args::BackfillArgs;
use simtide::backfill::{backfill_files, backfill_topic, BackfillRequest};
use simtide::config::Config;
use simtide::observability::metrics::Metrics;
use simtide::runtime::diskspace::describe_store_error;

/// Runs the backfill and prints its summary.
pub fn run(args: BackfillArgs, mut config: Config, out: &mut dyn Write) -> Result<()> {
    let metrics = match &args.metrics_listen {
        Some(listen) => {
            let metrics = Arc::new(Metrics::for_shard(config.cluster.spec()));
            simtide::service::http::serve_metrics_in_background(listen, metrics.clone())?;
            Some(metrics)
        }
        None => None,
    };
    if let Some(n) = args.batch_events {
        config.backfill.batch_events = n;
        config.validate()?;
    }
    let request = BackfillRequest {
        store_dir: args.store,
        inputs: args.input,
        config,
        show_progress: !args.quiet,
        metrics,
    };
    let summary = if args.from_topic {
        backfill_topic(&request)
    } else {
        backfill_files(&request)
    }
    .map_err(|e| anyhow::anyhow!(describe_store_error(&e, &request.store_dir)))?;
    writeln!(out, "{summary}")?;
    Ok(())
}
