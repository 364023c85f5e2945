//! Free space on the filesystem holding the store, for the "store near its disk limit"
//! alert.

use std::ffi::CString;
use std::os::unix::ffi::OsStrExt;
use std::path::Path;

/// Bytes available to an unprivileged writer on the filesystem of `path` (statvfs).
pub fn available_bytes(path: &Path) -> Option<u64> {
    let c_path = CString::new(path.as_os_str().as_bytes()).ok()?;
    let mut stats = std::mem::MaybeUninit::<libc::statvfs>::uninit();
    // SAFETY: `c_path` is a valid NUL-terminated string and `stats` points to writable
    // memory of the right type; statvfs only writes into it.
    let rc = unsafe { libc::statvfs(c_path.as_ptr(), stats.as_mut_ptr()) };
    if rc != 0 {
        return None;
    }
    // SAFETY: statvfs returned 0, so it filled the structure.
    let stats = unsafe { stats.assume_init() };
    Some(stats.f_bavail.saturating_mul(stats.f_frsize))
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
}
