//! Scores from stored sums (docs/design.md, "Scores"): adjusted cosine with optional
//! damping for ratings; cosine, Jaccard or log-likelihood ratio for purchases; and the rule
//! that decides whether a scored pair may be published.

use serde::{Deserialize, Serialize};

use crate::engine::fixed::to_f64;
use crate::model::RatingPairStats;

/// Which purchase-signal score ranks items purchased by the same users.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
#[serde(rename_all = "snake_case")]
pub enum PurchaseScore {
    /// Cosine of the binary buyer vectors: co / sqrt(n_a · n_b).
    #[default]
    Cosine,
    /// Jaccard index of the buyer sets: co / (n_a + n_b − co).
    Jaccard,
    /// Log-likelihood ratio G² of the 2×2 co-occurrence table (Dunning 1993), written
    /// `log_likelihood`.
    LogLikelihood,
}

/// Norms below this (after rounding) leave a pair without a score.
pub const ZERO_NORM: f64 = 1e-9;

/// The settings that turn sums into published lists; changing them needs no rebuild.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ListSettings {
    /// Top-k length.
    pub neighbors: usize,
    /// Minimum co-raters / co-buyers.
    pub min_common_users: u64,
    /// λ of sim·n/(n+λ).
    pub damping: f64,
    /// Only scores strictly above this are published.
    pub min_score: f64,
    /// Purchase score in use.
    pub purchase_score: PurchaseScore,
}

/// The real-valued sums of a rating pair.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RatingSums {
    /// Co-raters.
    pub n: i64,
    /// Σ d_a·d_b.
    pub dot: f64,
    /// Σ d_a² over co-raters (clamped at 0).
    pub norm_a: f64,
    /// Σ d_b² over co-raters (clamped at 0).
    pub norm_b: f64,
}

impl RatingSums {
    /// Converts stored fixed-point sums.
    pub fn from_stats(s: &RatingPairStats) -> RatingSums {
        RatingSums {
            n: s.n,
            dot: to_f64(s.dot),
            norm_a: to_f64(s.s_row).max(0.0),
            norm_b: to_f64(s.s_other).max(0.0),
        }
    }

    /// Adjusted cosine Σd_a·d_b / √(Σd_a² · Σd_b²); `None` when a norm is zero. One square
    /// root of the product, not a product of two roots: when the sums are equal (the
    /// co-raters deviate alike on both items) the score is exactly 1, where √x·√x can
    /// round to 0.9999999999999998 and let rounding, not the name, order tied neighbors.
    pub fn adjusted_cosine(&self) -> Option<f64> {
        if self.norm_a < ZERO_NORM || self.norm_b < ZERO_NORM {
            return None;
        }
        Some((self.dot / (self.norm_a * self.norm_b).sqrt()).clamp(-1.0, 1.0))
    }
}

/// Damps a score toward 0 for small support: sim·n/(n+λ).
pub fn damp(score: f64, support: u64, lambda: f64) -> f64 {
    if lambda == 0.0 {
        score
    } else {
        score * support as f64 / (support as f64 + lambda)
    }
}

/// The published score of a rating pair, or `None` when it must not be published.
pub fn rating_list_score(stats: &RatingPairStats, settings: &ListSettings) -> Option<f64> {
    if stats.n < 1 || (stats.n as u64) < settings.min_common_users {
        return None;
    }
    let raw = RatingSums::from_stats(stats).adjusted_cosine()?;
    let score = damp(raw, stats.n as u64, settings.damping);
    (score > settings.min_score).then_some(score)
}

/// x·ln(x) with 0·ln 0 = 0.
fn x_ln_x(x: f64) -> f64 {
    if x <= 0.0 {
        0.0
    } else {
        x * x.ln()
    }
}

/// Log-likelihood ratio G² of a 2×2 table (Dunning 1993):
/// 2·(Σ k ln k − Σ rows ln rows − Σ cols ln cols + N ln N).
pub fn log_likelihood_ratio(k11: f64, k12: f64, k21: f64, k22: f64) -> f64 {
    let n = k11 + k12 + k21 + k22;
    let cells = x_ln_x(k11) + x_ln_x(k12) + x_ln_x(k21) + x_ln_x(k22);
    let rows = x_ln_x(k11 + k12) + x_ln_x(k21 + k22);
    let cols = x_ln_x(k11 + k21) + x_ln_x(k12 + k22);
    (2.0 * (cells - rows - cols + x_ln_x(n))).max(0.0)
}

/// Raw purchase score of items a and b with `co` common buyers, `n_a` and `n_b` buyers and
/// `total` buyers overall. The log-likelihood ratio is only given for pairs purchased
/// by the same users more often than independence predicts (co·N > n_a·n_b): it is large for
/// strong avoidance too, which is no reason to recommend (common practice).
pub fn purchase_raw_score(kind: PurchaseScore, co: i64, n_a: i64, n_b: i64, total: i64) -> Option<f64> {
    if co <= 0 || n_a <= 0 || n_b <= 0 {
        return None;
    }
    let (co, na, nb, n) = (co as f64, n_a as f64, n_b as f64, total as f64);
    match kind {
        PurchaseScore::Cosine => Some(co / (na * nb).sqrt()),
        PurchaseScore::Jaccard => Some(co / (na + nb - co)),
        PurchaseScore::LogLikelihood => {
            if co * n <= na * nb {
                return None;
            }
            Some(log_likelihood_ratio(co, na - co, nb - co, n - na - nb + co))
        }
    }
}

/// The published score of a purchase pair, or `None` when it must not be published.
pub fn purchase_list_score(co: i64, n_a: i64, n_b: i64, total: i64, settings: &ListSettings) -> Option<f64> {
    if co < 1 || (co as u64) < settings.min_common_users {
        return None;
    }
    let raw = purchase_raw_score(settings.purchase_score, co, n_a, n_b, total)?;
    let score = damp(raw, co as u64, settings.damping);
    (score > settings.min_score).then_some(score)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::fixed::to_fixed;

    fn stats(pairs: &[(f64, f64)]) -> RatingPairStats {
        let mut s = RatingPairStats::default();
        for &(a, b) in pairs {
            s.add(&RatingPairStats {
                n: 1,
                dot: to_fixed(a * b),
                s_row: to_fixed(a * a),
                s_other: to_fixed(b * b),
            });
        }
        s
    }

    #[test]
    fn adjusted_cosine_by_hand() {
        // Deviations (1, 2) and (−1, 1): dot = 1·2 + (−1)·1 = 1; Σa² = 2; Σb² = 5;
        // score = 1/√10 = 0.316227766016838 (√10 = 3.16227766016838, from memory).
        let s = RatingSums::from_stats(&stats(&[(1.0, 2.0), (-1.0, 1.0)]));
        assert!((s.adjusted_cosine().unwrap() - 0.316_227_766_016_838).abs() < 1e-12);
    }

    #[test]
    fn alike_deviations_score_exactly_one() {
        // Deviations of three co-raters, equal on both items. For some of these sums x,
        // √x·√x ≠ x in binary floating point (asserted), which is what made such pairs
        // score 0.9999999999999998 before.
        let mut rounding_shown = false;
        for d in [0.1, 0.3, 0.7, 1.1, 1.7, 2.3, 2.9, 3.7] {
            let s = RatingSums::from_stats(&stats(&[(d, d), (-d / 3.0, -d / 3.0), (d / 7.0, d / 7.0)]));
            rounding_shown |= s.norm_a.sqrt() * s.norm_b.sqrt() != s.dot;
            assert_eq!(s.adjusted_cosine(), Some(1.0), "d = {d}");
        }
        assert!(rounding_shown, "no sum here shows the rounding of two roots");
    }

    #[test]
    fn zero_norm_has_no_score() {
        let s = RatingSums::from_stats(&stats(&[(0.0, 2.0), (0.0, 1.0)]));
        assert_eq!(s.adjusted_cosine(), None);
    }

    #[test]
    fn support_and_damping_rules() {
        let st = stats(&[(1.0, 1.0), (2.0, 2.0)]);
        let mut ls = ListSettings {
            neighbors: 5,
            min_common_users: 3,
            damping: 0.0,
            min_score: 0.0,
            purchase_score: PurchaseScore::Cosine,
        };
        assert_eq!(rating_list_score(&st, &ls), None, "n = 2 < min_common_users 3");
        ls.min_common_users = 2;
        ls.damping = 2.0;
        assert!(
            (rating_list_score(&st, &ls).unwrap() - 0.5).abs() < 1e-12,
            "1·2/(2+2)"
        );
    }

    #[test]
    fn log_likelihood_ratio_matches_independent_table() {
        // An independent table (rows and columns proportional) has G² = 0.
        assert!(log_likelihood_ratio(10.0, 20.0, 30.0, 60.0).abs() < 1e-9);
        // Symmetric in swapping rows with columns.
        let a = log_likelihood_ratio(7.0, 3.0, 2.0, 88.0);
        let b = log_likelihood_ratio(7.0, 2.0, 3.0, 88.0);
        assert!((a - b).abs() < 1e-9 && a > 0.0);
    }
}
