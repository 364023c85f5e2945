//! A dead letter the broker can never take is recorded in the rejects file and counted,
//! and the partition moves on.

use super::*;

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
