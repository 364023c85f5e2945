//! Exponential back-off between attempts of an operation that fails for a while (a store
//! write on a full disk, a delivery while the broker is away, a topic check): the wait
//! doubles from a first delay up to a longest one, and ends early when shutdown begins or
//! a deadline would pass. The one retry policy of the service.
//!
//! Hand-written on purpose: what matters here is that a wait ends at shutdown or at a
//! deadline, which is the caller's side of any back-off crate; the delays themselves are
//! a doubling and a cap.

use std::time::{Duration, Instant};

use crate::runtime::shutdown::Shutdown;

/// The waits between attempts of one operation.
#[derive(Debug, Clone)]
pub struct Backoff {
    first: Duration,
    longest: Duration,
    next: Duration,
}

impl Backoff {
    /// Waits start at `first` and double up to `longest`.
    pub fn new(first: Duration, longest: Duration) -> Backoff {
        Backoff {
            first,
            longest,
            next: first,
        }
    }

    /// The wait before the next attempt; each call doubles the one after (up to the
    /// longest).
    pub fn next_delay(&mut self) -> Duration {
        let delay = self.next;
        self.next = (self.next * 2).min(self.longest);
        delay
    }

    /// Starts over from the first delay (the operation succeeded).
    pub fn reset(&mut self) {
        self.next = self.first;
    }

    /// Sleeps this thread for the next delay. False, without sleeping past either, when
    /// `deadline` would pass first or shutdown begins: the caller should give up.
    pub fn wait(&mut self, deadline: Option<Instant>, shutdown: &Shutdown) -> bool {
        let delay = self.next_delay();
        if deadline.is_some_and(|d| Instant::now() + delay > d) {
            return false;
        }
        shutdown.sleep(delay)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn delays_double_up_to_the_longest_and_reset() {
        let mut b = Backoff::new(Duration::from_millis(200), Duration::from_secs(1));
        let delays: Vec<u128> = (0..5).map(|_| b.next_delay().as_millis()).collect();
        assert_eq!(delays, vec![200, 400, 800, 1000, 1000]);
        b.reset();
        assert_eq!(b.next_delay(), Duration::from_millis(200));
    }

    #[test]
    fn wait_gives_up_at_a_deadline_or_shutdown() {
        let shutdown = Shutdown::new();
        let mut b = Backoff::new(Duration::from_secs(10), Duration::from_secs(10));
        assert!(!b.wait(Some(Instant::now() + Duration::from_secs(1)), &shutdown));
        shutdown.begin();
        let started = Instant::now();
        assert!(!b.wait(None, &shutdown));
        assert!(started.elapsed() < Duration::from_secs(5));
        let mut quick = Backoff::new(Duration::from_millis(1), Duration::from_millis(1));
        assert!(!quick.wait(None, &shutdown), "no attempt after shutdown began");
        assert!(Backoff::new(Duration::from_millis(1), Duration::from_millis(1)).wait(None, &Shutdown::new()));
    }
}
