//! What a job's sidecar records: the job's parameters, how they were run and what was written,
//! as an [`output::sidecar::Sidecar`](crate::output::sidecar::Sidecar). Every value the file
//! holds is a number or a word chosen here (the job file's own spelling where there is one),
//! never a program's `Debug` text.

use std::path::Path;

use super::iterative::IterationRecord;
use super::spec::{
    AlgorithmChoice, CorrectionSpec, Geometry, IterativeSpec, JobSpec, Method, ObjectSource,
    Occlusion,
};
use crate::encoding::Encoding;
use crate::optics::Reference;
use crate::output::sidecar::{
    CalibrationRecord, CorrectionRecord, EncodingRecord, HologramRecord, IterativeRecord,
    JobRecord, MeshRecord, ObjectRecord, ObjectSourceRecord, OutputFiles, RecordingPlaneRecord,
    ReferenceRecord, Sidecar, SynthesisRecord, ToolRecord, ViewingRecord, FORMAT_NAME,
    FORMAT_VERSION,
};
use crate::output::tiff::{Compression, FinishedTiff, TiffLayout};
use crate::scene::mesh::PlacementSize;
use crate::scene::sampling::{Density, Pattern, PhaseMode};

/// What a run wrote: one TIFF, or a set of field files with their manifest.
pub enum Written<'a> {
    /// One TIFF.
    Tiff(&'a FinishedTiff),
    /// One GDSII layout.
    Gds(&'a crate::output::gdsii::FinishedGds),
    /// One panel PNG.
    Png(&'a crate::output::panel_png::FinishedPng),
    /// Field files.
    Fields {
        /// The manifest file.
        manifest: &'a Path,
        /// SHA-256 of its bytes.
        manifest_sha256: &'a str,
        /// Number of fields.
        count: usize,
        /// Field size.
        field_px: [u32; 2],
    },
}

/// Everything the sidecar records besides the job itself.
pub struct RunRecord<'a> {
    /// Encoding as written (amplitude scale resolved).
    pub encoding: &'a Encoding,
    /// TIFF layout.
    pub layout: &'a TiffLayout,
    /// What was written.
    pub written: Written<'a>,
    /// Emitters summed.
    pub emitters: usize,
    /// Emitters with no support on the plate.
    pub unreachable: usize,
    /// Point-pixel updates done.
    pub updates: u64,
    /// The iterative run, for iterative jobs.
    pub iterative: Option<IterativeRecord>,
    /// How the point sum was computed ("direct" or "recording-plane", with the plane), for
    /// point sums.
    pub sum_path: Option<PathRecord>,
}

/// `synthesis.path` with the record of the path's own figures.
pub type PathRecord = (
    &'static str,
    Option<RecordingPlaneRecord>,
    Option<crate::output::sidecar::LayersRecord>,
);

/// `synthesis.path` and the recording plane's record, for point sums (None for a phase cell).
pub fn path_record(path: &crate::synthesis::source::SourcePath) -> Option<PathRecord> {
    use crate::synthesis::source::SourcePath;
    let mut layers = None;
    let plane = match *path {
        SourcePath::PhaseCell => return None,
        SourcePath::Direct => None,
        SourcePath::Layers {
            slabs,
            spacing,
            plane,
            frame,
            silhouettes,
        } => {
            layers = Some(crate::output::sidecar::LayersRecord {
                slabs,
                slab_um: spacing * 1e6,
                front_plane_px: plane,
                frame_px: frame,
                occlusion: if silhouettes { "silhouette" } else { "none" }.into(),
                method: "meshes cut into depth slabs on the plate's pixel lattice (orthographic rays); each sample of a surface facing the plate is a diffuse emitter of the shaded amplitude with a random phase; slabs carried back to front by band-limited angular-spectrum steps in the reference's frame, masked by the occluding surfaces and the insides of closed occluding meshes, then carried to the plate by one periodic transform".into(),
            });
            None
        }
        SourcePath::RecordingPlane {
            distance,
            margins,
            band_rows,
        } => Some(RecordingPlaneRecord {
            distance_mm: distance * 1e3,
            grid_margins_px: margins,
            band_rows,
            edge_taper_from: crate::synthesis::recording_plane::TAPER_START,
            method: "emitters summed on a plane parallel to the plate (supports weighted by a quintic smooth step from 80 % of the half band to the Nyquist limit), carried to the plate by a band-limited angular-spectrum step centred on the reference's frequency".into(),
        }),
    };
    path.name().map(|n| (n, plane, layers))
}

/// The reference as recorded.
pub fn reference_record(r: &Reference) -> ReferenceRecord {
    match *r {
        Reference::Plane { tilt } => ReferenceRecord::Plane {
            tilt_deg: [tilt[0].to_degrees(), tilt[1].to_degrees()],
        },
        Reference::Spherical { position } => ReferenceRecord::Spherical {
            position_mm: position.map(|v| v * 1e3),
        },
    }
}

/// The encoding as recorded.
pub fn encoding_record(e: &Encoding) -> EncodingRecord {
    let bits = e.bits_per_sample();
    match *e {
        Encoding::CalibratedPhase {
            levels,
            ref calibration,
        } => EncodingRecord::Phase {
            levels,
            bits_per_sample: bits,
            stored_value: "s = level_to_grey[g], g = round(N arg(F) / 2 pi) mod N: the grey of the response's one monotonic branch (table joined by straight lines, phase counted from its lowest grey in [0, 2 pi)) nearest (mod 2 pi) to 2 pi g / N".into(),
            calibration: Some(CalibrationRecord {
                source: calibration.source.clone(),
                table: calibration.table.clone(),
                stroke_rad: calibration.stroke,
                level_to_grey: calibration.level_to_grey.clone(),
            }),
        },
        Encoding::Phase { levels } => EncodingRecord::Phase {
            levels,
            bits_per_sample: bits,
            stored_value: "s = round(g 2^b / N), g = round(N arg(F) / 2 pi) mod N; displayed phase 2 pi s / 2^b".into(),
            calibration: None,
        },
        Encoding::BinaryPhase => EncodingRecord::BinaryPhase {
            bits_per_sample: 1,
            stored_value: "1 (phase pi) where Re F < 0, else 0".into(),
        },
        Encoding::BinaryAmplitude => EncodingRecord::BinaryAmplitude {
            bits_per_sample: 1,
            stored_value: "1 (clear) where Re F >= 0, else 0 (opaque)".into(),
        },
        Encoding::Amplitude { bits, scale } => EncodingRecord::Amplitude {
            bits_per_sample: bits,
            bipolar_scale: scale,
            stored_value: "s = round((1 + Re F / bipolar_scale) / 2 (2^b - 1)), clipped".into(),
        },
    }
}

fn density_words(d: Option<Density>) -> String {
    match d {
        None => "replay cell lambda z / D".into(),
        Some(Density::Count(n)) => format!("{n} emitters"),
        Some(Density::SpacingM(s)) => format!("spacing {} um", s * 1e6),
    }
}

fn pattern_name(p: Pattern) -> &'static str {
    match p {
        Pattern::Random => "random",
        Pattern::Stratified => "stratified",
    }
}

fn phase_words(p: PhaseMode) -> String {
    match p {
        PhaseMode::Random => "random".into(),
        PhaseMode::Constant(v) => format!("constant {v} rad"),
    }
}

/// The job-file spelling of an occlusion mode.
pub fn occlusion_name(o: Occlusion) -> &'static str {
    match o {
        Occlusion::None => "none",
        Occlusion::Centre => "centre",
        Occlusion::Tiles => "tiles",
    }
}

/// The job-file spelling of an iterative algorithm.
pub fn algorithm_name(a: AlgorithmChoice) -> &'static str {
    match a {
        AlgorithmChoice::Gs => "gs",
        AlgorithmChoice::WeightedGs => "weighted-gs",
        AlgorithmChoice::MixedRegion(_) => "mixed-region",
        AlgorithmChoice::Superposition => "superposition",
    }
}

fn file_name(p: &Path) -> Option<String> {
    p.file_name().map(|f| f.to_string_lossy().into_owned())
}

/// The objects; `spot_count` is the spot list's length as the run read it.
fn objects(spec: &JobSpec, spot_count: usize) -> Vec<ObjectRecord> {
    spec.objects
        .iter()
        .map(|o| {
            let file = file_name(&o.points);
            let source = match &o.source {
                ObjectSource::Image { distance, shift_px } => ObjectSourceRecord::Image {
                    image: file,
                    distance_mm: distance.map(|d| d * 1e3),
                    shift_px: *shift_px,
                },
                ObjectSource::Spots => ObjectSourceRecord::Spots {
                    spots: file,
                    spot_count,
                },
                ObjectSource::Points => ObjectSourceRecord::Points {
                    points: file,
                    offset_mm: o.offset.map(|v| v * 1e3),
                    scale: o.scale,
                },
                ObjectSource::Mesh(m) => {
                    let pl = &m.placement;
                    let (scale, fit_mm) = match pl.size {
                        PlacementSize::Scale(s) => (Some(s), None),
                        PlacementSize::FitMm(f) => (None, Some(f)),
                    };
                    ObjectSourceRecord::Mesh(Box::new(MeshRecord {
                        mesh: file,
                        unit_mm: pl.unit_mm,
                        front: m.front.name().into(),
                        rotation_deg: pl.rotation_deg,
                        scale,
                        fit_mm,
                        offset_mm: pl.offset_mm,
                        density: density_words(m.density),
                        pattern: pattern_name(m.pattern).into(),
                        seed: m.seed,
                        light_dir: m.shading.light_dir,
                        ambient: m.shading.ambient,
                        smooth_normals: m.shading.smooth_normals,
                        phase: phase_words(m.phase),
                        occlusion: occlusion_name(m.occlusion).into(),
                    }))
                }
            };
            ObjectRecord {
                source,
                gain: o.gain,
                reference: o.reference.as_ref().map(reference_record),
            }
        })
        .collect()
}

/// The iterative section of a run.
pub fn iterative_record(it: &IterativeSpec, rec: &IterationRecord) -> IterativeRecord {
    IterativeRecord {
        geometry: match it.geometry {
            Geometry::Fourier(_) => "fourier",
            Geometry::Fresnel => "fresnel",
        }
        .into(),
        focal_mm: match it.geometry {
            Geometry::Fourier(f) => Some(f * 1e3),
            Geometry::Fresnel => None,
        },
        algorithm: algorithm_name(it.algorithm).into(),
        mix: match it.algorithm {
            AlgorithmChoice::MixedRegion(m) => Some(m),
            _ => None,
        },
        replay_lattice: "Fourier and single-FFT Fresnel planes: optical axis on sample floor(N/2) per axis (a plain FFT after fftshift); angular-spectrum planes: the plate's pixel centres".into(),
        iterations_run: rec.errors.len().saturating_sub(1),
        stopped_early: rec.stopped_early,
        stall_tolerance: Some(it.stall_tolerance),
        min_iterations: Some(it.min_iterations),
        replay_sign: Some(match it.geometry {
            Geometry::Fourier(_) => "Fourier geometry: replayed through a lens (reconstruct --focal-mm F) onto its focal plane".into(),
            Geometry::Fresnel => "designed for a real image at +D: reconstruct --distance-mm D propagates this plate by +D (other plates: by -D) and draws that plane as the targets are given".into(),
        }),
        error_per_iteration: rec.errors.clone(),
        cell_px: rec.cell,
        replay_pitch_um: rec
            .replay_pitch
            .iter()
            .map(|p| [p[0] * 1e6, p[1] * 1e6])
            .collect(),
        carrier_deg: [it.carrier[0].to_degrees(), it.carrier[1].to_degrees()],
        carrier_asked_deg: it.carrier_asked_deg,
        carrier_samples: it.carrier_samples,
        lens_mm: it.lens.map(|f| f * 1e3),
        seed: it.seed,
        quantize_last: it.quantize_last,
        spots: rec.spots.clone(),
        correction: rec.correction.clone(),
    }
}

/// The `[correction]` of a job, for the sidecar.
pub fn correction_record(c: Option<&CorrectionSpec>) -> Option<CorrectionRecord> {
    c.map(|c| CorrectionRecord {
        zernike: c
            .terms
            .iter()
            .map(|t| [f64::from(t.n), f64::from(t.m), t.waves])
            .collect(),
        normalisation: "Noll (JOSA 66, 207, 1976): (1/pi) integral over the unit pupil of Z_j Z_k = delta_jk, so a coefficient is the term's rms in waves; theta from panel +x towards +y; added inside the pupil only, then the map, modulo 2 pi".into(),
        pupil_radius_mm: c.pupil_radius * 1e3,
        pupil_centre_mm: [c.pupil_centre[0] * 1e3, c.pupil_centre[1] * 1e3],
        correction_map: c.map.as_deref().and_then(file_name),
        map_two_pi_grey: c.map_two_pi_grey,
    })
}

/// The sidecar of a run of `spec`.
pub fn sidecar(spec: &JobSpec, run: RunRecord) -> Sidecar {
    let p = &spec.plate;
    let s = &spec.synthesis;
    let compression = match run.layout.compression {
        Compression::None => "none",
        Compression::Deflate => "deflate",
    }
    .to_string();
    let output = match run.written {
        Written::Tiff(t) => OutputFiles::Tiff {
            file: file_name(&t.path),
            bytes: t.bytes,
            sha256: t.sha256.clone(),
            bigtiff: t.bigtiff,
            compression,
            rows_per_strip: run.layout.rows_per_strip,
            strips: t.strips,
            photometric: "min-is-black".into(),
        },
        Written::Png(g) => {
            let ps = spec.png.as_ref().expect("a PNG run has its spec");
            let l = &run.encoding;
            OutputFiles::Png {
                file: file_name(&g.path),
                format: "png".into(),
                bytes: g.bytes,
                sha256: g.sha256.clone(),
                bits_per_sample: l.bits_per_sample(),
                panel_px: ps.panel,
                plate_origin_px: [
                    i64::from(ps.panel[0] / 2) - i64::from(spec.plate.width / 2),
                    i64::from(ps.panel[1] / 2) - i64::from(spec.plate.height / 2),
                ],
                panel_fill: match ps.fill {
                    crate::output::panel_png::PanelFill::ZeroPhase => "zero-phase",
                    crate::output::panel_png::PanelFill::Tile => "tile",
                }
                .into(),
                placement: "the plate's centre sample (floor(W/2), floor(H/2)) on the panel's centre sample (floor(Wp/2), floor(Hp/2)); plate_origin_px is the plate's top-left pixel on the panel; samples are the TIFF's stored values (grey, 1 = white)".into(),
            }
        }
        Written::Gds(g) => {
            let gs = spec.gdsii.as_ref().expect("a GDSII run has its spec");
            let (merge, max_vertices) = match gs.merge {
                crate::output::gdsii::Merge::Rectangles => ("rectangles: the runs of set pixels (stored bit 1: clear, or pi) of each row, a run continuing with the same columns in the next rows extended downwards, closed at each strip's end; no pixel changes state".into(), None),
                crate::output::gdsii::Merge::Contour { max_vertices } => (format!("contour: each 4-connected region of set pixels (stored bit 1: clear, or pi) within a strip traced along pixel edges into one rectilinear polygon, counter-clockwise, no vertex repeated; regions with holes or corner-touching pixels cut along vertical pixel edges (at each hole's leftmost column and each such corner), outlines above {max_vertices} vertices cut at their middle column; no pixel changes state"), Some(max_vertices)),
            };
            OutputFiles::Gdsii {
                file: file_name(&g.path),
                format: "gdsii".into(),
                bytes: g.bytes,
                sha256: g.sha256.clone(),
                boundaries: g.boundaries,
                vertices: g.vertices,
                database_unit_nm: gs.db_unit * 1e9,
                user_unit_um: 1.0,
                layer: gs.layer,
                datatype: gs.datatype,
                rows_per_strip: run.layout.effective_rows_per_strip(),
                merge,
                max_vertices,
                coordinates: "plate coordinates in database units: origin at the plate's centre, x right, y up (row 0 on top); pixel (row i, column j) spans x (j - W/2) p .. (j + 1 - W/2) p, y (H/2 - i - 1) p .. (H/2 - i) p".into(),
            }
        }
        Written::Fields {
            manifest,
            manifest_sha256,
            count,
            field_px,
        } => OutputFiles::Fields {
            fields_manifest: file_name(manifest),
            fields_manifest_sha256: Some(manifest_sha256.to_string()),
            fields: count,
            field_px,
            compression,
            rows_per_strip: run.layout.rows_per_strip,
            photometric: "min-is-black".into(),
        },
    };
    let (path, recording_plane, layers) = match run.sum_path {
        Some((name, plane, layers)) => (Some(name.to_string()), plane, layers),
        None => (None, None, None),
    };
    // What the method computed, in the sidecar's words. Iterative plates have no point sum:
    // say so rather than carry its wording; their loop and FFTs run in f32 whatever the key says.
    let (method, approximation, precision, obliquity, anti_aliasing, fringe_term, point_pixel_updates) =
        match spec.method {
            Method::PointSum if layers.is_some() => (
                "point-sum",
                "exact",
                "f32",
                true,
                "the plate's band: the slices and the frame are sampled at the plate's pitch in the reference's frame, so every component has |f - f_R| <= 1 / (2p) per axis, and only directions from the scene to the plate are kept",
                "F = O conj(R), O the angular spectrum (Rayleigh-Sommerfeld, first kind) of the slabs' samples a exp(i phi) i lambda / (px py)",
                0,
            ),
            Method::PointSum => (
                "point-sum",
                s.approximation.name(),
                s.precision.name(),
                s.obliquity,
                "emitter j contributes where |(d_j - d_R)_x| <= lambda / (2 px) and likewise in y (d: local direction cosines)",
                "F = O conj(R), O = sum a_j exp(i (k r_j + phi_j)) / r_j",
                run.updates,
            ),
            Method::Iterative(_) => (
                "iterative",
                "none",
                "f32",
                false,
                "none needed: the plate's pixels are the sampling grid of the iteration's FFT propagators",
                "F = exp(i phi), phi the iterated cell's phase (plus carrier, lens and correction terms) laid over the plate",
                0,
            ),
        };
    Sidecar {
        format: FORMAT_NAME.into(),
        format_version: FORMAT_VERSION,
        tool: ToolRecord::this(),
        job: JobRecord {
            file: file_name(&spec.path),
            sha256: spec.sha256.clone(),
        },
        hologram: HologramRecord {
            width_px: p.width,
            height_px: p.height,
            pitch_um: [p.pitch[0] * 1e6, p.pitch[1] * 1e6],
            wavelength_nm: p.wavelength * 1e9,
            size_mm: [p.size()[0] * 1e3, p.size()[1] * 1e3],
            max_half_angle_deg: p.max_half_angle().map(f64::to_degrees),
            pixel_centre: "x = (j - (W-1)/2) px, y = ((H-1)/2 - i) py; row 0 is the top row; y up"
                .into(),
        },
        viewing: ViewingRecord::this(),
        reference: reference_record(&spec.reference),
        objects: objects(
            spec,
            run.iterative
                .as_ref()
                .and_then(|i| i.spots.as_ref())
                .map_or(0, |s| s.spots.len()),
        ),
        iterative: run.iterative,
        synthesis: SynthesisRecord {
            method: method.into(),
            approximation: approximation.into(),
            precision: precision.into(),
            path,
            recording_plane,
            layers,
            obliquity,
            anti_aliasing: anti_aliasing.into(),
            fringe_term: fringe_term.into(),
            emitters: run.emitters,
            emitters_without_support: run.unreachable,
            point_pixel_updates,
        },
        encoding: encoding_record(run.encoding),
        output,
    }
}
