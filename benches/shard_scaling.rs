//! Item shards on this machine (docs/design.md, "Shards"): for 1, 2 and 3 shards, what
//! each shard costs, over the MovieLens snapshot at default settings.
//! 1. Backfill: each shard's store built from the file, one after the other (as separate
//!    machines would, in parallel): wall time, processor time, events/s, the pairs of the
//!    rows it owns and its bytes on disk.
//! 2. Live: the N shards started together with `simtide run --stop-at-end` over the same
//!    3-partition topic on the tansu broker: events/s per shard, from start to exit. On
//!    this 2-core machine the shards and the broker share the cores, so the aggregate is
//!    bounded by the machine, not by sharding; the per-event processor time is the figure
//!    that carries over to one shard per machine.
//! 3. A model fitted to the backfill figures: processor seconds of a shard = a × events +
//!    b × (pair updates touching its items), least squares over the six shard runs,
//!    printed with the shard count it implies for a few loads (README, "Item shards").
//!
//! Run by `make bench`.

// A benchmark uses a few of the integration tests' helpers; the rest are theirs.
#[allow(dead_code)]
#[path = "../tests/common/mod.rs"]
mod common;

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use common::live::{
    broker_with_topics, produce, unstamped_events, write_config, LiveSettings, Service, INPUT,
};

/// Processor seconds of the children reaped so far (user + system).
fn reaped_children_cpu_seconds() -> f64 {
    let mut usage = std::mem::MaybeUninit::<libc::rusage>::zeroed();
    // SAFETY: getrusage fills the struct it is given; RUSAGE_CHILDREN is a valid target.
    let usage = unsafe {
        libc::getrusage(libc::RUSAGE_CHILDREN, usage.as_mut_ptr());
        usage.assume_init()
    };
    let seconds = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 / 1e6;
    seconds(usage.ru_utime) + seconds(usage.ru_stime)
}

/// Bytes under `dir`.
fn bytes_under(dir: &Path) -> u64 {
    std::fs::read_dir(dir)
        .map(|entries| {
            entries
                .flatten()
                .map(|e| match e.file_type() {
                    Ok(t) if t.is_dir() => bytes_under(&e.path()),
                    _ => e.metadata().map_or(0, |m| m.len()),
                })
                .sum()
        })
        .unwrap_or(0)
}

/// One shard's backfill.
struct ShardRun {
    wall: f64,
    cpu: f64,
    /// Pairs in the rows it owns.
    pairs: f64,
    /// Pair updates it summed: those touching its items.
    updates: f64,
    disk: u64,
}

/// Backfills shard `shard` of `shards` from `input` into a fresh store under `work`.
fn backfill_shard(work: &Path, input: &Path, shards: u32, shard: u32) -> ShardRun {
    let config = work.join("defaults.toml");
    std::fs::write(&config, "[similarity]\nrating_min = 0.5\n").unwrap();
    let store = work.join(format!("store-{shards}-{shard}"));
    let cpu_before = reaped_children_cpu_seconds();
    let started = Instant::now();
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--store"])
        .arg(&store)
        .arg("--config")
        .arg(&config)
        .arg("--input")
        .arg(input)
        .env("SIMTIDE_CLUSTER__SHARDS", shards.to_string())
        .env("SIMTIDE_CLUSTER__SHARD", shard.to_string())
        .output()
        .unwrap();
    let wall = started.elapsed().as_secs_f64();
    let cpu = reaped_children_cpu_seconds() - cpu_before;
    let summary = String::from_utf8_lossy(&out.stdout).into_owned();
    assert!(
        out.status.success(),
        "{summary}{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let count = |label: &str| -> f64 {
        summary
            .lines()
            .find(|l| l.trim_start().starts_with(label))
            .and_then(|l| l.split_whitespace().nth(2))
            .and_then(|n| n.parse().ok())
            .unwrap_or_else(|| panic!("the summary has no {label:?} line:\n{summary}"))
    };
    ShardRun {
        wall,
        cpu,
        pairs: count("rating pairs"),
        updates: count("pair updates"),
        disk: bytes_under(&store.join("db")),
    }
}

/// Least squares of y = a·x1 + b·x2 (no intercept), both costs at least 0: when the free
/// fit gives one a negative value (noise), the other is fitted alone.
fn fit(points: &[(f64, f64, f64)]) -> (f64, f64) {
    let alone = |pick: fn(&(f64, f64, f64)) -> f64| {
        let (sxx, sxy) = points.iter().fold((0.0, 0.0), |(sxx, sxy), p| {
            (sxx + pick(p) * pick(p), sxy + pick(p) * p.2)
        });
        sxy / sxx
    };
    match free_fit(points) {
        (a, _) if a < 0.0 => (0.0, alone(|p| p.1)),
        (_, b) if b < 0.0 => (alone(|p| p.0), 0.0),
        both => both,
    }
}

/// Least squares of y = a·x1 + b·x2 (no intercept).
fn free_fit(points: &[(f64, f64, f64)]) -> (f64, f64) {
    let (mut s11, mut s12, mut s22, mut s1y, mut s2y) = (0.0, 0.0, 0.0, 0.0, 0.0);
    for &(x1, x2, y) in points {
        s11 += x1 * x1;
        s12 += x1 * x2;
        s22 += x2 * x2;
        s1y += x1 * y;
        s2y += x2 * y;
    }
    let det = s11 * s22 - s12 * s12;
    ((s1y * s22 - s2y * s12) / det, (s2y * s11 - s1y * s12) / det)
}

/// The share of all pairs' updates a shard of `shards` keeps: those touching its items.
fn kept_share(shards: u32) -> f64 {
    1.0 - (1.0 - 1.0 / f64::from(shards)).powi(2)
}

/// Returns the pair updates of the whole input and the bytes on disk per pair of a
/// single store.
fn backfills(events: usize) -> (f64, f64) {
    let work = tempfile::tempdir().unwrap();
    let input = common::movielens_csv();
    println!("== backfill, one shard's store at a time (MovieLens, {events} ratings, defaults)");
    let mut points = Vec::new();
    let mut single = (0.0, 0.0);
    for shards in 1..=3 {
        for shard in 0..shards {
            let run = backfill_shard(work.path(), &input, shards, shard);
            println!(
                "  {shards} shard(s), shard {shard}: {:.2} s wall, {:.2} s processor, {:.0} events/s, {:.0} pair updates summed, {:.0} pairs in its rows, {:.1} MB on disk",
                run.wall,
                run.cpu,
                events as f64 / run.wall,
                run.updates,
                run.pairs,
                run.disk as f64 / 1e6
            );
            points.push((events as f64, run.updates, run.cpu));
            if shards == 1 {
                single = (run.updates, run.disk as f64 / run.pairs);
            }
        }
    }
    let (a, b) = fit(&points);
    println!(
        "  model: processor seconds of a shard ≈ {:.2} µs × events + {:.3} µs × pair updates it sums (those touching its items: of {:.0} updates, about 1 − (1 − 1/N)²)",
        a * 1e6,
        b * 1e6,
        points[0].1
    );
    for &(e, p, y) in &points {
        let predicted = a * e + b * p;
        assert!(
            (predicted - y).abs() / y < 0.5,
            "the model misses a run by more than half: {predicted:.2} s vs {y:.2} s"
        );
    }
    single
}

/// Returns the live model's (a, b), fitted like the backfill's; `updates` is the pair
/// updates of the whole input (from the backfill).
fn live(events: &[(String, String, Option<i64>)], updates: f64) -> (f64, f64) {
    let mut points = Vec::new();
    println!(
        "\n== live, N shards started together on one topic, `simtide run --stop-at-end` (2 cores shared with the broker)"
    );
    for shards in 1..=3u32 {
        let work = tempfile::tempdir().unwrap();
        let broker = broker_with_topics();
        produce(&broker.bootstrap(), INPUT, events);
        let cpu_before = reaped_children_cpu_seconds();
        let started = Instant::now();
        let services: Vec<Service> = (0..shards)
            .map(|shard| {
                let (config, port) = write_config(
                    work.path(),
                    &broker.bootstrap(),
                    &work.path().join(format!("store-{shard}")),
                    &LiveSettings {
                        tolerance: 0.05,
                        min_common_users: 5,
                        max_items_per_user: 500,
                        publish_interval: "5s",
                        batch_events: 5000,
                        ..LiveSettings::default()
                    },
                );
                let (n, i) = (shards.to_string(), shard.to_string());
                Service::start_with_env(
                    &config,
                    port,
                    &["--stop-at-end"],
                    &[
                        ("SIMTIDE_CLUSTER__SHARDS", n.as_str()),
                        ("SIMTIDE_CLUSTER__SHARD", i.as_str()),
                    ],
                )
            })
            .collect();
        let mut running: Vec<Option<Service>> = services.into_iter().map(Some).collect();
        let mut rates = vec![0.0; running.len()];
        while running.iter().any(Option::is_some) {
            for (shard, slot) in running.iter_mut().enumerate() {
                if slot.as_mut().is_some_and(|s| !s.running()) {
                    rates[shard] = events.len() as f64 / started.elapsed().as_secs_f64();
                    let (status, report) = slot.take().unwrap().wait_exit(Duration::from_secs(5));
                    assert!(status.success(), "shard {shard}: {status}\n{report}");
                }
            }
            assert!(
                started.elapsed() < Duration::from_secs(900),
                "the shards did not finish"
            );
            std::thread::sleep(Duration::from_millis(20));
        }
        let wall = started.elapsed().as_secs_f64();
        let cpu = reaped_children_cpu_seconds() - cpu_before;
        let per_shard = cpu / f64::from(shards);
        println!(
            "  {shards} shard(s): events/s per shard from start to exit {}; all done in {wall:.1} s; {:.1} µs of processor time per event per shard",
            rates.iter().map(|r| format!("{r:.0}")).collect::<Vec<_>>().join(", "),
            per_shard / events.len() as f64 * 1e6
        );
        points.push((events.len() as f64, updates * kept_share(shards), per_shard));
    }
    let (a, b) = fit(&points);
    println!(
        "  model: processor seconds of a live shard ≈ {:.2} µs × events + {:.3} µs × pair updates touching its items",
        a * 1e6,
        b * 1e6
    );
    (a, b)
}

/// Shards needed for a load, from the fitted costs: the smallest N whose shard needs at
/// most `cores × 0.7` (headroom, common practice) at `rate` events/s, with `updates` pair
/// updates per event (about the mean history length of the users rating).
fn shards_needed(a: f64, b: f64, rate: f64, updates: f64, cores: f64) -> Option<u32> {
    (1..=64).find(|&n| rate * (a + b * updates * kept_share(n)) <= cores * 0.7)
}

fn main() {
    let events: Vec<(String, String, Option<i64>)> =
        unstamped_events(&common::movielens_csv(), common::MOVIELENS_RATINGS as usize);
    println!("simtide shard benchmark on this machine\n");
    let (updates, bytes_per_pair) = backfills(events.len());
    let (a, b) = live(&events, updates);
    println!(
        "\n== shards needed by the live model (a shard per 8-core machine, at most 70 % busy); disk per shard ≈ {bytes_per_pair:.0} B × pairs × (1 − (1 − 1/N)²)"
    );
    println!(
        "  (pair updates per event ≈ the rating user's history length; this input: {:.0})",
        updates / events.len() as f64
    );
    for (rate, per_event) in [
        (1_000.0, 50.0),
        (5_000.0, 100.0),
        (20_000.0, 100.0),
        (20_000.0, 500.0),
    ] {
        let needed = shards_needed(a, b, rate, per_event, 8.0).map_or(
            "more than 64 (the per-event cost alone fills a machine)".to_string(),
            |n| n.to_string(),
        );
        println!("  {rate:.0} events/s, {per_event:.0} pair updates per event: {needed}");
    }
}
