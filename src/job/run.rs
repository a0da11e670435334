//! Running a job end to end: the synthesis path prepared, the plate streamed strip by strip with
//! its sidecar, resumed from a journal after an interruption, or one shard of it computed.

use std::fs::OpenOptions;
use std::io::{Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::time::Duration;

use super::fields::FieldSink;
use super::journal::{journal_path, Journal};
use super::prepare::{prepare, unit_count, Prepared};
use super::progress::ProgressMode;
use super::resume::find_resume;
use super::scene::build_scene;
use super::shard::{part_meta_path, part_path, shard_strips, write_part_record, Shard};
use super::space::{check_space, ensure_parent};
use super::spec::JobSpec;
use super::stream::{finish_fields, finish_plate, stream_rows, Sink, StreamCtx};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::output::tiff::{partial_path, StripWriter};
use crate::synthesis::Emitter;

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

/// Checks a job's outputs against its inputs and special files, before any work, and takes the
/// output's lock (a shard locks its own part, so the shards of a split run side by side).
pub(super) fn guard_outputs(
    spec: &JobSpec,
    shard: Option<Shard>,
) -> Result<crate::output::guard::OutputLock> {
    let inputs = spec.inputs();
    if super::prepare::sidecar_path(&spec.output) == spec.output {
        return Err(Error::job(
            &spec.path,
            format!(
                "[output] path = \"{}\" would be its own sidecar (NAME.json): name the plate NAME.tif",
                spec.output.display()
            ),
        ));
    }
    crate::output::guard::check_output(&spec.output, "output plate", &inputs)?;
    crate::output::guard::check_output(
        &super::prepare::sidecar_path(&spec.output),
        "plate's sidecar",
        &inputs,
    )?;
    if let Some(sh) = shard {
        crate::output::guard::check_output(&part_path(&spec.output, sh), "shard's part", &inputs)?;
    }
    if let Some(parent) = spec.output.parent().filter(|p| !p.as_os_str().is_empty()) {
        if parent.exists() && !parent.is_dir() {
            return Err(Error::job(
                &spec.output,
                format!("{} is not a folder", parent.display()),
            ));
        }
    }
    ensure_parent(&spec.output)?;
    crate::output::guard::lock_output(&match shard {
        Some(sh) => part_path(&spec.output, sh),
        None => spec.output.clone(),
    })
}

/// All emitters of a job in summation order (every channel), placed in plate coordinates.
pub fn build_emitters(spec: &JobSpec) -> Result<Vec<Emitter>> {
    Ok(build_scene(spec)?.emitters())
}

/// Runs one job end to end (or one shard of it). On any error nothing that looks finished is left
/// behind; after a checkpoint, the partial file and its journal stay so the same command continues.
pub fn run_job(spec: &JobSpec, opts: &RunOptions) -> Result<RunSummary> {
    let _lock = guard_outputs(spec, opts.shard)?;
    let prep = prepare(spec, opts.progress)?;
    let units = unit_count(&prep);
    let row_bytes = prep.encoding.row_bytes(spec.plate.width as usize);
    let (first_unit, end_unit) = match opts.shard {
        None => (0, units),
        Some(sh) => shard_strips(&*prep.source, prep.unit_rows, sh.count)[sh.index as usize],
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
    let inputs = super::journal::input_hashes(spec)?;
    let resume = find_resume(spec, &data_path, &journal, shard_tag, opts.restart, &inputs)?;
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
    let mut sink = open_sink(
        spec,
        &prep,
        opts,
        resume,
        &data_path,
        &journal,
        first_row + rows_done,
        rows_done,
        row_bytes,
    )?;
    let ctx = StreamCtx {
        spec,
        prep: &prep,
        journal: &journal,
        shard: shard_tag,
        rows: (first_row + rows_done, end_row),
        rows_before: rows_done,
        updates_before: updates0,
        inputs,
    };
    let updates = match stream_rows(&ctx, &mut sink, opts) {
        Ok(u) => u,
        Err(e) => return Err(stopped(sink, e, &journal, &data_path)),
    };
    let summary = finish_sink(
        spec,
        &prep,
        opts,
        sink,
        [first_row, end_row],
        updates,
        row_bytes,
    )?;
    // Done: the journal (none for a PNG) has nothing left to resume.
    let _ = std::fs::remove_file(&journal);
    Ok(summary)
}

/// The sink a run writes to: field files, a panel PNG, a GDSII layout, the TIFF (each new or
/// reopened at the journal's state), or a shard's part file cut back to its checkpoint.
#[allow(clippy::too_many_arguments)]
fn open_sink(
    spec: &JobSpec,
    prep: &Prepared,
    opts: &RunOptions,
    resume: Option<Journal>,
    data_path: &Path,
    journal: &Path,
    start_row: u32,
    rows_done: u32,
    row_bytes: usize,
) -> Result<Sink> {
    Ok(match (&prep.fields, &opts.shard, resume) {
        (Some(g), _, resumed) => Sink::Fields(FieldSink::new(
            g.clone(),
            start_row,
            resumed.and_then(|j| j.fields),
        )?),
        (None, Some(_), _) if prep.png.is_some() => {
            return Err(Error::job(
                &spec.path,
                "[output] format = \"png\" is written by one process: no --shard (write TIFF parts, or run it whole)",
            ))
        }
        (None, None, _) if prep.png.is_some() => Sink::Png(crate::output::panel_png::PanelWriter::new(
            &spec.output,
            prep.png.clone().expect("checked"),
        )),
        (None, None, Some(j)) if prep.gds.is_some() => {
            let state = j.gds.ok_or_else(|| {
                Error::input(
                    journal,
                    "journal without GDSII writer state; run with --restart",
                )
            })?;
            Sink::Gds(crate::output::gdsii::GdsWriter::resume(
                &spec.output,
                prep.gds.clone().expect("checked"),
                state,
            )?)
        }
        (None, None, None) if prep.gds.is_some() => {
            Sink::Gds(crate::output::gdsii::GdsWriter::create(
                &spec.output,
                prep.gds.clone().expect("checked"),
            )?)
        }
        (None, None, Some(j)) => {
            let state = j.writer.ok_or_else(|| {
                Error::input(journal, "journal without writer state; run with --restart")
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
                .read(true)
                .write(true)
                .truncate(resumed.is_none())
                .open(data_path)
                .map_err(|e| Error::io(data_path, e))?;
            let chunks = resumed.map(|j| j.part_chunks).unwrap_or_default();
            let keep = rows_done as u64 * row_bytes as u64;
            if chunks.last().is_some_and(|c| c.end != keep) {
                return Err(Error::input(
                    journal,
                    "resume journal: the part's checksums do not end at its rows; rerun with --restart",
                ));
            }
            crate::output::chunks::verify(data_path, &mut f, &chunks)?;
            f.set_len(keep)
                .and_then(|_| f.seek(SeekFrom::Start(keep)).map(|_| ()))
                .map_err(|e| Error::io(data_path, e))?;
            Sink::Part {
                file: std::io::BufWriter::with_capacity(1 << 20, f),
                path: data_path.to_path_buf(),
                hasher: crate::output::chunks::ChunkHasher::starting_at(keep, chunks),
                len: keep,
            }
        }
    })
}

/// What a failed or stopped stream leaves: without a checkpoint the partial files go; with one
/// they stay, and a failure other than a stop says how to continue.
fn stopped(sink: Sink, e: Error, journal: &Path, data_path: &Path) -> Error {
    let checkpointed = journal.exists();
    if !checkpointed {
        match sink {
            Sink::Tiff(w) => {
                let _ = w.abandon();
            }
            Sink::Gds(w) => {
                let _ = w.abandon();
            }
            Sink::Png(_) => {}
            Sink::Part { .. } => {
                let _ = std::fs::remove_file(data_path);
            }
            Sink::Fields(f) => f.abandon(),
        }
    }
    match e {
        Error::Interrupted(_) | Error::Job { .. } => e,
        other if checkpointed => Error::Interrupted(format!("{other}; stopped with the work so far saved in {}: fix the cause (e.g. free disk space) and run the same command again to continue", journal.display())),
        other => other,
    }
}

/// Finishes the sink: the plate, layout or PNG with its sidecar, a shard's part with its record,
/// or the fields with their manifest (a shard's: their record).
fn finish_sink(
    spec: &JobSpec,
    prep: &Prepared,
    opts: &RunOptions,
    sink: Sink,
    [first_row, end_row]: [u32; 2],
    updates: u64,
    row_bytes: usize,
) -> Result<RunSummary> {
    match sink {
        Sink::Tiff(w) => finish_plate(spec, prep, w, updates),
        Sink::Gds(w) => super::stream::finish_gds(spec, prep, w, updates),
        Sink::Png(w) => super::stream::finish_png(spec, prep, w, updates),
        Sink::Part { mut file, path, .. } => {
            file.flush()
                .and_then(|_| file.get_ref().sync_all())
                .map_err(|e| Error::io(&path, e))?;
            drop(file);
            let sh = opts.shard.expect("part sink only for shards");
            let final_part = part_path(&spec.output, sh);
            std::fs::rename(&path, &final_part).map_err(|e| Error::io(&final_part, e))?;
            let (_, sha) = crate::output::tiff::hash_path(&final_part)?;
            write_part_record(
                spec,
                sh,
                &part_meta_path(&final_part),
                [first_row, end_row],
                updates,
                row_bytes,
                Vec::new(),
                Some(sha),
            )?;
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
                    write_part_record(
                        spec,
                        sh,
                        &rec,
                        [first_row, end_row],
                        updates,
                        row_bytes,
                        entries,
                        None,
                    )?;
                    Ok(RunSummary {
                        tiff: rec.clone(),
                        sidecar: rec,
                        emitters: prep.emitters,
                        updates,
                        encoding: prep.encoding.clone(),
                    })
                }
                None => finish_fields(spec, prep, &grid, &entries, updates),
            }
        }
    }
}
