//! Shards of a plate for a cluster (contiguous strip ranges balanced by estimated work, one
//! part file each) and their assembly into the plate.

use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

use super::fields::{FieldEntry, FieldGrid};
use super::journal::FORMAT;
use super::prepare::{prepare, Prepared};
use super::progress::Progress;
use super::run::{RunOptions, RunSummary};
use super::space::check_space;
use super::spec::JobSpec;
use super::stream::{finish_fields, finish_plate};
use crate::error::{Error, Result};
use crate::output::atomic::write_atomically;
use crate::output::tiff::StripWriter;
use crate::synthesis::source::FringeSource;

/// A share of a plate: shard `index` of `count` (0-based index).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Shard {
    /// 0-based.
    pub index: u32,
    /// Number of shards.
    pub count: u32,
}

impl Shard {
    /// Parses `K/N` (1-based K, as users count) or `slurm` (from the job-array environment).
    pub fn parse(text: &str) -> std::result::Result<Shard, String> {
        if text == "slurm" {
            return Self::from_slurm(|k| std::env::var(k).ok());
        }
        let (k, n) = text
            .split_once('/')
            .ok_or_else(|| format!("--shard {text}: expected K/N, e.g. 2/4, or 'slurm'"))?;
        let k: u32 = k
            .trim()
            .parse()
            .map_err(|_| format!("--shard {text}: K is not a whole number"))?;
        let n: u32 = n
            .trim()
            .parse()
            .map_err(|_| format!("--shard {text}: N is not a whole number"))?;
        if n == 0 || k == 0 || k > n {
            return Err(format!("--shard {text}: need 1 <= K <= N"));
        }
        Ok(Shard {
            index: k - 1,
            count: n,
        })
    }

    /// The shard of a Slurm array task: index = SLURM_ARRAY_TASK_ID - SLURM_ARRAY_TASK_MIN (0 if
    /// unset), count = SLURM_ARRAY_TASK_COUNT, else MAX - MIN + 1.
    pub fn from_slurm(get: impl Fn(&str) -> Option<String>) -> std::result::Result<Shard, String> {
        let num = |k: &str| -> std::result::Result<Option<u32>, String> {
            match get(k) {
                None => Ok(None),
                Some(v) => v
                    .trim()
                    .parse()
                    .map(Some)
                    .map_err(|_| format!("{k}={v} is not a whole number")),
            }
        };
        let id = num("SLURM_ARRAY_TASK_ID")?
            .ok_or("--shard slurm: SLURM_ARRAY_TASK_ID is not set (not inside a job array?)")?;
        let min = num("SLURM_ARRAY_TASK_MIN")?.unwrap_or(0);
        let count = match num("SLURM_ARRAY_TASK_COUNT")? {
            Some(c) => c,
            None => {
                let max = num("SLURM_ARRAY_TASK_MAX")?.ok_or(
                    "--shard slurm: neither SLURM_ARRAY_TASK_COUNT nor SLURM_ARRAY_TASK_MAX is set",
                )?;
                max.checked_sub(min)
                    .ok_or("--shard slurm: SLURM_ARRAY_TASK_MAX < MIN")?
                    + 1
            }
        };
        let index = id
            .checked_sub(min)
            .ok_or("--shard slurm: task id below SLURM_ARRAY_TASK_MIN")?;
        if count == 0 || index >= count {
            return Err(format!("--shard slurm: task {id} is outside an array of {count} tasks starting at {min} (array ids must be contiguous)"));
        }
        Ok(Shard { index, count })
    }
}

/// Contiguous strip ranges of the shards, balanced by estimated work (emitters cluster, so equal
/// row counts would not give equal times). Deterministic: every shard computes the same split.
pub fn shard_strips(sum: &dyn FringeSource, rps: u32, count: u32) -> Vec<(u32, u32)> {
    let h = sum.plate().height;
    let strips = h.div_ceil(rps);
    let mut cands = Vec::new();
    let work: Vec<f64> = (0..strips)
        .map(|s| {
            let r0 = (s * rps) as usize;
            let n = rps.min(h - s * rps) as usize;
            sum.rows_work(r0, n, &mut cands)
        })
        .collect();
    let total: f64 = work.iter().sum();
    let mut out = Vec::new();
    let mut start = 0u32;
    let mut acc = 0.0;
    for k in 0..count {
        let goal = total * (k + 1) as f64 / count as f64;
        let mut end = start;
        while end < strips && (k + 1 == count || acc + work[end as usize] / 2.0 <= goal) {
            acc += work[end as usize];
            end += 1;
        }
        out.push((start, end));
        start = end;
    }
    out
}

/// Part file of a shard: `NAME.tif.part-K-of-N` (1-based K).
pub fn part_path(output: &Path, sh: Shard) -> PathBuf {
    let mut s = output.as_os_str().to_owned();
    s.push(format!(".part-{}-of-{}", sh.index + 1, sh.count));
    PathBuf::from(s)
}

pub(super) fn part_meta_path(part: &Path) -> PathBuf {
    let mut s = part.as_os_str().to_owned();
    s.push(".json");
    PathBuf::from(s)
}

/// Writes a finished shard's record: its rows, work and (field runs) the fields it wrote.
#[allow(clippy::too_many_arguments)]
pub(super) fn write_part_record(
    spec: &JobSpec,
    sh: Shard,
    path: &Path,
    rows: [u32; 2],
    updates: u64,
    row_bytes: usize,
    fields: Vec<FieldEntry>,
    sha256: Option<String>,
) -> Result<()> {
    let meta = PartMeta {
        sha256,
        format: FORMAT.into(),
        job_sha256: spec.sha256.clone(),
        shard: [sh.index, sh.count],
        rows,
        updates,
        row_bytes: row_bytes as u64,
        fields,
    };
    write_atomically(path, &serde_json::to_vec_pretty(&meta).expect("plain data"))
}

/// What a finished shard records beside its part file.
#[derive(serde::Serialize, serde::Deserialize, Debug)]
struct PartMeta {
    format: String,
    job_sha256: String,
    shard: [u32; 2],
    rows: [u32; 2],
    updates: u64,
    row_bytes: u64,
    /// Field runs: the fields this shard wrote.
    #[serde(default)]
    fields: Vec<FieldEntry>,
    /// SHA-256 of the part file (single-TIFF runs), checked by `assemble`.
    #[serde(default)]
    sha256: Option<String>,
}

/// Streams the finished shards' part files into the plate's TIFF and writes its sidecar, then
/// removes the parts. All parts of one split (same N, same job) must be present.
pub fn assemble(spec: &JobSpec, opts: &RunOptions) -> Result<RunSummary> {
    let _lock = super::run::guard_outputs(spec, None)?;
    let prep = prepare(spec, opts.progress)?;
    if prep.png.is_some() {
        return Err(Error::job(
            &spec.path,
            "[output] format = \"png\" has no shards to assemble (it is written by one run)",
        ));
    }
    if let Some(grid) = prep.fields.clone() {
        return assemble_fields(spec, &prep, &grid);
    }
    let dir = spec
        .output
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_default();
    let dir_read = if dir.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        dir.clone()
    };
    // Find the split: any NAME.part-K-of-N.json present.
    let count = shard_count(spec, &dir_read, &spec.output, ".json")?;
    let row_bytes = prep.encoding.row_bytes(spec.plate.width as usize) as u64;
    let mut metas = Vec::new();
    let mut next_row = 0u32;
    for k in 0..count {
        let part = part_path(&spec.output, Shard { index: k, count });
        let mp = part_meta_path(&part);
        let m = read_shard_record(spec, &mp, k, count, next_row)?;
        if m.row_bytes != row_bytes {
            return Err(Error::input(
                &mp,
                format!("rows of {} bytes, expected {row_bytes}", m.row_bytes),
            ));
        }
        let len = std::fs::metadata(&part)
            .map_err(|e| Error::io(&part, e))?
            .len();
        if len != (m.rows[1] - m.rows[0]) as u64 * row_bytes {
            return Err(Error::input(
                &part,
                format!(
                    "holds {len} bytes, expected {}",
                    (m.rows[1] - m.rows[0]) as u64 * row_bytes
                ),
            ));
        }
        if let Some(want) = &m.sha256 {
            let (_, got) = crate::output::tiff::hash_path(&part)?;
            if &got != want {
                return Err(Error::input(
                    &part,
                    format!(
                        "is not the part its record {} describes (SHA-256 differs): damaged or swapped; run shard {}/{count} again",
                        mp.display(),
                        k + 1
                    ),
                ));
            }
        }
        next_row = m.rows[1];
        metas.push((part, mp, m));
    }
    if next_row != spec.plate.height {
        return Err(Error::job(
            &spec.path,
            format!(
                "the shards cover rows 0..{next_row} of {}",
                spec.plate.height
            ),
        ));
    }
    check_space(&dir_read, prep.layout.estimated_file_bytes())?;
    let mut writer = match &prep.gds {
        Some(g) => super::stream::Sink::Gds(crate::output::gdsii::GdsWriter::create(
            &spec.output,
            g.clone(),
        )?),
        None => super::stream::Sink::Tiff(StripWriter::create(&spec.output, prep.layout.clone())?),
    };
    let mut progress = Progress::new("assemble", spec.plate.height as f64, opts.progress);
    let mut updates = 0u64;
    let chunk_rows = (prep.rps as u64).max((4 << 20) / row_bytes.max(1)).max(1);
    let mut buf = vec![0u8; (chunk_rows * row_bytes) as usize];
    for (part, _, m) in &metas {
        let mut f = File::open(part).map_err(|e| Error::io(part, e))?;
        let mut left = (m.rows[1] - m.rows[0]) as u64;
        while left > 0 {
            let n = left.min(chunk_rows);
            let b = &mut buf[..(n * row_bytes) as usize];
            f.read_exact(b).map_err(|e| Error::io(part, e))?;
            writer.write_rows(b)?;
            progress.advance(n as f64);
            left -= n;
        }
        updates += m.updates;
    }
    progress.finish();
    let summary = match writer {
        super::stream::Sink::Gds(w) => super::stream::finish_gds(spec, &prep, w, updates)?,
        super::stream::Sink::Tiff(w) => finish_plate(spec, &prep, w, updates)?,
        _ => unreachable!("assemble writes one TIFF or one layout"),
    };
    for (part, mp, _) in &metas {
        let _ = std::fs::remove_file(part);
        let _ = std::fs::remove_file(mp);
    }
    Ok(summary)
}

/// N of the shard split whose records `BASE.part-K-of-N{suffix}` lie in `dir` (the largest N seen).
fn shard_count(spec: &JobSpec, dir: &Path, base: &Path, suffix: &str) -> Result<u32> {
    let name = base
        .file_name()
        .map(|f| f.to_string_lossy().into_owned())
        .unwrap_or_default();
    let prefix = format!("{name}.part-");
    let mut count = None;
    for e in std::fs::read_dir(dir)
        .map_err(|e| Error::io(dir, e))?
        .flatten()
    {
        let f = e.file_name().to_string_lossy().into_owned();
        let n = f
            .strip_prefix(&prefix)
            .and_then(|r| r.strip_suffix(suffix))
            .and_then(|r| r.split_once("-of-"))
            .and_then(|(_, n)| n.parse::<u32>().ok());
        if let Some(n) = n {
            count = Some(count.map_or(n, |c: u32| c.max(n)));
        }
    }
    count.ok_or_else(|| {
        Error::job(
            &spec.path,
            format!(
                "no finished shard records of {name} found in {}",
                dir.display()
            ),
        )
    })
}

/// Reads shard k of count's record, checks it belongs to this job and continues at `next_row`.
fn read_shard_record(
    spec: &JobSpec,
    rec: &Path,
    k: u32,
    count: u32,
    next_row: u32,
) -> Result<PartMeta> {
    let bytes = std::fs::read(rec).map_err(|_| {
        Error::job(
            &spec.path,
            format!(
                "shard {}/{count} is not finished: {} is missing",
                k + 1,
                rec.display()
            ),
        )
    })?;
    let m: PartMeta = serde_json::from_slice(&bytes)
        .map_err(|e| Error::input(rec, format!("damaged shard record: {e}")))?;
    if m.job_sha256 != spec.sha256 {
        return Err(Error::job(
            &spec.path,
            format!(
                "{} was computed from another version of the job; run that shard again",
                rec.display()
            ),
        ));
    }
    if m.rows[0] != next_row {
        return Err(Error::input(
            rec,
            format!("rows {:?} do not continue at row {next_row}", m.rows),
        ));
    }
    Ok(m)
}

/// Field runs: the shards wrote complete field files; merge their records into the manifest.
fn assemble_fields(spec: &JobSpec, prep: &Prepared, grid: &FieldGrid) -> Result<RunSummary> {
    let manifest = grid.manifest_path();
    let dir = manifest
        .parent()
        .filter(|d| !d.as_os_str().is_empty())
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."));
    let count = shard_count(spec, &dir, &manifest, "")?;
    let (mut entries, mut updates, mut next_row, mut recs) = (Vec::new(), 0u64, 0u32, Vec::new());
    for k in 0..count {
        let rec = part_path(&manifest, Shard { index: k, count });
        let m = read_shard_record(spec, &rec, k, count, next_row)?;
        next_row = m.rows[1];
        updates += m.updates;
        entries.extend(m.fields);
        recs.push(rec);
    }
    if next_row != spec.plate.height {
        return Err(Error::job(
            &spec.path,
            format!(
                "the shards cover rows 0..{next_row} of {}",
                spec.plate.height
            ),
        ));
    }
    let summary = finish_fields(spec, prep, grid, &entries, updates)?;
    for r in recs {
        let _ = std::fs::remove_file(r);
    }
    Ok(summary)
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn shard_from_slurm_environment() {
        let env = |pairs: &'static [(&'static str, &'static str)]| {
            move |k: &str| pairs.iter().find(|p| p.0 == k).map(|p| p.1.to_string())
        };
        assert_eq!(
            Shard::from_slurm(env(&[
                ("SLURM_ARRAY_TASK_ID", "2"),
                ("SLURM_ARRAY_TASK_COUNT", "4")
            ]))
            .unwrap(),
            Shard { index: 2, count: 4 }
        );
        assert_eq!(
            Shard::from_slurm(env(&[
                ("SLURM_ARRAY_TASK_ID", "5"),
                ("SLURM_ARRAY_TASK_MIN", "3"),
                ("SLURM_ARRAY_TASK_MAX", "6")
            ]))
            .unwrap(),
            Shard { index: 2, count: 4 }
        );
        assert!(Shard::from_slurm(env(&[])).is_err());
        assert!(Shard::from_slurm(env(&[
            ("SLURM_ARRAY_TASK_ID", "9"),
            ("SLURM_ARRAY_TASK_COUNT", "4")
        ]))
        .is_err());
        assert_eq!(Shard::parse("2/4").unwrap(), Shard { index: 1, count: 4 });
        assert!(
            Shard::parse("5/4").is_err()
                && Shard::parse("0/4").is_err()
                && Shard::parse("x").is_err()
        );
    }
}
