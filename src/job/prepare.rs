//! Everything a run needs, prepared once: the synthesis path, the encoding (amplitude scale
//! measured), the TIFF layout, strips, bands and field blocks.

use std::path::{Path, PathBuf};

use num_complex::Complex64;

use super::fields::FieldGrid;
use super::iterative::{build_cell, IterationRecord};
use super::progress::{Progress, ProgressMode};
use super::scene::build_scene;
use super::spec::{IterativeSpec, JobSpec, Method, SumPath};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::output::tiff::TiffLayout;
use crate::synthesis::layers::LayerSynthesis;
use crate::synthesis::planner::{choose_path, PathChoice};
use crate::synthesis::point_sum::{BandScratch, PointSum};
use crate::synthesis::source::FringeSource;

/// Rows per band: about 4 MiB of complex field per band, at most 64 rows.
pub fn default_band_rows(width: u32) -> usize {
    ((4usize << 20) / (16 * width as usize)).clamp(1, 64)
}

/// B0 for the amplitude encoding: 3 x RMS of Re F over up to 16 evenly spread rows.
fn measure_bipolar_scale(sum: &dyn FringeSource) -> f64 {
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
pub(super) fn band_rows_for(spec: &JobSpec, rows_per_strip: u32) -> usize {
    let target = spec
        .band_rows
        .unwrap_or_else(|| default_band_rows(spec.plate.width))
        .min(rows_per_strip as usize)
        .max(1);
    (1..=target)
        .rev()
        .find(|b| (rows_per_strip as usize).is_multiple_of(*b))
        .unwrap_or(1)
}

/// Everything a run of one job needs, prepared once.
pub(super) struct Prepared {
    /// The synthesis path.
    pub source: Box<dyn FringeSource>,
    /// The iterative run behind a phase cell, for the sidecar.
    pub iteration: Option<(IterationRecord, IterativeSpec)>,
    pub encoding: Encoding,
    pub layout: TiffLayout,
    pub emitters: usize,
    /// Effective rows per strip.
    pub rps: u32,
    pub band_rows: usize,
    /// Field files, when the job asks for them.
    pub fields: Option<FieldGrid>,
    /// Column ranges encoded separately: the field columns, or the whole width.
    pub blocks: Vec<(usize, usize)>,
    /// Rows of the unit shards are made of: a strip, or a field row.
    pub unit_rows: u32,
    /// GDSII output: its layout (rectangles close at each strip of `rps` rows).
    pub gds: Option<crate::output::gdsii::GdsLayout>,
    /// PNG output: the panel image's layout.
    pub png: Option<crate::output::panel_png::PanelLayout>,
}

/// The direct point sum of a job's scene (channels, occlusion when a mesh asks for it) and the
/// path `[synthesis] path` chooses for it.
/// Also the scene's lines for `plan`.
pub(super) fn point_sum_and_path(spec: &JobSpec) -> Result<(PointSum, PathChoice, Vec<String>)> {
    let scene = build_scene(spec)?;
    let notes = scene.notes;
    let sum = PointSum::with_channels(spec.plate, scene.channels, spec.synthesis);
    let sum = match scene.visibility {
        Some(v) => sum.with_visibility(v),
        None => sum,
    };
    let choice = choose_path(&sum, spec.sum_path, spec.recording_plane_gap)
        .map_err(|m| Error::job(&spec.path, m))?;
    Ok((sum, choice, notes))
}

/// For `[synthesis] path = "auto"` on a job of meshes only: the layers path, built, when it is
/// faster than the point sum by `plan`'s estimates (or the point sum cannot run), and the line
/// saying why; None when the point sum is taken (with the line) or the job is not such a job.
pub(super) fn auto_layers(spec: &JobSpec) -> Result<(Option<LayerSynthesis>, Option<String>)> {
    let meshes_only = spec
        .objects
        .iter()
        .all(|o| matches!(o.source, super::spec::ObjectSource::Mesh(_)));
    if spec.sum_path != SumPath::Auto || !meshes_only || spec.objects.is_empty() {
        return Ok((None, None));
    }
    let layers = super::scene::layer_synthesis(spec).map(|(l, _)| l);
    let point = point_sum_and_path(spec).map(|(sum, choice, _)| {
        let plane = match choice.recipe {
            crate::synthesis::planner::SumRecipe::RecordingPlane => choice.costs.map(|c| c.plane),
            _ => None,
        };
        super::plan::point_sum_estimate(spec, &sum, plane).seconds()
    });
    let l_secs = layers
        .as_ref()
        .map(|l| super::plan::layers_seconds(l, spec))
        .map_err(|e| e.to_string());
    match crate::synthesis::planner::choose_layers(point.map_err(|e| e.to_string()), l_secs) {
        Ok((crate::synthesis::planner::AutoChoice::Layers, why)) => {
            Ok((Some(layers.expect("layers estimated")), Some(why)))
        }
        Ok((crate::synthesis::planner::AutoChoice::PointSum, why)) => Ok((None, Some(why))),
        Err(_) => {
            // Neither runs: the point sum's own error, as before `auto` weighed layers.
            point_sum_and_path(spec)?;
            Ok((None, None))
        }
    }
}

/// Computes the layers path's slabs and frame with a progress line (its own work, before the
/// plate's bands), after checking the scratch files fit.
fn prepare_layers(layers: &LayerSynthesis, mode: ProgressMode) -> Result<()> {
    super::space::check_space(layers.scratch_dir(), layers.scratch_bytes())?;
    let total = FringeSource::prepare_work(layers);
    let mut progress = Progress::new("layers", total.max(1.0), mode);
    FringeSource::prepare(layers, &mut |w| progress.advance(w))?;
    progress.finish();
    Ok(())
}

pub(super) fn prepare(spec: &JobSpec, mode: ProgressMode) -> Result<Prepared> {
    let auto = auto_layers(spec)?.0;
    let (sum, iteration, n): (Box<dyn FringeSource>, _, _) = match &spec.method {
        Method::PointSum if spec.sum_path == SumPath::Layers || auto.is_some() => {
            let layers = match auto {
                Some(l) => l,
                None => super::scene::layer_synthesis(spec)?.0,
            };
            prepare_layers(&layers, mode)?;
            (Box::new(layers), None, 0)
        }
        Method::PointSum => {
            let (sum, choice, _) = point_sum_and_path(spec)?;
            let n = sum.emitters().len();
            if n > 0 && sum.unreachable() == n && !(0..n).any(|j| sum.reaches_plate_exactly(j)) {
                return Err(Error::job(
                    &spec.path,
                    format!("none of the {n} emitters reaches the plate (every support misses it: the objects lie outside the zone the pitch can reproduce); the plate would be blank"),
                ));
            }
            (choice.into_source(sum), None, n)
        }
        Method::Iterative(it) => {
            let (cell, rec) = build_cell(spec, it, mode)?;
            (Box::new(cell), Some((rec, it.clone())), 0)
        }
    };
    let encoding = spec.encoding.resolve(|| measure_bipolar_scale(&*sum));
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
    // GDSII write fields are structures of one layout, not field files.
    let field_files = spec.field_px.filter(|_| spec.gdsii.is_none());
    let (fields, blocks, rps, unit_rows) = match field_files {
        None if spec.gdsii.is_some() && spec.field_px.is_some() => {
            let [fw, fh] = spec.field_px.expect("checked");
            let target = spec
                .rows_per_strip
                .unwrap_or_else(|| TiffLayout::default_rows_per_strip(fw, 1))
                .min(fh);
            let rps = (1..=target).rev().find(|r| fh % r == 0).unwrap_or(1);
            layout.rows_per_strip = rps;
            (None, vec![(0, spec.plate.width as usize)], rps, rps)
        }
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
                .find(|d| (rps as usize).is_multiple_of(*d))
                .unwrap_or(1)
        }
        _ => band_rows_for(spec, rps),
    };
    let gds = match &spec.gdsii {
        None => None,
        Some(g) => {
            let name = spec
                .output
                .file_stem()
                .map(|s| s.to_string_lossy().to_ascii_uppercase())
                .unwrap_or_else(|| "PLATE".into());
            Some(
                crate::output::gdsii::GdsLayout::new(
                    spec.plate.width,
                    spec.plate.height,
                    spec.plate.pitch,
                    g.db_unit,
                    g.layer,
                    g.datatype,
                    rps,
                    &name,
                )
                .map(|l| l.with_merge(g.merge))
                .and_then(|l| match spec.field_px {
                    Some(f) => l.with_fields(f),
                    None => Ok(l),
                })
                .map_err(|m| Error::job(&spec.path, m))?,
            )
        }
    };
    let png = spec.png.as_ref().map(|g| {
        // The stored value of zero phase (F = 1), or of F = 0 for the amplitude encoding.
        let f = match encoding {
            Encoding::Amplitude { .. } => Complex64::new(0.0, 0.0),
            _ => Complex64::new(1.0, 0.0),
        };
        let mut b = vec![0u8; encoding.row_bytes(1)];
        encoding.encode_row(&[f], &mut b);
        let fill_value = match encoding.bits_per_sample() {
            1 => u16::from(b[0] >> 7),
            8 => u16::from(b[0]),
            _ => u16::from_le_bytes([b[0], b[1]]),
        };
        crate::output::panel_png::PanelLayout {
            plate: [spec.plate.width, spec.plate.height],
            panel: g.panel,
            bits: encoding.bits_per_sample(),
            fill: g.fill,
            fill_value,
        }
    });
    Ok(Prepared {
        png,
        gds,
        source: sum,
        iteration,
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
pub(super) fn unit_count(p: &Prepared) -> u32 {
    p.source.plate().height.div_ceil(p.unit_rows)
}
