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

mod corruption;
mod erasure;
mod future_times;
mod liveness;
mod poison;
mod positions;
