//! Checksums of what a partial file holds at each checkpoint: the SHA-256 of the bytes written
//! since the previous checkpoint, so that a resume reads the partial file back and refuses one
//! that was damaged, truncated and regrown, or swapped since (a kill -9 never changes bytes
//! already written and synced; anything else that did is not this run's work).

use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::error::{Error, Result};

/// Bytes [start, end) of a file and their SHA-256, lowercase hex.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Chunk {
    /// First byte.
    pub start: u64,
    /// One past the last byte.
    pub end: u64,
    /// SHA-256 of those bytes.
    pub sha256: String,
}

/// Hashes bytes as they are appended, one chunk per checkpoint.
#[derive(Clone, Debug, Default)]
pub struct ChunkHasher {
    hasher: Sha256,
    start: u64,
    /// Chunks so far.
    pub chunks: Vec<Chunk>,
}

impl ChunkHasher {
    /// A hasher whose next chunk starts at byte `start`, after the `chunks` already verified.
    pub fn starting_at(start: u64, chunks: Vec<Chunk>) -> ChunkHasher {
        ChunkHasher {
            hasher: Sha256::new(),
            start,
            chunks,
        }
    }

    /// Feeds appended bytes.
    pub fn update(&mut self, bytes: &[u8]) {
        self.hasher.update(bytes);
    }

    /// Closes the chunk that ends at `end` (the file's length now) and returns every chunk.
    pub fn checkpoint(&mut self, end: u64) -> Vec<Chunk> {
        if end > self.start {
            let d = self.hasher.finalize_reset();
            self.chunks.push(Chunk {
                start: self.start,
                end,
                sha256: d.iter().map(|b| format!("{b:02x}")).collect(),
            });
            self.start = end;
        }
        self.chunks.clone()
    }
}

/// Reads each chunk back from `file` and compares its SHA-256; the message names the file and
/// the bytes that differ.
pub fn verify(path: &Path, file: &mut std::fs::File, chunks: &[Chunk]) -> Result<()> {
    let mut buf = vec![0u8; 1 << 20];
    for c in chunks {
        file.seek(SeekFrom::Start(c.start))
            .map_err(|e| Error::io(path, e))?;
        let mut h = Sha256::new();
        let mut left = c.end - c.start;
        while left > 0 {
            let n = (left as usize).min(buf.len());
            file.read_exact(&mut buf[..n])
                .map_err(|e| Error::io(path, e))?;
            h.update(&buf[..n]);
            left -= n as u64;
        }
        let got: String = h.finalize().iter().map(|b| format!("{b:02x}")).collect();
        if got != c.sha256 {
            return Err(Error::input(
                path,
                format!(
                    "bytes {}..{} changed since the checkpoint that wrote them (damaged or replaced): run with --restart",
                    c.start, c.end
                ),
            ));
        }
    }
    Ok(())
}
