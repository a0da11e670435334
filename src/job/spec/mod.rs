//! The job file (TOML): its raw form as written ([`raw`]), and the validated [`JobSpec`] every
//! command uses, checked table by table (`objects`, `synthesis`, `encoding`).
//!
//! The keys of issue #2 are a contract; new keys may be added, none renamed. Unknown keys are
//! errors that name the key and its line. Paths resolve against the job file's folder.

mod correction;
mod encoding;
mod objects;
pub mod raw;
mod synthesis;

use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};

use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::{Plate, Reference};
use crate::output::tiff::Compression;
use crate::synthesis::PointSumOptions;

pub use crate::synthesis::planner::SumPath;
pub use correction::CorrectionSpec;
pub use encoding::read_calibration;
pub use raw::*;

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
    /// A list of spots for iterative synthesis (fourier geometry).
    Spots,
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
    /// Spot lists only: superposition of gratings and lenses with random phases, no iteration.
    Superposition,
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
    /// Fourier geometry: `plan` warns when a target or spot comes nearer the zero order than
    /// this, metres in the focal plane (None: two replay samples).
    pub zero_order_guard: Option<f64>,
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
    /// Layers path: number of depth slabs (None: the path's default).
    pub layer_slabs: Option<usize>,
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
    /// The calibration table's file, if `[encoding] calibration` names one.
    pub calibration_file: Option<PathBuf>,
    /// Aberration correction added to every modulator pattern (`[correction]`).
    pub correction: Option<CorrectionSpec>,
    /// GDSII output instead of TIFF (`[output] format = "gdsii"`).
    pub gdsii: Option<GdsSpec>,
    /// PNG output instead of TIFF (`[output] format = "png"`).
    pub png: Option<PngSpec>,
}

/// `[output] format = "png"`, validated.
#[derive(Clone, Debug, PartialEq)]
pub struct PngSpec {
    /// Panel size [w, h].
    pub panel: [u32; 2],
    /// What fills the panel around the plate.
    pub fill: crate::output::panel_png::PanelFill,
}

/// `[output] format = "gdsii"`, validated.
#[derive(Clone, Debug, PartialEq)]
pub struct GdsSpec {
    /// Database unit, metres.
    pub db_unit: f64,
    /// Layer number.
    pub layer: i16,
    /// Datatype number.
    pub datatype: i16,
    /// How set pixels become boundaries.
    pub merge: crate::output::gdsii::Merge,
}

impl JobSpec {
    /// The files the job names and reads: the job file, every object's file with the external
    /// buffers and images a glTF (JSON) file names, a calibration table and a correction map.
    pub fn inputs(&self) -> Vec<PathBuf> {
        let mut v = vec![self.path.clone()];
        for o in &self.objects {
            v.push(o.points.clone());
            v.extend(gltf_companions(&o.points));
        }
        v.extend(self.calibration_file.iter().cloned());
        v.extend(self.correction.iter().filter_map(|c| c.map.clone()));
        v
    }
}

/// The external files a `.gltf` (JSON) file names: `buffers[].uri` and `images[].uri` that are
/// not `data:` URIs, beside the file (percent-escapes decoded). A file that cannot be read or
/// parsed names none here (the mesh reader reports it).
fn gltf_companions(path: &Path) -> Vec<PathBuf> {
    if !path
        .extension()
        .is_some_and(|e| e.eq_ignore_ascii_case("gltf"))
    {
        return Vec::new();
    }
    let Ok(meta) = std::fs::metadata(path) else {
        return Vec::new();
    };
    if meta.len() > 64 << 20 {
        return Vec::new();
    }
    let Ok(text) = std::fs::read(path) else {
        return Vec::new();
    };
    let Ok(json) = serde_json::from_slice::<serde_json::Value>(&text) else {
        return Vec::new();
    };
    let dir = path.parent().unwrap_or(Path::new(""));
    let decode = |u: &str| -> String {
        let b = u.as_bytes();
        let mut out = Vec::with_capacity(b.len());
        let mut i = 0;
        while i < b.len() {
            if b[i] == b'%' && i + 2 < b.len() {
                if let Some(v) = std::str::from_utf8(&b[i + 1..i + 3])
                    .ok()
                    .and_then(|h| u8::from_str_radix(h, 16).ok())
                {
                    out.push(v);
                    i += 3;
                    continue;
                }
            }
            out.push(b[i]);
            i += 1;
        }
        String::from_utf8_lossy(&out).into_owned()
    };
    let mut v = Vec::new();
    for key in ["buffers", "images"] {
        for item in json[key].as_array().into_iter().flatten() {
            if let Some(u) = item["uri"].as_str() {
                if !u.starts_with("data:") {
                    v.push(dir.join(decode(u)));
                }
            }
        }
    }
    v
}

/// Most field files a plate may be split into.
pub const MAX_FIELDS: u64 = 10_000;

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

/// `v` when it is finite, else an error naming the key.
fn finite(bad: &dyn Fn(String) -> Error, name: &str, v: f64) -> Result<f64> {
    if v.is_finite() {
        Ok(v)
    } else {
        Err(bad(format!("{name} = {v} is not a finite number")))
    }
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
        let plate = parse_plate(&raw.hologram, &bad)?;
        let reference = objects::parse_reference(&raw.reference, "[reference]", &bad)?;
        let objects = objects::parse_objects(&raw.object, dir, &bad)?;
        let s = &raw.synthesis;
        let method = synthesis::parse_method(s, &objects, &plate, &bad)?;
        let sum = synthesis::parse_point_sum(s, &bad)?;
        let encoding = encoding::parse_encoding(&raw.encoding, dir, path, &plate, &bad)?;
        let out = parse_output(
            &raw.output,
            &encoding.resolve(|| 1.0),
            &plate,
            path,
            dir,
            &bad,
        )?;
        let correction =
            correction::parse_correction(raw.correction.as_ref(), &method, &plate, dir, &bad)?;
        Ok(JobSpec {
            path: path.to_path_buf(),
            sha256,
            text: String::new(),
            plate,
            reference,
            objects,
            synthesis: sum.options,
            method,
            band_rows: sum.band_rows,
            sum_path: sum.path,
            recording_plane_gap: sum.plane_gap,
            layer_slabs: sum.layer_slabs,
            encoding,
            output: out.path,
            compression: out.compression,
            rows_per_strip: out.rows_per_strip,
            bigtiff: raw.output.bigtiff,
            field_px: out.field_px,
            calibration_file: raw.encoding.calibration.as_ref().map(|c| dir.join(c)),
            correction,
            gdsii: out.gdsii,
            png: out.png,
        })
    }
}

/// Validates `[hologram]`.
fn parse_plate(h: &RawHologram, bad: &dyn Fn(String) -> Error) -> Result<Plate> {
    let finite = |name: &str, v: f64| finite(bad, name, v);
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
        if !(0.01..=10_000.0).contains(&p) {
            return Err(bad(format!(
                "[hologram] pitch_um = {p} is outside 0.01 ..= 10000 um (a writer's or panel's pixel)"
            )));
        }
    }
    let wl = finite("[hologram] wavelength_nm", h.wavelength_nm)?;
    if wl <= 0.0 {
        return Err(bad(format!("[hologram] wavelength_nm = {wl} must be > 0")));
    }
    if !(10.0..=100_000.0).contains(&wl) {
        return Err(bad(format!(
            "[hologram] wavelength_nm = {wl:e} is outside 10 ..= 100000 nm (not a wavelength light holograms are made with)"
        )));
    }
    Ok(Plate {
        width: h.width_px as u32,
        height: h.height_px as u32,
        pitch: [pitch_um[0] * 1e-6, pitch_um[1] * 1e-6],
        wavelength: wl * 1e-9,
    })
}

/// `[output]` as validated.
struct OutputKeys {
    path: PathBuf,
    compression: Compression,
    rows_per_strip: Option<u32>,
    field_px: Option<[u32; 2]>,
    gdsii: Option<GdsSpec>,
    png: Option<PngSpec>,
}

/// Validates `[output]`.
fn parse_output(
    o: &RawOutput,
    encoding: &Encoding,
    plate: &Plate,
    job: &Path,
    dir: &Path,
    bad: &dyn Fn(String) -> Error,
) -> Result<OutputKeys> {
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
        Some(r) if r >= 1 && r <= plate.height as i64 => Some(r as u32),
        Some(r) => {
            return Err(bad(format!(
                "[output] rows_per_strip = {r} is outside 1..=height_px"
            )))
        }
    };

    let field_px = match o.field_px {
        None => None,
        Some(f) => {
            let f = super::fields::validate(f, job)?;
            if let Some(r) = rows_per_strip {
                if f[1] % r != 0 {
                    return Err(bad(format!(
                        "[output] rows_per_strip = {r} must divide the field height {}",
                        f[1]
                    )));
                }
            }
            let f = [f[0].min(plate.width), f[1].min(plate.height)];
            let count = plate.width.div_ceil(f[0]) as u64 * plate.height.div_ceil(f[1]) as u64;
            if count > MAX_FIELDS {
                return Err(bad(format!(
                    "[output] field_px = {:?} makes {count} field files; at most {MAX_FIELDS} (larger fields)",
                    [f[0], f[1]]
                )));
            }
            Some(f)
        }
    };
    let gds_keys = [
        ("database_unit_nm", o.database_unit_nm.is_some()),
        ("layer", o.layer.is_some()),
        ("datatype", o.datatype.is_some()),
        ("merge", o.merge.is_some()),
        ("max_vertices", o.max_vertices.is_some()),
    ];
    let format = o.format.as_deref().unwrap_or("tiff");
    if format != "gdsii" {
        if let Some((k, _)) = gds_keys.iter().find(|k| k.1) {
            return Err(bad(format!("[output] {k} applies to format = \"gdsii\"")));
        }
    }
    let png_keys = [
        ("panel_px", o.panel_px.is_some()),
        ("panel_fill", o.panel_fill.is_some()),
    ];
    let png = if format == "png" {
        if field_px.is_some() || o.compression.is_some() || o.bigtiff.is_some() {
            return Err(bad(
                "[output] field_px, compression and bigtiff apply to TIFF output, not to format = \"png\"".into(),
            ));
        }
        let panel = match o.panel_px {
            None => [plate.width, plate.height],
            Some(pp) => {
                if pp
                    .iter()
                    .any(|&v| !(1..=i64::from(crate::output::panel_png::MAX_SIDE)).contains(&v))
                {
                    return Err(bad(format!(
                        "[output] panel_px = {pp:?}: each side must be within 1..={}",
                        crate::output::panel_png::MAX_SIDE
                    )));
                }
                [pp[0] as u32, pp[1] as u32]
            }
        };
        let side = crate::output::panel_png::MAX_SIDE;
        if plate.width > side || plate.height > side {
            return Err(bad(format!(
                "[output] format = \"png\" holds the image in memory: the {} x {} plate is above {side} x {side} (write TIFF)",
                plate.width, plate.height
            )));
        }
        let fill = match o.panel_fill.as_deref().unwrap_or("zero-phase") {
            "zero-phase" => crate::output::panel_png::PanelFill::ZeroPhase,
            "tile" => crate::output::panel_png::PanelFill::Tile,
            other => {
                return Err(bad(format!(
                    "[output] panel_fill = \"{other}\" is not one of \"zero-phase\", \"tile\""
                )))
            }
        };
        Some(PngSpec { panel, fill })
    } else {
        if let Some((k, _)) = png_keys.iter().find(|k| k.1) {
            return Err(bad(format!("[output] {k} applies to format = \"png\"")));
        }
        None
    };
    let gdsii = match format {
        "tiff" | "png" => None,
        "gdsii" => {
            if !matches!(encoding, Encoding::BinaryAmplitude | Encoding::BinaryPhase) {
                return Err(bad(format!(
                    "[output] format = \"gdsii\" writes binary plates (encoding \"binary-amplitude\" or \"binary-phase\"), not \"{}\"",
                    encoding.kind_name()
                )));
            }
            if o.compression.is_some() || o.bigtiff.is_some() {
                return Err(bad(
                    "[output] compression and bigtiff apply to TIFF output".into()
                ));
            }
            use crate::output::gdsii::{Merge, MAX_VERTICES};
            let merge = match o.merge.as_deref().unwrap_or("rectangles") {
                "rectangles" => {
                    if o.max_vertices.is_some() {
                        return Err(bad(
                            "[output] max_vertices applies to merge = \"contour\"".into(),
                        ));
                    }
                    Merge::Rectangles
                }
                "contour" => match o.max_vertices.unwrap_or(i64::from(MAX_VERTICES)) {
                    n if (4..=i64::from(MAX_VERTICES)).contains(&n) => Merge::Contour {
                        max_vertices: n as u32,
                    },
                    n => {
                        return Err(bad(format!(
                            "[output] max_vertices = {n} is outside 4..={MAX_VERTICES} (an XY record holds 8191 points, the closing one included)"
                        )))
                    }
                },
                other => {
                    return Err(bad(format!(
                        "[output] merge = \"{other}\" is not one of \"rectangles\" (row runs merged vertically), \"contour\" (regions traced into polygons)"
                    )))
                }
            };
            let db = o.database_unit_nm.unwrap_or(1.0);
            if !(db.is_finite() && (0.001..=1e6).contains(&db)) {
                return Err(bad(format!(
                    "[output] database_unit_nm = {db} is outside 0.001 ..= 1e6"
                )));
            }
            let num = |k: &str, v: Option<i64>, d: i16| -> Result<i16> {
                match v.unwrap_or(i64::from(d)) {
                    n if (0..=32767).contains(&n) => Ok(n as i16),
                    n => Err(bad(format!("[output] {k} = {n} is outside 0..=32767"))),
                }
            };
            let g = GdsSpec {
                db_unit: db * 1e-9,
                layer: num("layer", o.layer, 1)?,
                datatype: num("datatype", o.datatype, 0)?,
                merge,
            };
            // The pitch and size checks, with the message the writer would give.
            crate::output::gdsii::GdsLayout::new(
                plate.width,
                plate.height,
                plate.pitch,
                g.db_unit,
                g.layer,
                g.datatype,
                1,
                "plate",
            )
            .map_err(bad)?;
            Some(g)
        }
        other => {
            return Err(bad(format!(
                "[output] format = \"{other}\" is not one of \"tiff\", \"gdsii\", \"png\""
            )))
        }
    };
    Ok(OutputKeys {
        path: output,
        compression,
        rows_per_strip,
        field_px,
        gdsii,
        png,
    })
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}
