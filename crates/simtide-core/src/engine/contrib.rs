//! Pair contributions of one user, and the exact difference between two of its states.
//!
//! A user whose active items (with their values) are `A` contributes to every pair
//! {a, b} ⊂ A. When a batch moves the user from state `before` to `after`, the change of
//! every pair sum is contribution(after) − contribution(before). Only pairs that touch a
//! changed item X (added, dropped, or with a new value) differ, so the difference is
//! described by the two states with their changed items flagged: a pair is part of the
//! difference when at least one of its items is flagged. That is O(|X|·|A|) pairs for an
//! ordinary event and O(|A|²) when the center moves and every deviation changes — the
//! same arithmetic as the per-event and re-centering formulas of docs/design.md (for a
//! shift δ, (d_a−δ)(d_b−δ) − d_a·d_b = −δ(d_a+d_b) + δ²), written once for every kind of
//! change.

/// One side of a user's difference: its items (sorted), their values, which of them
/// changed, and whether the side is added (+1) or retracted (−1).
#[derive(Debug, Clone, PartialEq)]
pub struct ContributionSet<T> {
    /// +1 for the state after the batch, −1 for the state before.
    pub sign: i64,
    /// Item ids, ascending.
    pub items: Vec<u32>,
    /// Value per item (deviation for ratings, nothing for purchases).
    pub values: Vec<T>,
    /// Whether each item changed between the two states.
    pub changed: Vec<bool>,
}

impl<T> ContributionSet<T> {
    /// Pairs this side contributes to the difference: C(k, 2) + k·(m − k) for k changed
    /// items out of m.
    pub fn pair_count(&self) -> u64 {
        let m = self.items.len() as u64;
        let k = self.changed.iter().filter(|&&c| c).count() as u64;
        k * k.saturating_sub(1) / 2 + k * (m - k)
    }
}

/// Flags, for each entry of `before` and `after` (both sorted by item), whether that item
/// changed: present on one side only, or present on both with a different value.
fn changed_flags<T: PartialEq>(before: &[(u32, T)], after: &[(u32, T)]) -> (Vec<bool>, Vec<bool>) {
    let mut fb = vec![false; before.len()];
    let mut fa = vec![false; after.len()];
    let (mut i, mut j) = (0, 0);
    while i < before.len() || j < after.len() {
        match (before.get(i), after.get(j)) {
            (Some(b), Some(a)) if b.0 == a.0 => {
                let differs = b.1 != a.1;
                fb[i] = differs;
                fa[j] = differs;
                i += 1;
                j += 1;
            }
            (Some(b), Some(a)) if b.0 < a.0 => {
                fb[i] = true;
                i += 1;
            }
            (Some(_), None) => {
                fb[i] = true;
                i += 1;
            }
            _ => {
                fa[j] = true;
                j += 1;
            }
        }
    }
    (fb, fa)
}

fn side<T: Copy>(sign: i64, entries: &[(u32, T)], changed: Vec<bool>) -> ContributionSet<T> {
    ContributionSet {
        sign,
        items: entries.iter().map(|e| e.0).collect(),
        values: entries.iter().map(|e| e.1).collect(),
        changed,
    }
}

/// The difference between two states as a retracted and an added side; `None` when no
/// item changed. With `all_changed` every item counts as changed (the center moved).
pub fn difference<T: Copy + PartialEq>(
    before: &[(u32, T)],
    after: &[(u32, T)],
    all_changed: bool,
) -> Option<[ContributionSet<T>; 2]> {
    let (fb, fa) = if all_changed {
        (vec![true; before.len()], vec![true; after.len()])
    } else {
        changed_flags(before, after)
    };
    if !fb.iter().chain(&fa).any(|&c| c) {
        return None;
    }
    Some([side(-1, before, fb), side(1, after, fa)])
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flags_mark_added_dropped_and_changed() {
        let before = [(1, 2), (3, -1), (5, 4), (8, 1)];
        let after = [(1, 2), (3, 7), (6, -2), (8, 1)];
        let [b, a] = difference(&before, &after, false).unwrap();
        assert_eq!(b.changed, vec![false, true, true, false]);
        assert_eq!(a.changed, vec![false, true, true, false]);
        assert_eq!((b.sign, a.sign), (-1, 1));
        // 2 changed of 4: C(2,2) + 2·2 = 5 pairs on each side.
        assert_eq!((b.pair_count(), a.pair_count()), (5, 5));
    }

    #[test]
    fn unchanged_state_has_no_difference() {
        let s = [(1, 2), (3, -1)];
        assert!(difference(&s, &s, false).is_none());
        assert!(
            difference(&s, &s, true).is_some(),
            "a moved center changes everything"
        );
    }
}
