//! Whole small files written so that a reader sees the old file or the new one, never a torn
//! one: written under a temporary name beside the target, synced, then renamed over it.

use std::path::Path;

use crate::error::{Error, Result};

/// Writes `bytes` to `path.partial`, syncs, renames to `path`; removes the partial on failure.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let tmp = super::tiff::partial_path(path);
    let res = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    res.map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        Error::io(path, e)
    })
}
