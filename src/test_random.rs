//! A seeded pseudo-random sequence for unit tests that generate events: the same seed
//! gives the same events on every run and machine (Knuth's MMIX linear congruential
//! constants, from memory; the high bits are used, the low ones cycle quickly).

/// The generator's state.
pub struct TestRandom(u64);

impl TestRandom {
    /// A sequence starting from `seed`.
    pub fn seeded(seed: u64) -> TestRandom {
        TestRandom(seed)
    }

    /// The next number in `0..n`.
    pub fn below(&mut self, n: u64) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 33) % n
    }
}

use crate::event::{Event, EventBody, UnixNanos};

/// `batches` batches of 1 to `largest` events a millisecond apart, by customers `c0…` of
/// a garden shop over items `seed-0…`: ratings of 1 to 5, withdrawals (one in six) and,
/// with `purchases`, purchases (two in six). Repeated names make pairs appear, change and
/// fall back to zero across batches.
pub fn shop_batches(
    seed: u64,
    batches: usize,
    largest: u64,
    customers: u64,
    items: u64,
    purchases: bool,
) -> Vec<Vec<Event>> {
    let mut random = TestRandom::seeded(seed);
    let mut at = 1_700_000_000_000_000_000i64;
    (0..batches)
        .map(|_| {
            (0..(1 + random.below(largest)))
                .map(|_| {
                    at += 1_000_000;
                    let user = format!("c{}", random.below(customers));
                    let item = format!("seed-{}", random.below(items));
                    let body = match random.below(6) {
                        0 => EventBody::Unrating { user, item },
                        1 | 2 if purchases => EventBody::Purchase { user, item },
                        _ => EventBody::Rating {
                            user,
                            item,
                            value: 1.0 + random.below(5) as f64,
                        },
                    };
                    Event {
                        at: UnixNanos(at),
                        body,
                    }
                })
                .collect()
        })
        .collect()
}
