//! The service's loop on the calling thread: poll, collect, apply, write, publish, and
//! the drain at shutdown.

use std::collections::BTreeMap;
use std::sync::atomic::Ordering;
use std::time::{Duration, Instant};

use anyhow::Result;

use super::report::RunReport;
use super::startup::{start, RunOptions, Service};
use super::state::{Core, Flushed};
use crate::config::Config;
use crate::observability::observe::Observation;
use crate::runtime::exit::SHUTDOWN_OVERRAN;
use crate::runtime::shutdown::Shutdown;

/// Longest idle wait for a message before the loop looks at its timers again.
const IDLE_WAIT: Duration = Duration::from_millis(500);

/// How often the loop looks for partitions the probe listed and the consumer has not
/// assigned yet (a sharded instance reads every partition).
const LISTING_LOOK_EVERY: Duration = Duration::from_millis(250);

/// Longest single poll: how soon the loop notices that shutdown began.
const LONGEST_POLL: Duration = Duration::from_millis(100);

/// Whether `message` lies at or past the stop: on a partition the stop does not list, or
/// at or after its offset there. Such a message is left for the next run, so the stored
/// positions end exactly at the stop.
fn past_the_stop(stop: &BTreeMap<i32, i64>, partition: i32, offset: i64) -> bool {
    stop.get(&partition).is_none_or(|&end| offset >= end)
}

/// When the next publication starts: one interval after this one started, so lists are
/// refreshed at the configured rate however long the write before the cycle took, but
/// never sooner than a quarter interval after that write ended (the cycle itself runs
/// beside consumption), so that consumption goes on when writes take most of the
/// interval.
fn next_cycle_start(started: Instant, ended: Instant, interval: Duration) -> Instant {
    (started + interval).max(ended + interval / 4)
}

impl Service {
    fn core(&self) -> std::sync::MutexGuard<'_, Core> {
        self.core.lock().expect("core lock")
    }

    /// Consumes, commits and publishes until shutdown begins.
    pub fn run(&mut self) -> Result<()> {
        let interval = self.config.publish.interval;
        let mut next_publish = Instant::now() + interval;
        let mut next_listing_look = Instant::now();
        while !self.shutdown.is_begun() {
            self.health.beat();
            if Instant::now() >= next_listing_look {
                let listed = self.listed_partitions.lock().expect("partitions lock").clone();
                self.consumer.assign_new_partitions(&listed);
                next_listing_look = Instant::now() + LISTING_LOOK_EVERY;
            }
            let now = Instant::now();
            let wake = self
                .core()
                .batch_deadline()
                .unwrap_or(now + IDLE_WAIT)
                .min(next_publish);
            // The core is not locked here: rebalance callbacks run inside poll and lock it.
            match self
                .consumer
                .poll(wake.saturating_duration_since(now).min(LONGEST_POLL))
            {
                Some(Ok(message)) => {
                    let past = self
                        .stop_at
                        .as_ref()
                        .is_some_and(|stop| past_the_stop(stop, message.partition, message.offset));
                    if !past {
                        self.core().take(message);
                    }
                }
                Some(Err(error)) => {
                    Observation::ConsumeFailed { error: &error.text }.emit(&self.metrics);
                    if error.position_out_of_range {
                        self.consumer.recheck_positions();
                    }
                }
                None => {}
            }
            let flushed = self.core().flush_if_due();
            self.commit_group_offsets(flushed);
            if let Some(ends) = &self.stop_at {
                if self.core().has_applied(ends) {
                    tracing::info!("every message before the stop offsets is applied; stopping");
                    self.shutdown.begin();
                }
            }
            if self.admin.compact.swap(false, Ordering::Relaxed) {
                tracing::info!("compacting the store on request");
                self.core().compact_store();
            }
            if self.admin.republish.swap(false, Ordering::Relaxed) {
                self.in_sync = false;
                next_publish = Instant::now();
            }
            if self.admin.publish.swap(false, Ordering::Relaxed) {
                next_publish = Instant::now();
            }
            if Instant::now() >= next_publish {
                let started = Instant::now();
                self.publish()?;
                next_publish = next_cycle_start(started, Instant::now(), interval);
            }
        }
        Ok(())
    }

    /// Writes the applied batches to the store, republishes everything first when the
    /// outputs are not in sync, then runs one publication cycle.
    fn publish(&mut self) -> Result<()> {
        let flushed = self.core().flush(None);
        self.commit_group_offsets(flushed);
        let mut c = self.core.lock().expect("core lock");
        c.end_cycle()?;
        if !self.in_sync {
            self.in_sync = c.republish_all()?;
        }
        c.start_cycle();
        Ok(())
    }

    /// Commits group offsets after a store write.
    fn commit_group_offsets(&self, flushed: Flushed) {
        if let Flushed::Committed(offsets) = flushed {
            self.consumer.commit_positions(&offsets);
        }
    }

    /// Stops consuming, writes the applied batches and publishes what is pending, within
    /// `live.shutdown_timeout` (a watchdog ends the process past it); returns what the
    /// run did.
    pub fn drain(mut self) -> Result<RunReport> {
        tracing::info!("stopping: writing the applied batches and publishing pending lists");
        self.shutdown.begin();
        self.health.set_stopping();
        let limit = self.config.live.shutdown_timeout;
        let _watchdog = self.shutdown.arm_watchdog(limit, SHUTDOWN_OVERRAN);
        let flushed = self.core().flush(Some(Instant::now() + limit));
        self.commit_group_offsets(flushed);
        self.publish()?;
        let report = {
            let mut c = self.core();
            c.end_cycle()?;
            c.report(self.started.elapsed().as_secs_f64())
        };
        let Service {
            runtime,
            consumer,
            lease,
            ..
        } = self;
        drop(consumer);
        // Only after the last publication: a standby takes over at once.
        drop(lease);
        runtime.shutdown_background();
        Ok(report)
    }
}

/// Runs the service until `shutdown` begins: [`start`], [`Service::run`],
/// [`Service::drain`].
pub fn run_service(config: &Config, options: RunOptions, shutdown: Shutdown) -> Result<RunReport> {
    let mut service = start(config, options, shutdown)?;
    service.run()?;
    service.drain()
}

#[cfg(test)]
mod tests {
    use std::time::{Duration, Instant};

    use super::{next_cycle_start, past_the_stop};

    #[test]
    fn messages_at_or_past_the_stop_are_left_for_the_next_run() {
        let stop = std::collections::BTreeMap::from([(0, 10), (1, 0)]);
        assert!(!past_the_stop(&stop, 0, 9));
        assert!(past_the_stop(&stop, 0, 10));
        assert!(past_the_stop(&stop, 1, 0));
        assert!(past_the_stop(&stop, 2, 0), "a partition the stop does not list");
    }

    #[test]
    fn publications_start_one_interval_apart_unless_a_write_ran_long() {
        let t0 = Instant::now();
        let interval = Duration::from_secs(5);
        // A 2 s write: the next publication starts 5 s after this one started, 3 s after
        // the write ended.
        let next = next_cycle_start(t0, t0 + Duration::from_secs(2), interval);
        assert_eq!(next, t0 + interval);
        // A 4.5 s write: consumption still gets a quarter interval before the next.
        let ended = t0 + Duration::from_millis(4500);
        assert_eq!(next_cycle_start(t0, ended, interval), ended + interval / 4);
        // A 9 s write: the same, not a publication right after the other.
        let ended = t0 + Duration::from_secs(9);
        assert_eq!(next_cycle_start(t0, ended, interval), ended + interval / 4);
    }
}
