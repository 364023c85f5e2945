//! Property test: random streams applied by the engine in random micro-batch sizes, with
//! the deltas summed in memory, equal a straightforward recomputation written here; and
//! every user's center stays within the tolerance of its mean after every batch. No store
//! is involved: the store only adds up what the engine returns (its own tests check that).

use std::collections::{BTreeMap, HashMap};

use proptest::prelude::*;
use simtide_core::engine::fixed::to_f64;
use simtide_core::engine::user_state::UserState;
use simtide_core::engine::{apply_batch, Action, EngineSettings, ItemStatus, Sequenced};
use simtide_core::event::{Event, EventBody, UnixNanos};

const USERS: u8 = 4;
const ITEMS: u8 = 6;

fn event_strategy() -> impl Strategy<Value = Event> {
    let user = (0..USERS).prop_map(|u| format!("u{u}"));
    let item = (0..ITEMS).prop_map(|i| format!("i{i}"));
    // Few distinct times, so ties (resolved by stream position) are common.
    let at = (0i64..12).prop_map(|t| t * 1_000_000_000);
    let value = (2u8..=10).prop_map(|h| f64::from(h) / 2.0);
    let body = prop_oneof![
        6 => (user.clone(), item.clone(), value).prop_map(|(user, item, value)| EventBody::Rating { user, item, value }),
        1 => (user.clone(), item.clone()).prop_map(|(user, item)| EventBody::Unrating { user, item }),
        3 => (user.clone(), item.clone()).prop_map(|(user, item)| EventBody::Purchase { user, item }),
        1 => user.prop_map(|user| EventBody::EraseUser { user }),
    ];
    (at, body).prop_map(|(at, body)| Event {
        at: UnixNanos(at),
        body,
    })
}

/// The model: per user and item, the latest event by (time, stream position).
#[derive(Default, Clone)]
struct ModelUser {
    ratings: BTreeMap<String, (Option<f64>, i64, usize)>,
    purchases: BTreeMap<String, (i64, usize)>,
    erased_at: Option<i64>,
}

fn model(events: &[Event]) -> BTreeMap<String, ModelUser> {
    let mut users: BTreeMap<String, ModelUser> = BTreeMap::new();
    for (pos, e) in events.iter().enumerate() {
        let u = users.entry(e.user().unwrap().to_string()).or_default();
        if u.erased_at.is_some_and(|t| e.at.0 <= t) {
            continue;
        }
        match &e.body {
            // A later time replaces; the same time replaces unless it repeats what is stored.
            EventBody::Rating { item, value, .. } => {
                if u.ratings
                    .get(item)
                    .is_none_or(|old| e.at.0 > old.1 || (e.at.0 == old.1 && old.0 != Some(*value)))
                {
                    u.ratings.insert(item.clone(), (Some(*value), e.at.0, pos));
                }
            }
            EventBody::Unrating { item, .. } => {
                if u.ratings
                    .get(item)
                    .is_none_or(|old| e.at.0 > old.1 || (e.at.0 == old.1 && old.0.is_some()))
                {
                    u.ratings.insert(item.clone(), (None, e.at.0, pos));
                }
            }
            EventBody::Purchase { item, .. } => {
                if u.purchases.get(item).is_none_or(|old| e.at.0 > old.0) {
                    u.purchases.insert(item.clone(), (e.at.0, pos));
                }
            }
            EventBody::EraseUser { .. } => {
                let newest = u
                    .ratings
                    .values()
                    .map(|r| r.1)
                    .chain(u.purchases.values().map(|p| p.0))
                    .fold(e.at.0, i64::max);
                *u = ModelUser {
                    erased_at: Some(newest),
                    ..ModelUser::default()
                };
            }
            EventBody::ItemStatus { .. } => unreachable!(),
        }
    }
    users
}

/// The `cut` most recent entries (0 = all) by (time, position).
fn recent<T: Clone>(mut entries: Vec<(String, i64, usize, T)>, cut: usize) -> Vec<(String, T)> {
    entries.sort_by_key(|e| std::cmp::Reverse((e.1, e.2)));
    if cut > 0 {
        entries.truncate(cut);
    }
    entries.into_iter().map(|(i, _, _, t)| (i, t)).collect()
}

fn active_ratings(u: &ModelUser, cut: usize) -> Vec<(String, f64)> {
    recent(
        u.ratings
            .iter()
            .filter_map(|(i, (v, at, pos))| v.map(|v| (i.clone(), *at, *pos, v)))
            .collect(),
        cut,
    )
}

fn active_purchases(u: &ModelUser, cut: usize) -> Vec<String> {
    recent(
        u.purchases
            .iter()
            .map(|(i, (at, pos))| (i.clone(), *at, *pos, ()))
            .collect(),
        cut,
    )
    .into_iter()
    .map(|(i, _)| i)
    .collect()
}

fn close(a: f64, b: f64) -> bool {
    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()).max(1.0)
}

/// What a store would hold, kept in memory: dense ids, user states and summed deltas.
#[derive(Default)]
struct MemoryState {
    users: HashMap<String, u32>,
    items: HashMap<String, u32>,
    item_names: Vec<String>,
    next_seq: u64,
    states: HashMap<u32, UserState>,
    statuses: HashMap<u32, ItemStatus>,
    /// (lo, hi) → (n, Σd_lo·d_hi, Σd_lo², Σd_hi²), fixed point.
    rating_pairs: BTreeMap<(u32, u32), (i64, i128, i128, i128)>,
    /// (lo, hi) → co-buyers; (a, a) → a's buyers.
    co_buyers: BTreeMap<(u32, u32), i64>,
    buyers: i64,
}

impl MemoryState {
    fn id(ids: &mut HashMap<String, u32>, name: &str) -> u32 {
        let next = ids.len() as u32;
        *ids.entry(name.to_string()).or_insert(next)
    }

    fn item(&mut self, name: &str) -> u32 {
        let id = Self::id(&mut self.items, name);
        if id as usize == self.item_names.len() {
            self.item_names.push(name.to_string());
        }
        id
    }

    fn apply(&mut self, settings: &EngineSettings, events: &[Event]) {
        let mut sequenced = Vec::new();
        for e in events {
            let action = match &e.body {
                EventBody::Rating { user, item, value } => Action::Rate {
                    user: Self::id(&mut self.users, user),
                    item: self.item(item),
                    value: *value,
                },
                EventBody::Unrating { user, item } => Action::Unrate {
                    user: Self::id(&mut self.users, user),
                    item: self.item(item),
                },
                EventBody::Purchase { user, item } => Action::Purchase {
                    user: Self::id(&mut self.users, user),
                    item: self.item(item),
                },
                EventBody::EraseUser { user } => Action::Erase {
                    user: Self::id(&mut self.users, user),
                },
                EventBody::ItemStatus { .. } => unreachable!("not generated"),
            };
            sequenced.push(Sequenced {
                seq: self.next_seq,
                at: e.at,
                action,
            });
            self.next_seq += 1;
        }
        let effects = apply_batch(settings, &sequenced, &mut self.states, &mut self.statuses);
        for (lo, hi, d) in &effects.rating_pairs {
            let e = self.rating_pairs.entry((*lo, *hi)).or_default();
            *e = (e.0 + d.n, e.1 + d.dot, e.2 + d.s_lo, e.3 + d.s_hi);
        }
        for (a, b, c) in &effects.purchase_pairs {
            *self.co_buyers.entry((*a, *b)).or_default() += c;
        }
        self.buyers += effects.buyers_delta;
    }

    fn center(&self, user: &str) -> f64 {
        self.states[&self.users[user]].center
    }

    fn name(&self, item: u32) -> String {
        self.item_names[item as usize].clone()
    }
}

/// Applies `events` to a fresh in-memory state in batches of `sizes` (repeated), calling
/// `after_batch` with the state and the end of each batch.
fn apply_in_batches(
    events: &[Event],
    sizes: &[usize],
    settings: &EngineSettings,
    mut after_batch: impl FnMut(&MemoryState, usize) -> Result<(), TestCaseError>,
) -> Result<MemoryState, TestCaseError> {
    let mut state = MemoryState::default();
    let mut start = 0;
    let mut sizes = sizes.iter().cycle();
    while start < events.len() {
        let end = (start + sizes.next().unwrap()).min(events.len());
        state.apply(settings, &events[start..end]);
        start = end;
        after_batch(&state, end)?;
    }
    Ok(state)
}

/// The re-centering rule run on the model (docs/design.md, "Re-centering"): after each of
/// a user's events, the center moves to the mean of the active ratings when the two are
/// more than `tolerance` apart; an applied erasure resets it to 0. Ratings here are
/// halves, so every sum of them is exact and the means do not depend on summing order.
fn model_centers(events: &[Event], tolerance: f64, cut: usize) -> BTreeMap<String, f64> {
    let mut centers: BTreeMap<String, f64> = BTreeMap::new();
    for k in 1..=events.len() {
        let event = &events[k - 1];
        let name = event.user().unwrap().to_string();
        let center = centers.entry(name.clone()).or_insert(0.0);
        if matches!(event.body, EventBody::EraseUser { .. }) {
            let erased_before = model(&events[..k - 1]).get(&name).and_then(|u| u.erased_at);
            if erased_before.is_none_or(|t| event.at.0 > t) {
                *center = 0.0;
            }
        }
        let active = active_ratings(&model(&events[..k])[&name], cut);
        if !active.is_empty() {
            let mean = active.iter().map(|(_, v)| v).sum::<f64>() / active.len() as f64;
            if (mean - *center).abs() > tolerance {
                *center = mean;
            }
        }
    }
    centers
}

/// What a batching must not change: every nonzero pair sum (exact integers), every
/// co-buyer count, the buyers and every user's center, bit for bit.
type ExactResult = (
    BTreeMap<(u32, u32), (i64, i128, i128, i128)>,
    BTreeMap<(u32, u32), i64>,
    i64,
    BTreeMap<u32, u64>,
);

fn exact_result(state: &MemoryState) -> ExactResult {
    (
        state
            .rating_pairs
            .iter()
            .filter(|(_, s)| **s != (0, 0, 0, 0))
            .map(|(k, v)| (*k, *v))
            .collect(),
        state
            .co_buyers
            .iter()
            .filter(|(_, c)| **c != 0)
            .map(|(k, v)| (*k, *v))
            .collect(),
        state.buyers,
        state
            .states
            .iter()
            .map(|(u, s)| (*u, s.center.to_bits()))
            .collect(),
    )
}

fn run_case(
    events: Vec<Event>,
    batch_sizes: Vec<usize>,
    tolerance: f64,
    cut: usize,
) -> Result<(), TestCaseError> {
    let settings = EngineSettings {
        recenter_tolerance: tolerance,
        max_items_per_user: cut,
    };
    let state = apply_in_batches(&events, &batch_sizes, &settings, |state, end| {
        // After every batch: |mean − center| ≤ tolerance for every user.
        for (name, u) in model(&events[..end]) {
            let active = active_ratings(&u, cut);
            if active.is_empty() {
                continue;
            }
            let mean = active.iter().map(|(_, v)| v).sum::<f64>() / active.len() as f64;
            let center = state.center(&name);
            prop_assert!(
                (mean - center).abs() <= tolerance + 1e-12,
                "user {name}: mean {mean}, center {center}"
            );
        }
        Ok(())
    })?;
    // The centers are the per-event rule's, exactly.
    for (name, center) in model_centers(&events, tolerance, cut) {
        prop_assert_eq!(
            state.center(&name).to_bits(),
            center.to_bits(),
            "center of {}",
            name
        );
    }

    // Recompute every pair directly from the model's final active sets, centered at the
    // centers the engine applied.
    let users = model(&events);
    let mut expected: HashMap<(String, String), (i64, f64, f64, f64)> = HashMap::new();
    let mut expected_co: HashMap<(String, String), i64> = HashMap::new();
    for (name, u) in &users {
        let active = active_ratings(u, cut);
        if !active.is_empty() {
            let c = state.center(name);
            for (a, ra) in &active {
                for (b, rb) in &active {
                    if a != b {
                        let e = expected.entry((a.clone(), b.clone())).or_default();
                        let (da, db) = (ra - c, rb - c);
                        *e = (e.0 + 1, e.1 + da * db, e.2 + da * da, e.3 + db * db);
                    }
                }
            }
        }
        let bought = active_purchases(u, cut);
        for a in &bought {
            for b in &bought {
                *expected_co.entry((a.clone(), b.clone())).or_default() += 1;
            }
        }
    }
    // Both orientations of every pair that still has co-raters, as the store keeps them.
    let mut summed: HashMap<(String, String), (i64, f64, f64, f64)> = HashMap::new();
    for (&(lo, hi), &(n, dot, s_lo, s_hi)) in state.rating_pairs.iter().filter(|(_, s)| s.0 != 0) {
        let (dot, s_lo, s_hi) = (to_f64(dot), to_f64(s_lo), to_f64(s_hi));
        summed.insert((state.name(lo), state.name(hi)), (n, dot, s_lo, s_hi));
        summed.insert((state.name(hi), state.name(lo)), (n, dot, s_hi, s_lo));
    }
    prop_assert!(!expected.is_empty() || summed.is_empty());
    prop_assert_eq!(summed.len(), expected.len(), "pairs summed vs expected");
    for (key, (n, dot, sa, sb)) in &expected {
        let s = summed.get(key);
        prop_assert!(s.is_some(), "pair {:?} missing", key);
        let &(sn, sdot, ssa, ssb) = s.unwrap();
        prop_assert_eq!(sn, *n, "n of {:?}", key);
        prop_assert!(
            close(sdot, *dot) && close(ssa, *sa) && close(ssb, *sb),
            "{:?}: summed {:?}, expected {:?}",
            key,
            (sn, sdot, ssa, ssb),
            (n, dot, sa, sb)
        );
    }
    let mut summed_co: HashMap<(String, String), i64> = HashMap::new();
    for (&(a, b), &c) in state.co_buyers.iter().filter(|(_, c)| **c != 0) {
        summed_co.insert((state.name(a), state.name(b)), c);
        summed_co.insert((state.name(b), state.name(a)), c);
    }
    prop_assert_eq!(summed_co, expected_co);
    let buyers = users
        .values()
        .filter(|u| !active_purchases(u, cut).is_empty())
        .count() as i64;
    prop_assert_eq!(state.buyers, buyers);
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 256, ..ProptestConfig::default() })]

    #[test]
    fn exact_tolerance_matches_recomputation(
        events in prop::collection::vec(event_strategy(), 1..80),
        sizes in prop::collection::vec(1usize..12, 1..6),
    ) {
        run_case(events, sizes, 0.0, 0)?;
    }

    #[test]
    fn loose_tolerance_and_small_cut_match_recomputation(
        events in prop::collection::vec(event_strategy(), 1..80),
        sizes in prop::collection::vec(1usize..12, 1..6),
        tolerance in prop_oneof![Just(0.05), Just(0.3), Just(1.0)],
        cut in 2usize..4,
    ) {
        run_case(events, sizes, tolerance, cut)?;
    }

    /// The sums depend only on the events consumed: one batch, and batches of any sizes,
    /// hold the same integers and centers at every tolerance.
    #[test]
    fn batching_never_changes_the_sums(
        events in prop::collection::vec(event_strategy(), 1..80),
        sizes in prop::collection::vec(1usize..12, 1..6),
        other_sizes in prop::collection::vec(1usize..30, 1..4),
        tolerance in prop_oneof![Just(0.05), Just(0.3)],
        cut in 0usize..4,
    ) {
        let settings = EngineSettings { recenter_tolerance: tolerance, max_items_per_user: cut };
        let whole = apply_in_batches(&events, &[events.len()], &settings, |_, _| Ok(()))?;
        let expected = exact_result(&whole);
        for sizes in [&sizes, &other_sizes] {
            let split = apply_in_batches(&events, sizes, &settings, |_, _| Ok(()))?;
            prop_assert_eq!(exact_result(&split), expected.clone(), "batches {:?}", sizes);
        }
    }
}
