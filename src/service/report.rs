//! What a run did: the counters of the batches written and the report printed at exit.

use std::collections::BTreeMap;
use std::fmt;

use crate::engine::tally::EventTally;

/// What a run did, printed when it ends.
#[derive(Debug, Clone)]
pub struct RunReport {
    /// This run's counters.
    pub counters: RunCounters,
    /// Median event-to-publication latency, milliseconds.
    pub latency_p50_ms: Option<f64>,
    /// 99th percentile of the same.
    pub latency_p99_ms: Option<f64>,
    /// Seconds from start to exit.
    pub seconds: f64,
}

impl fmt::Display for RunReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let c = &self.counters;
        let secs = self.seconds.max(1e-9);
        writeln!(f, "simtide run ended after {:.1}s", self.seconds)?;
        writeln!(
            f,
            "  messages committed {:>10}   {:>8.0}/s",
            c.messages,
            c.messages as f64 / secs
        )?;
        write!(f, "{}", c.events)?;
        let dead: u64 = c.dead_letters.values().sum();
        writeln!(f, "  dead letters       {dead:>10}")?;
        for (reason, n) in &c.dead_letters {
            writeln!(f, "    {reason:<24}{n:>10}")?;
        }
        writeln!(f, "  batches            {:>10}", c.batches)?;
        writeln!(
            f,
            "  publication cycles {:>10}   ({} lists delivered, {} retried later)",
            c.cycles, c.lists_delivered, c.lists_undelivered
        )?;
        let ms = |v: Option<f64>| v.map_or("-".to_string(), |v| format!("{v:.0} ms"));
        write!(
            f,
            "  event → published  p50 {}, p99 {}",
            ms(self.latency_p50_ms),
            ms(self.latency_p99_ms)
        )
    }
}

/// Counters of this process's run, for the summary printed at exit.
#[derive(Debug, Clone, Default)]
pub struct RunCounters {
    /// Messages consumed and written to the store.
    pub messages: u64,
    /// Accepted events by kind and outcome.
    pub events: EventTally,
    /// Dead letters delivered, by reason code.
    pub dead_letters: BTreeMap<String, u64>,
    /// Batches written to the store.
    pub batches: u64,
    /// Publication cycles completed.
    pub cycles: u64,
    /// Lists (and tombstones) delivered.
    pub lists_delivered: u64,
    /// Deliveries that failed and were left dirty for the next cycle.
    pub lists_undelivered: u64,
}

impl RunCounters {
    /// Adds the consumption counts of `other` (messages, events, dead letters, batches).
    pub fn absorb(&mut self, other: &RunCounters) {
        self.messages += other.messages;
        self.events.absorb(&other.events);
        for (reason, &n) in &other.dead_letters {
            *self.dead_letters.entry(reason.clone()).or_default() += n;
        }
        self.batches += other.batches;
    }
}
