//! Nothing lost, skipped or wedged without a word, on the real broker (tansu 0.6.0, sqlite
//! storage, started per test on a free 127.0.0.1 port): a stored position the replaced
//! input topic no longer holds is refused until an operator picks a policy, and each
//! policy resumes where it says with the skipped offsets counted; a dead letter the
//! broker can never take is recorded and the partition moves on; a loop stuck retrying
//! turns `/healthz` to 503; an event dated centuries ahead is dead-lettered, not applied.
//!
//! The events are invented (users `u…`, garden items), a few hundred per test, so each
//! test runs in seconds beyond the broker's start.

use crate::common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use common::broker::Broker;
use common::live::{
    http_get, produce, read_all, sample, wait_for, write_config, LiveSettings, Service, DEAD_LETTER, INPUT,
    OUTPUT, PURCHASE_OUTPUT,
};
use simtide::store::Store;

/// Longest wait for the service to reach a state it should reach within seconds.
const SOON: Duration = Duration::from_secs(60);

/// A broker with a one-partition input topic and the written topics.
fn broker_with_one_partition(dead_letter_topic: bool) -> Broker {
    let broker = Broker::start();
    broker.create_topic(INPUT, 1, false);
    broker.create_topic(OUTPUT, 1, true);
    broker.create_topic(PURCHASE_OUTPUT, 1, true);
    if dead_letter_topic {
        broker.create_topic(DEAD_LETTER, 1, false);
    }
    broker
}

/// `n` invented ratings by users with `prefix`, dated in 2026 (before the clock).
fn ratings(prefix: &str, n: usize) -> Vec<(String, String, Option<i64>)> {
    const ITEMS: [&str; 6] = ["rake", "hoe", "trowel", "shears", "seed-tray", "twine"];
    (0..n)
        .map(|i| {
            let user = format!("{prefix}{}", i / 5);
            let value = 1 + (i * 7 % 5);
            let at = 1_767_225_600 + i as i64 * 60;
            let event = format!(
                r#"{{"kind":"rating","user":"{user}","item":"{}","value":{value},"at":{at}}}"#,
                ITEMS[i % ITEMS.len()]
            );
            (user, event, None)
        })
        .collect()
}

/// The sum of `simtide_events_total` over every kind and outcome, from a scrape.
fn events_total(metrics: &str) -> f64 {
    metrics
        .lines()
        .filter(|l| l.starts_with("simtide_events_total{"))
        .filter_map(|l| l.rsplit_once(' ')?.1.parse::<f64>().ok())
        .sum()
}

/// One scrape of the service's metrics (empty when it does not answer).
fn scrape(service: &Service) -> String {
    service.get("/metrics").map(|(_, m)| m).unwrap_or_default()
}

/// The input topic's next offsets as the store at `dir` holds them.
fn stored_offsets(dir: &Path) -> BTreeMap<i32, i64> {
    let store = Store::open_as_stored(dir).unwrap();
    store.ledger().offsets.get(INPUT).cloned().unwrap_or_default()
}

/// Copies a closed store directory (RocksDB files and all) to a new one.
fn copy_store(from: &Path, to: &Path) {
    let status = Command::new("cp").arg("-a").arg(from).arg(to).status().unwrap();
    assert!(status.success());
}

/// A store that consumed `events` from the input topic, built by `backfill --from-topic`.
fn backfilled_store(work: &Path, config: &Path) -> PathBuf {
    let store = work.join("consumed");
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--from-topic", "--quiet", "--config"])
        .arg(config)
        .arg("--store")
        .arg(&store)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    store
}

/// Starts the service on a copy of `store` with `policy` (None: the default).
fn service_on_copy(
    work: &Path,
    store: &Path,
    name: &str,
    config: &Path,
    port: u16,
    policy: Option<&str>,
) -> (Service, PathBuf) {
    let copy = work.join(name);
    copy_store(store, &copy);
    let store_env = copy.display().to_string();
    // A group of its own: the store holds the positions, and a new member of the last
    // run's group could wait for that member's session to expire on the mock cluster.
    let group = format!("simtide-test-{name}");
    let mut env = vec![
        ("SIMTIDE_STORE__DIR", store_env.as_str()),
        ("SIMTIDE_KAFKA__GROUP", group.as_str()),
    ];
    if let Some(policy) = policy {
        env.push(("SIMTIDE_KAFKA__POSITION_OUTSIDE_LOG", policy));
    }
    (Service::start_with_env(config, port, &[], &env), copy)
}

#[test]
fn a_replaced_input_topic_is_refused_until_a_policy_says_where_to_resume() {
    let broker = broker_with_one_partition(true);
    let work = tempfile::tempdir().unwrap();
    let (config, port) = write_config(
        work.path(),
        &broker.bootstrap(),
        &work.path().join("unused"),
        &LiveSettings::default(),
    );
    produce(&broker.bootstrap(), INPUT, &ratings("u", 300));
    let consumed = backfilled_store(work.path(), &config);
    assert_eq!(stored_offsets(&consumed), BTreeMap::from([(0, 300)]));

    // The topic is replaced under the stopped service: 100 other events, offsets 0..100.
    // tansu 0.6.0 drops every topic on a DeleteTopics request (seen here: the listing is
    // empty after deleting the input topic alone), so the written topics, still empty,
    // are created again beside the new input topic.
    broker.delete_topic(INPUT);
    assert!(
        broker.topics().iter().all(|t| t != INPUT),
        "the input topic is gone"
    );
    broker.create_topic(INPUT, 1, false);
    for (topic, compacted) in [(OUTPUT, true), (PURCHASE_OUTPUT, true), (DEAD_LETTER, false)] {
        if !broker.topics().iter().any(|t| t == topic) {
            broker.create_topic(topic, 1, compacted);
        }
    }
    produce(&broker.bootstrap(), INPUT, &ratings("v", 100));

    // Default: refused, named on /readyz and in the metrics; nothing applied or moved.
    let (service, refused) = service_on_copy(work.path(), &consumed, "refused", &config, port, None);
    wait_for("/readyz to name the refused partition", SOON, || {
        service.get("/readyz").is_some_and(|(s, b)| {
            s == 503
                && b.contains(r#""name":"positions","ok":false"#)
                && b.contains("partition 0: the stored next offset 300 is outside the retained log [0, 100)")
                && b.contains("past the log end")
        })
    });
    let metrics = scrape(&service);
    assert_eq!(sample(&metrics, "simtide_input_partitions_refused"), Some(1.0));
    std::thread::sleep(Duration::from_secs(3));
    let metrics = scrape(&service);
    assert_eq!(events_total(&metrics), 0.0, "nothing of the new log applied");
    assert_eq!(sample(&metrics, "simtide_input_offsets_skipped_total"), Some(0.0));
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    assert_eq!(stored_offsets(&refused), BTreeMap::from([(0, 300)]), "no skip");

    // resume_at_log_start: the whole new log is applied, nothing skipped.
    let (service, from_start) = service_on_copy(
        work.path(),
        &consumed,
        "from-start",
        &config,
        port,
        Some("resume_at_log_start"),
    );
    wait_for("the 100 new events to be applied", SOON, || {
        events_total(&scrape(&service)) == 100.0
    });
    wait_for("readiness", SOON, || {
        service.get("/readyz").is_some_and(|(s, _)| s == 200)
    });
    assert_eq!(
        sample(&scrape(&service), "simtide_input_offsets_skipped_total"),
        Some(0.0)
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    assert_eq!(stored_offsets(&from_start), BTreeMap::from([(0, 100)]));

    // resume_at_log_end: the 100 offsets are skipped and counted; later events applied.
    let (service, from_end) = service_on_copy(
        work.path(),
        &consumed,
        "from-end",
        &config,
        port,
        Some("resume_at_log_end"),
    );
    wait_for("the skip to be counted", SOON, || {
        sample(&scrape(&service), "simtide_input_offsets_skipped_total") == Some(100.0)
    });
    assert!(
        service
            .log_text()
            .matches("resuming by kafka.position_outside_log")
            .count()
            == 1,
        "logged once:\n{}",
        service.log_text()
    );
    produce(&broker.bootstrap(), INPUT, &ratings("w", 10));
    wait_for("the 10 later events to be applied", SOON, || {
        events_total(&scrape(&service)) == 10.0
    });
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    assert_eq!(stored_offsets(&from_end), BTreeMap::from([(0, 110)]));

    // backfill --from-topic follows the same rule: refused by default, store unchanged.
    let again = work.path().join("backfill-refused");
    copy_store(&consumed, &again);
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--from-topic", "--quiet", "--config"])
        .arg(&config)
        .arg("--store")
        .arg(&again)
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success(), "{stderr}");
    assert!(
        stderr.contains("partition 0: the stored next offset 300") && stderr.contains("Nothing was applied"),
        "{stderr}"
    );
    assert_eq!(stored_offsets(&again), BTreeMap::from([(0, 300)]));
}

/// The store's rejects file, one JSON value per line.
fn rejects_lines(store: &Path) -> Vec<serde_json::Value> {
    std::fs::read_to_string(store.join("rejects.jsonl"))
        .unwrap_or_default()
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

/// Produces raw values (no key) allowing messages up to 4 MB.
fn produce_large(brokers: &str, values: &[Vec<u8>]) {
    use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
    let producer: ThreadedProducer<DefaultProducerContext> = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("message.max.bytes", "4000000")
        .create()
        .expect("producer");
    for value in values {
        producer
            .send(
                BaseRecord::<[u8], [u8]>::to(INPUT)
                    .key(&b"u1"[..])
                    .payload(&value[..]),
            )
            .map_err(|(e, _)| e)
            .unwrap();
    }
    producer.flush(Duration::from_secs(60)).unwrap();
}

#[test]
fn poison_that_cannot_be_dead_lettered_is_recorded_and_the_partition_moves_on() {
    let broker = broker_with_one_partition(true);
    let work = tempfile::tempdir().unwrap();
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &broker.bootstrap(), &store, &LiveSettings::default());
    let event = |item: &str| {
        format!(r#"{{"kind":"rating","user":"u1","item":"{item}","value":4,"at":"2026-03-01T10:00:00Z"}}"#)
            .into_bytes()
    };
    // Offset 0: 1,040,000 bytes of garbage, under the 1 MiB input limit, so it is refused
    // as bad JSON and its dead letter (payload plus headers) is over the producer's
    // 1,000,000-byte limit: refused for good. Offset 2: 1,200,000 bytes, over the input
    // limit: dead-lettered as a description.
    produce_large(
        &broker.bootstrap(),
        &[
            vec![b'x'; 1_040_000],
            event("rake"),
            vec![b'y'; 1_200_000],
            event("hoe"),
        ],
    );
    let service = Service::start(&config, port, &[]);
    wait_for("both valid events to be applied", SOON, || {
        events_total(&scrape(&service)) == 2.0
    });
    let metrics = scrape(&service);
    assert_eq!(
        sample(&metrics, "simtide_dead_letters_undeliverable_total"),
        Some(1.0)
    );
    assert_eq!(
        sample(&metrics, r#"simtide_rejected_events_total{reason="too_large"}"#),
        Some(1.0)
    );
    assert_eq!(
        sample(&metrics, r#"simtide_dead_letters_total{reason="too_large"}"#),
        Some(1.0)
    );
    assert_eq!(
        sample(&metrics, r#"simtide_dead_letters_total{reason="bad_json"}"#),
        Some(0.0)
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());

    let rejects = rejects_lines(&store);
    assert_eq!(rejects.len(), 1, "{rejects:?}");
    assert_eq!(rejects[0]["offset"], 0);
    assert_eq!(rejects[0]["reason"], "bad_json");
    assert!(
        rejects[0]["dead_letter_refused"]
            .as_str()
            .unwrap()
            .contains("too large"),
        "{rejects:?}"
    );
    assert!(
        !rejects[0].to_string().contains("xxxx"),
        "no payload in the rejects file"
    );

    let letters = read_all(&broker.bootstrap(), DEAD_LETTER);
    assert_eq!(letters.len(), 1);
    assert_eq!(letters[0].headers["simtide-reject-reason"], "too_large");
    let described: serde_json::Value = serde_json::from_slice(letters[0].value.as_deref().unwrap()).unwrap();
    assert_eq!(described["offset"], 2);
    assert!(
        described["detail"].as_str().unwrap().contains("1200002 bytes"),
        "{described}"
    );
    assert_eq!(stored_offsets(&store), BTreeMap::from([(0, 4)]));
}

#[test]
fn a_loop_held_by_a_retry_turns_healthz_to_503_and_back() {
    // No dead-letter topic and none created: the malformed message's dead letter is
    // retried (a missing topic may yet appear), which holds the loop.
    let broker = broker_with_one_partition(false);
    let work = tempfile::tempdir().unwrap();
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &broker.bootstrap(), &store, &LiveSettings::default());
    let text = std::fs::read_to_string(&config)
        .unwrap()
        .replace("[live]\n", "[live]\nstall_limit = \"3s\"\n");
    std::fs::write(&config, text).unwrap();
    let service = Service::start(&config, port, &[]);
    wait_for("alive while idle", SOON, || {
        http_get(port, "/healthz").is_some_and(|(s, _)| s == 200)
    });
    produce(
        &broker.bootstrap(),
        INPUT,
        &[("u1".into(), "{not json".into(), None)],
    );
    wait_for("/healthz to fail naming the stall", SOON, || {
        http_get(port, "/healthz").is_some_and(|(s, b)| {
            s == 503 && b.contains(r#""error":"stalled""#) && b.contains("live.stall_limit = 3s")
        })
    });
    broker.create_topic(DEAD_LETTER, 1, false);
    wait_for("/healthz to recover once the retry succeeds", SOON, || {
        http_get(port, "/healthz").is_some_and(|(s, _)| s == 200)
    });
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    assert_eq!(read_all(&broker.bootstrap(), DEAD_LETTER).len(), 1);
}

#[test]
fn an_event_dated_2261_is_dead_lettered_and_the_users_later_events_applied() {
    let broker = broker_with_one_partition(true);
    let work = tempfile::tempdir().unwrap();
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &broker.bootstrap(), &store, &LiveSettings::default());
    let record = |json: &str| ("u1".to_string(), json.to_string(), None);
    produce(
        &broker.bootstrap(),
        INPUT,
        &[
            record(r#"{"kind":"rating","user":"u1","item":"rake","value":5,"at":"2261-01-01T00:00:00Z"}"#),
            record(r#"{"kind":"erase_user","user":"u1","at":"2261-01-01T00:00:00Z"}"#),
            record(r#"{"kind":"rating","user":"u1","item":"rake","value":2,"at":"2026-03-01T10:00:00Z"}"#),
            record(r#"{"kind":"rating","user":"u1","item":"hoe","value":4,"at":"2026-03-01T10:01:00Z"}"#),
        ],
    );
    let service = Service::start(&config, port, &[]);
    wait_for("the two ordinary events to be counted", SOON, || {
        events_total(&scrape(&service)) == 2.0
    });
    let metrics = scrape(&service);
    assert_eq!(
        sample(
            &metrics,
            r#"simtide_events_total{kind="rating",outcome="applied"}"#
        ),
        Some(2.0),
        "applied, not stale behind a rating from 2261"
    );
    assert_eq!(
        sample(
            &metrics,
            r#"simtide_rejected_events_total{reason="too_far_ahead"}"#
        ),
        Some(2.0)
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    let letters = read_all(&broker.bootstrap(), DEAD_LETTER);
    assert_eq!(letters.len(), 2);
    for letter in &letters {
        assert_eq!(letter.headers["simtide-reject-reason"], "too_far_ahead");
        assert_eq!(letter.headers["simtide-reject-field"], "at");
    }
}

/// Writes `operand` as a merge operand of `key` in the store's `family`, as a foreign
/// writer or a damaged disk could leave it (RocksDB opened directly, simtide closed).
fn write_raw_operand(store: &Path, family: &str, key: &[u8], operand: &[u8]) {
    let path = store.join("db");
    let names = rocksdb::DB::list_cf(&rocksdb::Options::default(), &path).unwrap();
    let descriptors = names.iter().map(|name| {
        let mut options = rocksdb::Options::default();
        options
            .set_merge_operator_associative("test_raw_writer", |_, existing, _| existing.map(<[u8]>::to_vec));
        rocksdb::ColumnFamilyDescriptor::new(name, options)
    });
    let db = rocksdb::DB::open_cf_descriptors(&rocksdb::Options::default(), &path, descriptors).unwrap();
    db.merge_cf(db.cf_handle(family).unwrap(), key, operand).unwrap();
    db.flush_cf(db.cf_handle(family).unwrap()).unwrap();
}

#[test]
fn a_malformed_merge_operand_fails_reads_as_corruption_named_on_readyz() {
    let work = tempfile::tempdir().unwrap();
    let mock = common::live::mock_with_topics();
    let brokers = mock.bootstrap_servers();
    let rate = common::live::rating;
    produce(
        &brokers,
        INPUT,
        &[
            // ana and ben each rate rake and hoe alike and well above their own mean, so
            // the pair scores 1; trowel shares only ben.
            rate("ana", "rake", 5, 100),
            rate("ana", "hoe", 5, 101),
            rate("ana", "spade", 1, 102),
            rate("ben", "rake", 4, 103),
            rate("ben", "hoe", 4, 104),
            rate("ben", "trowel", 1, 105),
        ],
    );
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    // Two co-raters at least: rake and hoe have two, rake and trowel only ben.
    let service = Service::start_with_env(
        &config,
        port,
        &[],
        &[("SIMTIDE_SIMILARITY__MIN_COMMON_USERS", "2")],
    );
    wait_for("rake's list", SOON, || {
        service.get("/v1/lists/rake").is_some_and(|(s, _)| s == 200)
    });
    let (status, body) = service.get("/v1/pairs/rake/hoe").unwrap();
    assert_eq!(status, 200, "{body}");
    let (status, body) = service.get("/v1/pairs/rake/trowel").unwrap();
    assert_eq!(status, 404, "{body}");
    assert!(
        body.contains(r#""error":"below_support""#) && body.contains("1 co-rater") && !body.contains("dot"),
        "one co-rater's deviations stay hidden: {body}"
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    let key = {
        let s = Store::open_as_stored(&store).unwrap();
        simtide::store::codec::pair_row_key(s.item_id("rake").unwrap(), s.item_id("hoe").unwrap())
    };
    write_raw_operand(&store, "pairs", &key, b"\xff");
    let hex: String = key.iter().map(|b| format!("{b:02x}")).collect();

    let service = Service::start(&config, port, &[]);
    wait_for("the pair lookup to fail", SOON, || {
        service.get("/v1/pairs/rake/hoe").is_some_and(|(s, _)| s >= 500)
    });
    let (status, body) = service.get("/readyz").unwrap();
    assert_eq!(status, 503, "{body}");
    assert!(
        body.contains("corruption") && body.contains(&format!("column family pairs, key {hex}")),
        "{body}"
    );
    assert!(service.log_text().contains(&hex), "the error log names the key");
    drop(service);

    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["explain", "--store"])
        .arg(&store)
        .args(["rake", "hoe"])
        .output()
        .unwrap();
    assert!(
        !out.status.success(),
        "a read over the operand fails, never a wrong sum"
    );
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(
        stderr.contains("Corruption") || stderr.contains("corruption"),
        "{stderr}"
    );
}

#[test]
fn a_position_behind_the_log_start_is_refused_then_resumed_with_the_loss_counted() {
    // librdkafka's mock cluster drops a partition's oldest message sets once its log holds
    // more than 5 MiB (its built-in retention; tansu 0.6.0 has none to trigger and drops
    // its connection on DeleteRecords), so retention can run while the service is down.
    let work = tempfile::tempdir().unwrap();
    let mock = common::live::mock_with_topics();
    let brokers = mock.bootstrap_servers();
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    produce(&brokers, INPUT, &ratings("u", 60));
    let service = Service::start(&config, port, &["--stop-at-end"]);
    let (status, _) = service.wait_exit(SOON);
    assert!(status.success());
    let consumed = stored_offsets(&store);
    assert_eq!(consumed.values().sum::<i64>(), 60);

    // While it is down: about 7 MB more on each partition, so the first events are removed.
    let padding = "p".repeat(4000);
    let heavy: Vec<_> = ratings("w", 5_400)
        .into_iter()
        .map(|(k, v, t)| {
            (
                k,
                v.replace("\"kind\"", &format!("\"note\":\"{padding}\",\"kind\"")),
                t,
            )
        })
        .collect();
    produce(&brokers, INPUT, &heavy);

    let (service, refused) = service_on_copy(work.path(), &store, "refused", &config, port, None);
    wait_for("/readyz to name a partition behind its log start", SOON, || {
        service.get("/readyz").is_some_and(|(s, b)| {
            s == 503 && b.contains(r#""name":"positions","ok":false"#) && b.contains("behind the log start")
        })
    });
    std::thread::sleep(Duration::from_secs(2));
    let metrics = scrape(&service);
    assert_eq!(
        sample(&metrics, "simtide_input_partitions_refused"),
        Some(consumed.len() as f64)
    );
    assert_eq!(events_total(&metrics), 0.0, "nothing applied past the gap");
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    assert_eq!(
        stored_offsets(&refused),
        consumed,
        "a refused partition's position never moves"
    );

    let marks = watermarks(&brokers, consumed.keys().copied());
    let behind = |p: &i32| consumed[p] < marks[p].0;
    assert!(
        consumed.keys().all(behind),
        "retention passed every stored position: {consumed:?} {marks:?}"
    );
    let lost: i64 = consumed.iter().map(|(p, &at)| marks[p].0 - at).sum();
    let retained: i64 = marks.values().map(|(low, high)| high - low).sum();

    let (service, resumed) = service_on_copy(
        work.path(),
        &store,
        "resumed",
        &config,
        port,
        Some("resume_at_log_start"),
    );
    wait_for("what the log still holds to be applied", SOON, || {
        events_total(&scrape(&service)) == retained as f64
    });
    assert_eq!(
        sample(&scrape(&service), "simtide_input_offsets_skipped_total"),
        Some(lost as f64),
        "every offset removed before it was applied is counted"
    );
    let (status, _) = service.terminate(SOON);
    assert!(status.success());
    let ends: BTreeMap<i32, i64> = marks.iter().map(|(&p, &(_, high))| (p, high)).collect();
    assert_eq!(stored_offsets(&resumed), ends);
}

/// (first retained offset, next offset) of each input partition.
fn watermarks(brokers: &str, partitions: impl Iterator<Item = i32>) -> BTreeMap<i32, (i64, i64)> {
    let client: rdkafka::consumer::BaseConsumer = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .create()
        .unwrap();
    partitions
        .map(|p| {
            let marks =
                rdkafka::consumer::Consumer::fetch_watermarks(&client, INPUT, p, Duration::from_secs(10));
            (p, marks.unwrap())
        })
        .collect()
}

/// Whether any file under `dir` (recursively) holds `needle`, skipping files whose name
/// starts with a prefix in `skip`; returns the files that do.
fn files_holding(dir: &Path, needle: &[u8], skip: &[&str]) -> Vec<PathBuf> {
    let mut found = Vec::new();
    for entry in std::fs::read_dir(dir).unwrap() {
        let path = entry.unwrap().path();
        let name = path.file_name().unwrap().to_string_lossy().to_string();
        if skip.iter().any(|s| name.starts_with(s)) {
            continue;
        }
        if path.is_dir() {
            found.extend(files_holding(&path, needle, skip));
        } else if std::fs::read(&path)
            .unwrap()
            .windows(needle.len())
            .any(|w| w == needle)
        {
            found.push(path);
        }
    }
    found
}

/// The closed store at `dir` opened directly, read only, every merge operand kept: a
/// family's merge concatenates the value and its operands, so a scan sees every byte.
fn open_raw(dir: &Path) -> (rocksdb::DB, Vec<String>) {
    use rocksdb::{MergeOperands, Options, DB};
    fn concatenate(_: &[u8], existing: Option<&[u8]>, operands: &MergeOperands) -> Option<Vec<u8>> {
        Some(existing.into_iter().chain(operands).flatten().copied().collect())
    }
    let path = dir.join("db");
    let families = DB::list_cf(&Options::default(), &path).unwrap();
    let descriptors = families.iter().map(|name| {
        let mut options = Options::default();
        options.set_merge_operator_associative("concatenate", concatenate);
        rocksdb::ColumnFamilyDescriptor::new(name, options)
    });
    let db = DB::open_cf_descriptors_read_only(&Options::default(), &path, descriptors, false).unwrap();
    (db, families)
}

/// Every key and value (merge operands included) of every column family of the closed
/// store at `dir` that holds `needle`, as "family: key".
fn entries_holding(dir: &Path, needle: &[u8]) -> Vec<String> {
    use rocksdb::IteratorMode;
    let (db, families) = open_raw(dir);
    let mut found = Vec::new();
    for family in &families {
        let cf = db.cf_handle(family).unwrap();
        for entry in db.iterator_cf(cf, IteratorMode::Start) {
            let (key, value) = entry.unwrap();
            if [&key[..], &value[..]]
                .iter()
                .any(|b| b.windows(needle.len()).any(|w| w == needle))
            {
                found.push(format!("{family}: {}", String::from_utf8_lossy(&key)));
            }
        }
    }
    found
}

/// docs/design.md, "Personal data": a user rated, snapshotted (so the user is in table
/// files, not only in memory) and erased leaves no trace in any column family, table file
/// or log of the live store: the search is first shown to find the name in the snapshot.
/// A later replay of one of the user's old ratings is stale and writes nothing of the user;
/// only the keyed tombstone says when the name was erased.
#[test]
fn an_erased_user_leaves_no_trace_in_the_store_files() {
    const NAME: &str = "hollis-greenwood-4471";
    const ERASED_AT: i64 = 1_767_400_000;
    let broker = broker_with_one_partition(true);
    let brokers = broker.bootstrap();
    let work = tempfile::tempdir().unwrap();
    let store = work.path().join("store");
    let snapshots = work.path().join("snapshots");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    let mut events = ratings("u", 60);
    for (i, item) in ["rake", "hoe", "trowel", "twine"].iter().enumerate() {
        events.push(common::live::rating(
            NAME,
            item,
            2 + i as u8,
            1_767_300_000 + i as u64,
        ));
    }
    produce(&brokers, INPUT, &events);
    let env = [
        ("SIMTIDE_HTTP__ADMIN_TOKEN", "erase-test-token"),
        ("SIMTIDE_STORE__SNAPSHOT_DIR", snapshots.to_str().unwrap()),
    ];
    let service = Service::start_with_env(&config, port, &[], &env);
    wait_for("the ratings written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let dense_id = Store::open_read_only(&store).unwrap().user_ids(&[NAME]).unwrap()[0]
        .expect("the user has an id before the erasure");
    let auth = [("Authorization", "Bearer erase-test-token")];
    let (status, body) = common::live::http_request(port, "POST", "/v1/admin/snapshot", &auth).unwrap();
    assert_eq!(status, 201, "{body}");

    let erase = format!(r#"{{"kind":"erase_user","user":"{NAME}","at":{ERASED_AT}}}"#);
    produce(&brokers, INPUT, &[(NAME.to_string(), erase, None)]);
    wait_for("the erasure written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let (status, body) = service.get(&format!("/v1/users/{NAME}/recommendations")).unwrap();
    assert_eq!(status, 404, "{body}");
    // A replay of an old rating: stale, behind the tombstone.
    produce(
        &brokers,
        INPUT,
        &[common::live::rating(NAME, "shears", 5, 1_767_300_100)],
    );
    wait_for("the replayed rating counted", SOON, || {
        sample(
            &scrape(&service),
            r#"simtide_events_total{kind="rating",outcome="stale"}"#,
        ) == Some(1.0)
    });
    wait_for("the replay written", SOON, || {
        common::live::caught_up(&brokers, 1)
    });
    let (status, report) = service.terminate(SOON);
    assert!(status.success(), "{report}");

    let name = NAME.as_bytes();
    assert!(
        !files_holding(&snapshots, name, &[]).is_empty(),
        "the search finds the name where it is (the snapshot taken before the erasure)"
    );
    assert_eq!(entries_holding(&store, name), Vec::<String>::new());
    assert_eq!(
        files_holding(&store, name, &["MANIFEST-"]),
        Vec::<PathBuf>::new(),
        "no table file, write-ahead log, log or rejects file holds the name"
    );
    {
        use rocksdb::IteratorMode;
        let (db, _) = open_raw(&store);
        let users = db.cf_handle("users").unwrap();
        assert_eq!(
            db.get_cf(users, dense_id.to_be_bytes()).unwrap(),
            None,
            "no history under the dense id"
        );
        let ids = db.cf_handle("ids").unwrap();
        let holding_id: Vec<_> = db
            .iterator_cf(ids, IteratorMode::Start)
            .map(|e| e.unwrap())
            .filter(|(k, v)| k[0] == b'u' && v[..] == dense_id.to_be_bytes())
            .collect();
        assert!(holding_id.is_empty(), "no user name maps to the dense id");
    }
    // The MANIFEST may name a deleted boundary key until it is rewritten, which the next
    // open does.
    drop(Store::open_as_stored(&store).unwrap());
    assert_eq!(files_holding(&store, name, &[]), Vec::<PathBuf>::new());
    let after = Store::open_read_only(&store).unwrap();
    assert_eq!(after.user_ids(&[NAME]).unwrap(), vec![None]);
    assert_eq!(
        after.erasure_times(&[NAME]).unwrap(),
        vec![Some(simtide::event::UnixNanos(ERASED_AT * 1_000_000_000))],
        "the tombstone keeps the erasure time"
    );
    assert_eq!(after.erasure_times(&["u0"]).unwrap(), vec![None]);
}
