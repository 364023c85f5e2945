//! The similarity engine: applies a micro-batch of events to user histories and turns the
//! change into additive pair deltas (docs/design.md, "Adjusted cosine over co-raters"). It
//! knows nothing of RocksDB, Kafka or files: the caller loads the states a batch touches
//! and persists what comes back.

pub mod aggregate;
pub mod contrib;
pub mod fixed;
pub mod runs;
pub mod segment;
pub mod tally;
pub mod user_state;

use std::collections::{BTreeMap, HashMap};

use rustc_hash::FxHashMap;

use crate::event::{EventKind, UnixNanos};
use crate::model::DirtyScope;
use aggregate::{aggregate_pairs, PairSum};
use contrib::{difference, ContributionSet};
use tally::EventTally;
use user_state::{Outcome, UserState};

/// The settings that shape the statistics (part of the store's fingerprint).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct EngineSettings {
    /// Largest |mean − applied center| left after each event; 0 re-centers on every change.
    pub recenter_tolerance: f64,
    /// Items per user taking part in pairs, most recent first; 0 means no cut.
    pub max_items_per_user: usize,
}

/// An event with ids already interned to dense numbers.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Action {
    /// Rating of `item` by `user`.
    Rate {
        /// Dense user id.
        user: u32,
        /// Dense item id.
        item: u32,
        /// The rating.
        value: f64,
    },
    /// Withdrawal of a rating.
    Unrate {
        /// Dense user id.
        user: u32,
        /// Dense item id.
        item: u32,
    },
    /// A purchase.
    Purchase {
        /// Dense user id.
        user: u32,
        /// Dense item id.
        item: u32,
    },
    /// Erasure of a user.
    Erase {
        /// Dense user id.
        user: u32,
    },
    /// Availability change of an item.
    ItemStatus {
        /// Dense item id.
        item: u32,
        /// Whether it may be published.
        available: bool,
    },
}

impl Action {
    /// The user the action concerns, if any.
    pub fn user(&self) -> Option<u32> {
        match *self {
            Action::Rate { user, .. }
            | Action::Unrate { user, .. }
            | Action::Purchase { user, .. }
            | Action::Erase { user } => Some(user),
            Action::ItemStatus { .. } => None,
        }
    }

    /// The kind of the event it came from.
    pub fn kind(&self) -> EventKind {
        match self {
            Action::Rate { .. } => EventKind::Rating,
            Action::Unrate { .. } => EventKind::Unrating,
            Action::Purchase { .. } => EventKind::Purchase,
            Action::Erase { .. } => EventKind::EraseUser,
            Action::ItemStatus { .. } => EventKind::ItemStatus,
        }
    }
}

/// An action with its event time and store-wide source position.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sequenced {
    /// Source position: later events win ties in `at`.
    pub seq: u64,
    /// Event time.
    pub at: UnixNanos,
    /// What to do.
    pub action: Action,
}

/// The stored availability of an item.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ItemStatus {
    /// Whether it may appear in published lists.
    pub available: bool,
    /// Time of the status event.
    pub at: UnixNanos,
    /// Source position of the status event.
    pub seq: u64,
}

/// Change of one rating pair's sums, for the pair (lo, hi) with lo < hi.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RatingPairDelta {
    /// Change of the co-rater count n.
    pub n: i64,
    /// Change of Σ d_lo·d_hi (fixed point, see [`fixed`]).
    pub dot: i128,
    /// Change of Σ d_lo² over co-raters.
    pub s_lo: i128,
    /// Change of Σ d_hi² over co-raters.
    pub s_hi: i128,
}

/// Everything a batch changed, ready to be persisted in one write.
#[derive(Debug, Default)]
pub struct BatchEffects {
    /// Accepted events by kind and outcome.
    pub outcomes: EventTally,
    /// Rating pair deltas as (lo, hi, delta), lo < hi, sorted.
    pub rating_pairs: Vec<(u32, u32, RatingPairDelta)>,
    /// Co-buyer count deltas as (lo, hi, delta), lo ≤ hi, sorted; (a, a) is a's buyer count.
    pub purchase_pairs: Vec<(u32, u32, i64)>,
    /// Change in the number of users with at least one active purchase.
    pub buyers_delta: i64,
    /// Items whose rating list may have changed. [`DirtyScope::WithNeighbors`] means the
    /// item's availability changed, so every item listing it must be rescored too (the
    /// publisher resolves those from the item's row).
    pub dirty_rating: FxHashMap<u32, DirtyScope>,
    /// Items whose purchase list may have changed; with neighbors as above, also when the
    /// item's own buyer count changed (it divides every score in its column).
    pub dirty_purchase: FxHashMap<u32, DirtyScope>,
    /// Item statuses to store.
    pub statuses: Vec<(u32, ItemStatus)>,
    /// Users whose state changed, to store.
    pub touched_users: Vec<u32>,
    /// Users whose applied center differs after the batch (one shift of their pairs each).
    pub recenterings: u64,
    /// Pair contributions added or retracted.
    pub pair_updates: u64,
    /// Largest |mean − center| among touched users after the batch.
    pub max_center_gap: f64,
    /// |mean − center| of every touched user with ratings, after the batch.
    pub center_gaps: Vec<f64>,
    /// Newest event time among applied events.
    pub newest_event_at: Option<UnixNanos>,
}

/// A rating taking part in pairs: its deviation d = r − c_u, and d² in fixed point.
pub type Deviation = (f64, i128);

/// Adds `sign` (±1) times one co-rater's contribution to a pair's four sums: the
/// co-rater, the product of the deviations and each side's squared deviation (`first`
/// goes with `d_first`). Adding or subtracting spares three 128-bit multiplications.
fn add_contribution(
    sign: i64,
    sums: (&mut i64, &mut i128, &mut i128, &mut i128),
    first: &Deviation,
    second: &Deviation,
) {
    let (n, dot, s_first, s_second) = sums;
    let product = fixed::to_fixed(first.0 * second.0);
    if sign > 0 {
        *n += 1;
        *dot += product;
        *s_first += first.1;
        *s_second += second.1;
    } else {
        *n -= 1;
        *dot -= product;
        *s_first -= first.1;
        *s_second -= second.1;
    }
}

/// Sums oriented to a row, as a row summed under both orders accumulates them
/// ([`aggregate::RowIndex::both_orders`]): `lo` is the row's deviation, `hi` the partner's.
impl PairSum<Deviation> for crate::model::RatingPairStats {
    fn add(&mut self, sign: i64, row: &Deviation, other: &Deviation) {
        let sums = (&mut self.n, &mut self.dot, &mut self.s_row, &mut self.s_other);
        add_contribution(sign, sums, row, other);
    }
}

impl PairSum<Deviation> for RatingPairDelta {
    fn add(&mut self, sign: i64, lo: &Deviation, hi: &Deviation) {
        add_contribution(
            sign,
            (&mut self.n, &mut self.dot, &mut self.s_lo, &mut self.s_hi),
            lo,
            hi,
        );
    }
}

/// Co-buyer count of a pair.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
struct CoBuyers(i64);

impl PairSum<()> for CoBuyers {
    fn add(&mut self, sign: i64, _: &(), _: &()) {
        self.0 += sign;
    }
}

impl BatchEffects {
    /// Keeps what one item shard stores (docs/design.md, "Shards"), `owns` saying which
    /// items are its own: every pair with at least one of its items (written under both
    /// orders, so the row of another shard's item lists that item's partners here, which
    /// is how a change of that item's availability or buyers finds the lists it moves),
    /// every diagonal entry (an item's buyers, read when scoring any list it appears in),
    /// the marks of its own lists and every mark that expands to neighbors.
    pub fn keep_shard(&mut self, owns: impl Fn(u32) -> bool) {
        self.rating_pairs.retain(|&(a, b, _)| owns(a) || owns(b));
        self.purchase_pairs
            .retain(|&(a, b, _)| a == b || owns(a) || owns(b));
        for marks in [&mut self.dirty_rating, &mut self.dirty_purchase] {
            marks.retain(|&item, scope| owns(item) || *scope == DirtyScope::WithNeighbors);
        }
    }
}

/// The contribution sets of a batch, summed once all users are settled.
#[derive(Default)]
struct BatchSets {
    ratings: Vec<ContributionSet<Deviation>>,
    purchases: Vec<ContributionSet<()>>,
}

/// What of a user takes part in pairs: rating deviations and purchased items.
struct Contribution {
    ratings: Vec<(u32, Deviation)>,
    purchases: Vec<(u32, ())>,
}

fn contribution(state: &UserState, settings: &EngineSettings) -> Contribution {
    let ratings = state
        .active_ratings(settings.max_items_per_user)
        .into_iter()
        .map(|(item, r)| {
            let d = r - state.center;
            (item, (d, fixed::to_fixed(d * d)))
        })
        .collect();
    let purchases = state
        .active_purchases(settings.max_items_per_user)
        .into_iter()
        .map(|item| (item, ()))
        .collect();
    Contribution { ratings, purchases }
}

/// Applies one micro-batch. `users` must hold the stored state of every user the batch
/// names (absent users are new) and `statuses` the stored status of every item with an
/// item_status event; both are updated in place.
pub fn apply_batch(
    settings: &EngineSettings,
    events: &[Sequenced],
    users: &mut HashMap<u32, UserState>,
    statuses: &mut HashMap<u32, ItemStatus>,
) -> BatchEffects {
    apply_batch_for_shard(settings, events, users, statuses, &|_| true)
}

/// [`apply_batch`] for an item shard owning the items `owns` accepts: the pair sums of
/// pairs touching none of them are not computed (what [`BatchEffects::keep_shard`] would
/// drop), which spares a shard the summing of other shards' pairs; the effects still
/// need [`BatchEffects::keep_shard`] for their marks.
pub fn apply_batch_for_shard(
    settings: &EngineSettings,
    events: &[Sequenced],
    users: &mut HashMap<u32, UserState>,
    statuses: &mut HashMap<u32, ItemStatus>,
    owns: &dyn Fn(u32) -> bool,
) -> BatchEffects {
    let (mut fx, rating_sides) = apply_batch_unsummed(settings, events, users, statuses, owns);
    let (rating_pairs, rating_updates) = aggregate_pairs::<Deviation, RatingPairDelta>(&rating_sides, owns);
    fx.rating_pairs = rating_pairs;
    fx.pair_updates += rating_updates;
    fx
}

/// [`apply_batch_for_shard`] without summing the rating pairs: the effects (purchase pairs
/// summed, `pair_updates` counting only theirs) and the before and after sides of every
/// touched user's rating contribution, for the caller to sum row by row
/// ([`aggregate::RowIndex::both_orders`], docs/design.md "Bulk backfill").
pub fn apply_batch_unsummed(
    settings: &EngineSettings,
    events: &[Sequenced],
    users: &mut HashMap<u32, UserState>,
    statuses: &mut HashMap<u32, ItemStatus>,
    owns: &dyn Fn(u32) -> bool,
) -> (BatchEffects, Vec<ContributionSet<Deviation>>) {
    let mut fx = BatchEffects::default();
    let mut before: FxHashMap<u32, (Contribution, f64)> = FxHashMap::default();
    for ev in events {
        let outcome = match ev.action {
            Action::ItemStatus { item, available } => apply_status(&mut fx, statuses, item, available, ev),
            action => {
                let user = action.user().expect("user actions name a user");
                let state = users.entry(user).or_default();
                before
                    .entry(user)
                    .or_insert_with(|| (contribution(state, settings), state.center));
                let outcome = match action {
                    Action::Rate { item, value, .. } => state.rate(item, value, ev.at, ev.seq),
                    Action::Unrate { item, .. } => state.unrate(item, ev.at, ev.seq),
                    Action::Purchase { item, .. } => state.purchase(item, ev.at, ev.seq),
                    Action::Erase { .. } => state.erase(ev.at),
                    Action::ItemStatus { .. } => unreachable!("handled above"),
                };
                if outcome == Outcome::Applied {
                    state.follow_mean(settings.recenter_tolerance, settings.max_items_per_user);
                }
                outcome
            }
        };
        fx.outcomes.add(ev.action.kind(), outcome, 1);
        if outcome == Outcome::Applied {
            fx.newest_event_at = Some(fx.newest_event_at.map_or(ev.at, |t| t.max(ev.at)));
        }
    }
    let mut touched: Vec<u32> = before.keys().copied().collect();
    touched.sort_unstable();
    let mut sets = BatchSets::default();
    for user in &touched {
        let state = users.get(user).expect("touched users were inserted");
        let (old, old_center) = before.remove(user).expect("before view recorded");
        settle_user(settings, state, old, old_center, &mut sets, &mut fx);
    }
    fx.touched_users = touched;
    let (co_pairs, purchase_updates) = aggregate_pairs::<(), CoBuyers>(&sets.purchases, owns);
    let mut buyers: BTreeMap<u32, i64> = BTreeMap::new();
    for set in &sets.purchases {
        for (item, _) in set.items.iter().zip(&set.changed).filter(|(_, c)| **c) {
            *buyers.entry(*item).or_default() += set.sign;
        }
    }
    fx.purchase_pairs = co_pairs.into_iter().map(|(a, b, c)| (a, b, c.0)).collect();
    fx.purchase_pairs.extend(
        buyers
            .into_iter()
            .filter(|(_, d)| *d != 0)
            .map(|(a, d)| (a, a, d)),
    );
    fx.purchase_pairs.sort_unstable_by_key(|&(a, b, _)| (a, b));
    fx.pair_updates = purchase_updates;
    (fx, sets.ratings)
}

/// Records the difference of the user's contributions before and after the batch for
/// the batch's aggregation. The center was kept by the per-event rule while the events
/// were applied; only its final value reaches the pairs, so a user's pairs shift at most
/// once per batch whatever the number of its events.
fn settle_user(
    settings: &EngineSettings,
    state: &UserState,
    old: Contribution,
    old_center: f64,
    sets: &mut BatchSets,
    fx: &mut BatchEffects,
) {
    if let Some(mean) = state.active_mean(settings.max_items_per_user) {
        let gap = (mean - state.center).abs();
        fx.max_center_gap = fx.max_center_gap.max(gap);
        fx.center_gaps.push(gap);
    }
    let new = contribution(state, settings);
    // Bitwise comparison: any change of center changes every deviation.
    let center_moved = state.center.to_bits() != old_center.to_bits();
    fx.recenterings += u64::from(center_moved);
    if let Some(sides) = difference(&old.ratings, &new.ratings, center_moved) {
        if sides.iter().any(|s| s.pair_count() > 0) {
            for item in sides.iter().flat_map(|s| &s.items) {
                mark_dirty(&mut fx.dirty_rating, *item, DirtyScope::OwnList);
            }
        }
        sets.ratings.extend(sides);
    }
    if let Some(sides) = difference(&old.purchases, &new.purchases, false) {
        for side in &sides {
            for (item, _) in side.items.iter().zip(&side.changed).filter(|(_, c)| **c) {
                mark_dirty(&mut fx.dirty_purchase, *item, DirtyScope::WithNeighbors);
            }
        }
        sets.purchases.extend(sides);
    }
    fx.buyers_delta += i64::from(!new.purchases.is_empty()) - i64::from(!old.purchases.is_empty());
}

/// Marks `item` dirty in `set`, keeping the widest scope asked for.
pub(crate) fn mark_dirty(set: &mut FxHashMap<u32, DirtyScope>, item: u32, scope: DirtyScope) {
    let entry = set.entry(item).or_insert(scope);
    *entry = entry.widest(scope);
}

fn apply_status(
    fx: &mut BatchEffects,
    statuses: &mut HashMap<u32, ItemStatus>,
    item: u32,
    available: bool,
    ev: &Sequenced,
) -> Outcome {
    let new = ItemStatus {
        available,
        at: ev.at,
        seq: ev.seq,
    };
    let previous = statuses.get(&item).copied();
    let outcome = match previous {
        Some(old) if ev.at < old.at => Outcome::Stale,
        Some(old) if ev.at == old.at && old.available == available => Outcome::Duplicate,
        _ => Outcome::Applied,
    };
    if outcome == Outcome::Applied {
        let was_available = previous.is_none_or(|s| s.available);
        statuses.insert(item, new);
        fx.statuses.retain(|(i, _)| *i != item);
        fx.statuses.push((item, new));
        if was_available != available {
            mark_dirty(&mut fx.dirty_rating, item, DirtyScope::WithNeighbors);
            mark_dirty(&mut fx.dirty_purchase, item, DirtyScope::WithNeighbors);
        }
    }
    outcome
}
