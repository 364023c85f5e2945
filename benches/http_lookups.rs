//! HTTP lookup benchmark: `GET /v1/lists/{item}`, then `GET
//! /v1/users/{user}/recommendations`, from 8 and then 64 concurrent clients while `simtide
//! run` consumes the MovieLens snapshot from a real broker (tansu 0.6.0 on 127.0.0.1), and
//! again on the idle service. Prints requests/s, p50 and p99 latency per phase, and the
//! service's resident memory and open files before and after, against the targets:
//! ≥ 2,000 requests/s at 8 clients, p99 < 50 ms, RSS growth < 50 MB. Bounded: each phase
//! runs a fixed time, only against 127.0.0.1.
//!
//! Run with `cargo bench --bench http_lookups` (part of `make bench`).

// A benchmark uses a few of the integration tests' helpers; the rest are theirs.
#[allow(dead_code)]
#[path = "../tests/common/mod.rs"]
mod common;

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use common::live::{
    broker_with_topics, caught_up, http_get, produce, unstamped_events, wait_for, write_config, LiveSettings,
    Service, INPUT,
};

/// How long each phase sends requests.
const PHASE: Duration = Duration::from_secs(10);

/// Resident memory (MiB) and open files of a process, from /proc.
fn footprint(pid: u32) -> (f64, usize) {
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap_or_default();
    let rss_kib: f64 = status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.split_whitespace().next())
        .and_then(|v| v.parse().ok())
        .unwrap_or(0.0);
    let files = std::fs::read_dir(format!("/proc/{pid}/fd")).map_or(0, |d| d.count());
    (rss_kib / 1024.0, files)
}

/// Runs `clients` threads that each request `paths` in turn for [`PHASE`]; returns
/// (requests answered, failures, sorted latencies in ms).
fn phase(port: u16, clients: usize, paths: &Arc<Vec<String>>) -> (usize, usize, Vec<f64>) {
    let stop = Arc::new(AtomicBool::new(false));
    let handles: Vec<_> = (0..clients)
        .map(|c| {
            let (stop, paths) = (stop.clone(), paths.clone());
            std::thread::spawn(move || {
                let (mut latencies, mut failures, mut i) = (Vec::new(), 0usize, c * 7919);
                while !stop.load(Ordering::Relaxed) {
                    let path = &paths[i % paths.len()];
                    i += 1;
                    let t = Instant::now();
                    match http_get(port, path) {
                        Some((200 | 404, _)) => latencies.push(t.elapsed().as_secs_f64() * 1e3),
                        _ => failures += 1,
                    }
                }
                (latencies, failures)
            })
        })
        .collect();
    std::thread::sleep(PHASE);
    stop.store(true, Ordering::Relaxed);
    let (mut all, mut failures) = (Vec::new(), 0);
    for h in handles {
        let (l, f) = h.join().unwrap();
        all.extend(l);
        failures += f;
    }
    all.sort_by(f64::total_cmp);
    (all.len(), failures, all)
}

fn quantile(sorted: &[f64], q: f64) -> f64 {
    sorted
        .get(((sorted.len() as f64 - 1.0) * q).round() as usize)
        .copied()
        .unwrap_or(f64::NAN)
}

/// What a phase asks for: list lookups by item, or recommendations by user.
struct Requests {
    lists: Arc<Vec<String>>,
    recommendations: Arc<Vec<String>>,
}

/// Runs one phase of `kind` and prints its line.
fn report_phase(port: u16, clients: usize, kind: &str, paths: &Arc<Vec<String>>) {
    let (answered, failures, latencies) = phase(port, clients, paths);
    let rate = answered as f64 / PHASE.as_secs_f64();
    let (p50, p99) = (quantile(&latencies, 0.5), quantile(&latencies, 0.99));
    println!(
        "{kind:<16} {clients:>2} clients: {rate:.0} requests/s (target ≥ 2000: {:.2}×), p50 {p50:.1} ms, p99 {p99:.1} ms (target < 50 ms: {:.2}×), {failures} failures",
        rate / 2000.0,
        p99 / 50.0
    );
}

/// One service consuming the snapshot from a fresh broker. With `clients`, each phase
/// sends lookups, then recommendation requests, from that many clients; without, the
/// service is only watched for the same time (the control run: what consumption alone
/// does to memory). Returns the RSS (MiB) and open files at the first lists and at the
/// end.
fn run(
    events: &[(String, String, Option<i64>)],
    requests: &Requests,
    clients: &[usize],
) -> ((f64, usize), (f64, usize)) {
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    produce(&broker.bootstrap(), INPUT, events);
    let (config, port) = write_config(
        work.path(),
        &broker.bootstrap(),
        &work.path().join("store"),
        &LiveSettings {
            tolerance: 0.05,
            min_common_users: 3,
            max_items_per_user: 500,
            publish_interval: "1s",
            batch_events: 5000,
            ..LiveSettings::default()
        },
    );
    let service = Service::start(&config, port, &[]);
    wait_for("the first lists", Duration::from_secs(120), || {
        requests
            .lists
            .iter()
            .take(200)
            .any(|p| http_get(port, p).is_some_and(|(s, _)| s == 200))
    });
    let start = footprint(service.child.id());
    if clients.is_empty() {
        std::thread::sleep(PHASE * 4);
    }
    for &n in clients {
        report_phase(port, n, "lists", &requests.lists);
        report_phase(port, n, "recommendations", &requests.recommendations);
    }
    let end = footprint(service.child.id());
    if !clients.is_empty() {
        // Requests alone: once everything is consumed, memory can only move because of them.
        wait_for("the service to catch up", Duration::from_secs(600), || {
            caught_up(&broker.bootstrap(), 3)
        });
        std::thread::sleep(Duration::from_secs(3));
        let before = footprint(service.child.id());
        report_phase(port, 8, "recommendations", &requests.recommendations);
        for (kind, paths) in [
            ("lists", &requests.lists),
            ("recommendations", &requests.recommendations),
        ] {
            let (answered, failures, _) = phase(port, 64, paths);
            println!(
                "idle service, {kind}, 64 clients: {:.0} requests/s, {failures} failures",
                answered as f64 / PHASE.as_secs_f64(),
            );
        }
        let after = footprint(service.child.id());
        println!(
            "idle phases: RSS {:.0} → {:.0} MiB ({:+.1} MiB, target < 50 MB), open files {} → {}",
            before.0,
            after.0,
            after.0 - before.0,
            before.1,
            after.1
        );
    }
    let (status, _) = service.terminate(Duration::from_secs(60));
    assert!(status.success());
    (start, end)
}

fn main() {
    let events: Vec<(String, String, Option<i64>)> =
        unstamped_events(&common::movielens_csv(), common::MOVIELENS_RATINGS as usize);
    let field = |name: &str| -> Vec<String> {
        let mut v: Vec<String> = events
            .iter()
            .filter_map(|(_, v, _)| {
                let e: serde_json::Value = serde_json::from_str(v).ok()?;
                e[name].as_str().map(str::to_string)
            })
            .collect();
        v.sort();
        v.dedup();
        v
    };
    let (items, users) = (field("item"), field("user"));
    println!(
        "simtide HTTP lookups while consuming the MovieLens snapshot ({} events, {} items, {} users), tansu 0.6.0 on 127.0.0.1",
        events.len(),
        items.len(),
        users.len()
    );
    let requests = Requests {
        lists: Arc::new(items.iter().map(|i| format!("/v1/lists/{i}")).collect()),
        recommendations: Arc::new(
            users
                .iter()
                .map(|u| format!("/v1/users/{u}/recommendations"))
                .collect(),
        ),
    };
    let (start, end) = run(&events, &requests, &[8, 64]);
    println!(
        "with lookups: RSS {:.0} → {:.0} MiB ({:+.0}), open files {} → {}",
        start.0,
        end.0,
        end.0 - start.0,
        start.1,
        end.1
    );
    let (c_start, c_end) = run(&events, &requests, &[]);
    println!(
        "control run, same consumption without lookups: RSS {:.0} → {:.0} MiB ({:+.0}), open files {} → {}",
        c_start.0,
        c_end.0,
        c_end.0 - c_start.0,
        c_start.1,
        c_end.1
    );
    println!(
        "while consuming, RSS at the end with lookups minus without: {:+.0} MiB (consumption progress differs between the runs, so this is a rough reading; the idle phase above isolates the lookups)",
        end.0 - c_end.0
    );
}
