//! Streaming a plate: bands computed in parallel, encoded, appended in order to the sink (TIFF,
//! part file or field files) with checkpoints, and the finished plate's sidecar.

use std::fs::File;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::Ordering;
use std::time::Instant;

use num_complex::Complex64;
use rayon::prelude::*;

use super::fields::{FieldEntry, FieldGrid, FieldSink, FieldsState};
use super::journal::{Journal, FORMAT};
use super::prepare::{sidecar_path, Prepared};
use super::progress::Progress;
use super::record::{self, RunRecord, Written};
use super::run::{RunOptions, RunSummary};
use super::spec::JobSpec;
use crate::error::{Error, Result};
use crate::output::atomic::write_atomically;
use crate::output::tiff::StripWriter;
use crate::synthesis::point_sum::BandScratch;

/// Where one run writes its rows: the TIFF writer (whole plates), a raw part file (shards of a
/// single-file plate) or field files.
pub(super) enum Sink {
    Tiff(StripWriter),
    Png(crate::output::panel_png::PanelWriter),
    Gds(crate::output::gdsii::GdsWriter),
    Part {
        file: std::io::BufWriter<File>,
        path: PathBuf,
        /// Checksums of the rows written between checkpoints.
        hasher: crate::output::chunks::ChunkHasher,
        /// Bytes in the file.
        len: u64,
    },
    Fields(FieldSink),
}

/// What a checkpoint of a sink records in the journal.
type SinkState = (
    Option<crate::output::tiff::WriterState>,
    Option<FieldsState>,
    Option<crate::output::gdsii::GdsState>,
    Vec<crate::output::chunks::Chunk>,
);

impl Sink {
    /// Appends a band starting at plate row `row0`, one block of encoded rows per column block.
    pub(super) fn write_band(&mut self, row0: u32, blocks: &[Vec<u8>]) -> Result<()> {
        match self {
            Sink::Fields(f) => f.write_band(row0, blocks),
            _ => self.write_rows(&blocks[0]),
        }
    }
    /// Appends whole plate rows to a single-file sink (a band, or assembly of shards).
    pub(super) fn write_rows(&mut self, rows: &[u8]) -> Result<()> {
        match self {
            Sink::Tiff(w) => w.write_rows(rows),
            Sink::Gds(w) => w.write_rows(rows),
            Sink::Png(w) => w.write_rows(rows),
            Sink::Part {
                file,
                path,
                hasher,
                len,
            } => {
                hasher.update(rows);
                *len += rows.len() as u64;
                file.write_all(rows).map_err(|e| Error::io(&*path, e))
            }
            Sink::Fields(f) => Err(Error::job(
                f.grid().manifest_path(),
                "field sinks take bands, not plate rows",
            )),
        }
    }
    /// Whether writing a band at plate row `row0` publishes a finished field row first.
    pub(super) fn closes_field_row(&self, row0: u32) -> bool {
        match self {
            Sink::Fields(f) => f.closes_row(row0),
            _ => false,
        }
    }
    /// Makes what was written durable; returns what the journal must record to continue.
    pub(super) fn sync(&mut self) -> Result<SinkState> {
        match self {
            Sink::Tiff(w) => Ok((Some(w.checkpoint()?), None, None, Vec::new())),
            Sink::Gds(w) => Ok((None, None, Some(w.checkpoint()?), Vec::new())),
            // Never called: PNG runs keep no journal (`stream_rows`).
            Sink::Png(_) => Ok((None, None, None, Vec::new())),
            Sink::Part {
                file,
                path,
                hasher,
                len,
            } => {
                file.flush()
                    .and_then(|_| file.get_ref().sync_data())
                    .map_err(|e| Error::io(&*path, e))?;
                Ok((None, None, None, hasher.checkpoint(*len)))
            }
            Sink::Fields(f) => Ok((None, Some(f.checkpoint()?), None, Vec::new())),
        }
    }
}

/// A band computed and encoded: first row, rows, encoded bytes per column block, work done.
type EncodedBand = (usize, usize, Vec<Vec<u8>>, u64);

pub(super) struct StreamCtx<'a> {
    pub spec: &'a JobSpec,
    pub prep: &'a Prepared,
    pub journal: &'a Path,
    pub shard: Option<[u32; 2]>,
    /// Rows [start, end) still to compute.
    pub rows: (u32, u32),
    pub rows_before: u32,
    /// The inputs' hashes, for the journal.
    pub inputs: Vec<super::journal::InputHash>,
    pub updates_before: u64,
}

/// Computes rows in waves of whole strips, bands in parallel inside a wave, appends them in order,
/// and checkpoints (sink sync, then journal) between waves. Returns the total updates.
pub(super) fn stream_rows(ctx: &StreamCtx, sink: &mut Sink, opts: &RunOptions) -> Result<u64> {
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
    // Progress counts each band's expected work (the sum of its emitters' support spans, before
    // occlusion), not the updates it did: occlusion skips an unknown share of them, and a total
    // of unoccluded updates then never fills (the ETA came out 3-12x long on occluded jobs).
    // The rows this run resumes after count as done.
    let first_row = start as usize - ctx.rows_before as usize;
    let band_work: Vec<f64> = (first_row..end as usize)
        .step_by(band)
        .collect::<Vec<_>>()
        .par_iter()
        .map_init(Vec::new, |cands, &r| {
            prep.source.rows_work(r, band.min(end as usize - r), cands)
        })
        .collect();
    let work_of = |r0: usize| band_work[(r0 - first_row) / band];
    let total: f64 = band_work.iter().sum::<f64>().max(1.0);
    let label = match ctx.shard {
        None => "plate".to_string(),
        Some([k, n]) => format!("plate, shard {}/{}", k + 1, n),
    };
    let mut progress = Progress::new(&label, total, opts.progress);
    if ctx.rows_before > 0 {
        progress.skip(
            band_work[..(ctx.rows_before as usize).div_ceil(band)]
                .iter()
                .sum(),
        );
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
        let done: Vec<Option<EncodedBand>> = chunk
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
                lock_progress().advance(work_of(r0));
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
            // A field row's files are published (renamed from their partials) when the next
            // row starts; the journal must say first that the row is complete, or a kill right
            // after the renames leaves a journal pointing into partials that are gone.
            if sink.closes_field_row(r0 as u32) {
                checkpoint(ctx, sink, rows_done, updates)?;
                last_checkpoint = Instant::now();
            }
            sink.write_band(r0 as u32, &bytes)?;
            updates += u;
            rows_done += n as u32;
        }
        let stop = opts.stop.load(Ordering::SeqCst);
        let finished = start - ctx.rows_before + rows_done >= end;
        // The last field row is published by the caller: the journal says first that it is
        // complete (see above).
        // A PNG is encoded whole at the end: its runs keep no journal and restart.
        let due = if finished {
            matches!(sink, Sink::Fields(_))
        } else {
            !matches!(sink, Sink::Png(_))
                && (stop || last_checkpoint.elapsed() >= opts.checkpoint_every)
        };
        if due {
            checkpoint(ctx, sink, rows_done, updates)?;
            last_checkpoint = Instant::now();
        }
        if stop && !finished {
            progress
                .into_inner()
                .unwrap_or_else(|p| p.into_inner())
                .abandon();
            if matches!(sink, Sink::Png(_)) {
                return Err(Error::Interrupted(format!(
                    "interrupted after {rows_done} rows; a PNG is written whole, so the same command starts again"
                )));
            }
            return Err(Error::Interrupted(format!(
                "interrupted after {rows_done} rows; the work so far is saved in {}: run the same command again to continue",
                ctx.journal.display()
            )));
        }
    }
    progress
        .into_inner()
        .unwrap_or_else(|p| p.into_inner())
        .finish();
    Ok(updates)
}

/// Syncs the sink and writes the journal: the run can continue from here.
fn checkpoint(ctx: &StreamCtx, sink: &mut Sink, rows_done: u32, updates: u64) -> Result<()> {
    let (writer, fields, gds, part_chunks) = sink.sync()?;
    Journal {
        part_chunks,
        gds,
        format: FORMAT.into(),
        job_sha256: ctx.spec.sha256.clone(),
        job_toml: ctx.spec.text.clone(),
        shard: ctx.shard,
        rows_done,
        updates,
        writer,
        fields,
        inputs: ctx.inputs.clone(),
    }
    .write(ctx.journal)
}

/// Finishes the single-file TIFF and writes its sidecar ([`publish_with_sidecar`]).
pub(super) fn finish_plate(
    spec: &JobSpec,
    prep: &Prepared,
    writer: StripWriter,
    updates: u64,
) -> Result<RunSummary> {
    let done = writer.finish_unpublished()?.tiff;
    publish_with_sidecar(spec, prep, Written::Tiff(&done), &done.path, updates)
}

/// Writes the panel PNG and its sidecar ([`publish_with_sidecar`]).
pub(super) fn finish_png(
    spec: &JobSpec,
    prep: &Prepared,
    writer: crate::output::panel_png::PanelWriter,
    updates: u64,
) -> Result<RunSummary> {
    let done = writer.finish_unpublished()?;
    publish_with_sidecar(spec, prep, Written::Png(&done), &done.path, updates)
}

/// Finishes a GDSII layout and writes its sidecar ([`publish_with_sidecar`]).
pub(super) fn finish_gds(
    spec: &JobSpec,
    prep: &Prepared,
    writer: crate::output::gdsii::GdsWriter,
    updates: u64,
) -> Result<RunSummary> {
    let done = writer.finish_unpublished()?.gds;
    publish_with_sidecar(spec, prep, Written::Gds(&done), &done.path, updates)
}

/// Publishes a complete output waiting under its partial name (`NAME.partial`, synced and
/// hashed) together with its sidecar: the sidecar is written under a partial name too, then both
/// are renamed, the output first, and the folder synced. A failure before the renames keeps the
/// previous output and sidecar of these names (and removes the new partials); a stop between the
/// two renames leaves a new output with the old sidecar, which `reconstruct` refuses (the
/// sidecar's SHA-256 of the file).
fn publish_with_sidecar(
    spec: &JobSpec,
    prep: &Prepared,
    written: Written,
    output: &Path,
    updates: u64,
) -> Result<RunSummary> {
    let partial = crate::output::tiff::partial_path(output);
    let sidecar = sidecar_path(&spec.output);
    let side = record::sidecar(spec, run_record(prep, written, updates));
    let side_partial = crate::output::tiff::partial_path(&sidecar);
    if let Err(e) = side.write(&side_partial) {
        let _ = std::fs::remove_file(&partial);
        let _ = std::fs::remove_file(&side_partial);
        return Err(e);
    }
    if let Err(e) = std::fs::rename(&partial, output) {
        let _ = std::fs::remove_file(&side_partial);
        return Err(Error::io(output, e));
    }
    std::fs::rename(&side_partial, &sidecar).map_err(|e| Error::io(&sidecar, e))?;
    crate::output::tiff::sync_parent_dir(&sidecar)?;
    Ok(RunSummary {
        tiff: output.to_path_buf(),
        sidecar,
        emitters: prep.emitters,
        updates,
        encoding: prep.encoding.clone(),
    })
}

/// Writes the field manifest and the plate's sidecar.
pub(super) fn finish_fields(
    spec: &JobSpec,
    prep: &Prepared,
    grid: &FieldGrid,
    entries: &[FieldEntry],
    updates: u64,
) -> Result<RunSummary> {
    let manifest = grid.manifest_path();
    let text = super::fields::manifest(grid, entries, &spec.sha256).to_text() + "\n";
    let manifest_sha256: String = {
        use sha2::Digest;
        sha2::Sha256::digest(text.as_bytes())
            .iter()
            .map(|b| format!("{b:02x}"))
            .collect()
    };
    // Manifest and sidecar both under partial names first, then renamed together: a failure
    // before the renames keeps the previous pair, and the sidecar names its manifest's SHA-256.
    let manifest_partial = crate::output::tiff::partial_path(&manifest);
    write_atomically(&manifest_partial, text.as_bytes())?;
    let sidecar = sidecar_path(&spec.output);
    let side_partial = crate::output::tiff::partial_path(&sidecar);
    let side = record::sidecar(
        spec,
        run_record(
            prep,
            Written::Fields {
                manifest: &manifest,
                manifest_sha256: &manifest_sha256,
                count: entries.len(),
                field_px: grid.field,
            },
            updates,
        ),
    );
    if let Err(e) = side.write(&side_partial) {
        let _ = std::fs::remove_file(&manifest_partial);
        let _ = std::fs::remove_file(&side_partial);
        return Err(e);
    }
    std::fs::rename(&manifest_partial, &manifest).map_err(|e| Error::io(&manifest, e))?;
    std::fs::rename(&side_partial, &sidecar).map_err(|e| Error::io(&sidecar, e))?;
    crate::output::tiff::sync_parent_dir(&sidecar)?;
    Ok(RunSummary {
        tiff: manifest,
        sidecar,
        emitters: prep.emitters,
        updates,
        encoding: prep.encoding.clone(),
    })
}

/// What the sidecar records of a finished run.
fn run_record<'a>(prep: &'a Prepared, written: Written<'a>, updates: u64) -> RunRecord<'a> {
    RunRecord {
        encoding: &prep.encoding,
        layout: &prep.layout,
        written,
        emitters: prep.emitters,
        unreachable: prep.source.unreachable(),
        updates,
        iterative: prep
            .iteration
            .as_ref()
            .map(|(rec, it)| record::iterative_record(it, rec)),
        sum_path: record::path_record(&prep.source.path()),
    }
}
