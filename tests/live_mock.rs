//! What the real broker of tests/live_service.rs cannot show: tombstones (tansu does not
//! return records without a value) and a broker that goes down and up on command. Both on
//! librdkafka's in-process mock cluster, with `simtide run` as a separate process that
//! connects to it over 127.0.0.1.

mod common;

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

#[test]
fn readiness_follows_the_broker_down_and_up() {
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
    assert!(service.running());
    mock.broker_up(1).unwrap();
    wait_for("ready with the broker up", Duration::from_secs(60), || {
        service.get("/readyz").is_some_and(|(s, _)| s == 200)
    });
    let log_path = service.log.clone();
    let (status, _) = service.terminate(Duration::from_secs(30));
    assert!(status.success());
    // librdkafka reports a down broker many times a second; the log holds a bounded
    // number of warnings (one per kind per 10 s, plus the two transitions).
    let log = std::fs::read_to_string(log_path).unwrap();
    let warnings = log.lines().filter(|l| l.contains("WARN")).count();
    assert!(warnings <= 12, "{warnings} warnings in the log:\n{log}");
    assert!(log.contains("brokers unreachable"), "{log}");
    assert!(log.contains("brokers reachable again"), "{log}");
}
