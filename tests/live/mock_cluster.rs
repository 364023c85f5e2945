//! What the real broker of tests/live/service.rs cannot show: tombstones (tansu does not
//! return records without a value) and a broker that goes down and up on command. Both on
//! librdkafka's in-process mock cluster, with `simtide run` as a separate process that
//! connects to it over 127.0.0.1.

use crate::common;

use std::time::Duration;

use common::live::{
    mock_with_topics, produce, rating, read_all, unrating, wait_for, write_config, LiveSettings, Service,
    INPUT, OUTPUT,
};

/// The list of `item` on the output topic, in order of appearance: `Some(first neighbor)`
/// for a list, `None` for a tombstone.
fn history_of(brokers: &str, item: &str) -> Vec<Option<String>> {
    read_all(brokers, OUTPUT)
        .into_iter()
        .filter(|r| r.key == item)
        .map(|r| {
            r.value.map(|v| {
                let rec: serde_json::Value = serde_json::from_slice(&v).unwrap();
                rec["neighbors"][0]["item"].as_str().unwrap().to_string()
            })
        })
        .collect()
}

#[test]
fn a_list_that_empties_is_replaced_by_a_tombstone() {
    let work = tempfile::tempdir().unwrap();
    let mock = mock_with_topics();
    let brokers = mock.bootstrap_servers();
    // Two users who rate rake and hoe alike and trowel apart: rake's only positive
    // neighbor is hoe (adjusted cosine 1), trowel's scores are negative (not published).
    let first = [
        rating("ana", "rake", 5, 100),
        rating("ana", "hoe", 5, 101),
        rating("ana", "trowel", 1, 102),
        rating("ben", "rake", 4, 103),
        rating("ben", "hoe", 4, 104),
        rating("ben", "trowel", 2, 105),
    ];
    produce(&brokers, INPUT, &first);
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    let service = Service::start(&config, port, &[]);
    wait_for("rake's list", Duration::from_secs(60), || {
        history_of(&brokers, "rake").last() == Some(&Some("hoe".to_string()))
    });
    // Withdrawing both hoe ratings leaves rake without a publishable neighbor.
    produce(
        &brokers,
        INPUT,
        &[unrating("ana", "hoe", 200), unrating("ben", "hoe", 201)],
    );
    wait_for("rake's tombstone", Duration::from_secs(60), || {
        history_of(&brokers, "rake").last() == Some(&None)
    });
    assert_eq!(
        history_of(&brokers, "hoe").last(),
        Some(&None),
        "hoe has no pairs left"
    );
    let (status, _) = service.terminate(Duration::from_secs(30));
    assert!(status.success());
}

/// The kind of a JSON log line: its target and, for librdkafka's lines, the facility
/// (their text varies), otherwise the message.
fn line_kind(line: &serde_json::Value) -> String {
    let fields = &line["fields"];
    let what = fields["facility"]
        .as_str()
        .or_else(|| fields["message"].as_str())
        .unwrap_or("?");
    format!("{} {what}", line["target"].as_str().unwrap_or("?"))
}

#[test]
fn readiness_follows_the_broker_down_and_up_and_the_log_stays_short() {
    let work = tempfile::tempdir().unwrap();
    let mock = mock_with_topics();
    let brokers = mock.bootstrap_servers();
    produce(
        &brokers,
        INPUT,
        &[rating("ana", "rake", 5, 100), rating("ana", "hoe", 4, 101)],
    );
    let store = work.path().join("store");
    let (config, port) = write_config(work.path(), &brokers, &store, &LiveSettings::default());
    let text = std::fs::read_to_string(&config).unwrap() + "[log]\nformat = \"json\"\n";
    std::fs::write(&config, text).unwrap();
    let mut service = Service::start(&config, port, &[]);
    wait_for("ready", Duration::from_secs(60), || {
        service.get("/readyz").is_some_and(|(s, _)| s == 200)
    });
    mock.broker_down(1).unwrap();
    wait_for("not ready with the broker down", Duration::from_secs(60), || {
        service
            .get("/readyz")
            .is_some_and(|(s, b)| s == 503 && b.contains(r#""name":"broker","ok":false"#))
    });
    // 30 s of outage: long enough for every repeating warning to repeat many times.
    std::thread::sleep(Duration::from_secs(30));
    assert!(service.running());
    mock.broker_up(1).unwrap();
    wait_for("ready with the broker up", Duration::from_secs(60), || {
        service.get("/readyz").is_some_and(|(s, _)| s == 200)
    });
    let log_path = service.log.clone();
    let (status, _) = service.terminate(Duration::from_secs(30));
    assert!(status.success());
    // librdkafka and the consume loop report a down broker many times a second (215
    // "consume error" lines in 11 s before they were limited); every kind of warning is
    // written at most once per 10 s with the count held back, so 30-odd seconds of outage
    // leave a handful of lines per kind.
    let log = std::fs::read_to_string(log_path).unwrap();
    let mut per_kind: std::collections::BTreeMap<String, usize> = Default::default();
    let mut held_back = 0u64;
    for line in log
        .lines()
        .filter_map(|l| serde_json::from_str::<serde_json::Value>(l).ok())
    {
        if matches!(line["level"].as_str(), Some("WARN" | "ERROR")) {
            *per_kind.entry(line_kind(&line)).or_default() += 1;
            held_back += line["fields"]["suppressed"].as_u64().unwrap_or(0);
        }
    }
    eprintln!("warning lines per kind: {per_kind:#?}; lines held back: {held_back}");
    assert!(!per_kind.is_empty(), "the outage left no warning at all:\n{log}");
    for (kind, n) in &per_kind {
        assert!(*n <= 6, "{n} lines of {kind} in the log:\n{log}");
    }
    assert!(
        held_back > 0,
        "nothing was held back: the limit was never exercised"
    );
    assert!(log.contains("brokers unreachable"), "{log}");
    assert!(log.contains("brokers reachable again"), "{log}");
}
