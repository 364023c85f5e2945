//! Backfill: history into a store, from files (`files`) or from the input topic itself
//! (`topic`), through one batch writer (`writer`) that commits each segment with its
//! source positions and rejects — a file segment's rows summed, written and scored in one
//! pass (`row_pass`) — and publishes at the end; `summary` is what a run reports. A killed
//! run rerun with the same inputs resumes after its last committed segment and ends in
//! the same state as an uninterrupted run.

mod files;
mod row_pass;
pub(crate) mod source;
mod summary;
mod topic;
pub(crate) mod writer;

use std::path::PathBuf;
use std::sync::Arc;

pub use files::backfill_files;
pub use summary::BackfillSummary;
pub use topic::backfill_topic;

use crate::config::Config;
use crate::observability::metrics::Metrics;

/// What to replay, and where.
#[derive(Debug, Clone)]
pub struct BackfillRequest {
    /// Store directory (created if missing).
    pub store_dir: PathBuf,
    /// Input files, applied in this order (file backfill).
    pub inputs: Vec<PathBuf>,
    /// Effective configuration.
    pub config: Config,
    /// Show a progress display on stderr.
    pub show_progress: bool,
    /// Metrics to move as batches commit (served by `--metrics-listen`).
    pub metrics: Option<Arc<Metrics>>,
}

#[cfg(test)]
mod interrupted_segment_tests;
