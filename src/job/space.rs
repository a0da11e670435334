//! Free-space limits: a run refuses to start when the disk cannot hold what it will write.

use std::path::Path;

use crate::error::{Error, Result};

/// Free bytes on the file system holding `dir`, if the platform says.
pub fn free_bytes(dir: &Path) -> Option<u64> {
    #[cfg(unix)]
    {
        use std::os::unix::ffi::OsStrExt;
        let c = std::ffi::CString::new(dir.as_os_str().as_bytes()).ok()?;
        let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
        // SAFETY: `c` is a valid NUL-terminated path and `st` a writable statvfs struct.
        let r = unsafe { libc::statvfs(c.as_ptr(), &mut st) };
        if r != 0 {
            return None;
        }
        Some(st.f_bavail as u64 * st.f_frsize as u64)
    }
    #[cfg(not(unix))]
    {
        let _ = dir;
        None
    }
}

/// Refuses to start when the file system holding `dir` has less than `needed` bytes (plus slack) free.
pub fn check_space(dir: &Path, needed: u64) -> Result<()> {
    let dir = if dir.as_os_str().is_empty() {
        Path::new(".")
    } else {
        dir
    };
    if let Some(free) = free_bytes(dir) {
        let needed = needed + (1 << 20); // journal, sidecar and slack
        if free < needed {
            return Err(Error::io(
                dir,
                std::io::Error::other(format!(
                    "not enough free space: the output needs about {:.1} MB, {:.1} MB are free",
                    needed as f64 / 1e6,
                    free as f64 / 1e6
                )),
            ));
        }
    }
    Ok(())
}

pub(super) fn ensure_parent(path: &Path) -> Result<()> {
    if let Some(parent) = path.parent() {
        if !parent.as_os_str().is_empty() {
            std::fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
        }
    }
    Ok(())
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn refuses_when_disk_lacks_room() {
        let d = std::env::temp_dir();
        assert!(check_space(&d, 1024).is_ok());
        let e = check_space(&d, u64::MAX / 4).unwrap_err().to_string();
        assert!(e.contains("not enough free space"), "{e}");
    }
}
