//! One log line per kind of repeated message per interval, with a count of the lines held
//! back. A broker that is away or a disk that is full makes the same warning fire many
//! times a second; the operator needs to know that it keeps happening and how often, not
//! to scroll through thousands of identical lines.
//!
//! Hand-written on purpose: the count of held-back lines goes into the next line that
//! passes, which tracing's own filters do not do.

use std::collections::BTreeMap;
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Shortest time between two lines of the same kind.
pub const REPEAT_EVERY: Duration = Duration::from_secs(10);

/// Remembers, per kind, when a line was last let through and how many were held since.
#[derive(Debug)]
pub struct LogLimiter {
    every: Duration,
    last: BTreeMap<String, (Instant, u64)>,
}

impl LogLimiter {
    /// A limiter letting one line per kind through every `every`.
    pub const fn new(every: Duration) -> LogLimiter {
        LogLimiter {
            every,
            last: BTreeMap::new(),
        }
    }

    /// `Some(lines held back since the last one)` when a line of this kind may be
    /// written now, `None` when it is to be held back (and counted).
    pub fn admit(&mut self, kind: &str) -> Option<u64> {
        self.admit_at(kind, Instant::now())
    }

    fn admit_at(&mut self, kind: &str, now: Instant) -> Option<u64> {
        match self.last.get_mut(kind) {
            Some((at, held)) if now.duration_since(*at) < self.every => {
                *held += 1;
                None
            }
            Some((at, held)) => {
                let n = *held;
                *at = now;
                *held = 0;
                Some(n)
            }
            None => {
                self.last.insert(kind.to_string(), (now, 0));
                Some(0)
            }
        }
    }
}

/// The process-wide limiter of the service's own repeated warnings (one log, one limiter).
static REPEATED: Mutex<LogLimiter> = Mutex::new(LogLimiter::new(REPEAT_EVERY));

/// `Some(lines held back since the last one)` when a line of `kind` may be written now
/// (process-wide); `None` counts it as held back.
pub fn admit(kind: &str) -> Option<u64> {
    REPEATED.lock().unwrap_or_else(|e| e.into_inner()).admit(kind)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_line_per_kind_per_interval_and_the_rest_counted() {
        let mut l = LogLimiter::new(Duration::from_secs(10));
        let t0 = Instant::now();
        assert_eq!(l.admit_at("consume", t0), Some(0));
        assert_eq!(l.admit_at("consume", t0 + Duration::from_secs(1)), None);
        assert_eq!(l.admit_at("consume", t0 + Duration::from_secs(9)), None);
        assert_eq!(
            l.admit_at("delivery", t0 + Duration::from_secs(9)),
            Some(0),
            "kinds are apart"
        );
        assert_eq!(l.admit_at("consume", t0 + Duration::from_secs(10)), Some(2));
        assert_eq!(l.admit_at("consume", t0 + Duration::from_secs(11)), None);
    }
}
