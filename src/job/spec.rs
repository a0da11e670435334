//! The job file (TOML): its raw form as written, and the validated [`JobSpec`] every command uses.
//!
//! The keys of issue #2 are a contract; new keys may be added, none renamed. Unknown keys are
//! errors that name the key and its line. Paths resolve against the job file's folder.

use std::path::{Path, PathBuf};

use serde::Deserialize;
use sha2::{Digest, Sha256};

use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::{Plate, Reference};
use crate::output::tiff::Compression;
use crate::synthesis::{Approximation, PointSumOptions, Precision};

/// A number or an [x, y] pair (pitch).
#[derive(Deserialize, Debug, Clone, Copy)]
#[serde(untagged)]
pub enum OneOrTwo {
    /// The same value on both axes.
    One(f64),
    /// [x, y].
    Two([f64; 2]),
}

/// `[hologram]`
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawHologram {
    pub width_px: i64,
    pub height_px: i64,
    pub pitch_um: OneOrTwo,
    pub wavelength_nm: f64,
}

/// `[reference]`
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawReference {
    pub kind: String,
    pub tilt_deg: Option<[f64; 2]>,
    pub position_mm: Option<[f64; 3]>,
}

/// `[[object]]`
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawObject {
    /// Point cloud (.ply, .csv).
    pub points: Option<String>,
    /// Mesh (.glb, .gltf, .obj, .stl, .ply with faces).
    pub mesh: Option<String>,
    #[serde(default)]
    pub offset_mm: Option<[f64; 3]>,
    pub scale: Option<f64>,
    /// Multiplies every amplitude of this object (default 1).
    pub gain: Option<f64>,
    /// Own reference: this object is a separate channel (angle multiplexing).
    pub reference: Option<RawReference>,
    /// Meshes: rotations about x, y, z (applied in that order), degrees.
    pub rotation_deg: Option<[f64; 3]>,
    /// Meshes: largest extent after rotation, mm (instead of scale).
    pub fit_mm: Option<f64>,
    /// Meshes: the file's unit, "m", "mm", "um" or "in" (default: metres for glTF, millimetres
    /// for OBJ, STL and PLY).
    pub units: Option<String>,
    /// Meshes: the model axis that faces the plate's viewer, "+z" (default), "-z", "+x", "-x",
    /// "+y" or "-y".
    pub front: Option<String>,
    /// Meshes: number of emitters.
    pub emitters: Option<i64>,
    /// Meshes: mean emitter spacing, micrometres.
    pub spacing_um: Option<f64>,
    /// Meshes: "stratified" (default) or "random".
    pub pattern: Option<String>,
    /// Meshes: seed of the sampling and of random phases (default 1).
    pub seed: Option<u64>,
    /// Meshes: direction towards the light, plate coordinates.
    pub light_dir: Option<[f64; 3]>,
    /// Meshes: ambient share of the intensity, 0..=1.
    pub ambient: Option<f64>,
    /// Meshes: "smooth" (default) or "flat" normals.
    pub normals: Option<String>,
    /// Meshes: "random" (diffuse, default) or "constant" (specular look) emitter phases.
    pub phase: Option<String>,
    /// Meshes: "tiles" (default: visibility from each tile's centre), "centre" or "none".
    pub occlusion: Option<String>,
    /// Iterative synthesis: target intensity image (8/16-bit grey PNG or TIFF).
    pub image: Option<String>,
    /// Iterative synthesis, fresnel geometry: distance of the image's plane, mm.
    pub distance_mm: Option<f64>,
    /// Iterative synthesis: shift of the image's centre from the axis, replay-plane pixels [right, up].
    pub shift_px: Option<[i64; 2]>,
}

pub use crate::synthesis::planner::SumPath;

/// `[synthesis]`
#[derive(Deserialize, Debug, Clone, Default)]
#[serde(deny_unknown_fields)]
pub struct RawSynthesis {
    pub method: Option<String>,
    pub approximation: Option<String>,
    /// Include the obliquity factor z / r (default false).
    pub obliquity: Option<bool>,
    /// Exact kernel arithmetic: "f64" (default) or "f32".
    pub precision: Option<String>,
    /// Point sum: "direct" (default), "recording-plane" or "auto" (the cheaper by estimate).
    pub path: Option<String>,
    /// Recording-plane path: distance from the nearest emitter to the plane, mm.
    pub recording_plane_gap_mm: Option<f64>,
    /// Rows computed together per task (default: chosen from the width).
    pub band_rows: Option<i64>,
    /// Iterative: "fourier" or "fresnel".
    pub geometry: Option<String>,
    /// Iterative, fourier geometry: focal length of the replay lens, mm.
    pub focal_mm: Option<f64>,
    /// Iterative: number of iterations (default 50).
    pub iterations: Option<i64>,
    /// Iterative: seed of the start phase (default 1).
    pub seed: Option<u64>,
    /// Iterative: "gs" (default), "weighted-gs" or "mixed-region".
    pub algorithm: Option<String>,
    /// Iterative, mixed-region: share of the target imposed in the signal window (default 0.6).
    pub mix: Option<f64>,
    /// Iterative: last iterations projected onto the encoding's phase levels (default 5).
    pub quantize_last: Option<i64>,
    /// Iterative: stop when the best error of the last 10 iterations is less than this share
    /// below the best before them (default 1e-3, 0 = never).
    pub stall_tolerance: Option<f64>,
    /// Iterative: no early stop before this many iterations (default 30).
    pub min_iterations: Option<i64>,
    /// Iterative: size of the computed cell, repeated over the plate (default: the whole plate).
    pub cell_px: Option<[i64; 2]>,
    /// Iterative: blazed carrier tilts, degrees (moves the image off the zero order).
    pub carrier_deg: Option<[f64; 2]>,
    /// Iterative: lens term focal length, mm.
    pub lens_mm: Option<f64>,
}

/// `[encoding]`
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawEncoding {
    pub kind: String,
    pub levels: Option<i64>,
    /// Amplitude encoding: 8 or 16.
    pub bits: Option<i64>,
    /// Amplitude encoding: B0; default measured before streaming (3 x RMS of Re F on a probe grid).
    pub bipolar_scale: Option<f64>,
    /// Phase encoding: a modulator's measured grey-to-phase table (CSV `grey,phase_rad`).
    pub calibration: Option<String>,
    /// Phase encoding with `calibration`: the wavelength the table was measured at, nm (its phases
    /// are scaled by calibration_nm / wavelength_nm).
    pub calibration_nm: Option<f64>,
    /// Phase encoding: a linear panel reaching 2 pi at this grey (instead of a table).
    pub two_pi_grey: Option<i64>,
    /// Phase encoding: "left" (default, s = round(g 2^b / N)) or "right" (s = g, as 10- and
    /// 12-bit panels take it in 16-bit samples).
    pub justify: Option<String>,
}

/// `[output]`
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawOutput {
    pub path: String,
    /// "none" (default) or "deflate".
    pub compression: Option<String>,
    pub rows_per_strip: Option<i64>,
    /// Force BigTIFF (true) or classic TIFF (false); default automatic.
    pub bigtiff: Option<bool>,
    /// Split the plate into field files of [w, h] pixels.
    pub field_px: Option<[i64; 2]>,
}

/// The job file as written.
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RawJob {
    pub hologram: RawHologram,
    pub reference: RawReference,
    #[serde(default)]
    pub object: Vec<RawObject>,
    #[serde(default)]
    pub synthesis: RawSynthesis,
    pub encoding: RawEncoding,
    pub output: RawOutput,
}

/// Encoding as asked for in the job; the amplitude scale may still be open.
#[derive(Clone, Debug, PartialEq)]
pub enum EncodingRequest {
    /// Fully known.
    Fixed(Encoding),
    /// Amplitude with B0 to be measured before streaming.
    AmplitudeAuto {
        /// 8 or 16.
        bits: u8,
    },
}

impl EncodingRequest {
    /// The encoding a run writes: the fixed one, or the amplitude encoding with B0 from `scale`
    /// (measured on the plate's field; `plan` passes a nominal 1).
    pub fn resolve(&self, scale: impl FnOnce() -> f64) -> Encoding {
        match self {
            EncodingRequest::Fixed(e) => e.clone(),
            EncodingRequest::AmplitudeAuto { bits } => Encoding::Amplitude {
                bits: *bits,
                scale: scale(),
            },
        }
    }
}

/// Where an object's emitters come from.
#[derive(Clone, Debug, PartialEq)]
pub enum ObjectSource {
    /// A target intensity image for iterative synthesis.
    Image {
        /// Plane distance, metres (fresnel geometry).
        distance: Option<f64>,
        /// Shift of the image centre, replay pixels [right, up].
        shift_px: [i64; 2],
    },
    /// A point cloud file.
    Points,
    /// A mesh sampled into emitters.
    Mesh(MeshObject),
}

/// How a mesh object is placed, sampled, shaded and occluded.
#[derive(Clone, Debug, PartialEq)]
pub struct MeshObject {
    /// Placement (offset, turn, rotation, scale or fit).
    pub placement: crate::scene::mesh::Placement,
    /// The model axis turned to face the viewer (its matrix is the placement's orientation).
    pub front: crate::scene::mesh::Front,
    /// Emitter count or spacing (metres); None: derived from the plate's resolution at that depth.
    pub density: Option<crate::scene::sampling::Density>,
    /// Sampling pattern.
    pub pattern: crate::scene::sampling::Pattern,
    /// Seed.
    pub seed: u64,
    /// Lighting.
    pub shading: crate::scene::sampling::Shading,
    /// Phases.
    pub phase: crate::scene::sampling::PhaseMode,
    /// Occlusion.
    pub occlusion: Occlusion,
}

/// How occlusion is decided for a mesh's emitters.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Occlusion {
    /// Every emitter contributes everywhere.
    None,
    /// Emitters hidden from the plate centre are dropped.
    Centre,
    /// Visibility from the centre of each tile of the plate (parallax-correct to the tile).
    Tiles,
}

/// One validated `[[object]]`.
#[derive(Clone, Debug, PartialEq)]
pub struct ObjectSpec {
    /// Points or mesh file, resolved against the job's folder.
    pub points: PathBuf,
    /// Point cloud or mesh.
    pub source: ObjectSource,
    /// Added after scaling, metres (point clouds; meshes carry it in their placement too).
    pub offset: [f64; 3],
    /// Multiplies the file's coordinates.
    pub scale: f64,
    /// Multiplies the amplitudes.
    pub gain: f64,
    /// Own reference (a separate channel), or None for the job's.
    pub reference: Option<Reference>,
}

/// Iterative synthesis geometry.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Geometry {
    /// Lens of this focal length (metres): the replay plane is its focal plane.
    Fourier(f64),
    /// Free-space propagation to each image's distance.
    Fresnel,
}

/// Algorithm choice as written.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum AlgorithmChoice {
    /// Gerchberg-Saxton.
    Gs,
    /// Weighted GS.
    WeightedGs,
    /// Mixed-region amplitude freedom with this mix.
    MixedRegion(f64),
}

/// `[synthesis] method = "iterative"`, validated.
#[derive(Clone, Debug, PartialEq)]
pub struct IterativeSpec {
    /// Geometry.
    pub geometry: Geometry,
    /// Iterations.
    pub iterations: usize,
    /// Seed.
    pub seed: u64,
    /// Algorithm.
    pub algorithm: AlgorithmChoice,
    /// Quantized final iterations.
    pub quantize_last: usize,
    /// Early-stop tolerance (relative improvement over the stall window).
    pub stall_tolerance: f64,
    /// No early stop before this many iterations.
    pub min_iterations: usize,
    /// The carrier as the job asked for it, degrees (before snapping).
    pub carrier_asked_deg: [f64; 2],
    /// The carrier's shift in whole replay samples of the plate's FFT lattice [x, y]
    /// (`carrier` is snapped to it: sin t = m lambda / (N p)).
    pub carrier_samples: [i64; 2],
    /// Cell size, if smaller than the plate.
    pub cell_px: Option<[u32; 2]>,
    /// Carrier tilts, radians.
    pub carrier: [f64; 2],
    /// Lens focal length, metres.
    pub lens: Option<f64>,
}

/// The synthesis method.
#[derive(Clone, Debug, PartialEq)]
pub enum Method {
    /// Point-source summation.
    PointSum,
    /// Iterative phase retrieval from images.
    Iterative(IterativeSpec),
}

/// A validated job.
#[derive(Clone, Debug)]
pub struct JobSpec {
    /// The job file.
    pub path: PathBuf,
    /// SHA-256 of the job file's bytes, lowercase hex.
    pub sha256: String,
    /// The job file's text (journals keep it to name what changed).
    pub text: String,
    /// Pixel grid, pitch and wavelength.
    pub plate: Plate,
    /// Reference wave.
    pub reference: Reference,
    /// Objects, summed.
    pub objects: Vec<ObjectSpec>,
    /// Point-sum options.
    pub synthesis: PointSumOptions,
    /// The method.
    pub method: Method,
    /// Rows per band, if set.
    pub band_rows: Option<usize>,
    /// How the point sum is computed (`[synthesis] path`).
    pub sum_path: SumPath,
    /// Recording-plane gap, metres (None: the method's default).
    pub recording_plane_gap: Option<f64>,
    /// Encoding.
    pub encoding: EncodingRequest,
    /// Output TIFF path, resolved.
    pub output: PathBuf,
    /// TIFF compression.
    pub compression: Compression,
    /// TIFF rows per strip, if set.
    pub rows_per_strip: Option<u32>,
    /// Forced TIFF flavour, if set.
    pub bigtiff: Option<bool>,
    /// Field size [w, h], if the plate is split into field files.
    pub field_px: Option<[u32; 2]>,
}

/// Largest accepted side, pixels (a 4 Gpx-wide row would not fit a TIFF strip).
pub const MAX_SIDE_PX: i64 = 1 << 24;

/// 1-based line of a byte offset.
fn line_of(text: &str, offset: usize) -> usize {
    text.as_bytes()[..offset.min(text.len())]
        .iter()
        .filter(|&&b| b == b'\n')
        .count()
        + 1
}

impl JobSpec {
    /// Reads and validates a job file.
    pub fn load(path: &Path) -> Result<JobSpec> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        let text = String::from_utf8(bytes.clone()).map_err(|e| {
            Error::input(
                path,
                format!("not UTF-8 text (byte {})", e.utf8_error().valid_up_to()),
            )
        })?;
        let raw: RawJob = toml::from_str(&text).map_err(|e| {
            let msg = e.message().trim().replace('\n', " ");
            match e.span() {
                Some(s) => Error::input(path, format!("line {}: {}", line_of(&text, s.start), msg)),
                None => Error::input(path, msg),
            }
        })?;
        let sha256 = hex(&Sha256::digest(&bytes));
        let dir = path.parent().map(Path::to_path_buf).unwrap_or_default();
        let mut spec = Self::from_raw(raw, path, &dir, sha256)?;
        spec.text = text;
        Ok(spec)
    }

    /// Validates a parsed job. `dir` is the folder paths resolve against.
    pub fn from_raw(raw: RawJob, path: &Path, dir: &Path, sha256: String) -> Result<JobSpec> {
        let bad = |m: String| Error::job(path, m);
        let finite = |name: &str, v: f64| -> Result<f64> {
            if v.is_finite() {
                Ok(v)
            } else {
                Err(bad(format!("{name} = {v} is not a finite number")))
            }
        };
        let h = &raw.hologram;
        for (name, v) in [
            ("[hologram] width_px", h.width_px),
            ("[hologram] height_px", h.height_px),
        ] {
            if !(1..=MAX_SIDE_PX).contains(&v) {
                return Err(bad(format!("{name} = {v} is outside 1..={MAX_SIDE_PX}")));
            }
        }
        let pitch_um = match h.pitch_um {
            OneOrTwo::One(p) => [p, p],
            OneOrTwo::Two(p) => p,
        };
        for p in pitch_um {
            if !(finite("[hologram] pitch_um", p)? > 0.0) {
                return Err(bad(format!("[hologram] pitch_um = {p} must be > 0")));
            }
        }
        let wl = finite("[hologram] wavelength_nm", h.wavelength_nm)?;
        if wl <= 0.0 {
            return Err(bad(format!("[hologram] wavelength_nm = {wl} must be > 0")));
        }
        let plate = Plate {
            width: h.width_px as u32,
            height: h.height_px as u32,
            pitch: [pitch_um[0] * 1e-6, pitch_um[1] * 1e-6],
            wavelength: wl * 1e-9,
        };

        let reference = parse_reference(&raw.reference, "[reference]", &bad)?;

        if raw.object.is_empty() {
            return Err(bad("no [[object]] table: nothing to record".into()));
        }
        let mut objects = Vec::new();
        for (i, o) in raw.object.iter().enumerate() {
            let n = i + 1;
            let mesh_keys = [
                ("rotation_deg", o.rotation_deg.is_some()),
                ("fit_mm", o.fit_mm.is_some()),
                ("units", o.units.is_some()),
                ("front", o.front.is_some()),
                ("emitters", o.emitters.is_some()),
                ("spacing_um", o.spacing_um.is_some()),
                ("pattern", o.pattern.is_some()),
                ("seed", o.seed.is_some()),
                ("light_dir", o.light_dir.is_some()),
                ("ambient", o.ambient.is_some()),
                ("normals", o.normals.is_some()),
                ("phase", o.phase.is_some()),
                ("occlusion", o.occlusion.is_some()),
            ];
            let img_keys = [
                ("distance_mm", o.distance_mm.is_some()),
                ("shift_px", o.shift_px.is_some()),
            ];
            if o.image.is_none() {
                if let Some((k, _)) = img_keys.iter().find(|k| k.1) {
                    return Err(bad(format!(
                        "[[object]] #{n}: {k} applies to image objects"
                    )));
                }
            }
            let (points, source) = match (&o.points, &o.mesh) {
                (None, None) if o.image.is_some() => {
                    if let Some((k, _)) = mesh_keys.iter().find(|k| k.1) {
                        return Err(bad(format!("[[object]] #{n}: {k} applies to mesh objects, not to images")));
                    }
                    let distance = match o.distance_mm {
                        None => None,
                        Some(d) if d.is_finite() && d > 0.0 => Some(d * 1e-3),
                        Some(d) => return Err(bad(format!("[[object]] #{n} distance_mm = {d} must be > 0"))),
                    };
                    (o.image.as_ref().expect("checked"), ObjectSource::Image { distance, shift_px: o.shift_px.unwrap_or([0, 0]) })
                }
                (_, _) if o.image.is_some() => return Err(bad(format!("[[object]] #{n}: one source per object (image, points or mesh)"))),
                (Some(p), None) => {
                    if let Some((k, _)) = mesh_keys.iter().find(|k| k.1) {
                        return Err(bad(format!("[[object]] #{n}: {k} applies to mesh objects, not to points")));
                    }
                    (p, ObjectSource::Points)
                }
                (None, Some(m)) => (m, ObjectSource::Mesh(mesh_object(o, n, &bad)?)),
                (Some(_), Some(_)) => return Err(bad(format!("[[object]] #{n} has both points and mesh: one object, one source"))),
                (None, None) => return Err(bad(format!("[[object]] #{n} needs points = \"file.ply\" or \"file.csv\", or mesh = \"file.glb\""))),
            };
            let own_reference = match &o.reference {
                Some(r) => Some(parse_reference(
                    r,
                    &format!("[[object]] #{n} reference"),
                    &bad,
                )?),
                None => None,
            };
            let off = o.offset_mm.unwrap_or([0.0; 3]);
            for v in off {
                finite(&format!("[[object]] #{n} offset_mm"), v)?;
            }
            let scale = finite(&format!("[[object]] #{n} scale"), o.scale.unwrap_or(1.0))?;
            if scale <= 0.0 {
                return Err(bad(format!("[[object]] #{n} scale = {scale} must be > 0")));
            }
            let gain = finite(&format!("[[object]] #{n} gain"), o.gain.unwrap_or(1.0))?;
            if gain < 0.0 {
                return Err(bad(format!("[[object]] #{n} gain = {gain} must be >= 0")));
            }
            if o.fit_mm.is_some() && o.scale.is_some() {
                return Err(bad(format!(
                    "[[object]] #{n}: give scale or fit_mm, not both"
                )));
            }
            objects.push(ObjectSpec {
                points: dir.join(points),
                source,
                offset: [off[0] * 1e-3, off[1] * 1e-3, off[2] * 1e-3],
                scale,
                gain,
                reference: own_reference,
            });
        }

        let s = &raw.synthesis;
        let iter_keys = [
            ("geometry", s.geometry.is_some()),
            ("focal_mm", s.focal_mm.is_some()),
            ("iterations", s.iterations.is_some()),
            ("seed", s.seed.is_some()),
            ("algorithm", s.algorithm.is_some()),
            ("mix", s.mix.is_some()),
            ("quantize_last", s.quantize_last.is_some()),
            ("stall_tolerance", s.stall_tolerance.is_some()),
            ("min_iterations", s.min_iterations.is_some()),
            ("cell_px", s.cell_px.is_some()),
            ("carrier_deg", s.carrier_deg.is_some()),
            ("lens_mm", s.lens_mm.is_some()),
        ];
        let images = objects
            .iter()
            .filter(|o| matches!(o.source, ObjectSource::Image { .. }))
            .count();
        let method = match s.method.as_deref().unwrap_or("point-sum") {
            "point-sum" => {
                if let Some((k, _)) = iter_keys.iter().find(|k| k.1) {
                    return Err(bad(format!(
                        "[synthesis] {k} applies to method = \"iterative\""
                    )));
                }
                if images > 0 {
                    return Err(bad(
                        "image objects need [synthesis] method = \"iterative\"".into()
                    ));
                }
                Method::PointSum
            }
            "iterative" => {
                if images != objects.len() {
                    return Err(bad(
                        "method = \"iterative\" takes image objects only (no points or meshes)"
                            .into(),
                    ));
                }
                Method::Iterative(iterative_spec(s, &objects, &plate, &bad)?)
            }
            other => {
                return Err(bad(format!(
                    "[synthesis] method = \"{other}\" is not one of \"point-sum\", \"iterative\""
                )))
            }
        };

        let approximation = match s.approximation.as_deref().unwrap_or("exact") {
            "exact" => Approximation::Exact,
            "fresnel" => Approximation::Fresnel,
            other => {
                return Err(bad(format!(
                    "[synthesis] approximation = \"{other}\" is not one of \"exact\", \"fresnel\""
                )))
            }
        };
        let precision = match s.precision.as_deref().unwrap_or("f32") {
            "f64" => Precision::F64,
            "f32" => Precision::F32,
            other => {
                return Err(bad(format!(
                    "[synthesis] precision = \"{other}\" is not one of \"f64\", \"f32\""
                )))
            }
        };
        let sum_path = match s.path.as_deref().unwrap_or("direct") {
            "direct" => SumPath::Direct,
            "recording-plane" => SumPath::RecordingPlane,
            "auto" => SumPath::Auto,
            other => {
                return Err(bad(format!(
                    "[synthesis] path = \"{other}\" is not one of \"direct\", \"recording-plane\", \"auto\""
                )))
            }
        };
        let recording_plane_gap = match s.recording_plane_gap_mm {
            None => None,
            Some(g) if g.is_finite() && g > 0.0 => Some(g * 1e-3),
            Some(g) => {
                return Err(bad(format!(
                    "[synthesis] recording_plane_gap_mm = {g} must be a positive number"
                )))
            }
        };
        let band_rows = match s.band_rows {
            None => None,
            Some(b) if (1..=65536).contains(&b) => Some(b as usize),
            Some(b) => {
                return Err(bad(format!(
                    "[synthesis] band_rows = {b} is outside 1..=65536"
                )))
            }
        };

        let e = &raw.encoding;
        let only = |key: &str, present: bool, kinds: &str| -> Result<()> {
            if present {
                Err(bad(format!(
                    "[encoding] {key} does not apply to kind = \"{}\" (only {kinds})",
                    e.kind
                )))
            } else {
                Ok(())
            }
        };
        let encoding = match e.kind.as_str() {
            "phase" => {
                only("bits", e.bits.is_some(), "\"amplitude\"")?;
                only("bipolar_scale", e.bipolar_scale.is_some(), "\"amplitude\"")?;
                let levels = e.levels.unwrap_or(256);
                if !(2..=65536).contains(&levels) {
                    return Err(bad(format!("[encoding] levels = {levels} is outside 2..=65536")));
                }
                let levels = levels as u32;
                let justify = e.justify.as_deref().unwrap_or("left");
                if !matches!(justify, "left" | "right") {
                    return Err(bad(format!("[encoding] justify = \"{justify}\" is not one of \"left\", \"right\"")));
                }
                if e.calibration.is_some() as u8 + e.two_pi_grey.is_some() as u8 + (justify == "right") as u8 > 1 {
                    return Err(bad("[encoding] calibration, two_pi_grey and justify = \"right\" each set the grey of every level: give one of them".into()));
                }
                if e.calibration_nm.is_some() && e.calibration.is_none() {
                    return Err(bad("[encoding] calibration_nm needs a calibration table".into()));
                }
                let calibrated = |c: std::result::Result<crate::encoding::Calibration, String>, at: &Path| -> Result<EncodingRequest> {
                    let cal = c.map_err(|m| Error::input(at, m))?;
                    Ok(EncodingRequest::Fixed(Encoding::CalibratedPhase { levels, calibration: std::sync::Arc::new(cal) }))
                };
                if let Some(c) = &e.calibration {
                    let path = dir.join(c);
                    let mut table = read_calibration(&path)?;
                    let mut source = format!("table {}", path.file_name().map(|f| f.to_string_lossy().into_owned()).unwrap_or_default());
                    if let Some(nm) = e.calibration_nm {
                        if !(finite("[encoding] calibration_nm", nm)? > 0.0) {
                            return Err(bad(format!("[encoding] calibration_nm = {nm} must be > 0")));
                        }
                        // A liquid-crystal retardance 2 pi dn d / lambda: phase scales as 1 / lambda
                        // when the dispersion of dn is neglected (common practice for a first
                        // correction; a table measured at the working wavelength is better).
                        let scale = nm * 1e-9 / plate.wavelength;
                        for r in &mut table {
                            r.1 *= scale;
                        }
                        source += &format!(", measured at {nm} nm, phases scaled by {scale:.6}");
                    }
                    calibrated(crate::encoding::Calibration::new(table, levels, source), &path)?
                } else if let Some(g) = e.two_pi_grey {
                    if !(2..=65535).contains(&g) {
                        return Err(bad(format!("[encoding] two_pi_grey = {g} is outside 2..=65535")));
                    }
                    calibrated(crate::encoding::Calibration::linear(g as u16, levels, format!("linear, 2 pi at grey {g}")), path)?
                } else if justify == "right" && levels < 65536 {
                    calibrated(crate::encoding::Calibration::linear(levels as u16, levels, "right-justified: s = g"), path)?
                } else {
                    EncodingRequest::Fixed(Encoding::Phase { levels })
                }
            }
            "binary-phase" | "binary-amplitude" => {
                only("calibration", e.calibration.is_some(), "\"phase\"")?;
                only("calibration_nm", e.calibration_nm.is_some(), "\"phase\"")?;
                only("two_pi_grey", e.two_pi_grey.is_some(), "\"phase\"")?;
                only("justify", e.justify.is_some(), "\"phase\"")?;
                only("levels", e.levels.is_some(), "\"phase\"")?;
                only("bits", e.bits.is_some(), "\"amplitude\"")?;
                only("bipolar_scale", e.bipolar_scale.is_some(), "\"amplitude\"")?;
                EncodingRequest::Fixed(if e.kind == "binary-phase" { Encoding::BinaryPhase } else { Encoding::BinaryAmplitude })
            }
            "amplitude" => {
                only("calibration", e.calibration.is_some(), "\"phase\"")?;
                only("calibration_nm", e.calibration_nm.is_some(), "\"phase\"")?;
                only("two_pi_grey", e.two_pi_grey.is_some(), "\"phase\"")?;
                only("justify", e.justify.is_some(), "\"phase\"")?;
                only("levels", e.levels.is_some(), "\"phase\"")?;
                let bits = match e.bits.unwrap_or(8) {
                    8 => 8u8,
                    16 => 16u8,
                    b => return Err(bad(format!("[encoding] bits = {b} must be 8 or 16"))),
                };
                match e.bipolar_scale {
                    None => EncodingRequest::AmplitudeAuto { bits },
                    Some(b0) => {
                        if !(finite("[encoding] bipolar_scale", b0)? > 0.0) {
                            return Err(bad(format!("[encoding] bipolar_scale = {b0} must be > 0")));
                        }
                        EncodingRequest::Fixed(Encoding::Amplitude { bits, scale: b0 })
                    }
                }
            }
            other => return Err(bad(format!("[encoding] kind = \"{other}\" is not one of \"phase\", \"binary-phase\", \"binary-amplitude\", \"amplitude\""))),
        };

        let o = &raw.output;
        if o.path.trim().is_empty() {
            return Err(bad("[output] path is empty".into()));
        }
        let output = dir.join(&o.path);
        let compression = match o.compression.as_deref().unwrap_or("none") {
            "none" => Compression::None,
            "deflate" => Compression::Deflate,
            other => {
                return Err(bad(format!(
                    "[output] compression = \"{other}\" is not one of \"none\", \"deflate\""
                )))
            }
        };
        let rows_per_strip = match o.rows_per_strip {
            None => None,
            Some(r) if r >= 1 && r <= h.height_px => Some(r as u32),
            Some(r) => {
                return Err(bad(format!(
                    "[output] rows_per_strip = {r} is outside 1..=height_px"
                )))
            }
        };

        Ok(JobSpec {
            path: path.to_path_buf(),
            sha256,
            text: String::new(),
            plate,
            reference,
            objects,
            synthesis: PointSumOptions {
                approximation,
                obliquity: s.obliquity.unwrap_or(false),
                anti_alias: true,
                precision,
            },
            method,
            band_rows,
            sum_path,
            recording_plane_gap,
            encoding,
            output,
            compression,
            rows_per_strip,
            bigtiff: o.bigtiff,
            field_px: match o.field_px {
                None => None,
                Some(f) => {
                    let f = super::fields::validate(f, path)?;
                    if let Some(r) = rows_per_strip {
                        if f[1] % r != 0 {
                            return Err(bad(format!(
                                "[output] rows_per_strip = {r} must divide the field height {}",
                                f[1]
                            )));
                        }
                    }
                    Some([f[0].min(plate.width), f[1].min(plate.height)])
                }
            },
        })
    }
}

/// Validates a reference table (`what` names it in messages).
fn parse_reference(
    r: &RawReference,
    what: &str,
    bad: &dyn Fn(String) -> Error,
) -> Result<Reference> {
    let finite = |name: &str, v: f64| -> Result<f64> {
        if v.is_finite() {
            Ok(v)
        } else {
            Err(bad(format!("{what} {name} = {v} is not a finite number")))
        }
    };
    match r.kind.as_str() {
        "plane" => {
            if r.position_mm.is_some() {
                return Err(bad(format!(
                    "{what} position_mm belongs to kind = \"spherical\", not \"plane\""
                )));
            }
            let t = r.tilt_deg.unwrap_or([0.0, 0.0]);
            for v in t {
                if !(finite("tilt_deg", v)?.abs() < 90.0) {
                    return Err(bad(format!(
                        "{what} tilt_deg = {v} must be between -90 and 90"
                    )));
                }
            }
            Ok(Reference::Plane {
                tilt: [t[0].to_radians(), t[1].to_radians()],
            })
        }
        "spherical" => {
            if r.tilt_deg.is_some() {
                return Err(bad(format!(
                    "{what} tilt_deg belongs to kind = \"plane\", not \"spherical\""
                )));
            }
            let p = r.position_mm.ok_or_else(|| {
                bad(format!(
                    "{what} kind = \"spherical\" needs position_mm = [x, y, z]"
                ))
            })?;
            for v in p {
                finite("position_mm", v)?;
            }
            if p[2] == 0.0 {
                return Err(bad(format!(
                    "{what} position_mm: z must not be 0 (the source cannot sit on the plate)"
                )));
            }
            Ok(Reference::Spherical {
                position: [p[0] * 1e-3, p[1] * 1e-3, p[2] * 1e-3],
            })
        }
        other => Err(bad(format!(
            "{what} kind = \"{other}\" is not one of \"plane\", \"spherical\""
        ))),
    }
}

/// Validates the iterative keys of `[synthesis]`.
fn iterative_spec(
    s: &RawSynthesis,
    objects: &[ObjectSpec],
    plate: &Plate,
    bad: &dyn Fn(String) -> Error,
) -> Result<IterativeSpec> {
    let geometry = match s.geometry.as_deref() {
        Some("fourier") => {
            let f = s
                .focal_mm
                .ok_or_else(|| bad("[synthesis] geometry = \"fourier\" needs focal_mm".into()))?;
            if !(f.is_finite() && f > 0.0) {
                return Err(bad(format!("[synthesis] focal_mm = {f} must be > 0")));
            }
            if objects.iter().any(|o| {
                matches!(
                    o.source,
                    ObjectSource::Image {
                        distance: Some(_),
                        ..
                    }
                )
            }) {
                return Err(bad("distance_mm does not apply in fourier geometry (the image plane is the lens's focal plane)".into()));
            }
            if objects.len() > 1 {
                return Err(bad(
                    "fourier geometry has one image plane: give one image object".into(),
                ));
            }
            Geometry::Fourier(f * 1e-3)
        }
        Some("fresnel") => {
            if s.focal_mm.is_some() {
                return Err(bad(
                    "[synthesis] focal_mm applies to geometry = \"fourier\"".into(),
                ));
            }
            if let Some(i) = objects
                .iter()
                .position(|o| matches!(o.source, ObjectSource::Image { distance: None, .. }))
            {
                return Err(bad(format!(
                    "[[object]] #{} needs distance_mm in fresnel geometry",
                    i + 1
                )));
            }
            Geometry::Fresnel
        }
        Some(other) => {
            return Err(bad(format!(
                "[synthesis] geometry = \"{other}\" is not one of \"fourier\", \"fresnel\""
            )))
        }
        None => {
            return Err(bad(
                "[synthesis] method = \"iterative\" needs geometry = \"fourier\" or \"fresnel\""
                    .into(),
            ))
        }
    };
    let iterations = match s.iterations.unwrap_or(50) {
        i if (1..=100_000).contains(&i) => i as usize,
        i => {
            return Err(bad(format!(
                "[synthesis] iterations = {i} is outside 1..=100000"
            )))
        }
    };
    let algorithm = match s.algorithm.as_deref().unwrap_or("gs") {
        "gs" => AlgorithmChoice::Gs,
        "weighted-gs" => AlgorithmChoice::WeightedGs,
        "mixed-region" => {
            let m = s.mix.unwrap_or(0.6);
            if !(m > 0.0 && m <= 1.0) {
                return Err(bad(format!("[synthesis] mix = {m} must be within (0, 1]")));
            }
            AlgorithmChoice::MixedRegion(m)
        }
        other => return Err(bad(format!("[synthesis] algorithm = \"{other}\" is not one of \"gs\", \"weighted-gs\", \"mixed-region\""))),
    };
    if s.mix.is_some() && !matches!(algorithm, AlgorithmChoice::MixedRegion(_)) {
        return Err(bad(
            "[synthesis] mix applies to algorithm = \"mixed-region\"".into(),
        ));
    }
    let quantize_last = match s.quantize_last.unwrap_or(5) {
        q if q >= 0 && q as usize <= iterations => q as usize,
        q => {
            return Err(bad(format!(
                "[synthesis] quantize_last = {q} must be within 0..=iterations"
            )))
        }
    };
    let stall_tolerance = s.stall_tolerance.unwrap_or(1e-3);
    let min_iterations = match s.min_iterations.unwrap_or(30) {
        m if m >= 0 => m as usize,
        m => {
            return Err(bad(format!(
                "[synthesis] min_iterations = {m} must be >= 0"
            )))
        }
    };
    if !(stall_tolerance.is_finite() && stall_tolerance >= 0.0) {
        return Err(bad(format!(
            "[synthesis] stall_tolerance = {stall_tolerance} must be >= 0"
        )));
    }
    let cell_px = match s.cell_px {
        None => None,
        Some(c) if c[0] > plate.width as i64 || c[1] > plate.height as i64 => {
            return Err(bad(format!(
                "[synthesis] cell_px = [{}, {}] is larger than the {} x {} plate: the cell repeats over the plate, so it must fit in it",
                c[0], c[1], plate.width, plate.height
            )))
        }
        Some(c) if c.iter().all(|&v| (1..=8192).contains(&v)) => Some([c[0] as u32, c[1] as u32]),
        Some(c) => {
            return Err(bad(format!(
                "[synthesis] cell_px = {c:?}: each side must be within 1..=8192"
            )))
        }
    };
    let asked = s.carrier_deg.unwrap_or([0.0, 0.0]);
    if asked.iter().any(|t| !(t.is_finite() && t.abs() < 90.0)) {
        return Err(bad(format!(
            "[synthesis] carrier_deg = {asked:?} must be between -90 and 90"
        )));
    }
    // Snap the carrier to a whole number of replay samples of the plate's FFT lattice:
    // sin t = m lambda / (N p) moves the replay by exactly m samples.
    let n = [plate.width as f64, plate.height as f64];
    let mut carrier_samples = [0i64; 2];
    let mut carrier = [0.0f64; 2];
    for a in 0..2 {
        let step = plate.wavelength / (n[a] * plate.pitch[a]);
        let m = (asked[a].to_radians().sin() / step).round();
        let sin = m * step;
        if sin.abs() > plate.wavelength / (2.0 * plate.pitch[a]) {
            return Err(bad(format!(
                "[synthesis] carrier_deg = {} in {} is beyond the {:.3} deg half-angle the pitch holds: the carrier would alias",
                asked[a],
                ["x", "y"][a],
                (plate.wavelength / (2.0 * plate.pitch[a])).asin().to_degrees()
            )));
        }
        carrier_samples[a] = m as i64;
        carrier[a] = sin.asin().to_degrees();
    }
    let carrier_asked = asked;
    let lens = match s.lens_mm {
        None => None,
        Some(f) if f.is_finite() && f != 0.0 => Some(f * 1e-3),
        Some(f) => {
            return Err(bad(format!(
                "[synthesis] lens_mm = {f} must be finite and non-zero"
            )))
        }
    };
    Ok(IterativeSpec {
        geometry,
        iterations,
        seed: s.seed.unwrap_or(1),
        algorithm,
        quantize_last,
        stall_tolerance,
        min_iterations,
        cell_px,
        carrier: [carrier[0].to_radians(), carrier[1].to_radians()],
        carrier_asked_deg: carrier_asked,
        carrier_samples,
        lens,
    })
}

/// Validates the mesh keys of an object.
fn mesh_object(o: &RawObject, n: usize, bad: &dyn Fn(String) -> Error) -> Result<MeshObject> {
    use crate::scene::mesh::{Placement, PlacementSize};
    use crate::scene::sampling::{Density, Pattern, PhaseMode, Shading};
    let size = match (o.scale, o.fit_mm) {
        (_, Some(f)) if !(f.is_finite() && f > 0.0) => {
            return Err(bad(format!("[[object]] #{n} fit_mm = {f} must be > 0")))
        }
        (_, Some(f)) => PlacementSize::FitMm(f),
        (s, None) => PlacementSize::Scale(s.unwrap_or(1.0)),
    };
    use crate::scene::mesh::{Front, MeshFormat};
    let unit_mm = match &o.units {
        Some(u) => crate::scene::mesh::unit_mm(u).ok_or_else(|| {
            bad(format!(
                "[[object]] #{n} units = {u:?}: expected \"m\", \"mm\", \"um\" or \"in\""
            ))
        })?,
        // The format's own unit; an unknown extension is refused when the mesh is read.
        None => o
            .mesh
            .as_deref()
            .and_then(|m| std::path::Path::new(m).extension())
            .and_then(|e| MeshFormat::from_extension(&e.to_string_lossy()))
            .map_or(1.0, MeshFormat::default_unit_mm),
    };
    let front = match &o.front {
        Some(f) => Front::parse(f).ok_or_else(|| {
            bad(format!(
                "[[object]] #{n} front = {f:?}: expected \"+z\", \"-z\", \"+x\", \"-x\", \"+y\" or \"-y\""
            ))
        })?,
        None => Front::PlusZ,
    };
    let placement = Placement {
        offset_mm: o.offset_mm.unwrap_or([0.0; 3]),
        unit_mm,
        orientation: front.matrix(),
        rotation_deg: o.rotation_deg.unwrap_or([0.0; 3]),
        size,
    };
    placement
        .validate()
        .map_err(|m| bad(format!("[[object]] #{n}: {m}")))?;
    let density = match (o.emitters, o.spacing_um) {
        (Some(_), Some(_)) => {
            return Err(bad(format!(
                "[[object]] #{n}: give emitters or spacing_um, not both"
            )))
        }
        (Some(c), None) if c >= 1 => Some(Density::Count(c as usize)),
        (Some(c), None) => {
            return Err(bad(format!(
                "[[object]] #{n} emitters = {c} must be at least 1"
            )))
        }
        (None, Some(sp)) if sp.is_finite() && sp > 0.0 => Some(Density::SpacingM(sp * 1e-6)),
        (None, Some(sp)) => {
            return Err(bad(format!(
                "[[object]] #{n} spacing_um = {sp} must be > 0"
            )))
        }
        (None, None) => None,
    };
    let pattern = match o.pattern.as_deref().unwrap_or("stratified") {
        "stratified" => Pattern::Stratified,
        "random" => Pattern::Random,
        other => {
            return Err(bad(format!(
                "[[object]] #{n} pattern = \"{other}\" is not one of \"stratified\", \"random\""
            )))
        }
    };
    let mut shading = Shading::default();
    if let Some(l) = o.light_dir {
        if l.iter().any(|v| !v.is_finite()) || l.iter().all(|&v| v == 0.0) {
            return Err(bad(format!(
                "[[object]] #{n} light_dir = {l:?} must be a finite, non-zero direction"
            )));
        }
        shading.light_dir = l;
    }
    if let Some(a) = o.ambient {
        if !(0.0..=1.0).contains(&a) {
            return Err(bad(format!(
                "[[object]] #{n} ambient = {a} must be within 0..=1"
            )));
        }
        shading.ambient = a;
    }
    shading.smooth_normals = match o.normals.as_deref().unwrap_or("smooth") {
        "smooth" => true,
        "flat" => false,
        other => {
            return Err(bad(format!(
                "[[object]] #{n} normals = \"{other}\" is not one of \"smooth\", \"flat\""
            )))
        }
    };
    let phase = match o.phase.as_deref().unwrap_or("random") {
        "random" => PhaseMode::Random,
        "constant" => PhaseMode::Constant(0.0),
        other => {
            return Err(bad(format!(
                "[[object]] #{n} phase = \"{other}\" is not one of \"random\", \"constant\""
            )))
        }
    };
    let occlusion = match o.occlusion.as_deref().unwrap_or("tiles") {
        "tiles" => Occlusion::Tiles,
        "centre" | "center" => Occlusion::Centre,
        "none" => Occlusion::None,
        other => {
            return Err(bad(format!(
            "[[object]] #{n} occlusion = \"{other}\" is not one of \"tiles\", \"centre\", \"none\""
        )))
        }
    };
    Ok(MeshObject {
        front,
        placement,
        density,
        pattern,
        seed: o.seed.unwrap_or(1),
        shading,
        phase,
        occlusion,
    })
}

/// Reads a calibration table: a header line, then `grey,phase_rad` rows (`#` comments allowed).
pub fn read_calibration(path: &Path) -> Result<Vec<(u16, f64)>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut rows = Vec::new();
    let mut header = true;
    for (i, line) in text.lines().enumerate() {
        let l = line.trim();
        if l.is_empty() || l.starts_with('#') {
            continue;
        }
        if header {
            header = false;
            if l.replace(' ', "") != "grey,phase_rad" {
                return Err(Error::input(
                    path,
                    format!("line {}: expected the header 'grey,phase_rad'", i + 1),
                ));
            }
            continue;
        }
        let mut it = l.split(',').map(str::trim);
        let (Some(g), Some(p), None) = (it.next(), it.next(), it.next()) else {
            return Err(Error::input(
                path,
                format!("line {}: expected two fields, grey,phase_rad", i + 1),
            ));
        };
        let g: u16 = g.parse().map_err(|_| {
            Error::input(
                path,
                format!("line {}: grey '{g}' is not a whole number 0..=65535", i + 1),
            )
        })?;
        let p: f64 = p
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite())
            .ok_or_else(|| {
                Error::input(
                    path,
                    format!("line {}: phase '{p}' is not a finite number", i + 1),
                )
            })?;
        rows.push((g, p));
    }
    if rows.is_empty() {
        return Err(Error::input(path, "no calibration rows"));
    }
    Ok(rows)
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}
