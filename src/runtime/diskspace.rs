//! Free space on the filesystem holding the store, for the "store near its disk limit"
//! alert, and the sentence that says a failure was a full disk.

use std::path::Path;

/// Bytes available to an unprivileged writer on the filesystem of `path` (statvfs,
/// through rustix's safe wrapper).
pub fn available_bytes(path: &Path) -> Option<u64> {
    let stats = rustix::fs::statvfs(path).ok()?;
    Some(stats.f_bavail.saturating_mul(stats.f_frsize))
}

/// `error` as one line, led by what to do when its cause is a full disk (the operating
/// system's ENOSPC text anywhere in the chain): the disk holding `dir`, its free bytes,
/// and that the same command resumes once space is freed.
pub fn describe_store_error(error: &anyhow::Error, dir: &Path) -> String {
    let text = format!("{error:#}");
    if !text.contains("No space left on device") {
        return text;
    }
    let free = available_bytes(dir)
        .or_else(|| dir.parent().and_then(available_bytes))
        .map_or("unknown".to_string(), |b| b.to_string());
    format!(
        "the disk holding {} is full ({free} bytes free): free space; nothing stored was lost, and the work resumes from the store's positions ({text})",
        dir.display()
    )
}

#[cfg(test)]
mod tests {
    #[test]
    fn a_real_directory_has_free_space_and_a_missing_one_has_none() {
        let dir = std::env::temp_dir();
        assert!(super::available_bytes(&dir).is_some_and(|b| b > 0));
        assert_eq!(
            super::available_bytes(std::path::Path::new("/no/such/dir/here")),
            None
        );
    }

    #[test]
    fn a_full_disk_is_named_and_other_errors_are_kept_as_they_are() {
        let dir = std::env::temp_dir();
        let full = anyhow::anyhow!("IO error: No space left on device: While appending to file")
            .context("cannot write table files");
        let said = super::describe_store_error(&full, &dir);
        assert!(
            said.starts_with(&format!("the disk holding {} is full (", dir.display())),
            "{said}"
        );
        assert!(said.ends_with("While appending to file)"), "{said}");
        let other = anyhow::anyhow!("Corruption: bad block");
        assert_eq!(super::describe_store_error(&other, &dir), "Corruption: bad block");
    }
}
