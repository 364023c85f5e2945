//! What a backfill run did: its tallies, and the summary printed at the end.

use std::collections::BTreeMap;
use std::fmt;
use std::path::PathBuf;

use crate::decode::RejectReason;
use crate::engine::tally::EventTally;
use crate::pipeline::publish::CycleReport;
use crate::pipeline::segment::BatchSummary;

/// The outcome of one backfill run.
#[derive(Debug, Clone, Default)]
pub struct BackfillSummary {
    /// Accepted events of this run by kind and outcome.
    pub events: EventTally,
    /// Rejected records of this run by reason.
    pub rejects: BTreeMap<RejectReason, u64>,
    /// Files skipped because an earlier run applied them completely.
    pub skipped_files: Vec<String>,
    /// Topic offsets never applied because a stored position was outside its
    /// partition's log and `kafka.position_outside_log` resumed elsewhere.
    pub skipped_offsets: u64,
    /// Pair contributions added or retracted in this run.
    pub pair_updates: u64,
    /// Re-centerings in this run.
    pub recenterings: u64,
    /// Batches read in this run: chunks of `backfill.batch_events` records staged (files)
    /// or batches applied (topic).
    pub batches: u64,
    /// Segments (groups of batches written out at once) committed in this run.
    pub segments: u64,
    /// Seconds spent opening the store, reading and applying events.
    pub apply_seconds: f64,
    /// Seconds spent publishing lists.
    pub publish_seconds: f64,
    /// The publication cycle at the end.
    pub publication: CycleReport,
    /// User ids the store has given out (forgotten users' included: ids are never reused).
    pub users: u64,
    /// Items known to the store.
    pub items: u64,
    /// Where rejected records were written.
    pub rejects_file: PathBuf,
}

impl BackfillSummary {
    /// Events read in this run, accepted or not.
    pub fn records(&self) -> u64 {
        self.events.total() + self.rejects.values().sum::<u64>()
    }

    /// Wall time of the run.
    pub fn wall_seconds(&self) -> f64 {
        self.apply_seconds + self.publish_seconds
    }

    /// Adds what an applied batch (or a file segment's engine run) did.
    pub(super) fn absorb(&mut self, batch: &BatchSummary) {
        self.events.absorb(&batch.outcomes);
        self.pair_updates += batch.pair_updates;
        self.recenterings += batch.recenterings;
    }
}

impl fmt::Display for BackfillSummary {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let wall = self.wall_seconds().max(1e-9);
        writeln!(
            f,
            "backfill finished in {:.2}s ({:.2}s applying, {:.2}s publishing)",
            wall, self.apply_seconds, self.publish_seconds
        )?;
        for skipped in &self.skipped_files {
            writeln!(f, "  skipped (already applied): {skipped}")?;
        }
        if self.skipped_offsets > 0 {
            writeln!(
                f,
                "  skipped offsets   {:>12}   (outside the retained log; kafka.position_outside_log)",
                self.skipped_offsets
            )?;
        }
        writeln!(
            f,
            "  records read      {:>12}   {:>10.0}/s over the whole run",
            self.records(),
            self.records() as f64 / wall
        )?;
        write!(f, "{}", self.events)?;
        let rejected: u64 = self.rejects.values().sum();
        writeln!(f, "  rejected          {rejected:>12}")?;
        for (reason, n) in &self.rejects {
            writeln!(f, "    {:<24}{n:>10}", reason.code())?;
        }
        if rejected > 0 {
            writeln!(
                f,
                "    (each rejected record, with line and reason: {})",
                self.rejects_file.display()
            )?;
        }
        writeln!(
            f,
            "  pair updates      {:>12}   {:>10.0}/s while applying",
            self.pair_updates,
            self.pair_updates as f64 / self.apply_seconds.max(1e-9)
        )?;
        writeln!(f, "  re-centerings     {:>12}", self.recenterings)?;
        writeln!(
            f,
            "  batches           {:>12}   in {} segment(s) written out",
            self.batches, self.segments
        )?;
        writeln!(
            f,
            "  lists rescored    {:>12}   ({} changed, {} now empty)",
            self.publication.rescored, self.publication.changed, self.publication.tombstones
        )?;
        writeln!(
            f,
            "  rating pairs      {:>12}   (in the {} rescored rows; the whole store after a fresh backfill)",
            self.publication.rating_pairs_seen, self.publication.rescored
        )?;
        write!(
            f,
            "  ids given out     {} users, {} items (forgotten users' ids included)",
            self.users, self.items
        )
    }
}
