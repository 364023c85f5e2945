//! New store directories made whole or not at all (docs/design.md, "Snapshots",
//! "Resharding"): a snapshot or a resharded store is built in a sibling directory named
//! `.NAME.incomplete` holding an [`INCOMPLETE`] marker, and renamed to its final name
//! only after the last byte is written. A process killed part way leaves no directory
//! under the final name, and opening the unfinished one is refused with what to do.

use std::path::{Path, PathBuf};

use anyhow::{bail, Context, Result};

use super::errors::OpenError;

/// The marker file inside a directory still being built.
pub const INCOMPLETE: &str = "INCOMPLETE";

/// Where the directory that will become `to` is built.
fn staging_path(to: &Path) -> Result<PathBuf> {
    let name = to
        .file_name()
        .with_context(|| format!("{} has no directory name", to.display()))?;
    let mut staged = std::ffi::OsString::from(".");
    staged.push(name);
    staged.push(".incomplete");
    Ok(to.with_file_name(staged))
}

/// Builds a new directory `to` with `build`, which receives the staging directory
/// (created, holding the marker). `to` must not exist. A staging directory left by a
/// killed run is removed first; one left by a failed `build` is removed at once.
pub fn build_whole<T>(to: &Path, what: &str, build: impl FnOnce(&Path) -> Result<T>) -> Result<T> {
    if to.exists() {
        bail!("{} already exists: {what} goes to a new directory", to.display());
    }
    let staging = staging_path(to)?;
    if staging.exists() {
        tracing::info!(path = %staging.display(), "removing an unfinished copy a stopped run left");
        std::fs::remove_dir_all(&staging).with_context(|| format!("cannot remove {}", staging.display()))?;
    }
    std::fs::create_dir_all(&staging).with_context(|| format!("cannot create {}", staging.display()))?;
    let made = std::fs::write(
        staging.join(INCOMPLETE),
        format!("{what} being written to {}\n", to.display()),
    )
    .with_context(|| format!("cannot write into {}", staging.display()))
    .and_then(|()| build(&staging))
    .and_then(|value| {
        std::fs::remove_file(staging.join(INCOMPLETE))?;
        std::fs::rename(&staging, to)
            .with_context(|| format!("cannot rename {} to {}", staging.display(), to.display()))?;
        Ok(value)
    });
    if made.is_err() {
        let _ = std::fs::remove_dir_all(&staging);
    }
    made
}

/// Refuses a directory that a snapshot or reshard was still writing when it stopped.
pub fn refuse_incomplete(dir: &Path) -> Result<()> {
    if dir.join(INCOMPLETE).exists() {
        return Err(OpenError::Incomplete {
            dir: dir.to_path_buf(),
        }
        .into());
    }
    Ok(())
}

/// The unfinished copies a stopped run left directly under `root` (directories holding
/// the [`INCOMPLETE`] marker): the service names them at start, since admin snapshots are
/// named by the time and a later one never reuses, and so never removes, a leftover.
pub fn leftovers_under(root: &Path) -> Vec<PathBuf> {
    let Ok(entries) = std::fs::read_dir(root) else {
        return Vec::new();
    };
    let mut found: Vec<PathBuf> = entries
        .filter_map(|e| Some(e.ok()?.path()))
        .filter(|p| p.join(INCOMPLETE).exists())
        .collect();
    found.sort();
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_target_appears_only_whole_and_a_failed_build_leaves_nothing() {
        let root = tempfile::tempdir().unwrap();
        let to = root.path().join("copy");
        let seen = build_whole(&to, "a test copy", |staging| {
            assert!(!to.exists(), "nothing under the final name while building");
            assert!(refuse_incomplete(staging).is_err());
            std::fs::write(staging.join("data"), b"whole")?;
            Ok(staging.to_path_buf())
        })
        .unwrap();
        assert_eq!(seen, root.path().join(".copy.incomplete"));
        assert_eq!(std::fs::read(to.join("data")).unwrap(), b"whole");
        assert!(refuse_incomplete(&to).is_ok() && !seen.exists());
        let again = build_whole(&to, "a test copy", |_| Ok(())).unwrap_err();
        assert!(again.to_string().contains("already exists"), "{again}");

        let failed = root.path().join("failed");
        let err = build_whole(&failed, "a test copy", |_| -> Result<()> { bail!("disk full") }).unwrap_err();
        assert!(err.to_string().contains("disk full"));
        assert!(!failed.exists() && !root.path().join(".failed.incomplete").exists());
    }

    #[test]
    fn a_copy_left_by_a_killed_run_is_refused_by_name_and_cleared_by_the_next_run() {
        let root = tempfile::tempdir().unwrap();
        let left = root.path().join(".copy.incomplete");
        std::fs::create_dir_all(&left).unwrap();
        std::fs::write(left.join(INCOMPLETE), "").unwrap();
        let refused = refuse_incomplete(&left).unwrap_err().to_string();
        assert!(
            refused.contains("incomplete") && refused.contains("Delete it"),
            "{refused}"
        );
        build_whole(&root.path().join("copy"), "a test copy", |_| Ok(())).unwrap();
        assert!(!left.exists());
    }
}
