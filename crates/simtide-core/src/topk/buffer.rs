//! A row's best candidates kept between publication cycles, so that a changed pair costs
//! an update of two buffers instead of a rescoring of two whole rows (docs/design.md,
//! "Lists kept incrementally"). This is the materialized top-k view maintenance of Yi,
//! Yu, Yang, Xia and Chen (ICDE 2003, "Efficient maintenance of materialized top-k
//! views"): keep more than k, and go back to the base data ("refill") only when fewer
//! than k kept entries are certain to be in the top k.

use std::cmp::Ordering;
use std::collections::BTreeMap;

use rustc_hash::FxHashMap;

use super::{top_k, Exclusions, NameOrder};
use crate::model::Neighbor;

/// A candidate's place in the buffer: score descending, then id (names break ties only
/// when a list is read, since ids keep their order as the catalogue grows).
#[derive(Debug, Clone, Copy)]
struct Ranked {
    score: f64,
    item: u32,
}

impl Ord for Ranked {
    fn cmp(&self, other: &Self) -> Ordering {
        other
            .score
            .total_cmp(&self.score)
            .then_with(|| self.item.cmp(&other.item))
    }
}

impl PartialOrd for Ranked {
    fn partial_cmp(&self, other: &Self) -> Option<Ordering> {
        Some(self.cmp(other))
    }
}

impl PartialEq for Ranked {
    fn eq(&self, other: &Self) -> bool {
        self.cmp(other) == Ordering::Equal
    }
}

impl Eq for Ranked {}

/// Whether `score` is strictly above `bound` in the total order scores are ranked by.
fn above(score: f64, bound: f64) -> bool {
    score.total_cmp(&bound) == Ordering::Greater
}

/// The best candidates of one row (each with its support), and a bound that no
/// candidate outside the buffer scores above.
#[derive(Debug, Clone, PartialEq)]
pub struct CandidateBuffer {
    entries: BTreeMap<Ranked, u64>,
    /// The score of each candidate in `entries`, to find it by id.
    members: FxHashMap<u32, f64>,
    /// `None`: every candidate of the row is in the buffer.
    bound: Option<f64>,
    capacity: usize,
}

impl CandidateBuffer {
    /// The buffer of a row whose scored candidates are `candidates`: the best `capacity`
    /// of them (at least one), the bound the best score left out.
    pub fn fill(candidates: impl IntoIterator<Item = Neighbor>, capacity: usize) -> CandidateBuffer {
        let capacity = capacity.max(1);
        let mut all: Vec<Neighbor> = candidates.into_iter().collect();
        let by_rank = |a: &Neighbor, b: &Neighbor| {
            Ranked {
                score: a.score,
                item: a.item,
            }
            .cmp(&Ranked {
                score: b.score,
                item: b.item,
            })
        };
        let bound = (all.len() > capacity).then(|| {
            // The element at `capacity` in rank order is the best one left out.
            all.select_nth_unstable_by(capacity, by_rank);
            let best_left_out = all[capacity].score;
            all.truncate(capacity);
            best_left_out
        });
        let members = all.iter().map(|n| (n.item, n.score)).collect();
        let entries = all
            .into_iter()
            .map(|n| {
                (
                    Ranked {
                        score: n.score,
                        item: n.item,
                    },
                    n.support,
                )
            })
            .collect();
        CandidateBuffer {
            entries,
            members,
            bound,
            capacity,
        }
    }

    /// Takes a change of one partner's pair sums: `new` is the candidate after the change
    /// (`None` when it has no publishable score). O(log of the buffer's size).
    pub fn update(&mut self, item: u32, new: Option<Neighbor>) {
        if let Some(score) = self.members.remove(&item) {
            self.entries.remove(&Ranked { score, item });
        }
        let Some(candidate) = new else { return };
        if self.bound.is_some_and(|b| !above(candidate.score, b)) {
            // Outside, at or below the bound: the bound still holds.
            return;
        }
        self.entries.insert(
            Ranked {
                score: candidate.score,
                item,
            },
            candidate.support,
        );
        self.members.insert(item, candidate.score);
        if self.entries.len() > self.capacity {
            let (last, _) = self.entries.pop_last().expect("the buffer is not empty");
            self.members.remove(&last.item);
            self.bound = Some(match self.bound {
                Some(b) if above(b, last.score) => b,
                _ => last.score,
            });
        }
    }

    /// The top `k` allowed candidates, best first with ties by name — exactly the list a
    /// full rescoring of the row gives — or `None` when fewer than `k` allowed entries are
    /// certain to be in it and the row must be refilled.
    pub fn list(&self, k: usize, excluded: &Exclusions, names: &NameOrder) -> Option<Vec<Neighbor>> {
        let certain: Vec<Neighbor> = self
            .entries
            .iter()
            .take_while(|(r, _)| self.bound.is_none_or(|b| above(r.score, b)))
            .filter(|(r, _)| excluded.allows(r.item))
            .map(|(r, &support)| Neighbor {
                item: r.item,
                score: r.score,
                support,
            })
            .collect();
        if certain.len() < k && self.bound.is_some() {
            return None;
        }
        Some(top_k(names, certain, k))
    }

    /// Candidates held.
    pub fn len(&self) -> usize {
        self.entries.len()
    }

    /// Whether it holds no candidate.
    pub fn is_empty(&self) -> bool {
        self.entries.is_empty()
    }
}

#[cfg(test)]
mod tests {
    use proptest::prelude::*;
    use rustc_hash::FxHashSet;

    use super::*;

    fn candidate(item: u32, score: f64) -> Neighbor {
        Neighbor {
            item,
            score,
            support: u64::from(item) + 1,
        }
    }

    /// One random stream of score changes over `partners` partners: after every change,
    /// the list read from the buffer (or from the full row when the buffer says it must
    /// be refilled) is compared with the top k of all candidates, ties by name included.
    /// Returns (lists the buffer answered, refills).
    fn follow_stream(
        partners: u32,
        spare: usize,
        k: usize,
        steps: &[(u32, Option<u8>)],
        unavailable: &[u32],
    ) -> Result<(usize, usize), TestCaseError> {
        // Names in an order unlike the ids, so that name ties differ from id ties.
        let names: Vec<String> = (0..partners)
            .map(|i| format!("n{}", (i * 7) % partners))
            .collect();
        let names = NameOrder::of(&names);
        let unavailable: FxHashSet<u32> = unavailable.iter().copied().collect();
        let excluded = Exclusions {
            unavailable: &unavailable,
        };
        let capacity = k + spare;
        let mut truth: Vec<Option<f64>> = vec![None; partners as usize];
        let mut buffer = CandidateBuffer::fill(Vec::new(), capacity);
        let (mut answered, mut refills) = (0, 0);
        for &(item, score) in steps {
            let item = item % partners;
            // Coarse scores (twelve values) so that ties are common.
            let new = score.map(|s| candidate(item, f64::from(s) / 4.0 - 1.0));
            buffer.update(item, new);
            truth[item as usize] = new.map(|n| n.score);
            let all: Vec<Neighbor> = truth
                .iter()
                .enumerate()
                .filter_map(|(i, s)| s.map(|s| candidate(i as u32, s)))
                .collect();
            let full = top_k(
                &names,
                all.iter().copied().filter(|n| excluded.allows(n.item)).collect(),
                k,
            );
            match buffer.list(k, &excluded, &names) {
                Some(list) => {
                    answered += 1;
                    prop_assert_eq!(list, full);
                }
                None => {
                    refills += 1;
                    buffer = CandidateBuffer::fill(all, capacity);
                }
            }
            prop_assert!(buffer.len() <= capacity);
        }
        Ok((answered, refills))
    }

    proptest! {
        /// Scores appear, move, tie and vanish at random; every list the buffer answers
        /// equals the full one.
        #[test]
        fn buffered_lists_equal_full_lists_after_every_change(
            partners in 2u32..40,
            spare in 0usize..12,
            k in 1usize..8,
            steps in prop::collection::vec((0u32..40, prop::option::of(0u8..12)), 1..200),
            unavailable in prop::collection::vec(0u32..40, 0..6),
        ) {
            follow_stream(partners, spare, k, &steps, &unavailable)?;
        }
    }

    #[test]
    fn a_long_stream_is_answered_mostly_from_the_buffer() {
        // A fixed pseudo-random stream (a linear congruential generator).
        let mut state = 7u64;
        let mut next = |n: u64| {
            state = state
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            (state >> 33) % n
        };
        let steps: Vec<(u32, Option<u8>)> = (0..5000)
            .map(|_| (next(200) as u32, (next(8) != 0).then(|| next(12) as u8)))
            .collect();
        let (answered, refills) = follow_stream(200, 20, 10, &steps, &[3, 17]).unwrap();
        assert!(refills > 0, "the stream makes the buffer refill");
        assert!(answered > 10 * refills, "answered {answered}, refills {refills}");
    }

    #[test]
    fn a_refilled_buffer_keeps_the_best_and_bounds_the_rest() {
        let buffer = CandidateBuffer::fill(
            [0.9, 0.1, 0.5, 0.7, 0.3]
                .iter()
                .enumerate()
                .map(|(i, &s)| candidate(i as u32, s)),
            2,
        );
        assert_eq!(buffer.len(), 2);
        assert_eq!(buffer.bound, Some(0.5), "the best score left out");
        let none = FxHashSet::default();
        let names = NameOrder::of(&["a", "b", "c", "d", "e"]);
        let excluded = Exclusions { unavailable: &none };
        let items: Vec<u32> = buffer
            .list(2, &excluded, &names)
            .unwrap()
            .iter()
            .map(|n| n.item)
            .collect();
        assert_eq!(items, vec![0, 3]);
        assert_eq!(buffer.list(3, &excluded, &names), None, "a third is not certain");
    }
}
