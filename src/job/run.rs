//! Running a job: emitters from the objects, the point sum band by band in parallel, encoding,
//! and the TIFF streamed strip by strip with its sidecar; resuming an interrupted run from its
//! journal; shards of a plate for a cluster and their assembly. Also `plan`: what a run would do.

use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use num_complex::Complex64;
use rayon::prelude::*;

use super::fields::{manifest_json, FieldEntry, FieldGrid, FieldSink, FieldsState};
use super::iterative::{build_cell, IterationRecord};
use super::journal::{changed_key, journal_path, Journal, FORMAT};
use super::progress::{Progress, ProgressMode};
use super::record::{self, RunRecord, Written};
use super::scene::{build_scene, Scene};
use super::spec::SumPath;
use super::spec::{EncodingRequest, JobSpec};
use super::spec::{IterativeSpec, Method};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::output::atomic::write_atomically;
use crate::output::sidecar::RecordingPlaneRecord;
use crate::output::tiff::{partial_path, StripWriter, TiffLayout};
use crate::synthesis::phase_cell::PhaseCell;
use crate::synthesis::point_sum::{BandScratch, PointSum};
use crate::synthesis::recording_plane::RecordingPlane;
use crate::synthesis::Emitter;
use crate::synthesis::{Approximation, Precision};

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

/// Options of a run that are not part of the job.
#[derive(Clone, Debug)]
pub struct RunOptions {
    /// Progress display.
    pub progress: ProgressMode,
    /// Discard an interrupted run's partial work instead of continuing it.
    pub restart: bool,
    /// Compute only this share of the plate (into a part file), for `assemble` later.
    pub shard: Option<Shard>,
    /// Least time between two checkpoints (journal updates).
    pub checkpoint_every: Duration,
    /// Set from outside (Ctrl-C) to stop after the band in flight, with a checkpoint.
    pub stop: Arc<AtomicBool>,
}

impl RunOptions {
    /// Defaults: checkpoints every 30 s, no shard, progress as given.
    pub fn new(progress: ProgressMode) -> RunOptions {
        RunOptions {
            progress,
            restart: false,
            shard: None,
            checkpoint_every: Duration::from_secs(30),
            stop: Arc::new(AtomicBool::new(false)),
        }
    }
}

/// What a finished run produced.
#[derive(Clone, Debug)]
pub struct RunSummary {
    /// The TIFF.
    pub tiff: PathBuf,
    /// The sidecar.
    pub sidecar: PathBuf,
    /// Emitters summed.
    pub emitters: usize,
    /// Point-pixel updates done.
    pub updates: u64,
    /// The encoding written (amplitude scale resolved).
    pub encoding: Encoding,
}

/// All emitters of a job in summation order (every channel), placed in plate coordinates.
pub fn build_emitters(spec: &JobSpec) -> Result<Vec<Emitter>> {
    Ok(build_scene(spec)?.emitters())
}

/// The point sum of a job: its channels, with occlusion when a mesh asks for it.
fn point_sum(spec: &JobSpec, scene: Scene) -> PointSum {
    let sum = PointSum::with_channels(spec.plate, scene.channels, spec.synthesis);
    match scene.visibility {
        Some(v) => sum.with_visibility(v),
        None => sum,
    }
}

/// Rough cost weights for `[synthesis] path = "auto"`, in units of one f64 exact update, measured
/// on the benchmark machine (BENCHMARKS.md): an f32 exact update, and one element of one radix-2
/// pass of a complex f64 FFT.
const F32_UPDATE_WEIGHT: f64 = 0.3;
const FFT_PASS_WEIGHT: f64 = 0.27;
/// `auto` takes the recording plane only when its estimate is this many times below the direct one.
const AUTO_PLANE_MARGIN: f64 = 2.0;

/// The point sum on the path the job asks for (`[synthesis] path`), with lines for `plan`.
fn choose_sum(spec: &JobSpec, scene: Scene) -> Result<(Source, Vec<String>)> {
    let mut lines = Vec::new();
    if spec.sum_path == SumPath::Direct {
        lines.push("path: direct point sum".into());
        return Ok((Source::Points(point_sum(spec, scene)), lines));
    }
    let plane = if scene.channels.len() == 1 && scene.visibility.is_none() {
        let (reference, emitters) = &scene.channels[0];
        RecordingPlane::new(
            spec.plate,
            *reference,
            emitters.clone(),
            spec.synthesis,
            spec.recording_plane_gap,
        )
    } else {
        Err("the recording plane takes one reference and no occlusion".to_string())
    };
    let sum = point_sum(spec, scene);
    let plane = match plane {
        Ok(p) => p,
        Err(why) => {
            if spec.sum_path == SumPath::RecordingPlane {
                return Err(Error::job(
                    &spec.path,
                    format!("[synthesis] path = \"recording-plane\": {why}"),
                ));
            }
            lines.push(format!(
                "path: direct point sum (recording plane not applicable: {why})"
            ));
            return Ok((Source::Points(sum), lines));
        }
    };
    let unit = if spec.synthesis.precision == Precision::F32
        && spec.synthesis.approximation == Approximation::Exact
    {
        F32_UPDATE_WEIGHT
    } else {
        1.0
    };
    let direct = sum.estimate_updates(64) * unit;
    // The plane's updates run in the precision the job asks for too (soft edges in f32 since
    // the per-pixel f32 path takes them).
    let via_plane = plane.estimate_cost(unit, FFT_PASS_WEIGHT);
    lines.push(format!(
        "estimated cost (f64 exact updates): direct {direct:.3e}, recording plane {via_plane:.3e} (plane {:.3} mm from the plate, grid margins {} x {} px, bands of {} rows)",
        plane.distance() * 1e3,
        plane.margins()[0],
        plane.margins()[1],
        plane.band_rows()
    ));
    // The estimate counts the updates inside the supports; the kernels also walk the slack of the
    // per-row spans (about 6x for emitters 0.25-0.75 mm from the plane in the test scene of
    // BENCHMARKS.md, where the estimate said 2.8x and the run gave 1.6x), so `auto` takes the plane
    // only at a twofold margin.
    let take = spec.sum_path == SumPath::RecordingPlane || via_plane * AUTO_PLANE_MARGIN < direct;
    lines.push(
        if take {
            "path: recording plane"
        } else {
            "path: direct point sum (auto takes the recording plane below half the direct estimate)"
        }
        .into(),
    );
    Ok((
        if take {
            Source::Plane(plane, sum.unreachable())
        } else {
            Source::Points(sum)
        },
        lines,
    ))
}

/// What produces the fringe term band by band: the point sum, or an iterated phase cell.
pub enum Source {
    /// Point-source summation.
    Points(PointSum),
    /// Point sum through a recording plane (and the direct sum's count of unreachable emitters).
    Plane(RecordingPlane, usize),
    /// Iterated phase cell over the plate, with the iteration's record.
    Cell(PhaseCell, IterationRecord, IterativeSpec),
}

impl Source {
    /// The plate.
    pub fn plate(&self) -> &crate::optics::Plate {
        match self {
            Source::Points(s) => s.plate(),
            Source::Plane(p, _) => p.plate(),
            Source::Cell(c, ..) => c.plate(),
        }
    }
    /// Rows per band the source prefers, if it has a preference.
    fn preferred_band_rows(&self) -> Option<usize> {
        match self {
            Source::Plane(p, _) => Some(p.band_rows()),
            _ => None,
        }
    }
    /// `synthesis.path` (and the recording plane's record) for the sidecar.
    fn sum_path(&self) -> Option<(&'static str, Option<RecordingPlaneRecord>)> {
        match self {
            Source::Points(_) => Some(("direct", None)),
            Source::Plane(p, _) => Some((
                "recording-plane",
                Some(RecordingPlaneRecord {
                    distance_mm: p.distance() * 1e3,
                    grid_margins_px: p.margins(),
                    band_rows: p.band_rows(),
                    edge_taper_from: crate::synthesis::recording_plane::TAPER_START,
                    method: "emitters summed on a plane parallel to the plate (supports weighted by a quintic smooth step from 80 % of the half band to the Nyquist limit), carried to the plate by a band-limited angular-spectrum step centred on the reference's frequency".into(),
                }),
            )),
            Source::Cell(..) => None,
        }
    }
    /// F for a band; returns the work done (point-pixel updates, or pixels).
    pub fn compute_band(
        &self,
        r0: usize,
        n: usize,
        out: &mut [Complex64],
        scratch: &mut BandScratch,
    ) -> u64 {
        match self {
            Source::Points(s) => s.compute_band(r0, n, out, scratch),
            Source::Plane(p, _) => p.compute_band(r0, n, out, scratch),
            Source::Cell(c, ..) => c.compute_band(r0, n, out),
        }
    }
    /// Estimated work of the whole plate, in the units of `compute_band`.
    pub fn estimate_updates(&self, max_rows: usize) -> f64 {
        match self {
            Source::Points(s) => s.estimate_updates(max_rows),
            Source::Plane(p, _) => p.estimate_cost(1.0, 0.0),
            Source::Cell(c, ..) => c.plate().pixels() as f64,
        }
    }
    /// Emitters that miss the plate.
    pub fn unreachable(&self) -> usize {
        match self {
            Source::Points(s) => s.unreachable(),
            Source::Plane(_, n) => *n,
            Source::Cell(..) => 0,
        }
    }
    /// Relative cost of rows [r0, r0 + n), for balancing shards.
    fn rows_work(&self, r0: usize, n: usize, cands: &mut Vec<u32>) -> f64 {
        let w = self.plate().width as f64;
        match self {
            Source::Points(sum) => {
                sum.candidates(r0, n, cands);
                let mid = r0 + n / 2;
                // Span lengths on the middle row, plus a per-pixel cost for the reference and encoding.
                let spans: usize = cands
                    .iter()
                    .filter_map(|&j| sum.row_span(j as usize, mid))
                    .map(|(a, b)| b - a)
                    .sum();
                (spans as f64 + 0.05 * w) * n as f64
            }
            Source::Plane(..) | Source::Cell(..) => w * n as f64,
        }
    }
    /// The sidecar's synthesis extras.
    fn sidecar_extra(&self) -> Option<crate::output::sidecar::IterativeRecord> {
        match self {
            Source::Points(_) | Source::Plane(..) => None,
            Source::Cell(_, rec, it) => Some(record::iterative_record(it, rec)),
        }
    }
}

/// Rows per band: about 4 MiB of complex field per band, at most 64 rows.
pub fn default_band_rows(width: u32) -> usize {
    ((4usize << 20) / (16 * width as usize)).clamp(1, 64)
}

/// B0 for the amplitude encoding: 3 x RMS of Re F over up to 16 evenly spread rows.
fn measure_bipolar_scale(sum: &Source) -> f64 {
    let p = *sum.plate();
    let w = p.width as usize;
    let n = (p.height as usize).min(16);
    let mut scratch = BandScratch::default();
    let mut buf = vec![Complex64::new(0.0, 0.0); w];
    let (mut acc, mut cnt) = (0.0f64, 0usize);
    for s in 0..n {
        let row = (s * p.height as usize) / n;
        sum.compute_band(row, 1, &mut buf, &mut scratch);
        acc += buf.iter().map(|f| f.re * f.re).sum::<f64>();
        cnt += w;
    }
    let rms = (acc / cnt as f64).sqrt();
    if rms > 0.0 && rms.is_finite() {
        3.0 * rms
    } else {
        1.0
    }
}

/// The TIFF layout a job writes.
pub fn tiff_layout(spec: &JobSpec, encoding: &Encoding) -> TiffLayout {
    let bits = encoding.bits_per_sample();
    TiffLayout {
        width: spec.plate.width,
        height: spec.plate.height,
        bits_per_sample: bits,
        compression: spec.compression,
        rows_per_strip: spec
            .rows_per_strip
            .unwrap_or_else(|| TiffLayout::default_rows_per_strip(spec.plate.width, bits)),
        pixel_pitch_m: (spec.plate.pitch[0], spec.plate.pitch[1]),
        software: format!("fringemill {}", env!("CARGO_PKG_VERSION")),
        description: Some(format!(
            "fringe pattern, {} encoding; parameters in the JSON sidecar",
            encoding.kind_name()
        )),
        bigtiff: spec.bigtiff,
    }
}

/// Sidecar path: the TIFF path with its extension replaced by `.json`.
pub fn sidecar_path(tiff: &Path) -> PathBuf {
    tiff.with_extension("json")
}

/// Rows per band: the largest divisor of the strip height not above [`default_band_rows`], so
/// that strips (the unit of checkpoints and shards) are whole numbers of bands.
fn band_rows_for(spec: &JobSpec, rows_per_strip: u32) -> usize {
    let target = spec
        .band_rows
        .unwrap_or_else(|| default_band_rows(spec.plate.width))
        .min(rows_per_strip as usize)
        .max(1);
    (1..=target)
        .rev()
        .find(|b| rows_per_strip as usize % b == 0)
        .unwrap_or(1)
}

/// Everything a run of one job needs, prepared once.
struct Prepared {
    source: Source,
    encoding: Encoding,
    layout: TiffLayout,
    emitters: usize,
    /// Effective rows per strip.
    rps: u32,
    band_rows: usize,
    /// Field files, when the job asks for them.
    fields: Option<FieldGrid>,
    /// Column ranges encoded separately: the field columns, or the whole width.
    blocks: Vec<(usize, usize)>,
    /// Rows of the unit shards are made of: a strip, or a field row.
    unit_rows: u32,
}

fn prepare(spec: &JobSpec, mode: ProgressMode) -> Result<Prepared> {
    let (sum, n) = match &spec.method {
        Method::PointSum => {
            let scene = build_scene(spec)?;
            let n = scene.normals.len();
            (choose_sum(spec, scene)?.0, n)
        }
        Method::Iterative(it) => {
            let (cell, rec) = build_cell(spec, it, mode)?;
            (Source::Cell(cell, rec, it.clone()), 0)
        }
    };
    let encoding = match &spec.encoding {
        EncodingRequest::Fixed(e) => e.clone(),
        EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude {
            bits: *bits,
            scale: measure_bipolar_scale(&sum),
        },
    };
    let mut layout = tiff_layout(spec, &encoding);
    // A source with its own band height (the recording plane pays its margins once per band)
    // gets strips of that height unless the job sets them.
    if let (Some(b), None, None) = (
        sum.preferred_band_rows(),
        spec.rows_per_strip,
        spec.field_px,
    ) {
        layout.rows_per_strip = b as u32;
    }
    let (fields, blocks, rps, unit_rows) = match spec.field_px {
        None => {
            let rps = layout.effective_rows_per_strip();
            (None, vec![(0, spec.plate.width as usize)], rps, rps)
        }
        Some([fw, fh]) => {
            // Strips must tile each field row exactly.
            let target = spec
                .rows_per_strip
                .unwrap_or_else(|| {
                    TiffLayout::default_rows_per_strip(fw, encoding.bits_per_sample())
                })
                .min(fh);
            let rps = (1..=target).rev().find(|r| fh % r == 0).unwrap_or(1);
            layout.rows_per_strip = rps;
            let grid = FieldGrid {
                field: [fw, fh],
                plate: spec.plate,
                output: spec.output.clone(),
                layout: layout.clone(),
            };
            let blocks = grid.column_blocks();
            (Some(grid), blocks, rps, fh)
        }
    };
    let band_rows = match (sum.preferred_band_rows(), spec.band_rows) {
        (Some(b), None) => {
            let target = b.min(rps as usize).max(1);
            (1..=target)
                .rev()
                .find(|d| rps as usize % d == 0)
                .unwrap_or(1)
        }
        _ => band_rows_for(spec, rps),
    };
    Ok(Prepared {
        source: sum,
        encoding,
        layout,
        emitters: n,
        rps,
        band_rows,
        fields,
        blocks,
        unit_rows,
    })
}

/// Number of shard units (strips, or field rows) of the plate.
fn unit_count(p: &Prepared) -> u32 {
    p.source.plate().height.div_ceil(p.unit_rows)
}

/// Contiguous strip ranges of the shards, balanced by estimated work (emitters cluster, so equal
/// row counts would not give equal times). Deterministic: every shard computes the same split.
pub fn shard_strips(sum: &Source, rps: u32, count: u32) -> Vec<(u32, u32)> {
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

/// Where one run writes its rows: the TIFF writer (whole plates), a raw part file (shards of a
/// single-file plate) or field files.
enum Sink {
    Tiff(StripWriter),
    Part {
        file: std::io::BufWriter<File>,
        path: PathBuf,
    },
    Fields(FieldSink),
}

/// What a checkpoint of a sink records in the journal.
type SinkState = (
    Option<crate::output::tiff::WriterState>,
    Option<FieldsState>,
);

impl Sink {
    /// Appends a band starting at plate row `row0`, one block of encoded rows per column block.
    fn write_band(&mut self, row0: u32, blocks: &[Vec<u8>]) -> Result<()> {
        match self {
            Sink::Tiff(w) => w.write_rows(&blocks[0]),
            Sink::Part { file, path } => {
                file.write_all(&blocks[0]).map_err(|e| Error::io(&*path, e))
            }
            Sink::Fields(f) => f.write_band(row0, blocks),
        }
    }
    /// Makes what was written durable; returns what the journal must record to continue.
    fn sync(&mut self) -> Result<SinkState> {
        match self {
            Sink::Tiff(w) => Ok((Some(w.checkpoint()?), None)),
            Sink::Part { file, path } => {
                file.flush()
                    .and_then(|_| file.get_ref().sync_data())
                    .map_err(|e| Error::io(&*path, e))?;
                Ok((None, None))
            }
            Sink::Fields(f) => Ok((None, Some(f.checkpoint()?))),
        }
    }
}

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

fn ensure_parent(path: &Path) -> Result<()> {
    if let Some(parent) = path.parent() {
        if !parent.as_os_str().is_empty() {
            std::fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
        }
    }
    Ok(())
}

/// Looks for an interrupted run of this output. Ok(Some(journal)) to continue; Ok(None) to start
/// afresh (no journal, or --restart); Err when the job changed and --restart was not given.
fn find_resume(
    spec: &JobSpec,
    data: &Path,
    journal: &Path,
    shard: Option<[u32; 2]>,
    restart: bool,
) -> Result<Option<Journal>> {
    if restart {
        // Also when the journal itself is damaged: --restart is the way out.
        let _ = std::fs::remove_file(data);
        let _ = std::fs::remove_file(journal);
        return Ok(None);
    }
    let Some(j) = Journal::read(journal)? else {
        return Ok(None);
    };
    if j.job_sha256 != spec.sha256 {
        return Err(Error::job(
            &spec.path,
            format!(
                "changed since the interrupted run in {} ({}); run again with --restart to discard the partial work",
                journal.display(),
                changed_key(&j.job_toml, &spec.text)
            ),
        ));
    }
    if j.shard != shard {
        return Err(Error::job(
            &spec.path,
            format!(
                "{} belongs to another shard split; run with --restart",
                journal.display()
            ),
        ));
    }
    if j.fields.is_none() && !data.exists() {
        let _ = std::fs::remove_file(journal);
        return Ok(None);
    }
    Ok(Some(j))
}

/// Runs one job end to end (or one shard of it). On any error nothing that looks finished is left
/// behind; after a checkpoint, the partial file and its journal stay so the same command continues.
pub fn run_job(spec: &JobSpec, opts: &RunOptions) -> Result<RunSummary> {
    let prep = prepare(spec, opts.progress)?;
    ensure_parent(&spec.output)?;
    let units = unit_count(&prep);
    let row_bytes = prep.encoding.row_bytes(spec.plate.width as usize);
    let (first_unit, end_unit) = match opts.shard {
        None => (0, units),
        Some(sh) => shard_strips(&prep.source, prep.unit_rows, sh.count)[sh.index as usize],
    };
    let shard_tag = opts.shard.map(|sh| [sh.index, sh.count]);
    // The file whose journal records progress: the TIFF, the shard's part, or the field manifest.
    let data_path = match (&prep.fields, opts.shard) {
        (None, None) => partial_path(&spec.output),
        (None, Some(sh)) => partial_path(&part_path(&spec.output, sh)),
        (Some(g), None) => partial_path(&g.manifest_path()),
        (Some(g), Some(sh)) => partial_path(&part_path(&g.manifest_path(), sh)),
    };
    let journal = journal_path(&data_path);
    let resume = find_resume(spec, &data_path, &journal, shard_tag, opts.restart)?;
    let first_row = first_unit * prep.unit_rows;
    let end_row = (end_unit * prep.unit_rows).min(spec.plate.height);
    let (rows_done, updates0) = resume
        .as_ref()
        .map(|j| (j.rows_done, j.updates))
        .unwrap_or((0, 0));
    // Room on disk for what remains.
    let remaining = match (&prep.fields, opts.shard) {
        (None, None) => prep.layout.estimated_file_bytes().saturating_sub(
            resume
                .as_ref()
                .and_then(|j| j.writer.as_ref())
                .map(|w| w.file_len)
                .unwrap_or(0),
        ),
        _ => (end_row - first_row - rows_done) as u64 * row_bytes as u64,
    };
    check_space(data_path.parent().unwrap_or(Path::new(".")), remaining)?;
    let mut sink = match (&prep.fields, &opts.shard, resume) {
        (Some(g), _, resumed) => Sink::Fields(FieldSink::new(
            g.clone(),
            first_row + rows_done,
            resumed.and_then(|j| j.fields),
        )?),
        (None, None, Some(j)) => {
            let state = j.writer.ok_or_else(|| {
                Error::input(&journal, "journal without writer state; run with --restart")
            })?;
            Sink::Tiff(StripWriter::resume(
                &spec.output,
                prep.layout.clone(),
                state,
            )?)
        }
        (None, None, None) => Sink::Tiff(StripWriter::create(&spec.output, prep.layout.clone())?),
        (None, Some(_), resumed) => {
            let mut f = OpenOptions::new()
                .create(true)
                .write(true)
                .truncate(resumed.is_none())
                .open(&data_path)
                .map_err(|e| Error::io(&data_path, e))?;
            let keep = rows_done as u64 * row_bytes as u64;
            f.set_len(keep)
                .and_then(|_| f.seek(SeekFrom::Start(keep)).map(|_| ()))
                .map_err(|e| Error::io(&data_path, e))?;
            Sink::Part {
                file: std::io::BufWriter::with_capacity(1 << 20, f),
                path: data_path.clone(),
            }
        }
    };
    let ctx = StreamCtx {
        spec,
        prep: &prep,
        journal: &journal,
        shard: shard_tag,
        rows: (first_row + rows_done, end_row),
        rows_before: rows_done,
        updates_before: updates0,
    };
    let streamed = stream_rows(&ctx, &mut sink, opts);
    let updates = match streamed {
        Ok(u) => u,
        Err(e) => {
            let checkpointed = journal.exists();
            if !checkpointed {
                match sink {
                    Sink::Tiff(w) => {
                        let _ = w.abandon();
                    }
                    Sink::Part { .. } => {
                        let _ = std::fs::remove_file(&data_path);
                    }
                    Sink::Fields(f) => f.abandon(),
                }
            }
            return Err(match e {
                Error::Interrupted(_) | Error::Job { .. } => e,
                other if checkpointed => Error::Interrupted(format!("{other}; stopped with the work so far saved in {}: fix the cause (e.g. free disk space) and run the same command again to continue", journal.display())),
                other => other,
            });
        }
    };
    match sink {
        Sink::Tiff(w) => {
            let summary = finish_plate(spec, &prep, w, updates)?;
            let _ = std::fs::remove_file(&journal);
            Ok(summary)
        }
        Sink::Part { mut file, path } => {
            file.flush()
                .and_then(|_| file.get_ref().sync_all())
                .map_err(|e| Error::io(&path, e))?;
            drop(file);
            let sh = opts.shard.expect("part sink only for shards");
            let final_part = part_path(&spec.output, sh);
            let meta = PartMeta {
                format: FORMAT.into(),
                job_sha256: spec.sha256.clone(),
                shard: [sh.index, sh.count],
                rows: [first_row, end_row],
                updates,
                row_bytes: row_bytes as u64,
                fields: Vec::new(),
            };
            std::fs::rename(&path, &final_part).map_err(|e| Error::io(&final_part, e))?;
            write_atomically(
                &part_meta_path(&final_part),
                &serde_json::to_vec_pretty(&meta).expect("plain data"),
            )?;
            let _ = std::fs::remove_file(&journal);
            Ok(RunSummary {
                tiff: final_part.clone(),
                sidecar: part_meta_path(&final_part),
                emitters: prep.emitters,
                updates,
                encoding: prep.encoding.clone(),
            })
        }
        Sink::Fields(mut f) => {
            f.finish_row()?;
            let grid = f.grid().clone();
            let entries = std::mem::take(&mut f.done);
            match opts.shard {
                Some(sh) => {
                    // A shard's fields are complete files already; its record lists them for assemble.
                    let rec = part_path(&grid.manifest_path(), sh);
                    let meta = PartMeta {
                        format: FORMAT.into(),
                        job_sha256: spec.sha256.clone(),
                        shard: [sh.index, sh.count],
                        rows: [first_row, end_row],
                        updates,
                        row_bytes: row_bytes as u64,
                        fields: entries,
                    };
                    write_atomically(&rec, &serde_json::to_vec_pretty(&meta).expect("plain data"))?;
                    let _ = std::fs::remove_file(&journal);
                    Ok(RunSummary {
                        tiff: rec.clone(),
                        sidecar: rec,
                        emitters: prep.emitters,
                        updates,
                        encoding: prep.encoding.clone(),
                    })
                }
                None => {
                    let summary = finish_fields(spec, &prep, &grid, &entries, updates)?;
                    let _ = std::fs::remove_file(&journal);
                    Ok(summary)
                }
            }
        }
    }
}

/// Finishes the single-file TIFF and writes its sidecar; if the sidecar fails, the TIFF is removed
/// too, so no plate stands without its record.
fn finish_plate(
    spec: &JobSpec,
    prep: &Prepared,
    writer: StripWriter,
    updates: u64,
) -> Result<RunSummary> {
    let finished = writer.finish()?;
    let sidecar = sidecar_path(&spec.output);
    let side = record::sidecar(
        spec,
        RunRecord {
            encoding: &prep.encoding,
            layout: &prep.layout,
            written: Written::Tiff(&finished),
            emitters: prep.emitters,
            unreachable: prep.source.unreachable(),
            updates,
            iterative: prep.source.sidecar_extra(),
            sum_path: prep.source.sum_path(),
        },
    );
    if let Err(e) = side.write(&sidecar) {
        let _ = std::fs::remove_file(&finished.path);
        return Err(e);
    }
    Ok(RunSummary {
        tiff: finished.path,
        sidecar,
        emitters: prep.emitters,
        updates,
        encoding: prep.encoding.clone(),
    })
}

/// Writes the field manifest and the plate's sidecar.
fn finish_fields(
    spec: &JobSpec,
    prep: &Prepared,
    grid: &FieldGrid,
    entries: &[FieldEntry],
    updates: u64,
) -> Result<RunSummary> {
    let manifest = grid.manifest_path();
    let text = serde_json::to_string_pretty(&manifest_json(grid, entries, &spec.sha256))
        .expect("plain data")
        + "\n";
    write_atomically(&manifest, text.as_bytes())?;
    let sidecar = sidecar_path(&spec.output);
    record::sidecar(
        spec,
        RunRecord {
            encoding: &prep.encoding,
            layout: &prep.layout,
            written: Written::Fields {
                manifest: &manifest,
                count: entries.len(),
                field_px: grid.field,
            },
            emitters: prep.emitters,
            unreachable: prep.source.unreachable(),
            updates,
            iterative: prep.source.sidecar_extra(),
            sum_path: prep.source.sum_path(),
        },
    )
    .write(&sidecar)?;
    Ok(RunSummary {
        tiff: manifest,
        sidecar,
        emitters: prep.emitters,
        updates,
        encoding: prep.encoding.clone(),
    })
}

/// Part file of a shard: `NAME.tif.part-K-of-N` (1-based K).
pub fn part_path(output: &Path, sh: Shard) -> PathBuf {
    let mut s = output.as_os_str().to_owned();
    s.push(format!(".part-{}-of-{}", sh.index + 1, sh.count));
    PathBuf::from(s)
}

fn part_meta_path(part: &Path) -> PathBuf {
    let mut s = part.as_os_str().to_owned();
    s.push(".json");
    PathBuf::from(s)
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
}

struct StreamCtx<'a> {
    spec: &'a JobSpec,
    prep: &'a Prepared,
    journal: &'a Path,
    shard: Option<[u32; 2]>,
    /// Rows [start, end) still to compute.
    rows: (u32, u32),
    rows_before: u32,
    updates_before: u64,
}

/// Computes rows in waves of whole strips, bands in parallel inside a wave, appends them in order,
/// and checkpoints (sink sync, then journal) between waves. Returns the total updates.
fn stream_rows(ctx: &StreamCtx, sink: &mut Sink, opts: &RunOptions) -> Result<u64> {
    let prep = ctx.prep;
    let plate = *prep.source.plate();
    let w = plate.width as usize;
    let (start, end) = ctx.rows;
    let band = prep.band_rows;
    let bands: Vec<(usize, usize)> = (start as usize..end as usize)
        .step_by(band)
        .map(|r| (r, band.min(end as usize - r)))
        .collect();
    let bands_per_strip = (prep.rps as usize).div_ceil(band);
    let strips_per_wave = (4 * rayon::current_num_threads())
        .div_ceil(bands_per_strip)
        .max(1);
    let wave = strips_per_wave * bands_per_strip;
    let total = prep.source.estimate_updates(64).max(1.0);
    let label = match ctx.shard {
        None => "plate".to_string(),
        Some([k, n]) => format!("plate, shard {}/{}", k + 1, n),
    };
    let mut progress = Progress::new(&label, total, opts.progress);
    if ctx.updates_before > 0 {
        progress.advance(ctx.updates_before as f64);
    }
    // Workers report each band as it is done (not each wave), so a long run shows progress
    // from its first band.
    let progress = std::sync::Mutex::new(progress);
    let lock_progress = || progress.lock().unwrap_or_else(|p| p.into_inner());
    let blocks = &prep.blocks;
    let mut updates = ctx.updates_before;
    let mut rows_done = ctx.rows_before;
    let mut last_checkpoint = Instant::now();
    let encoding = &prep.encoding;
    // Band buffers per worker thread, kept for the whole run: allocating them anew for each
    // piece of work rayon splits off cost a page fault per fresh page (a tenth of a fast run).
    let pool: Vec<std::sync::Mutex<(BandScratch, Vec<Complex64>)>> = (0
        ..rayon::current_num_threads() + 1)
        .map(|_| std::sync::Mutex::new((BandScratch::default(), Vec::new())))
        .collect();
    for chunk in bands.chunks(wave) {
        let done: Vec<Option<(usize, usize, Vec<Vec<u8>>, u64)>> = chunk
            .par_iter()
            .map(|&(r0, n)| {
                // After a stop request (Ctrl-C, SIGTERM) no band starts: the run stops once the
                // bands in flight are done, not the whole wave.
                if opts.stop.load(Ordering::SeqCst) {
                    return None;
                }
                let slot =
                    rayon::current_thread_index().map_or(pool.len() - 1, |i| i.min(pool.len() - 1));
                // A thread that takes up another band while its own waits inside nested parallel
                // work finds its slot held: it then works with buffers of its own.
                let (mut guard, mut fresh);
                let (scratch, field) = match pool[slot].try_lock() {
                    Ok(g) => {
                        guard = g;
                        &mut *guard
                    }
                    Err(std::sync::TryLockError::Poisoned(p)) => {
                        guard = p.into_inner();
                        &mut *guard
                    }
                    Err(std::sync::TryLockError::WouldBlock) => {
                        fresh = (BandScratch::default(), Vec::new());
                        &mut fresh
                    }
                };
                field.resize(n * w, Complex64::new(0.0, 0.0));
                let u = prep.source.compute_band(r0, n, field, scratch);
                let out = blocks
                    .iter()
                    .map(|&(c0, c1)| {
                        let rb = encoding.row_bytes(c1 - c0);
                        let mut bytes = vec![0u8; n * rb];
                        for (f, o) in field.chunks_exact(w).zip(bytes.chunks_exact_mut(rb)) {
                            encoding.encode_row(&f[c0..c1], o);
                        }
                        bytes
                    })
                    .collect();
                lock_progress().advance(u as f64);
                Some((r0, n, out, u))
            })
            .collect();
        // Bands are written in order: the whole wave, or after a stop the whole strips at its
        // start that are complete (the journal's unit); the rest is computed again on resume.
        let complete = done.iter().take_while(|d| d.is_some()).count();
        let keep = if complete == done.len() {
            complete
        } else {
            complete / bands_per_strip * bands_per_strip
        };
        for (r0, n, bytes, u) in done.into_iter().take(keep).flatten() {
            sink.write_band(r0 as u32, &bytes)?;
            updates += u;
            rows_done += n as u32;
        }
        let stop = opts.stop.load(Ordering::SeqCst);
        let finished = start - ctx.rows_before + rows_done >= end;
        if (stop || last_checkpoint.elapsed() >= opts.checkpoint_every) && !finished {
            let (writer, fields) = sink.sync()?;
            Journal {
                format: FORMAT.into(),
                job_sha256: ctx.spec.sha256.clone(),
                job_toml: ctx.spec.text.clone(),
                shard: ctx.shard,
                rows_done,
                updates,
                writer,
                fields,
            }
            .write(ctx.journal)?;
            last_checkpoint = Instant::now();
            if stop {
                progress
                    .into_inner()
                    .unwrap_or_else(|p| p.into_inner())
                    .abandon();
                return Err(Error::Interrupted(format!(
                    "interrupted after {rows_done} rows; the work so far is saved in {}: run the same command again to continue",
                    ctx.journal.display()
                )));
            }
        }
    }
    progress
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
        .finish();
    Ok(updates)
}

/// Streams the finished shards' part files into the plate's TIFF and writes its sidecar, then
/// removes the parts. All parts of one split (same N, same job) must be present.
pub fn assemble(spec: &JobSpec, opts: &RunOptions) -> Result<RunSummary> {
    let prep = prepare(spec, opts.progress)?;
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
    let mut writer = StripWriter::create(&spec.output, prep.layout.clone())?;
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
    let summary = finish_plate(spec, &prep, writer, updates)?;
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

/// `plan` for iterative synthesis: sizes and replay sampling, without iterating.
fn plan_iterative(spec: &JobSpec, it: &IterativeSpec) -> Result<PlanReport> {
    let p = spec.plate;
    let cell = it.cell_px.unwrap_or([p.width, p.height]);
    let mut lines = vec![
        format!("job: {}", spec.path.display()),
        format!("plate: {} x {} px, pitch {:.4} x {:.4} um, wavelength {:.2} nm", p.width, p.height, p.pitch[0] * 1e6, p.pitch[1] * 1e6, p.wavelength * 1e9),
        format!("iterative synthesis: {}, {} iterations at most, cell {} x {} px repeated over the plate", super::record::algorithm_name(it.algorithm), it.iterations, cell[0], cell[1]),
    ];
    if let super::spec::Geometry::Fourier(f) = it.geometry {
        lines.push(format!(
            "fourier geometry, f = {:.3} mm: replay pitch lambda f / (N p) = {:.3} x {:.3} um, replay field {:.3} x {:.3} mm",
            f * 1e3,
            p.wavelength * f / (cell[0] as f64 * p.pitch[0]) * 1e6,
            p.wavelength * f / (cell[1] as f64 * p.pitch[1]) * 1e6,
            p.wavelength * f / p.pitch[0] * 1e3,
            p.wavelength * f / p.pitch[1] * 1e3
        ));
    }
    if it.carrier_samples != [0, 0] || it.carrier_asked_deg != [0.0, 0.0] {
        lines.push(format!(
            "carrier: asked [{}, {}] deg, snapped to [{:.5}, {:.5}] deg = [{}, {}] whole samples of the plate's replay lattice (sin t = m lambda / (N p))",
            it.carrier_asked_deg[0],
            it.carrier_asked_deg[1],
            it.carrier[0].to_degrees(),
            it.carrier[1].to_degrees(),
            it.carrier_samples[0],
            it.carrier_samples[1]
        ));
    }
    for o in &spec.objects {
        let (w, h, _) = super::iterative::read_target(&o.points)?;
        lines.push(format!("target {}: {} x {} px", o.points.display(), w, h));
    }
    lines.extend(super::iterative::placement_warnings(spec, it)?);
    let layout = tiff_layout(
        spec,
        &match &spec.encoding {
            EncodingRequest::Fixed(e) => e.clone(),
            EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude {
                bits: *bits,
                scale: 1.0,
            },
        },
    );
    let bytes = layout.estimated_file_bytes();
    lines.push(format!(
        "output: {} ({:.3} MB)",
        spec.output.display(),
        bytes as f64 / 1e6
    ));
    Ok(PlanReport {
        lines,
        unreachable: 0,
        updates: p.pixels() as f64,
        bytes,
    })
}

/// What `plan` reports.
#[derive(Clone, Debug)]
pub struct PlanReport {
    /// Text lines for the user.
    pub lines: Vec<String>,
    /// Emitters whose support misses the plate.
    pub unreachable: usize,
    /// Estimated point-pixel updates.
    pub updates: f64,
    /// Estimated bytes on disk (uncompressed size for deflate).
    pub bytes: u64,
}

/// Validates a job without computing the plate and says what a run will do.
pub fn plan(spec: &JobSpec) -> Result<PlanReport> {
    if let Method::Iterative(it) = &spec.method {
        return plan_iterative(spec, it);
    }
    let scene = build_scene(spec)?;
    let emitters = scene.emitters();
    let p = spec.plate;
    let mut lines = Vec::new();
    let size = p.size();
    lines.push(format!("job: {}", spec.path.display()));
    lines.push(format!(
        "plate: {} x {} px = {:.3} Mpx, pitch {:.4} x {:.4} um, {:.3} x {:.3} mm, wavelength {:.2} nm",
        p.width,
        p.height,
        p.pixels() as f64 / 1e6,
        p.pitch[0] * 1e6,
        p.pitch[1] * 1e6,
        size[0] * 1e3,
        size[1] * 1e3,
        p.wavelength * 1e9
    ));
    let th = p.max_half_angle();
    lines.push(format!(
        "largest diffraction half-angle asin(lambda / 2p): {:.3} deg in x, {:.3} deg in y",
        th[0].to_degrees(),
        th[1].to_degrees()
    ));
    lines.push(format!("reference: {}", spec.reference.describe()));
    if let crate::optics::Reference::Plane { tilt } = spec.reference {
        for (axis, t, m) in [("x", tilt[0], th[0]), ("y", tilt[1], th[1])] {
            if t.abs() > m {
                lines.push(format!("warning: reference tilt in {axis} ({:.2} deg) exceeds the half-angle the pitch holds: the carrier aliases", t.to_degrees()));
            }
        }
    }
    let zs: Vec<f64> = {
        let mut z: Vec<f64> = emitters.iter().map(|e| e.pos[2]).collect();
        z.sort_by(f64::total_cmp);
        z
    };
    lines.push(format!(
        "emitters: {} from {} object(s) in {} channel(s)",
        emitters.len(),
        spec.objects.len(),
        scene.channels.len()
    ));
    lines.extend(scene.notes.iter().cloned());
    let n_channels = scene.channels.len();
    let (source, path_lines) = choose_sum(spec, scene)?;
    let sum = match &source {
        Source::Points(s) => s,
        _ => {
            // The direct sum's figures (supports, reach) are reported either way.
            &point_sum(spec, build_scene(spec)?)
        }
    };
    if !zs.is_empty() {
        for (name, z) in [
            ("nearest", zs[0]),
            ("median", zs[zs.len() / 2]),
            ("farthest", zs[zs.len() - 1]),
        ] {
            // Support half-widths on the foot row for a point on the axis at this depth.
            let b = p.nyquist_cosines();
            let rx = if b[0] >= 1.0 {
                f64::INFINITY
            } else {
                z * b[0] / (1.0 - b[0] * b[0]).sqrt()
            };
            let ry = if b[1] >= 1.0 {
                f64::INFINITY
            } else {
                z * b[1] / (1.0 - b[1] * b[1]).sqrt()
            };
            lines.push(format!(
                "support radius at {name} depth z = {:.3} mm: {:.3} mm in x, {:.3} mm in y (z tan theta_max, before the reference shifts it)",
                z * 1e3,
                rx * 1e3,
                ry * 1e3
            ));
        }
    }
    let unreachable = sum.unreachable();
    if unreachable > 0 {
        lines.push(format!("warning: {unreachable} emitter(s) lie outside the zone the plate can reproduce (no pixel passes the Nyquist test): they contribute nothing"));
    } else {
        lines.push("every emitter reaches the plate".into());
    }
    let updates = sum.estimate_updates(256);
    lines.push(format!(
        "work: about {:.3e} point-pixel updates ({:.1} per pixel on average)",
        updates,
        updates / p.pixels() as f64
    ));
    let tests = sum
        .occlusion()
        .map_or(0, |o| o.tests_needed(sum.row_ranges()));
    let mut visible_updates = updates;
    if let Some(o) = sum.occlusion() {
        let share = o.sampled_visible_share(sum.row_ranges(), 4000);
        visible_updates = updates * share;
        lines.push(format!(
            "occlusion: visibility tested from the centre of each {} x {} px tile (a grid fixed in plate pixels): about {:.3e} tests; about {:.0} % of emitter-tile pairs visible (4000 sampled), so about {:.3e} updates",
            o.tile()[0],
            o.tile()[1],
            tests as f64,
            share * 100.0,
            visible_updates
        ));
    }
    let threads = rayon::current_num_threads();
    let sep = spec.synthesis.approximation == Approximation::Fresnel
        && sum.occlusion().is_none()
        && n_channels == 1
        && matches!(spec.reference, crate::optics::Reference::Plane { .. });
    let per_update = super::estimate::seconds_per_update(
        spec.synthesis.approximation,
        spec.synthesis.precision,
        sep,
    );
    let secs = super::estimate::wall_seconds(
        visible_updates * per_update,
        tests as f64,
        p.pixels() as f64,
        threads,
    );
    lines.push(format!(
        "time: about {} on {threads} thread(s) for the direct sum ({:.2} ns per update, {:.1} us per visibility test, {:.0} ns per pixel written, per thread, as measured on the development machine: see BENCHMARKS.md)",
        super::estimate::human(secs),
        per_update * 1e9,
        super::estimate::SECONDS_PER_VISIBILITY_TEST * 1e6,
        super::estimate::SECONDS_PER_PIXEL_WRITTEN * 1e9
    ));
    lines.extend(path_lines);
    let encoding = match &spec.encoding {
        EncodingRequest::Fixed(e) => e.clone(),
        EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude {
            bits: *bits,
            scale: 1.0,
        },
    };
    let layout = tiff_layout(spec, &encoding);
    let bytes = layout.estimated_file_bytes();
    lines.push(format!(
        "output: {} ({} encoding, {} bit, {}, {:.3} MB{}{})",
        spec.output.display(),
        encoding.kind_name(),
        encoding.bits_per_sample(),
        match spec.compression {
            crate::output::tiff::Compression::None => "uncompressed",
            crate::output::tiff::Compression::Deflate => "deflate",
        },
        bytes as f64 / 1e6,
        if matches!(spec.compression, crate::output::tiff::Compression::Deflate) {
            " at most"
        } else {
            ""
        },
        if layout.uses_bigtiff() {
            ", BigTIFF"
        } else {
            ""
        }
    ));
    lines.push(format!("sidecar: {}", sidecar_path(&spec.output).display()));
    Ok(PlanReport {
        lines,
        unreachable,
        updates,
        bytes,
    })
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

    #[test]
    fn refuses_when_disk_lacks_room() {
        let d = std::env::temp_dir();
        assert!(check_space(&d, 1024).is_ok());
        let e = check_space(&d, u64::MAX / 4).unwrap_err().to_string();
        assert!(e.contains("not enough free space"), "{e}");
    }
}
