//! Whether a stored position still lies inside its partition's retained log, and where
//! consumption starts when it does not (docs/design.md, "Positions outside the log").
//! A position behind the log's first offset means events were removed before they were
//! applied (retention ran while the service was down, or an old snapshot was restored);
//! one past the log's end means the topic was replaced or truncated. Either way the store
//! and the log disagree, and the choice between refusing and skipping belongs to an
//! operator (`kafka.position_outside_log`), never to a client default.

use std::fmt;

use crate::config::OutsideLogPolicy;

/// On which side of the retained log a stored position lies.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum OutsideSide {
    /// Before the first retained offset: events were lost to retention.
    BehindLogStart,
    /// After the offset the next message will get: the topic was replaced or truncated.
    PastLogEnd,
}

/// A stored position the partition's log no longer holds.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct OutsidePosition {
    /// The partition.
    pub partition: i32,
    /// The store's next offset for it.
    pub stored: i64,
    /// The first retained offset.
    pub low: i64,
    /// The offset the next message will get.
    pub high: i64,
    /// Which side.
    pub side: OutsideSide,
}

impl fmt::Display for OutsidePosition {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let why = match self.side {
            OutsideSide::BehindLogStart => {
                "behind the log start: the events in between were removed (retention, or an old snapshot) before they were applied"
            }
            OutsideSide::PastLogEnd => "past the log end: the topic was replaced or truncated",
        };
        write!(
            f,
            "partition {}: the stored next offset {} is outside the retained log [{}, {}), {why}",
            self.partition, self.stored, self.low, self.high
        )
    }
}

/// Where a partition with a stored position starts.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum StartDecision {
    /// The position is inside the log (or at its end): start there.
    Inside(i64),
    /// Outside, and the policy refuses: the partition is not consumed.
    Refused(OutsidePosition),
    /// Outside, and the policy resumes elsewhere.
    Resumed {
        /// The offset consumption starts at.
        at: i64,
        /// Offsets of the current log that will never be applied.
        skipped: u64,
        /// What was found.
        outside: OutsidePosition,
    },
}

/// Judges `stored` against the partition's watermarks `(low, high)` under `policy`.
/// `skipped` counts the offsets of the current log between the stored position and the
/// resumption point that are never applied: behind the start, up to where consumption
/// resumes; past the end, the whole current log when resuming at its end and nothing
/// when resuming at its start (what the replaced log held after the stored position is
/// unknowable).
pub fn decide(
    partition: i32,
    stored: i64,
    (low, high): (i64, i64),
    policy: OutsideLogPolicy,
) -> StartDecision {
    let side = if stored < low {
        OutsideSide::BehindLogStart
    } else if stored > high {
        OutsideSide::PastLogEnd
    } else {
        return StartDecision::Inside(stored);
    };
    let outside = OutsidePosition {
        partition,
        stored,
        low,
        high,
        side,
    };
    let (at, skipped) = match (policy, side) {
        (OutsideLogPolicy::Refuse, _) => return StartDecision::Refused(outside),
        (OutsideLogPolicy::ResumeAtLogStart, OutsideSide::BehindLogStart) => (low, low - stored),
        (OutsideLogPolicy::ResumeAtLogStart, OutsideSide::PastLogEnd) => (low, 0),
        (OutsideLogPolicy::ResumeAtLogEnd, OutsideSide::BehindLogStart) => (high, high - stored),
        (OutsideLogPolicy::ResumeAtLogEnd, OutsideSide::PastLogEnd) => (high, high - low),
    };
    StartDecision::Resumed {
        at,
        skipped: skipped as u64,
        outside,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn inside_and_at_either_end_start_where_stored() {
        for stored in [100, 150, 200] {
            assert_eq!(
                decide(0, stored, (100, 200), OutsideLogPolicy::Refuse),
                StartDecision::Inside(stored)
            );
        }
    }

    #[test]
    fn outside_is_refused_by_default_and_each_policy_counts_what_it_skips() {
        // A store at 1,000 on a topic replaced by one holding 200 events.
        let past = decide(3, 1000, (0, 200), OutsideLogPolicy::Refuse);
        let StartDecision::Refused(outside) = &past else {
            panic!("{past:?}")
        };
        assert_eq!(outside.side, OutsideSide::PastLogEnd);
        let text = outside.to_string();
        assert!(
            text.contains("partition 3")
                && text.contains("1000")
                && text.contains("[0, 200)")
                && text.contains("replaced"),
            "{text}"
        );
        let resumed = |stored, policy| match decide(3, stored, (500, 800), policy) {
            StartDecision::Resumed { at, skipped, .. } => (at, skipped),
            other => panic!("{other:?}"),
        };
        // Retention removed offsets 40..500 before they were applied.
        assert_eq!(resumed(40, OutsideLogPolicy::ResumeAtLogStart), (500, 460));
        assert_eq!(resumed(40, OutsideLogPolicy::ResumeAtLogEnd), (800, 760));
        // The topic was replaced: its whole log is new.
        assert_eq!(resumed(9000, OutsideLogPolicy::ResumeAtLogStart), (500, 0));
        assert_eq!(resumed(9000, OutsideLogPolicy::ResumeAtLogEnd), (800, 300));
    }
}
