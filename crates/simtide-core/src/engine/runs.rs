//! Pair deltas of many batches summed in memory before one write (docs/design.md,
//! "Bulk backfill").
//!
//! Each batch's deltas arrive sorted by (lo, hi). Keeping them as a stack of sorted runs
//! whose lengths at least halve from bottom to top, and merging the top two whenever that
//! order breaks, sums N deltas in O(N log N) with sequential memory access only (the way
//! a log-structured store merges its levels) and never more than one extra copy of the
//! largest run. Sums are exact integers, so the grouping changes no bit of the result.

/// A pair delta that can be added to another of its kind.
pub trait Summable: Copy + Default + PartialEq {
    /// Adds `other` into `self`.
    fn absorb(&mut self, other: &Self);
}

impl Summable for i64 {
    fn absorb(&mut self, other: &i64) {
        *self += *other;
    }
}

impl Summable for super::RatingPairDelta {
    fn absorb(&mut self, other: &Self) {
        self.n += other.n;
        self.dot += other.dot;
        self.s_lo += other.s_lo;
        self.s_hi += other.s_hi;
    }
}

/// Sorted runs of (lo, hi, delta) waiting to be summed into one.
#[derive(Debug, Clone, Default)]
pub struct PairRuns<T> {
    runs: Vec<Vec<(u32, u32, T)>>,
}

impl<T: Summable> PairRuns<T> {
    /// Adds one batch's deltas, sorted by (lo, hi) with each pair at most once.
    pub fn push(&mut self, run: Vec<(u32, u32, T)>) {
        if run.is_empty() {
            return;
        }
        self.runs.push(run);
        while let [.., below, top] = self.runs.as_slice() {
            if below.len() > 2 * top.len() {
                break;
            }
            let top = self.runs.pop().expect("two runs");
            let below = self.runs.pop().expect("two runs");
            self.runs.push(merge(below, top));
        }
    }

    /// Entries held in all runs (an upper bound on the distinct pairs).
    pub fn entries(&self) -> usize {
        self.runs.iter().map(Vec::len).sum()
    }

    /// The sum of every run, sorted by (lo, hi), zero deltas left out.
    pub fn into_sorted(mut self) -> Vec<(u32, u32, T)> {
        let mut total = self.runs.pop().unwrap_or_default();
        while let Some(below) = self.runs.pop() {
            total = merge(below, total);
        }
        total
    }
}

/// Merges two sorted runs, adding the deltas of a pair present in both and dropping sums
/// that cancel to zero.
fn merge<T: Summable>(a: Vec<(u32, u32, T)>, b: Vec<(u32, u32, T)>) -> Vec<(u32, u32, T)> {
    let mut out = Vec::with_capacity(a.len() + b.len());
    let mut a = a.into_iter().peekable();
    let mut b = b.into_iter().peekable();
    loop {
        let next = match (a.peek(), b.peek()) {
            (Some(x), Some(y)) => match (x.0, x.1).cmp(&(y.0, y.1)) {
                std::cmp::Ordering::Less => a.next(),
                std::cmp::Ordering::Greater => b.next(),
                std::cmp::Ordering::Equal => {
                    let (lo, hi, mut sum) = a.next().expect("peeked");
                    sum.absorb(&b.next().expect("peeked").2);
                    if sum == T::default() {
                        continue;
                    }
                    Some((lo, hi, sum))
                }
            },
            (Some(_), None) => a.next(),
            (None, Some(_)) => b.next(),
            (None, None) => break,
        };
        out.extend(next);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::collections::BTreeMap;

    #[test]
    fn runs_sum_to_what_a_map_sums() {
        // Deterministic pseudo-random runs (a linear congruential generator) over a few
        // pairs, so that sums collide, cancel and stack in many orders.
        let mut state = 7u64;
        let mut next = move || {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 33) as u32
        };
        let mut runs = PairRuns::<i64>::default();
        let mut expected: BTreeMap<(u32, u32), i64> = BTreeMap::new();
        for _ in 0..200 {
            let mut run: BTreeMap<(u32, u32), i64> = BTreeMap::new();
            for _ in 0..(next() % 40) {
                let (a, b) = (next() % 12, next() % 12);
                let d = i64::from(next() % 5) - 2;
                *run.entry((a.min(b), a.max(b))).or_default() += d;
            }
            run.retain(|_, d| *d != 0);
            for (k, d) in &run {
                *expected.entry(*k).or_default() += d;
            }
            runs.push(run.into_iter().map(|((a, b), d)| (a, b, d)).collect());
            assert!(
                runs.runs.windows(2).all(|w| w[0].len() > 2 * w[1].len()),
                "run lengths at least halve upward"
            );
        }
        expected.retain(|_, d| *d != 0);
        let got: Vec<(u32, u32, i64)> = runs.into_sorted();
        let want: Vec<(u32, u32, i64)> = expected.into_iter().map(|((a, b), d)| (a, b, d)).collect();
        assert!(!want.is_empty());
        assert_eq!(got, want);
    }
}
