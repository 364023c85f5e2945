//! A loop stuck retrying turns `/healthz` to 503, and back once it moves.

use super::*;

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
