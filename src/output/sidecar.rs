//! The JSON sidecar written beside each plate (`NAME.json` for `NAME.tif`): every physical parameter,
//! the viewing convention, the encoding, counts, tool version, the job's hash and the TIFF's
//! SHA-256. One serde type, [`Sidecar`], is written here and read back by `replay`, so the file
//! format is this module's types and nothing else: no `Debug` text reaches the file, and renaming
//! a Rust item cannot change it. Its fields are documented in README.md ("The sidecar");
//! [`FORMAT_VERSION`] changes when a field changes meaning. It holds no time stamps, so the same
//! job gives the same sidecar.
//!
//! This module knows the file, not the job: `job` fills a [`Sidecar`] from what it ran.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::atomic::write_atomically;
use crate::error::{Error, Result};

/// Version of the sidecar layout. 2: the `viewing` section, names instead of program text for
/// mesh sizes, densities, patterns, phases, occlusion and the iterative algorithm, the replay
/// lattice of iterative planes.
pub const FORMAT_VERSION: u32 = 2;

/// The `format` field of every sidecar.
pub const FORMAT_NAME: &str = "fringemill-sidecar";

/// The whole sidecar.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Sidecar {
    /// Always [`FORMAT_NAME`].
    pub format: String,
    /// [`FORMAT_VERSION`].
    pub format_version: u32,
    /// The program that wrote it.
    pub tool: ToolRecord,
    /// The job file.
    pub job: JobRecord,
    /// The plate's geometry.
    pub hologram: HologramRecord,
    /// Which side the viewer stands on, how models are turned, how replays are drawn.
    pub viewing: ViewingRecord,
    /// The job's reference wave.
    pub reference: ReferenceRecord,
    /// The job's objects, in order.
    pub objects: Vec<ObjectRecord>,
    /// Iterative synthesis (null for point sums).
    pub iterative: Option<IterativeRecord>,
    /// How F was computed.
    pub synthesis: SynthesisRecord,
    /// How F became samples.
    pub encoding: EncodingRecord,
    /// What was written.
    pub output: OutputFiles,
}

/// `tool`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ToolRecord {
    /// "fringemill".
    pub name: String,
    /// Package version.
    pub version: String,
}

impl ToolRecord {
    /// This program.
    pub fn this() -> ToolRecord {
        ToolRecord {
            name: "fringemill".into(),
            version: env!("CARGO_PKG_VERSION").into(),
        }
    }
}

/// `job`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct JobRecord {
    /// File name of the job.
    pub file: Option<String>,
    /// SHA-256 of the job file's bytes.
    pub sha256: String,
}

/// `hologram`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct HologramRecord {
    /// Columns.
    pub width_px: u32,
    /// Rows.
    pub height_px: u32,
    /// Pitch [x, y], micrometres.
    pub pitch_um: [f64; 2],
    /// Wavelength, nanometres.
    pub wavelength_nm: f64,
    /// Size [x, y], millimetres.
    pub size_mm: [f64; 2],
    /// asin(lambda / 2p) per axis, degrees.
    pub max_half_angle_deg: [f64; 2],
    /// Where pixel centres are.
    pub pixel_centre: String,
}

/// `viewing`: physics.md, "Viewing side".
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ViewingRecord {
    /// Where the viewer stands.
    pub viewer: String,
    /// How meshes are turned into plate coordinates.
    pub meshes: String,
    /// How point files are placed.
    pub points: String,
    /// How `reconstruct` draws its images.
    pub replay_images: String,
}

impl ViewingRecord {
    /// The conventions this tool follows.
    pub fn this() -> ViewingRecord {
        ViewingRecord {
            viewer: "stands on the side opposite the scene (z < 0) and looks towards +z through the plate at the virtual image; plate +x is the viewer's left".into(),
            meshes: "the model's front (front key, +Z by default) is turned to plate -z and its up (+Y, or +Z for a front along Y) to plate +y, so the model faces the viewer right-reading (for +Z a half turn about y: model +X to plate -x); then rotation_deg, scale or fit_mm, offset_mm".into(),
            points: "point files are in plate coordinates as given".into(),
            replay_images: "depth replays are drawn as the viewer sees them (image right = plate -x, image up = plate +y), except the design plane of an iterative Fresnel plate (a real image at +D, drawn as its targets are given: image right = +x of that plane); Fourier replays on the FFT lattice (optical axis on sample floor(N/2), image right = +x of the focal plane)".into(),
        }
    }
}

/// `reference` (and an object's own reference).
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum ReferenceRecord {
    /// Plane wave.
    Plane {
        /// Tilts [x, y], degrees.
        tilt_deg: [f64; 2],
    },
    /// Spherical wave.
    Spherical {
        /// Source position, millimetres.
        position_mm: [f64; 3],
    },
}

/// One `[[object]]`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ObjectRecord {
    /// The source and its placement.
    #[serde(flatten)]
    pub source: ObjectSourceRecord,
    /// Amplitude factor.
    pub gain: f64,
    /// Own reference (a separate channel), if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub reference: Option<ReferenceRecord>,
}

/// What an object is made of.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum ObjectSourceRecord {
    /// A target image of iterative synthesis.
    Image {
        /// File name.
        image: Option<String>,
        /// Distance of its plane (Fresnel geometry), millimetres.
        distance_mm: Option<f64>,
        /// Shift from the axis [right, up], replay samples.
        shift_px: [i64; 2],
    },
    /// A point cloud.
    Points {
        /// File name.
        points: Option<String>,
        /// Offset, millimetres.
        offset_mm: [f64; 3],
        /// Scale.
        scale: f64,
    },
    /// A mesh.
    Mesh(Box<MeshRecord>),
    /// A list of spots (iterative synthesis; the spots and their predicted figures are in
    /// `iterative.spots`).
    Spots {
        /// File name.
        spots: Option<String>,
        /// Spots in the list.
        spot_count: usize,
    },
}

/// A mesh object's placement, sampling and shading.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct MeshRecord {
    /// File name.
    pub mesh: Option<String>,
    /// Millimetres per file unit.
    pub unit_mm: f64,
    /// The model axis turned to face the viewer.
    pub front: String,
    /// Rotations about x, y, z after the turn, degrees.
    pub rotation_deg: [f64; 3],
    /// Scale (when not fitted).
    pub scale: Option<f64>,
    /// Largest extent, millimetres (when fitted).
    pub fit_mm: Option<f64>,
    /// Offset, millimetres.
    pub offset_mm: [f64; 3],
    /// Emitter density, in words.
    pub density: String,
    /// "stratified" or "random".
    pub pattern: String,
    /// Sampling seed.
    pub seed: u64,
    /// Direction towards the light, plate coordinates.
    pub light_dir: [f64; 3],
    /// Ambient share.
    pub ambient: f64,
    /// Smooth (vertex) normals.
    pub smooth_normals: bool,
    /// "random" or "constant R" (radians).
    pub phase: String,
    /// "none", "centre" or "tiles".
    pub occlusion: String,
}

/// `iterative`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct IterativeRecord {
    /// "fourier" or "fresnel".
    pub geometry: String,
    /// Focal length (Fourier geometry), millimetres.
    pub focal_mm: Option<f64>,
    /// "gs", "weighted-gs" or "mixed-region".
    pub algorithm: String,
    /// Mixed-region: the share of the free region's amplitude kept.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub mix: Option<f64>,
    /// Where the optical axis sits on the replay planes.
    pub replay_lattice: String,
    /// Iterations done.
    pub iterations_run: usize,
    /// Stopped before the iteration count.
    pub stopped_early: bool,
    /// The early-stop rule: stop once the error improved by less than this share over the
    /// stall window (0: never).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub stall_tolerance: Option<f64>,
    /// Iterations always run before the stall test applies.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub min_iterations: Option<usize>,
    /// Which way `reconstruct --distance-mm D` propagates this plate, in words.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub replay_sign: Option<String>,
    /// Error after each iteration (first: the start).
    pub error_per_iteration: Vec<f64>,
    /// Cell size [w, h].
    pub cell_px: [usize; 2],
    /// Replay-plane pitch per image, micrometres.
    pub replay_pitch_um: Vec<[f64; 2]>,
    /// Blazed carrier as applied, degrees (snapped to whole replay samples).
    pub carrier_deg: [f64; 2],
    /// The carrier the job asked for, degrees.
    pub carrier_asked_deg: [f64; 2],
    /// The carrier's shift in whole samples of the plate's FFT replay lattice [x, y].
    pub carrier_samples: [i64; 2],
    /// Lens term, millimetres.
    pub lens_mm: Option<f64>,
    /// Seed of the start phases.
    pub seed: u64,
    /// Quantized iterations at the end.
    pub quantize_last: usize,
    /// Spot lists: the spots and the pattern's predicted figures.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub spots: Option<SpotsRecord>,
    /// The aberration correction added to the pattern.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub correction: Option<CorrectionRecord>,
}

/// `iterative.spots`: a spot-list design and what it predicts.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SpotsRecord {
    /// The model the figures come from, in words.
    pub model: String,
    /// The spots, in the list's order, with their predicted intensities.
    pub spots: Vec<SpotRecord>,
    /// Sum of the predicted intensities (share of the panel's power).
    pub efficiency: f64,
    /// 1 - (max - min) / (max + min) of intensity / weight.
    pub uniformity: f64,
    /// (efficiency, uniformity) after each iteration (first: the superposition start).
    pub history: Vec<[f64; 2]>,
}

/// One spot of `iterative.spots`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SpotRecord {
    /// Focal-plane x (replay columns increasing), micrometres.
    pub x_um: f64,
    /// Focal-plane y (up), micrometres.
    pub y_um: f64,
    /// Beyond the focal plane, micrometres.
    pub z_um: f64,
    /// Relative intensity asked for.
    pub weight: f64,
    /// Fixed phase, radians, if the list gave one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub phase_rad: Option<f64>,
    /// Predicted share of the panel's power in this spot (quantized pattern).
    pub predicted_intensity: f64,
    /// Where the plate puts it under normal illumination [x, y, z], micrometres: moved by the
    /// carrier and a lens term.
    pub replayed_at_um: [f64; 3],
}

/// `iterative.correction`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CorrectionRecord {
    /// [n, m, coefficient in waves rms] per term.
    pub zernike: Vec<[f64; 3]>,
    /// The polynomials' normalisation and angle, in words.
    pub normalisation: String,
    /// Pupil radius, millimetres.
    pub pupil_radius_mm: f64,
    /// Pupil centre on the panel, millimetres.
    pub pupil_centre_mm: [f64; 2],
    /// The measured map's file name, if any.
    pub correction_map: Option<String>,
    /// The map's grey value standing for 2 pi (null: 2^bits of the map, 256 or 65536).
    pub map_two_pi_grey: Option<f64>,
}

/// `synthesis`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct SynthesisRecord {
    /// "point-sum" or "iterative".
    pub method: String,
    /// "exact" or "fresnel".
    pub approximation: String,
    /// "f64" or "f32": which kernel ran.
    pub precision: String,
    /// "direct" or "recording-plane" (point sums).
    pub path: Option<String>,
    /// The recording plane, when that path ran.
    pub recording_plane: Option<RecordingPlaneRecord>,
    /// The layers, when that path ran.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub layers: Option<LayersRecord>,
    /// Obliquity factor z / r included.
    pub obliquity: bool,
    /// The anti-aliasing rule.
    pub anti_aliasing: String,
    /// The fringe term.
    pub fringe_term: String,
    /// Emitters summed.
    pub emitters: usize,
    /// Emitters with no support on the plate.
    pub emitters_without_support: usize,
    /// Point-pixel updates done.
    pub point_pixel_updates: u64,
}

/// `synthesis.recording_plane`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RecordingPlaneRecord {
    /// Distance plate -> plane, millimetres.
    pub distance_mm: f64,
    /// Margins of the plane's grid [x, y], pixels.
    pub grid_margins_px: [usize; 2],
    /// Rows per band.
    pub band_rows: usize,
    /// Start of the soft support edge, as a share of the half band.
    pub edge_taper_from: f64,
    /// The method in words.
    pub method: String,
}

/// `synthesis.layers`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct LayersRecord {
    /// Number of depth slabs.
    pub slabs: usize,
    /// Slab thickness, micrometres.
    pub slab_um: f64,
    /// The front plane's samples [columns, rows], at the plate's pitch.
    pub front_plane_px: [usize; 2],
    /// The last step's periodic frame [columns, rows].
    pub frame_px: [usize; 2],
    /// "silhouette" or "none".
    pub occlusion: String,
    /// The method in words.
    pub method: String,
}

/// `encoding`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "kebab-case")]
pub enum EncodingRecord {
    /// N phase levels (with a modulator's calibration table, if any).
    Phase {
        /// N.
        levels: u32,
        /// 8 or 16.
        bits_per_sample: u8,
        /// The formula.
        stored_value: String,
        /// The calibration applied.
        #[serde(default, skip_serializing_if = "Option::is_none")]
        calibration: Option<CalibrationRecord>,
    },
    /// 1 bit, phase 0 or pi.
    BinaryPhase {
        /// 1.
        bits_per_sample: u8,
        /// The formula.
        stored_value: String,
    },
    /// 1 bit, opaque or clear.
    BinaryAmplitude {
        /// 1.
        bits_per_sample: u8,
        /// The formula.
        stored_value: String,
    },
    /// Grey bipolar intensity.
    Amplitude {
        /// 8 or 16.
        bits_per_sample: u8,
        /// B0.
        bipolar_scale: f64,
        /// The formula.
        stored_value: String,
    },
}

/// A modulator calibration, as applied.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CalibrationRecord {
    /// Where the response came from: a table (and the wavelength it was measured at), a linear
    /// panel (`two_pi_grey`) or right-justified samples.
    #[serde(default)]
    pub source: String,
    /// The response as used: (grey, phase in radians) by rising grey.
    pub table: Vec<(u16, f64)>,
    /// Phase covered by the branch of greys used, radians.
    #[serde(default)]
    pub stroke_rad: f64,
    /// Grey written for each level.
    pub level_to_grey: Vec<u16>,
}

/// `output`
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(untagged)]
pub enum OutputFiles {
    /// One TIFF.
    Tiff {
        /// File name.
        file: Option<String>,
        /// Size.
        bytes: u64,
        /// SHA-256 of the whole file.
        sha256: String,
        /// BigTIFF.
        bigtiff: bool,
        /// "none" or "deflate".
        compression: String,
        /// Rows per strip.
        rows_per_strip: u32,
        /// Strips.
        strips: u32,
        /// "min-is-black".
        photometric: String,
    },
    /// A GDSII layout (binary plates).
    Gdsii {
        /// File name.
        file: Option<String>,
        /// "gdsii".
        format: String,
        /// Size.
        bytes: u64,
        /// SHA-256 of the whole file.
        sha256: String,
        /// BOUNDARY elements (rectangles).
        boundaries: u64,
        /// Their vertices, each closing point counted (5 per rectangle).
        vertices: u64,
        /// Database unit, nanometres.
        database_unit_nm: f64,
        /// User unit, micrometres.
        user_unit_um: f64,
        /// Layer and datatype of every boundary.
        layer: i16,
        /// Datatype.
        datatype: i16,
        /// Rows per strip: shapes close at each strip's end.
        rows_per_strip: u32,
        /// How pixels became polygons, in words.
        merge: String,
        /// `merge = "contour"`: most vertices per boundary (closing point not counted).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        max_vertices: Option<u32>,
        /// Where the coordinates are, in words.
        coordinates: String,
    },
    /// A panel PNG (a modulator's screen image).
    Png {
        /// File name.
        file: Option<String>,
        /// "png".
        format: String,
        /// Size.
        bytes: u64,
        /// SHA-256 of the whole file.
        sha256: String,
        /// 1, 8 or 16 (the TIFF's stored values).
        bits_per_sample: u8,
        /// Panel size [w, h].
        panel_px: [u32; 2],
        /// The plate's top-left pixel on the panel [column, row].
        plate_origin_px: [i64; 2],
        /// "zero-phase" or "tile".
        panel_fill: String,
        /// The placement rule, in words.
        placement: String,
    },
    /// Field files with a manifest.
    Fields {
        /// The manifest's file name.
        fields_manifest: Option<String>,
        /// SHA-256 of the manifest's bytes (a manifest and a sidecar of different runs differ).
        #[serde(default, skip_serializing_if = "Option::is_none")]
        fields_manifest_sha256: Option<String>,
        /// Number of fields.
        fields: usize,
        /// Field size [w, h].
        field_px: [u32; 2],
        /// "none" or "deflate".
        compression: String,
        /// Rows per strip.
        rows_per_strip: u32,
        /// "min-is-black".
        photometric: String,
    },
}

impl Sidecar {
    /// The sidecar as JSON text (pretty, with a final newline).
    pub fn to_text(&self) -> String {
        serde_json::to_string_pretty(self).expect("JSON of plain values") + "\n"
    }

    /// Reads and checks a sidecar: JSON, the format name and version, every field of its type.
    pub fn read(path: &Path) -> Result<Sidecar> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        let v: serde_json::Value = serde_json::from_slice(&bytes)
            .map_err(|e| Error::input(path, format!("not JSON: {e}")))?;
        if v["format"] != FORMAT_NAME {
            return Err(Error::input(
                path,
                "not a fringemill sidecar (format field)",
            ));
        }
        if v["format_version"] != FORMAT_VERSION {
            return Err(Error::input(
                path,
                format!(
                    "sidecar format_version {} is not the {FORMAT_VERSION} this version reads: rerun the job with this version",
                    v["format_version"]
                ),
            ));
        }
        serde_json::from_value(v).map_err(|e| Error::input(path, format!("sidecar field: {e}")))
    }

    /// Writes the sidecar under a temporary name and renames it into place.
    pub fn write(&self, path: &Path) -> Result<()> {
        write_atomically(path, self.to_text().as_bytes())
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    fn sample() -> Sidecar {
        Sidecar {
            format: FORMAT_NAME.into(),
            format_version: FORMAT_VERSION,
            tool: ToolRecord::this(),
            job: JobRecord {
                file: Some("j.toml".into()),
                sha256: "ab".into(),
            },
            hologram: HologramRecord {
                width_px: 4,
                height_px: 3,
                pitch_um: [1.0, 2.0],
                wavelength_nm: 532.0,
                size_mm: [0.004, 0.006],
                max_half_angle_deg: [15.4, 7.6],
                pixel_centre: "centres".into(),
            },
            viewing: ViewingRecord::this(),
            reference: ReferenceRecord::Plane {
                tilt_deg: [0.0, 30.0],
            },
            objects: vec![
                ObjectRecord {
                    source: ObjectSourceRecord::Points {
                        points: Some("p.csv".into()),
                        offset_mm: [0.0, 0.0, 5.0],
                        scale: 1.0,
                    },
                    gain: 1.0,
                    reference: Some(ReferenceRecord::Spherical {
                        position_mm: [0.0, 0.0, -50.0],
                    }),
                },
                ObjectRecord {
                    source: ObjectSourceRecord::Image {
                        image: Some("t.png".into()),
                        distance_mm: None,
                        shift_px: [1, -2],
                    },
                    gain: 1.0,
                    reference: None,
                },
            ],
            iterative: None,
            synthesis: SynthesisRecord {
                method: "point-sum".into(),
                approximation: "exact".into(),
                precision: "f32".into(),
                path: Some("direct".into()),
                recording_plane: None,
                layers: None,
                obliquity: false,
                anti_aliasing: "a".into(),
                fringe_term: "f".into(),
                emitters: 1,
                emitters_without_support: 0,
                point_pixel_updates: 12,
            },
            encoding: EncodingRecord::Phase {
                levels: 8,
                bits_per_sample: 8,
                stored_value: "s".into(),
                calibration: None,
            },
            output: OutputFiles::Tiff {
                file: Some("p.tif".into()),
                bytes: 100,
                sha256: "cd".into(),
                bigtiff: false,
                compression: "none".into(),
                rows_per_strip: 3,
                strips: 1,
                photometric: "min-is-black".into(),
            },
        }
    }

    #[test]
    fn round_trips_through_its_own_text() {
        let s = sample();
        let text = s.to_text();
        let v: serde_json::Value = serde_json::from_str(&text).unwrap();
        // The documented layout: tagged kinds, flattened objects, null for absent sections.
        assert_eq!(v["reference"]["kind"], "plane");
        assert_eq!(v["objects"][0]["points"], "p.csv");
        assert_eq!(v["objects"][0]["reference"]["kind"], "spherical");
        assert_eq!(v["objects"][1]["image"], "t.png");
        assert!(v["iterative"].is_null());
        assert_eq!(v["encoding"]["kind"], "phase");
        assert_eq!(v["output"]["strips"], 1);
        let back: Sidecar = serde_json::from_value(v).unwrap();
        assert_eq!(back, s);
    }

    #[test]
    fn read_refuses_other_formats_and_versions() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("s.json");
        let mut v = serde_json::to_value(sample()).unwrap();
        v["format_version"] = 1.into();
        std::fs::write(&p, v.to_string()).unwrap();
        let e = Sidecar::read(&p).unwrap_err().to_string();
        assert!(e.contains("format_version 1"), "{e}");
        v["format"] = "other".into();
        std::fs::write(&p, v.to_string()).unwrap();
        assert!(Sidecar::read(&p)
            .unwrap_err()
            .to_string()
            .contains("format field"));
        std::fs::write(&p, "{").unwrap();
        assert!(Sidecar::read(&p)
            .unwrap_err()
            .to_string()
            .contains("not JSON"));
        let mut v = serde_json::to_value(sample()).unwrap();
        v["hologram"]["width_px"] = "wide".into();
        std::fs::write(&p, v.to_string()).unwrap();
        assert!(Sidecar::read(&p)
            .unwrap_err()
            .to_string()
            .contains("sidecar field"));
        sample().write(&p).unwrap();
        assert_eq!(Sidecar::read(&p).unwrap(), sample());
    }
}
