//! Output safety: what a command writes never replaces what it reads, a special file or a folder,
//! and two runs never write the same plate at once.
//!
//! Every output is checked before any work starts: it may not be one of the command's inputs
//! (the same file by path, symbolic link or hard link), an existing folder, or an existing file
//! that is not a regular file (a device, a pipe). While a run writes a plate (or a shard's part)
//! it holds an exclusive advisory lock on `NAME.lock` beside it (`flock`, released by the kernel
//! when the process ends, however it ends); a second run on the same output refuses at once.

use std::fs::{File, OpenOptions};
use std::path::{Path, PathBuf};

use crate::error::{Error, Result};

/// The identity of an existing file: its canonical path and, on Unix, device and inode (so hard
/// links compare equal).
fn identity(p: &Path) -> Option<(PathBuf, Option<(u64, u64)>)> {
    let c = std::fs::canonicalize(p).ok()?;
    #[cfg(unix)]
    let id = {
        use std::os::unix::fs::MetadataExt;
        std::fs::metadata(&c).ok().map(|m| (m.dev(), m.ino()))
    };
    #[cfg(not(unix))]
    let id = None;
    Some((c, id))
}

/// True when `a` and `b` name the same existing file.
pub fn same_file(a: &Path, b: &Path) -> bool {
    match (identity(a), identity(b)) {
        (Some((ca, ia)), Some((cb, ib))) => ca == cb || (ia.is_some() && ia == ib),
        _ => false,
    }
}

/// Refuses to write `out` (`what` names it in the message) when it is one of `inputs`, an
/// existing folder, or an existing file that is not a regular file.
pub fn check_output(out: &Path, what: &str, inputs: &[PathBuf]) -> Result<()> {
    if let Ok(m) = std::fs::metadata(out) {
        if m.is_dir() {
            return Err(Error::job(
                out,
                format!("the {what} is an existing folder; name a file"),
            ));
        }
        if !m.is_file() {
            return Err(Error::job(
                out,
                format!(
                    "the {what} exists and is not a regular file (a device or pipe); name a plain file"
                ),
            ));
        }
    }
    if let Some(i) = inputs.iter().find(|i| same_file(out, i)) {
        return Err(Error::job(
            out,
            format!(
                "the {what} would overwrite an input of this command ({}); name another file",
                i.display()
            ),
        ));
    }
    Ok(())
}

/// An exclusive lock on an output, held until dropped (the lock file is removed then).
#[derive(Debug)]
pub struct OutputLock {
    path: PathBuf,
    _file: File,
}

/// The lock file of an output: `NAME.lock` beside `NAME`.
pub fn lock_path(out: &Path) -> PathBuf {
    let mut s = out.as_os_str().to_owned();
    s.push(".lock");
    PathBuf::from(s)
}

/// Takes the exclusive lock of `out`, or refuses at once when another process holds it.
///
/// The holder removes the lock file when it is done; a process that opened the file just before
/// that removal may then lock a file that no longer has the name. So after locking, the name is
/// checked to still lead to the locked file (same device and inode), and the lock is taken again
/// otherwise.
pub fn lock_output(out: &Path) -> Result<OutputLock> {
    let path = lock_path(out);
    for _ in 0..16 {
        let file = OpenOptions::new()
            .create(true)
            .truncate(false)
            .write(true)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
        #[cfg(unix)]
        {
            use std::os::unix::fs::MetadataExt;
            use std::os::unix::io::AsRawFd;
            // SAFETY: `file` is an open descriptor owned by this function; flock only sets an
            // advisory lock on it.
            let r = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
            if r != 0 {
                let e = std::io::Error::last_os_error();
                if e.raw_os_error() == Some(libc::EWOULDBLOCK) {
                    return Err(Error::job(
                        out,
                        format!(
                            "another run is writing this output now (it holds {}); wait for it or name another output",
                            path.display()
                        ),
                    ));
                }
                return Err(Error::io(&path, e));
            }
            let held = file.metadata().map_err(|e| Error::io(&path, e))?;
            match std::fs::metadata(&path) {
                Ok(named) if named.dev() == held.dev() && named.ino() == held.ino() => {}
                // The previous holder removed the name meanwhile: lock the new file instead.
                _ => continue,
            }
        }
        return Ok(OutputLock { path, _file: file });
    }
    Err(Error::job(
        out,
        format!(
            "could not take the lock {} (it keeps being replaced)",
            path.display()
        ),
    ))
}

impl Drop for OutputLock {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn inputs_links_folders_and_devices_are_refused() {
        let d = tempfile::tempdir().unwrap();
        let a = d.path().join("a.csv");
        std::fs::write(&a, "x").unwrap();
        let inputs = vec![a.clone()];
        assert!(check_output(&d.path().join("new.tif"), "plate", &inputs).is_ok());
        let e = check_output(&a, "plate", &inputs).unwrap_err().to_string();
        assert!(e.contains("overwrite an input"), "{e}");
        // The same file through another spelling and a hard link.
        let other = d.path().join(".").join("a.csv");
        assert!(check_output(&other, "plate", &inputs).is_err());
        let link = d.path().join("hard.csv");
        std::fs::hard_link(&a, &link).unwrap();
        assert!(check_output(&link, "plate", &inputs).is_err());
        let e = check_output(d.path(), "plate", &inputs)
            .unwrap_err()
            .to_string();
        assert!(e.contains("folder"), "{e}");
        #[cfg(unix)]
        {
            let e = check_output(Path::new("/dev/null"), "plate", &inputs)
                .unwrap_err()
                .to_string();
            assert!(e.contains("not a regular file"), "{e}");
        }
    }

    #[test]
    fn a_second_lock_is_refused_until_the_first_is_dropped() {
        let d = tempfile::tempdir().unwrap();
        let out = d.path().join("p.tif");
        let first = lock_output(&out).unwrap();
        // flock locks belong to the open file description: a second open in this process
        // conflicts as another process would.
        let e = lock_output(&out).unwrap_err().to_string();
        assert!(e.contains("another run"), "{e}");
        drop(first);
        assert!(!lock_path(&out).exists());
        assert!(lock_output(&out).is_ok());
    }
}
