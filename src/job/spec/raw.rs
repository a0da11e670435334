//! The job file as written: one serde struct per table, unknown keys refused.

use serde::Deserialize;

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
    /// Iterative synthesis, fourier geometry: a list of spots (CSV: x_um, y_um, z_um, weight
    /// and optionally phase_rad).
    pub spots: Option<String>,
}

/// `[synthesis]`
#[derive(Deserialize, Debug, Clone, Default)]
#[serde(deny_unknown_fields)]
pub struct RawSynthesis {
    pub method: Option<String>,
    pub approximation: Option<String>,
    /// Include the obliquity factor z / r (default false).
    pub obliquity: Option<bool>,
    /// Kernel arithmetic: "f32" (default) or "f64" (the reference).
    pub precision: Option<String>,
    /// Point sum: "direct" (default), "recording-plane" or "auto" (the cheaper by estimate).
    pub path: Option<String>,
    /// Recording-plane path: distance from the nearest emitter to the plane, mm.
    pub recording_plane_gap_mm: Option<f64>,
    /// Layers path: number of depth slabs (default: 25 um slabs, at most 64).
    pub layers: Option<i64>,
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
    /// Iterative, fourier geometry: `plan` warns when a target or spot comes nearer the zero order
    /// than this, micrometres in the focal plane (default: two replay samples).
    pub zero_order_guard_um: Option<f64>,
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
    /// "tiff" (default), "gdsii" (binary encodings: polygons for e-beam and laser writers) or
    /// "png" (a modulator's screen image).
    pub format: Option<String>,
    /// PNG: the panel's size [w, h] the plate is centred on (default: the plate's).
    pub panel_px: Option<[i64; 2]>,
    /// PNG: "zero-phase" (default) or "tile": what fills the panel around the plate.
    pub panel_fill: Option<String>,
    /// GDSII: the database unit, nanometres (default 1).
    pub database_unit_nm: Option<f64>,
    /// GDSII: layer number (default 1).
    pub layer: Option<i64>,
    /// GDSII: datatype number (default 0).
    pub datatype: Option<i64>,
    /// GDSII: "rectangles" (default: row runs merged vertically) or "contour" (regions traced).
    pub merge: Option<String>,
    /// GDSII, `merge = "contour"`: most vertices per boundary (default 8190).
    pub max_vertices: Option<i64>,
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
    pub correction: Option<RawCorrection>,
}

/// `[correction]`: aberration correction added to every modulator pattern.
#[derive(Deserialize, Debug, Clone, Default)]
#[serde(deny_unknown_fields)]
pub struct RawCorrection {
    /// [[n, m, coefficient_waves], ...], Noll-normalised Zernike terms.
    pub zernike: Option<Vec<[f64; 3]>>,
    /// Pupil radius, mm (default: half the panel's shorter side).
    pub pupil_radius_mm: Option<f64>,
    /// Pupil centre on the panel, mm (default the panel's centre).
    pub pupil_centre_mm: Option<[f64; 2]>,
    /// A measured phase map (grey PNG or TIFF of the panel's size).
    pub correction_map: Option<String>,
    /// The map's grey value that stands for 2 pi (default 2^bits: grey g is 2 pi g / 256 in an
    /// 8-bit map, 2 pi g / 65536 in a 16-bit one).
    pub map_two_pi_grey: Option<f64>,
}
