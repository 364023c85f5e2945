//! Property test: random streams applied incrementally, in random micro-batch sizes, to a
//! real RocksDB store equal a straightforward recomputation written here, and every user's
//! center stays within the tolerance of its mean after every batch.

mod common;

use std::collections::{BTreeMap, HashMap};

use proptest::prelude::*;
use simtide::decode::RejectReason;
use simtide::engine::EngineSettings;
use simtide::event::{Event, EventBody};
use simtide::pipeline::apply_and_commit;
use simtide::score::RatingSums;
use simtide::store::Store;

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
    (at, body).prop_map(|(at, body)| Event { at, body })
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
        if u.erased_at.is_some_and(|t| e.at <= t) {
            continue;
        }
        match &e.body {
            // A later time replaces; the same time replaces unless it repeats what is stored.
            EventBody::Rating { item, value, .. } => {
                if u.ratings
                    .get(item)
                    .is_none_or(|old| e.at > old.1 || (e.at == old.1 && old.0 != Some(*value)))
                {
                    u.ratings.insert(item.clone(), (Some(*value), e.at, pos));
                }
            }
            EventBody::Unrating { item, .. } => {
                if u.ratings
                    .get(item)
                    .is_none_or(|old| e.at > old.1 || (e.at == old.1 && old.0.is_some()))
                {
                    u.ratings.insert(item.clone(), (None, e.at, pos));
                }
            }
            EventBody::Purchase { item, .. } => {
                if u.purchases.get(item).is_none_or(|old| e.at > old.0) {
                    u.purchases.insert(item.clone(), (e.at, pos));
                }
            }
            EventBody::EraseUser { .. } => {
                let newest = u
                    .ratings
                    .values()
                    .map(|r| r.1)
                    .chain(u.purchases.values().map(|p| p.0))
                    .fold(e.at, i64::max);
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

fn run_case(
    events: Vec<Event>,
    batch_sizes: Vec<usize>,
    tolerance: f64,
    cut: usize,
) -> Result<(), TestCaseError> {
    let dir = tempfile::tempdir().unwrap();
    let config = common::config(tolerance, cut, 1, 1000);
    let mut store = Store::open(dir.path(), &config).unwrap();
    let settings = EngineSettings {
        recenter_tolerance: tolerance,
        max_items_per_user: cut,
    };
    let mut start = 0;
    let mut sizes = batch_sizes.into_iter().cycle();
    while start < events.len() {
        let end = (start + sizes.next().unwrap()).min(events.len());
        apply_and_commit(
            &mut store,
            &settings,
            &events[start..end],
            &BTreeMap::<RejectReason, u64>::new(),
            |_| {},
        )
        .unwrap();
        start = end;
        // After every batch: |mean − center| ≤ tolerance for every user.
        for (name, u) in model(&events[..end]) {
            let active = active_ratings(&u, cut);
            if active.is_empty() {
                continue;
            }
            let mean = active.iter().map(|(_, v)| v).sum::<f64>() / active.len() as f64;
            let center = store.user_state(&name).unwrap().expect("user stored").center;
            prop_assert!(
                (mean - center).abs() <= tolerance + 1e-12,
                "user {name}: mean {mean}, center {center}"
            );
        }
    }

    // Recompute every pair directly from the model's final active sets, centered at the
    // centers the store applied.
    let users = model(&events);
    let mut expected: HashMap<(String, String), (i64, f64, f64, f64)> = HashMap::new();
    let mut expected_co: HashMap<(String, String), i64> = HashMap::new();
    for (name, u) in &users {
        let active = active_ratings(u, cut);
        if !active.is_empty() {
            let c = store.user_state(name).unwrap().unwrap().center;
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
    let mut stored: HashMap<(String, String), RatingSums> = HashMap::new();
    for ((a, b), stats) in store.all_rating_pairs().unwrap() {
        stored.insert(
            (store.item_name(a).to_string(), store.item_name(b).to_string()),
            RatingSums::from_stats(&stats),
        );
    }
    prop_assert_eq!(stored.len(), expected.len(), "pairs stored vs expected");
    for (key, (n, dot, sa, sb)) in &expected {
        let s = stored.get(key);
        prop_assert!(s.is_some(), "pair {:?} missing", key);
        let s = s.unwrap();
        prop_assert_eq!(s.n, *n, "n of {:?}", key);
        prop_assert!(
            close(s.dot, *dot) && close(s.norm_a, *sa) && close(s.norm_b, *sb),
            "{:?}: stored {:?}, expected {:?}",
            key,
            s,
            (n, dot, sa, sb)
        );
    }
    let stored_co: HashMap<(String, String), i64> = store
        .all_purchase_pairs()
        .unwrap()
        .into_iter()
        .map(|((a, b), c)| {
            (
                (store.item_name(a).to_string(), store.item_name(b).to_string()),
                c,
            )
        })
        .collect();
    prop_assert_eq!(stored_co, expected_co);
    let buyers = users
        .values()
        .filter(|u| !active_purchases(u, cut).is_empty())
        .count() as i64;
    prop_assert_eq!(store.progress().buyers, buyers);
    Ok(())
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

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
}
