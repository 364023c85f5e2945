//! An event dated centuries ahead is dead-lettered; the user's later events apply.

use super::*;

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
