//! How much an item's list moved between two publications: the share of neighbors that
//! changed, and rank-biased overlap, which weighs the top of the list more.

use std::collections::HashSet;

/// Persistence of rank-biased overlap: p = 0.9 puts about 86% of the weight on the first
/// 10 ranks (Webber, Moffat and Zobel 2010, from memory).
pub const RBO_PERSISTENCE: f64 = 0.9;

/// 1 − |previous ∩ new| / max(|previous|, |new|): 0 when the neighbors are the same set,
/// 1 when none is shared (or one list is empty and the other is not).
pub fn overlap_drift<T: Eq + std::hash::Hash>(previous: &[T], new: &[T]) -> f64 {
    let longest = previous.len().max(new.len());
    if longest == 0 {
        return 0.0;
    }
    let before: HashSet<&T> = previous.iter().collect();
    let shared = new.iter().filter(|x| before.contains(x)).count();
    1.0 - shared as f64 / longest as f64
}

/// Extrapolated rank-biased overlap RBO_ext of two rankings without ties, after Webber,
/// Moffat and Zobel, "A similarity measure for indefinite rankings", TOIS 2010, eq. 32
/// (uneven lengths; S the shorter list of length s, L the longer of length l, X_d the
/// overlap of the two prefixes of depth d):
///
///   RBO_ext = (1−p)/p · ( Σ_{d=1..l} X_d/d · p^d + Σ_{d=s+1..l} X_s·(d−s)/(s·d) · p^d )
///             + ((X_l − X_s)/l + X_s/s) · p^l
///
/// 1 for identical lists, 0 for disjoint ones; two empty lists count as identical.
pub fn rank_biased_overlap<T: Eq + std::hash::Hash>(a: &[T], b: &[T], p: f64) -> f64 {
    let (short, long) = if a.len() <= b.len() { (a, b) } else { (b, a) };
    let (s, l) = (short.len(), long.len());
    if l == 0 {
        return 1.0;
    }
    if s == 0 {
        return 0.0;
    }
    let mut seen_short: HashSet<&T> = HashSet::new();
    let mut seen_long: HashSet<&T> = HashSet::new();
    let mut overlap = 0usize;
    let mut x_s = 0usize;
    let mut sum = 0.0;
    let mut weight = 1.0;
    for d in 1..=l {
        weight *= p;
        let from_long = &long[d - 1];
        if d <= s {
            let from_short = &short[d - 1];
            if from_short == from_long {
                overlap += 1;
            } else {
                overlap += usize::from(seen_long.contains(from_short));
                overlap += usize::from(seen_short.contains(from_long));
            }
            seen_short.insert(from_short);
        } else {
            overlap += usize::from(seen_short.contains(from_long));
        }
        seen_long.insert(from_long);
        if d == s {
            x_s = overlap;
        }
        sum += overlap as f64 / d as f64 * weight;
        if d > s {
            sum += (x_s * (d - s)) as f64 / (s * d) as f64 * weight;
        }
    }
    let x_l = overlap;
    (1.0 - p) / p * sum + ((x_l as f64 - x_s as f64) / l as f64 + x_s as f64 / s as f64) * weight
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn overlap_drift_by_hand() {
        assert_eq!(overlap_drift(&["a", "b", "c", "d"], &["a", "b", "c", "d"]), 0.0);
        // One of four neighbors replaced: 1 − 3/4.
        assert_eq!(overlap_drift(&["a", "b", "c", "d"], &["a", "b", "c", "e"]), 0.25);
        // Order alone does not move the set.
        assert_eq!(overlap_drift(&["a", "b"], &["b", "a"]), 0.0);
        assert_eq!(overlap_drift(&["a", "b"], &[]), 1.0);
        // A list that grew from 2 to 4 keeping both: 1 − 2/4.
        assert_eq!(overlap_drift(&["a", "b"], &["a", "b", "c", "d"]), 0.5);
    }

    #[test]
    fn rbo_limits_and_a_hand_computed_case() {
        let p = RBO_PERSISTENCE;
        assert!((rank_biased_overlap(&[1, 2, 3], &[1, 2, 3], p) - 1.0).abs() < 1e-12);
        assert_eq!(rank_biased_overlap(&[1, 2, 3], &[4, 5, 6], p), 0.0);
        // Even lengths k = 2, swapped: X_1 = 0, X_2 = 2.
        // RBO_ext = (1−p)/p · (0·p + 2/2·p²) + (2/2)·p² = (1−p)·p + p² = p = 0.9.
        assert!((rank_biased_overlap(&[1, 2], &[2, 1], p) - 0.9).abs() < 1e-12);
        // Uneven: S = [1], L = [1, 2]: X_1 = 1, X_2 = 1, s = 1, l = 2.
        // Σ_{d=1..2} X_d/d p^d = p + p²/2; Σ_{d=2} X_s(d−s)/(s d) p^d = p²/2.
        // RBO_ext = (1−p)/p · (p + p²) + ((1−1)/2 + 1/1) · p² = (1−p)(1+p) + p² = 1.
        assert!((rank_biased_overlap(&[1], &[1, 2], p) - 1.0).abs() < 1e-12);
        // Symmetric in its arguments.
        let (a, b) = ([1, 2, 3, 4], [3, 1, 5]);
        assert!((rank_biased_overlap(&a, &b, p) - rank_biased_overlap(&b, &a, p)).abs() < 1e-12);
    }
}
