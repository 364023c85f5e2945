//! A stored position the input topic no longer holds: refused until an operator picks a
//! policy, then resumed where the policy says with the skipped offsets counted (a
//! replaced topic on tansu; retention behind the log start on the mock cluster).

use super::*;

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
