//! Running a job: emitters from the objects, the point sum band by band in parallel, encoding,
//! and the TIFF streamed strip by strip with its sidecar. Also `plan`: what a run would do.

use std::path::{Path, PathBuf};

use num_complex::Complex64;
use rayon::prelude::*;

use super::progress::{Progress, ProgressMode};
use super::spec::{EncodingRequest, JobSpec};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::output::sidecar::{self, SidecarInput};
use crate::output::tiff::{StripWriter, TiffLayout};
use crate::scene::points::read_points;
use crate::synthesis::point_sum::{BandScratch, PointSum};
use crate::synthesis::Emitter;

/// Options of a run that are not part of the job.
#[derive(Clone, Copy, Debug)]
pub struct RunOptions {
    /// Progress display.
    pub progress: ProgressMode,
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

/// Reads every object's points and places them: p = scale * p_file + offset, in metres.
/// Errors name the file and point of any emitter that lands at z <= 0.
pub fn build_emitters(spec: &JobSpec) -> Result<Vec<Emitter>> {
    let mut out = Vec::new();
    for o in &spec.objects {
        let pts = read_points(&o.points)?;
        for (i, p) in pts.iter().enumerate() {
            let pos = [p.x_mm * 1e-3 * o.scale + o.offset[0], p.y_mm * 1e-3 * o.scale + o.offset[1], p.z_mm * 1e-3 * o.scale + o.offset[2]];
            if !(pos[2] > 0.0) {
                return Err(Error::job(
                    &spec.path,
                    format!(
                        "point {} of {} lands at z = {} mm after scale and offset_mm; points must sit in front of the plate (z > 0)",
                        i,
                        o.points.display(),
                        pos[2] * 1e3
                    ),
                ));
            }
            out.push(Emitter { pos, amplitude: p.amplitude * o.gain, phase: p.phase_rad });
        }
    }
    Ok(out)
}

/// Rows per band: about 4 MiB of complex field per band, at most 64 rows.
pub fn default_band_rows(width: u32) -> usize {
    ((4usize << 20) / (16 * width as usize)).clamp(1, 64)
}

/// B0 for the amplitude encoding: 3 x RMS of Re F over up to 16 evenly spread rows.
fn measure_bipolar_scale(sum: &PointSum) -> f64 {
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
        rows_per_strip: spec.rows_per_strip.unwrap_or_else(|| TiffLayout::default_rows_per_strip(spec.plate.width, bits)),
        pixel_pitch_m: (spec.plate.pitch[0], spec.plate.pitch[1]),
        software: format!("fringemill {}", env!("CARGO_PKG_VERSION")),
        description: Some(format!("fringe pattern, {} encoding; parameters in the JSON sidecar", encoding.kind_name())),
        bigtiff: spec.bigtiff,
    }
}

/// Sidecar path: the TIFF path with its extension replaced by `.json`.
pub fn sidecar_path(tiff: &Path) -> PathBuf {
    tiff.with_extension("json")
}

/// Runs one job end to end. On any error nothing that looks finished is left behind.
pub fn run_job(spec: &JobSpec, opts: &RunOptions) -> Result<RunSummary> {
    let emitters = build_emitters(spec)?;
    let n_emitters = emitters.len();
    let sum = PointSum::new(spec.plate, spec.reference, emitters, spec.synthesis);
    let encoding = match spec.encoding {
        EncodingRequest::Fixed(e) => e,
        EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude { bits, scale: measure_bipolar_scale(&sum) },
    };
    if let Some(parent) = spec.output.parent() {
        if !parent.as_os_str().is_empty() {
            std::fs::create_dir_all(parent).map_err(|e| Error::io(parent, e))?;
        }
    }
    let layout = tiff_layout(spec, &encoding);
    let mut writer = StripWriter::create(&spec.output, layout.clone())?;
    let streamed = stream_plate(&sum, &encoding, &mut writer, opts);
    let updates = match streamed {
        Ok(u) => u,
        Err(e) => {
            let _ = writer.abandon();
            return Err(e);
        }
    };
    let finished = writer.finish()?;
    let sidecar = sidecar_path(&spec.output);
    let input = SidecarInput { spec, encoding: &encoding, layout: &layout, tiff: &finished, emitters: n_emitters, unreachable: sum.unreachable(), updates };
    if let Err(e) = sidecar::write(&sidecar, &input) {
        let _ = std::fs::remove_file(&finished.path);
        return Err(e);
    }
    Ok(RunSummary { tiff: finished.path, sidecar, emitters: n_emitters, updates, encoding })
}

/// Computes every band, in parallel waves, and appends them in order to the writer.
fn stream_plate(sum: &PointSum, encoding: &Encoding, writer: &mut StripWriter, opts: &RunOptions) -> Result<u64> {
    let plate = *sum.plate();
    let w = plate.width as usize;
    let h = plate.height as usize;
    let band = default_band_rows(plate.width);
    let bands: Vec<(usize, usize)> = (0..h).step_by(band).map(|r| (r, band.min(h - r))).collect();
    let wave = 4 * rayon::current_num_threads();
    let total = sum.estimate_updates(64).max(1.0);
    let mut progress = Progress::new("point sum", total, opts.progress);
    let row_bytes = encoding.row_bytes(w);
    let mut updates = 0u64;
    for chunk in bands.chunks(wave) {
        let done: Vec<(Vec<u8>, u64)> = chunk
            .par_iter()
            .map_init(
                || (BandScratch::default(), Vec::<Complex64>::new()),
                |(scratch, field), &(r0, n)| {
                    field.resize(n * w, Complex64::new(0.0, 0.0));
                    let u = sum.compute_band(r0, n, field, scratch);
                    let mut bytes = vec![0u8; n * row_bytes];
                    for (f, o) in field.chunks_exact(w).zip(bytes.chunks_exact_mut(row_bytes)) {
                        encoding.encode_row(f, o);
                    }
                    (bytes, u)
                },
            )
            .collect();
        for (bytes, u) in done {
            writer.write_rows(&bytes)?;
            updates += u;
            progress.advance(u as f64);
        }
    }
    progress.finish();
    Ok(updates)
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
    let emitters = build_emitters(spec)?;
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
    lines.push(format!("largest diffraction half-angle asin(lambda / 2p): {:.3} deg in x, {:.3} deg in y", th[0].to_degrees(), th[1].to_degrees()));
    lines.push(format!("reference: {:?}", spec.reference));
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
    lines.push(format!("emitters: {} from {} object(s)", emitters.len(), spec.objects.len()));
    let sum = PointSum::new(p, spec.reference, emitters, spec.synthesis);
    if !zs.is_empty() {
        for (name, z) in [("nearest", zs[0]), ("median", zs[zs.len() / 2]), ("farthest", zs[zs.len() - 1])] {
            // Support half-widths on the foot row for a point on the axis at this depth.
            let b = p.nyquist_cosines();
            let rx = if b[0] >= 1.0 { f64::INFINITY } else { z * b[0] / (1.0 - b[0] * b[0]).sqrt() };
            let ry = if b[1] >= 1.0 { f64::INFINITY } else { z * b[1] / (1.0 - b[1] * b[1]).sqrt() };
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
    lines.push(format!("work: about {:.3e} point-pixel updates ({:.1} per pixel on average)", updates, updates / p.pixels() as f64));
    let encoding = match spec.encoding {
        EncodingRequest::Fixed(e) => e,
        EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude { bits, scale: 1.0 },
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
        if matches!(spec.compression, crate::output::tiff::Compression::Deflate) { " at most" } else { "" },
        if layout.uses_bigtiff() { ", BigTIFF" } else { "" }
    ));
    lines.push(format!("sidecar: {}", sidecar_path(&spec.output).display()));
    Ok(PlanReport { lines, unreachable, updates, bytes })
}
