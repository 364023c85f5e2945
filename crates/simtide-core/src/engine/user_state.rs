//! One user's stored history and applied center, and the rules that change them:
//! last write wins by event time (ties to the later source position), withdrawals,
//! erasure, and the interaction cut that picks the items taking part in pairs.

use crate::event::UnixNanos;

/// The user's latest rating event for one item.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RatingEntry {
    /// Dense item id.
    pub item: u32,
    /// The rating, or `None` once withdrawn (kept so older events stay stale).
    pub value: Option<f64>,
    /// Time of the event that set this entry.
    pub at: UnixNanos,
    /// Source position (store-wide sequence) of that event.
    pub seq: u64,
}

/// The user's latest purchase of one item.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct PurchaseEntry {
    /// Dense item id.
    pub item: u32,
    /// Time of the latest purchase.
    pub at: UnixNanos,
    /// Source position of that purchase.
    pub seq: u64,
}

/// Everything stored about one user.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct UserState {
    /// The applied center c_u that all of this user's rating-pair contributions use.
    pub center: f64,
    /// Events at or before this time are stale: the user was erased then.
    pub erased_at: Option<UnixNanos>,
    /// Rating entries, sorted by item.
    pub ratings: Vec<RatingEntry>,
    /// Purchase entries, sorted by item.
    pub purchases: Vec<PurchaseEntry>,
}

/// What an event did to the state.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Outcome {
    /// The state changed.
    Applied,
    /// Older than what is stored for the same key: ignored.
    Stale,
    /// Same time and same effect as what is stored: ignored.
    Duplicate,
}

impl Outcome {
    /// Every outcome of an accepted event.
    pub const ALL: [Outcome; 3] = [Outcome::Applied, Outcome::Stale, Outcome::Duplicate];

    /// Counter label.
    pub fn as_str(self) -> &'static str {
        match self {
            Outcome::Applied => "applied",
            Outcome::Stale => "stale",
            Outcome::Duplicate => "duplicate",
        }
    }
}

/// Picks the `limit` most recent entries by (time, source position); 0 means all.
fn most_recent<T, F: Fn(&T) -> (UnixNanos, u64)>(mut entries: Vec<T>, limit: usize, key: F) -> Vec<T> {
    if limit > 0 && entries.len() > limit {
        entries.select_nth_unstable_by(limit - 1, |a, b| key(b).cmp(&key(a)));
        entries.truncate(limit);
    }
    entries
}

/// Stores `entry` in a list sorted by item unless the stored entry for the same item is
/// newer (stale) or has the same time and the same effect (duplicate). `key` gives
/// (item, time); ties in time otherwise go to the newcomer, the later source position.
fn last_write_wins<E: Copy>(
    entries: &mut Vec<E>,
    entry: E,
    key: impl Fn(&E) -> (u32, UnixNanos),
    same_effect: impl Fn(&E, &E) -> bool,
) -> Outcome {
    let (item, at) = key(&entry);
    match entries.binary_search_by_key(&item, |e| key(e).0) {
        Ok(i) => {
            let old_at = key(&entries[i]).1;
            if at < old_at {
                Outcome::Stale
            } else if at == old_at && same_effect(&entries[i], &entry) {
                Outcome::Duplicate
            } else {
                entries[i] = entry;
                Outcome::Applied
            }
        }
        Err(i) => {
            entries.insert(i, entry);
            Outcome::Applied
        }
    }
}

impl UserState {
    /// Bytes the state occupies in memory (entries at their capacity), for budgets of
    /// work that holds many states at once.
    pub fn approx_bytes(&self) -> usize {
        std::mem::size_of::<UserState>()
            + self.ratings.capacity() * std::mem::size_of::<RatingEntry>()
            + self.purchases.capacity() * std::mem::size_of::<PurchaseEntry>()
    }

    fn erased_since(&self, at: UnixNanos) -> bool {
        self.erased_at.is_some_and(|e| at <= e)
    }

    /// Applies a rating of `item`.
    pub fn rate(&mut self, item: u32, value: f64, at: UnixNanos, seq: u64) -> Outcome {
        self.set_rating(RatingEntry {
            item,
            value: Some(value),
            at,
            seq,
        })
    }

    /// Withdraws the rating of `item`, leaving a marker so older ratings stay stale.
    pub fn unrate(&mut self, item: u32, at: UnixNanos, seq: u64) -> Outcome {
        self.set_rating(RatingEntry {
            item,
            value: None,
            at,
            seq,
        })
    }

    fn set_rating(&mut self, entry: RatingEntry) -> Outcome {
        if self.erased_since(entry.at) {
            return Outcome::Stale;
        }
        last_write_wins(
            &mut self.ratings,
            entry,
            |e| (e.item, e.at),
            |a, b| a.value == b.value,
        )
    }

    /// Records a purchase of `item`; a repeat purchase only refreshes its time.
    pub fn purchase(&mut self, item: u32, at: UnixNanos, seq: u64) -> Outcome {
        if self.erased_since(at) {
            return Outcome::Stale;
        }
        last_write_wins(
            &mut self.purchases,
            PurchaseEntry { item, at, seq },
            |e| (e.item, e.at),
            |_, _| true,
        )
    }

    /// Forgets the whole history. The erasure time is kept, raised to the newest time
    /// seen, so a replay of any forgotten event is stale and cannot bring it back.
    pub fn erase(&mut self, at: UnixNanos) -> Outcome {
        if self.erased_since(at) {
            return Outcome::Stale;
        }
        let newest = self
            .ratings
            .iter()
            .map(|e| e.at)
            .chain(self.purchases.iter().map(|e| e.at))
            .fold(at, UnixNanos::max);
        *self = UserState {
            center: 0.0,
            erased_at: Some(newest),
            ratings: Vec::new(),
            purchases: Vec::new(),
        };
        Outcome::Applied
    }

    /// The mean of the ratings that take part in pairs (see [`UserState::active_ratings`]),
    /// `None` for none. Equal, bit for bit, to `mean_rating(&self.active_ratings(limit))`,
    /// without building the list when every rating takes part (checked after each event).
    pub fn active_mean(&self, limit: usize) -> Option<f64> {
        let values = self.ratings.iter().filter_map(|e| e.value);
        let count = values.clone().count();
        if count == 0 {
            return None;
        }
        if limit > 0 && count > limit {
            return mean_rating(&self.active_ratings(limit));
        }
        Some(values.sum::<f64>() / count as f64)
    }

    /// The per-event re-centering rule (docs/design.md, "Re-centering"): moves the applied
    /// center to the mean of the active ratings when they are more than `tolerance` apart.
    /// Run after each of the user's events in their order, it makes the center depend only
    /// on the events consumed, never on where micro-batches begin and end.
    pub fn follow_mean(&mut self, tolerance: f64, limit: usize) {
        if let Some(mean) = self.active_mean(limit) {
            if (mean - self.center).abs() > tolerance {
                self.center = mean;
            }
        }
    }

    /// The ratings that take part in pairs: the `limit` most recent non-withdrawn ones
    /// (0 = all), sorted by item, as (item, rating).
    pub fn active_ratings(&self, limit: usize) -> Vec<(u32, f64)> {
        let live: Vec<&RatingEntry> = self.ratings.iter().filter(|e| e.value.is_some()).collect();
        let mut chosen = most_recent(live, limit, |e| (e.at, e.seq));
        chosen.sort_unstable_by_key(|e| e.item);
        chosen
            .into_iter()
            .filter_map(|e| e.value.map(|v| (e.item, v)))
            .collect()
    }

    /// The purchases that take part in pairs, sorted by item.
    pub fn active_purchases(&self, limit: usize) -> Vec<u32> {
        let mut chosen = most_recent(self.purchases.iter().collect(), limit, |e| (e.at, e.seq));
        chosen.sort_unstable_by_key(|e| e.item);
        chosen.into_iter().map(|e| e.item).collect()
    }
}

/// Mean of the given ratings, `None` for none.
fn mean_rating(active: &[(u32, f64)]) -> Option<f64> {
    if active.is_empty() {
        return None;
    }
    Some(active.iter().map(|(_, v)| v).sum::<f64>() / active.len() as f64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_quick_mean_equals_the_mean_of_the_active_list() {
        let mut state = UserState::default();
        for (i, value) in [3.5, 4.0, 0.5, 5.0, 2.5, 1.0, 4.5].into_iter().enumerate() {
            state.rate(7 - i as u32, value, UnixNanos(i as i64), i as u64);
        }
        state.unrate(5, UnixNanos(20), 20);
        for limit in [0, 2, 5, 6, 7, 100] {
            let slow = mean_rating(&state.active_ratings(limit));
            assert_eq!(
                state.active_mean(limit).map(f64::to_bits),
                slow.map(f64::to_bits),
                "limit {limit}"
            );
        }
        assert_eq!(UserState::default().active_mean(0), None);
    }

    #[test]
    fn last_write_wins_by_time_then_position() {
        let mut u = UserState::default();
        assert_eq!(u.rate(7, 4.0, UnixNanos(100), 1), Outcome::Applied);
        assert_eq!(u.rate(7, 2.0, UnixNanos(50), 2), Outcome::Stale);
        assert_eq!(u.rate(7, 4.0, UnixNanos(100), 3), Outcome::Duplicate);
        assert_eq!(
            u.rate(7, 5.0, UnixNanos(100), 4),
            Outcome::Applied,
            "same time, later position wins"
        );
        assert_eq!(u.unrate(7, UnixNanos(90), 5), Outcome::Stale);
        assert_eq!(u.unrate(7, UnixNanos(120), 6), Outcome::Applied);
        assert_eq!(
            u.rate(7, 3.0, UnixNanos(110), 7),
            Outcome::Stale,
            "older than the withdrawal"
        );
        assert!(u.active_ratings(0).is_empty());
    }

    #[test]
    fn cut_keeps_most_recent() {
        let mut u = UserState::default();
        for (item, at) in [(1, 30), (2, 10), (3, 20), (4, 40)] {
            u.rate(item, 3.0, UnixNanos(at), item as u64);
        }
        let kept: Vec<u32> = u.active_ratings(2).into_iter().map(|(i, _)| i).collect();
        assert_eq!(kept, vec![1, 4]);
        u.unrate(4, UnixNanos(50), 9);
        let kept: Vec<u32> = u.active_ratings(2).into_iter().map(|(i, _)| i).collect();
        assert_eq!(
            kept,
            vec![1, 3],
            "a withdrawn item lets the next most recent back in"
        );
    }

    #[test]
    fn erasure_blocks_replays() {
        let mut u = UserState::default();
        u.rate(1, 5.0, UnixNanos(200), 1);
        u.purchase(2, UnixNanos(300), 2);
        assert_eq!(u.erase(UnixNanos(100)), Outcome::Applied);
        assert!(u.ratings.is_empty() && u.purchases.is_empty());
        assert_eq!(
            u.rate(1, 5.0, UnixNanos(200), 3),
            Outcome::Stale,
            "replay of a forgotten event"
        );
        assert_eq!(
            u.purchase(2, UnixNanos(301), 4),
            Outcome::Applied,
            "a genuinely newer event"
        );
    }
}
