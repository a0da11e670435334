//! The run journal: a small JSON file beside the output (`NAME.tif.journal`, or beside a shard's part)
//! that records how far an interrupted run got, so the same command continues where it stopped.
//!
//! It is written through a temporary name, synced and renamed, only after the data it describes is
//! itself synced: after a crash, kill -9 or power loss, the journal never claims more than the disk
//! holds. It carries the job file's text, so a changed job is recognised and the changed key named.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::output::atomic::write_atomically;
use crate::output::tiff::WriterState;

/// Journal format name.
pub const FORMAT: &str = "fringemill-journal";

/// What the journal records.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq)]
pub struct Journal {
    /// Always [`FORMAT`].
    pub format: String,
    /// SHA-256 of the job file's bytes.
    pub job_sha256: String,
    /// The job file's text, to name what changed.
    pub job_toml: String,
    /// `[k, n]` for a shard, None for a whole plate.
    pub shard: Option<[u32; 2]>,
    /// Rows safely on disk.
    pub rows_done: u32,
    /// Point-pixel updates of those rows.
    pub updates: u64,
    /// The TIFF writer's checkpoint (whole plates).
    pub writer: Option<WriterState>,
    /// Field runs: fields done and the current row's writer checkpoints.
    #[serde(default)]
    pub fields: Option<super::fields::FieldsState>,
    /// The GDSII writer's checkpoint (layouts).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub gds: Option<crate::output::gdsii::GdsState>,
    /// A shard's part file: SHA-256 of its rows written between checkpoints (checked on resume).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub part_chunks: Vec<crate::output::chunks::Chunk>,
    /// SHA-256 of every input file the job names (points, mesh, target images, calibration), as
    /// read when the run started: a resume refuses when one changed.
    #[serde(default)]
    pub inputs: Vec<InputHash>,
}

/// An input file and the SHA-256 of its bytes.
#[derive(serde::Serialize, serde::Deserialize, Clone, Debug, PartialEq, Eq)]
pub struct InputHash {
    /// The path as the job resolves it.
    pub file: String,
    /// Lowercase hex.
    pub sha256: String,
}

/// The hashes of a job's input files (the job file itself is hashed in `JobSpec`).
pub fn input_hashes(spec: &super::spec::JobSpec) -> crate::error::Result<Vec<InputHash>> {
    spec.inputs()
        .into_iter()
        .skip(1)
        .map(|p| {
            let (_, sha256) = crate::output::tiff::hash_path(&p)?;
            Ok(InputHash {
                file: p.display().to_string(),
                sha256,
            })
        })
        .collect()
}

/// Journal path for an output (TIFF or part) path.
pub fn journal_path(output: &Path) -> PathBuf {
    let mut s = output.as_os_str().to_owned();
    s.push(".journal");
    PathBuf::from(s)
}

impl Journal {
    /// Reads a journal; Ok(None) if there is none.
    pub fn read(path: &Path) -> Result<Option<Journal>> {
        match std::fs::read(path) {
            Ok(b) => {
                let j: Journal = serde_json::from_slice(&b).map_err(|e| {
                    Error::input(
                        path,
                        format!("damaged journal ({e}); delete it or run with --restart"),
                    )
                })?;
                if j.format != FORMAT {
                    return Err(Error::input(path, "not a fringemill journal"));
                }
                Ok(Some(j))
            }
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
            Err(e) => Err(Error::io(path, e)),
        }
    }

    /// Writes the journal atomically.
    pub fn write(&self, path: &Path) -> Result<()> {
        let text = serde_json::to_vec(self).expect("journal is plain data");
        write_atomically(path, &text)
    }
}

/// The first key whose value differs between two job texts, as `table.key: old -> new`.
pub fn changed_key(old: &str, new: &str) -> String {
    let (Ok(a), Ok(b)) = (old.parse::<toml::Table>(), new.parse::<toml::Table>()) else {
        return "the job file".into();
    };
    diff(&toml::Value::Table(a), &toml::Value::Table(b), "")
        .unwrap_or_else(|| "formatting or comments only".into())
}

fn diff(a: &toml::Value, b: &toml::Value, at: &str) -> Option<String> {
    let join = |k: &str| {
        if at.is_empty() {
            k.to_string()
        } else {
            format!("{at}.{k}")
        }
    };
    match (a, b) {
        (toml::Value::Table(x), toml::Value::Table(y)) => {
            let mut keys: Vec<&String> = x.keys().chain(y.keys()).collect();
            keys.sort();
            keys.dedup();
            for k in keys {
                match (x.get(k), y.get(k)) {
                    (Some(u), Some(v)) => {
                        if let Some(d) = diff(u, v, &join(k)) {
                            return Some(d);
                        }
                    }
                    (Some(u), None) => return Some(format!("{}: {} -> (removed)", join(k), u)),
                    (None, Some(v)) => return Some(format!("{}: (absent) -> {}", join(k), v)),
                    (None, None) => {}
                }
            }
            None
        }
        (toml::Value::Array(x), toml::Value::Array(y)) if x.len() == y.len() => x
            .iter()
            .zip(y)
            .enumerate()
            .find_map(|(i, (u, v))| diff(u, v, &format!("{at}[{i}]"))),
        _ => (a != b).then(|| format!("{at}: {a} -> {b}")),
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn names_the_changed_key() {
        let a = "[hologram]\nwidth_px = 10\n[[object]]\npoints = \"a.csv\"\n";
        let b = "[hologram]\nwidth_px = 12\n[[object]]\npoints = \"a.csv\"\n";
        assert_eq!(changed_key(a, b), "hologram.width_px: 10 -> 12");
        let c = "[hologram]\nwidth_px = 10\n[[object]]\npoints = \"b.csv\"\n";
        assert_eq!(
            changed_key(a, c),
            "object[0].points: \"a.csv\" -> \"b.csv\""
        );
        assert_eq!(
            changed_key(a, &format!("# note\n{a}")),
            "formatting or comments only"
        );
    }
}
