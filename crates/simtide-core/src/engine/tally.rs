//! Counts of accepted events by kind and outcome, typed: what a batch, a backfill run and
//! a live run report. The store's ledger keeps the same counts under text keys
//! ([`EventTally::key`]) so that its stored form never depends on these types.

use std::collections::BTreeMap;
use std::fmt;

use super::user_state::Outcome;
use crate::event::EventKind;

/// Accepted events by kind and outcome.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct EventTally(BTreeMap<(EventKind, Outcome), u64>);

impl EventTally {
    /// Counts `n` more events of `kind` that ended as `outcome`.
    pub fn add(&mut self, kind: EventKind, outcome: Outcome, n: u64) {
        *self.0.entry((kind, outcome)).or_default() += n;
    }

    /// Adds every count of `other`.
    pub fn absorb(&mut self, other: &EventTally) {
        for (&(kind, outcome), &n) in other.iter() {
            self.add(kind, outcome, n);
        }
    }

    /// Events of `kind` that ended as `outcome`.
    pub fn count(&self, kind: EventKind, outcome: Outcome) -> u64 {
        self.0.get(&(kind, outcome)).copied().unwrap_or(0)
    }

    /// Every event counted.
    pub fn total(&self) -> u64 {
        self.0.values().sum()
    }

    /// The counts in (kind, outcome) order.
    pub fn iter(&self) -> impl Iterator<Item = (&(EventKind, Outcome), &u64)> {
        self.0.iter()
    }

    /// The text key of a count, `kind/outcome` (e.g. `rating/applied`), as the ledger and
    /// the printed summaries show it.
    pub fn key(kind: EventKind, outcome: Outcome) -> String {
        format!("{}/{}", kind.as_str(), outcome.as_str())
    }
}

/// One indented line per count, `kind/outcome` then the number, as the run summaries print
/// them.
impl fmt::Display for EventTally {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (&(kind, outcome), n) in self.iter() {
            writeln!(f, "    {:<24}{n:>10}", EventTally::key(kind, outcome))?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_add_up_by_kind_and_outcome() {
        let mut a = EventTally::default();
        a.add(EventKind::Rating, Outcome::Applied, 2);
        let mut b = EventTally::default();
        b.add(EventKind::Rating, Outcome::Applied, 3);
        b.add(EventKind::Purchase, Outcome::Stale, 1);
        a.absorb(&b);
        assert_eq!(a.count(EventKind::Rating, Outcome::Applied), 5);
        assert_eq!(a.count(EventKind::Purchase, Outcome::Stale), 1);
        assert_eq!(a.count(EventKind::Purchase, Outcome::Applied), 0);
        assert_eq!(a.total(), 6);
        assert_eq!(
            EventTally::key(EventKind::Rating, Outcome::Applied),
            "rating/applied"
        );
    }
}
