//! Top-N quality of a ranking on a held-out split, and the popularity ranking every
//! setting is read against (docs/design.md, "Evaluation").
//!
//! For each evaluated user (one with a relevant held-out item the training part knows),
//! with R the relevant items and L the ranked list cut at N:
//! precision@N = |L ∩ R| / N; recall@N = |L ∩ R| / |R|; hit rate@N = share of users with
//! L ∩ R non-empty; nDCG@N = DCG / IDCG with DCG = Σ_{r ≤ N, L_r ∈ R} 1 / log2(r + 1) and
//! IDCG = Σ_{r ≤ min(|R|, N)} 1 / log2(r + 1) (binary relevance, Järvelin and Kekäläinen,
//! ACM TOIS 2002). Each is the mean over users. Catalogue coverage is the share of
//! training items that appear in some user's list at `top_n`; head share is the share of
//! all recommended slots at `top_n` taken by the 10 % most popular training items.

use std::collections::{BTreeMap, HashMap};

use rustc_hash::FxHashSet;

use crate::event::{Event, EventBody};
use crate::store::Store;

/// The cut-offs every ranking is measured at.
pub const CUTOFFS: [usize; 3] = [5, 10, 20];

/// The share of the catalogue, most popular first, that counts as the head.
pub const HEAD_FRACTION: f64 = 0.1;

/// Each evaluated user's ranked items, best first.
pub type TopLists = BTreeMap<String, Vec<u32>>;

/// Quality at one cut-off N.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AtCutoff {
    /// N.
    pub n: usize,
    /// Mean precision at N.
    pub precision: f64,
    /// Mean recall at N.
    pub recall: f64,
    /// Mean normalised discounted cumulative gain at N.
    pub ndcg: f64,
    /// Share of users with a relevant item in their first N.
    pub hit_rate: f64,
}

/// Top-N quality of one ranking.
#[derive(Debug, Clone, PartialEq)]
pub struct RankingQuality {
    /// One entry per cut-off of [`CUTOFFS`], in order.
    pub cutoffs: Vec<AtCutoff>,
    /// Share of training items recommended to some user at `top_n`.
    pub coverage: f64,
    /// Share of the recommendations at `top_n` that fall in the head.
    pub head_share: f64,
}

impl RankingQuality {
    /// The figures at cut-off `n`, one of [`CUTOFFS`].
    pub fn at(&self, n: usize) -> AtCutoff {
        *self
            .cutoffs
            .iter()
            .find(|c| c.n == n)
            .expect("n is one of CUTOFFS")
    }

    /// Measures `ranked` (lists at least as long as the largest cut-off and `top_n`
    /// allow) against each user's relevant items.
    pub fn measure(
        ranked: &TopLists,
        relevant: &BTreeMap<String, FxHashSet<u32>>,
        catalogue: usize,
        popularity: &Popularity,
        top_n: usize,
    ) -> RankingQuality {
        let users = relevant.len().max(1) as f64;
        let cutoffs = CUTOFFS
            .iter()
            .map(|&n| {
                let (mut precision, mut recall, mut ndcg, mut hits_any) = (0.0, 0.0, 0.0, 0.0);
                for (user, wanted) in relevant {
                    let list = ranked.get(user).map_or(&[][..], |l| &l[..l.len().min(n)]);
                    let hits = list.iter().filter(|i| wanted.contains(i)).count() as f64;
                    precision += hits / n as f64;
                    recall += hits / wanted.len() as f64;
                    hits_any += f64::from(u8::from(hits > 0.0));
                    let dcg: f64 = list
                        .iter()
                        .enumerate()
                        .filter(|(_, i)| wanted.contains(i))
                        .map(|(r, _)| discount(r))
                        .sum();
                    let ideal: f64 = (0..wanted.len().min(n)).map(discount).sum();
                    ndcg += dcg / ideal;
                }
                AtCutoff {
                    n,
                    precision: precision / users,
                    recall: recall / users,
                    ndcg: ndcg / users,
                    hit_rate: hits_any / users,
                }
            })
            .collect();
        let (mut shown, mut slots, mut in_head) = (FxHashSet::default(), 0usize, 0usize);
        for list in ranked.values() {
            for &item in &list[..list.len().min(top_n)] {
                shown.insert(item);
                slots += 1;
                in_head += usize::from(popularity.in_head(item));
            }
        }
        RankingQuality {
            cutoffs,
            coverage: shown.len() as f64 / catalogue.max(1) as f64,
            head_share: in_head as f64 / slots.max(1) as f64,
        }
    }
}

/// 1 / log2(r + 2) for the 0-based rank r (the 1-based rank's 1 / log2(rank + 1)).
fn discount(r: usize) -> f64 {
    1.0 / ((r + 2) as f64).log2()
}

/// How many distinct users rated each item in the training events, by item id.
#[derive(Debug, Default)]
pub struct TrainingCounts {
    raters: HashMap<String, u64>,
}

impl TrainingCounts {
    /// Counts the distinct raters of each item among `train`'s rating events (removals of
    /// ratings are not subtracted).
    pub fn of_training(train: &[Event]) -> TrainingCounts {
        let mut seen: FxHashSet<(&str, &str)> = FxHashSet::default();
        let mut raters: HashMap<String, u64> = HashMap::new();
        for e in train {
            if let EventBody::Rating { user, item, .. } = &e.body {
                if seen.insert((user, item)) {
                    *raters.entry(item.clone()).or_default() += 1;
                }
            }
        }
        TrainingCounts { raters }
    }

    /// The popularity order of a store's items.
    pub fn by_id(&self, store: &Store) -> Popularity {
        let mut rated: Vec<(u64, &str, u32)> = self
            .raters
            .iter()
            .filter_map(|(name, &n)| store.item_id(name).map(|id| (n, name.as_str(), id)))
            .collect();
        rated.sort_unstable_by(|a, b| b.0.cmp(&a.0).then_with(|| a.1.cmp(b.1)));
        let head_size = (rated.len() as f64 * HEAD_FRACTION).ceil() as usize;
        let order: Vec<u32> = rated.into_iter().map(|(_, _, id)| id).collect();
        let head = order[..head_size].iter().copied().collect();
        Popularity { order, head }
    }
}

/// A store's rated items, most raters first (ties by name), and the head: the first
/// [`HEAD_FRACTION`] of them, rounded up.
#[derive(Debug, Default)]
pub struct Popularity {
    order: Vec<u32>,
    head: FxHashSet<u32>,
}

impl Popularity {
    /// The popularity ranking for one user: the `length` most popular items for which
    /// `has` is false (what the user has, or cannot be offered).
    pub fn top_for(&self, length: usize, has: impl Fn(u32) -> bool) -> Vec<u32> {
        self.order
            .iter()
            .copied()
            .filter(|&i| !has(i))
            .take(length)
            .collect()
    }

    /// Whether `item` is among the most popular [`HEAD_FRACTION`] of the catalogue.
    pub fn in_head(&self, item: u32) -> bool {
        self.head.contains(&item)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two users. a: relevant {1, 2}, list [1, 3, 2, …]; b: relevant {9}, list [4, 5, …].
    /// At N = 5: a has 2 hits, precision 2/5, recall 1, DCG = 1/log2 2 + 1/log2 4 = 1.5,
    /// IDCG = 1 + 1/log2 3 = 1.6309297535714575, nDCG = 0.9197207891481876; b has none.
    #[test]
    fn cutoff_figures_follow_their_definitions() {
        let ranked: TopLists = [
            ("a".to_string(), vec![1, 3, 2, 7, 8, 10, 11]),
            ("b".to_string(), vec![4, 5, 6]),
        ]
        .into_iter()
        .collect();
        let relevant: BTreeMap<String, FxHashSet<u32>> = [
            ("a".to_string(), [1, 2].into_iter().collect()),
            ("b".to_string(), [9].into_iter().collect()),
        ]
        .into_iter()
        .collect();
        let popularity = Popularity {
            order: vec![1, 4, 3],
            head: [1, 4].into_iter().collect(),
        };
        let q = RankingQuality::measure(&ranked, &relevant, 20, &popularity, 5);
        let five = q.at(5);
        assert!((five.precision - (2.0 / 5.0) / 2.0).abs() < 1e-15);
        assert!((five.recall - 0.5).abs() < 1e-15);
        assert!((five.hit_rate - 0.5).abs() < 1e-15);
        assert!(
            (five.ndcg - 0.919_720_789_148_187_6 / 2.0).abs() < 1e-15,
            "{}",
            five.ndcg
        );
        // Coverage at 5: {1, 3, 2, 7, 8} ∪ {4, 5, 6} = 8 of 20; head: 1 and 4 of 8 slots.
        assert!((q.coverage - 0.4).abs() < 1e-15);
        assert!((q.head_share - 0.25).abs() < 1e-15);
    }

    #[test]
    fn popularity_skips_what_the_user_has() {
        let popularity = Popularity {
            order: vec![5, 2, 9, 1],
            head: [5].into_iter().collect(),
        };
        assert_eq!(popularity.top_for(2, |i| i == 2), vec![5, 9]);
    }
}
