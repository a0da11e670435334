//! The JSON sidecar written beside each plate (`NAME.json` for `NAME.tif`): every physical parameter,
//! the encoding, counts, tool version, the job's hash and the TIFF's SHA-256. Its fields are
//! documented in README.md ("The sidecar"); `format_version` changes when a field changes meaning.
//! It holds no time stamps, so the same job gives the same sidecar.

use std::path::Path;

use serde_json::{json, Value};

use super::tiff::{Compression, FinishedTiff, TiffLayout};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::job::spec::JobSpec;
use crate::optics::Reference;

/// Version of the sidecar layout.
pub const FORMAT_VERSION: u32 = 1;

/// Everything the sidecar records.
pub struct SidecarInput<'a> {
    /// The job.
    pub spec: &'a JobSpec,
    /// Encoding as written (amplitude scale resolved).
    pub encoding: &'a Encoding,
    /// TIFF layout.
    pub layout: &'a TiffLayout,
    /// What was written.
    pub output: OutputRecord<'a>,
    /// Emitters summed.
    pub emitters: usize,
    /// Emitters with no support on the plate.
    pub unreachable: usize,
    /// Point-pixel updates done.
    pub updates: u64,
    /// Method-specific record (iterative synthesis), stored under `iterative`.
    pub extra: Option<Value>,
    /// How the point sum was computed: `synthesis.path`, and `synthesis.recording_plane` when
    /// that path ran.
    pub sum_path: Option<(&'static str, Option<Value>)>,
}

/// What a run wrote: one TIFF, or a set of field files with their manifest.
pub enum OutputRecord<'a> {
    /// One TIFF.
    Tiff(&'a FinishedTiff),
    /// Field files.
    Fields {
        /// The manifest file.
        manifest: &'a Path,
        /// Number of fields.
        count: usize,
        /// Field size.
        field_px: [u32; 2],
    },
}

fn reference_json(r: &Reference) -> Value {
    match *r {
        Reference::Plane { tilt } => {
            json!({"kind": "plane", "tilt_deg": [tilt[0].to_degrees(), tilt[1].to_degrees()]})
        }
        Reference::Spherical { position } => {
            json!({"kind": "spherical", "position_mm": [position[0] * 1e3, position[1] * 1e3, position[2] * 1e3]})
        }
    }
}

/// The sidecar as a JSON value.
pub fn to_json(i: &SidecarInput) -> Value {
    let p = &i.spec.plate;
    let reference = reference_json(&i.spec.reference);
    let encoding = match *i.encoding {
        Encoding::CalibratedPhase {
            levels,
            ref calibration,
        } => json!({
            "kind": "phase", "levels": levels, "bits_per_sample": i.encoding.bits_per_sample(),
            "stored_value": "the grey value of the calibration table whose measured phase is nearest (mod 2 pi) to 2 pi g / N, g = round(N arg(F) / 2 pi) mod N",
            "calibration": {"table": calibration.table, "level_to_grey": calibration.level_to_grey},
        }),
        Encoding::Phase { levels } => json!({
            "kind": "phase", "levels": levels, "bits_per_sample": i.encoding.bits_per_sample(),
            "stored_value": "s = round(g 2^b / N), g = round(N arg(F) / 2 pi) mod N; displayed phase 2 pi s / 2^b"
        }),
        Encoding::BinaryPhase => {
            json!({"kind": "binary-phase", "bits_per_sample": 1, "stored_value": "1 (phase pi) where Re F < 0, else 0"})
        }
        Encoding::BinaryAmplitude => {
            json!({"kind": "binary-amplitude", "bits_per_sample": 1, "stored_value": "1 (clear) where Re F >= 0, else 0 (opaque)"})
        }
        Encoding::Amplitude { bits, scale } => json!({
            "kind": "amplitude", "bits_per_sample": bits, "bipolar_scale": scale,
            "stored_value": "s = round((1 + Re F / bipolar_scale) / 2 (2^b - 1)), clipped"
        }),
    };
    let objects: Vec<Value> = i
        .spec
        .objects
        .iter()
        .map(|o| {
            let file = o.points.file_name().map(|f| f.to_string_lossy().into_owned());
            let mut v = match &o.source {
                crate::job::spec::ObjectSource::Image { distance, shift_px } => json!({"image": file, "distance_mm": distance.map(|d| d * 1e3), "shift_px": shift_px}),
                crate::job::spec::ObjectSource::Points => json!({"points": file, "offset_mm": [o.offset[0] * 1e3, o.offset[1] * 1e3, o.offset[2] * 1e3], "scale": o.scale}),
                crate::job::spec::ObjectSource::Mesh(m) => json!({
                    "mesh": file,
                    "offset_mm": m.placement.offset_mm,
                    "rotation_deg": m.placement.rotation_deg,
                    "size": format!("{:?}", m.placement.size),
                    "density": m.density.map(|d| format!("{d:?}")).unwrap_or_else(|| "replay cell lambda z / D".into()),
                    "pattern": format!("{:?}", m.pattern),
                    "seed": m.seed,
                    "light_dir": m.shading.light_dir, "ambient": m.shading.ambient, "smooth_normals": m.shading.smooth_normals,
                    "phase": format!("{:?}", m.phase),
                    "occlusion": format!("{:?}", m.occlusion),
                }),
            };
            v["gain"] = json!(o.gain);
            if let Some(r) = o.reference {
                v["reference"] = reference_json(&r);
            }
            v
        })
        .collect();
    let s = &i.spec.synthesis;
    let compression = match i.layout.compression {
        Compression::None => "none",
        Compression::Deflate => "deflate",
    };
    let output = match &i.output {
        OutputRecord::Tiff(t) => json!({
            "file": t.path.file_name().map(|f| f.to_string_lossy().into_owned()),
            "bytes": t.bytes,
            "sha256": t.sha256,
            "bigtiff": t.bigtiff,
            "compression": compression,
            "rows_per_strip": i.layout.rows_per_strip,
            "strips": t.strips,
            "photometric": "min-is-black",
        }),
        OutputRecord::Fields {
            manifest,
            count,
            field_px,
        } => json!({
            "fields_manifest": manifest.file_name().map(|f| f.to_string_lossy().into_owned()),
            "fields": count,
            "field_px": field_px,
            "compression": compression,
            "rows_per_strip": i.layout.rows_per_strip,
            "photometric": "min-is-black",
        }),
    };
    json!({
        "format": "fringemill-sidecar",
        "format_version": FORMAT_VERSION,
        "tool": {"name": "fringemill", "version": env!("CARGO_PKG_VERSION")},
        "job": {"file": i.spec.path.file_name().map(|f| f.to_string_lossy().into_owned()), "sha256": i.spec.sha256},
        "hologram": {
            "width_px": p.width, "height_px": p.height,
            "pitch_um": [p.pitch[0] * 1e6, p.pitch[1] * 1e6],
            "wavelength_nm": p.wavelength * 1e9,
            "size_mm": [p.size()[0] * 1e3, p.size()[1] * 1e3],
            "max_half_angle_deg": [p.max_half_angle()[0].to_degrees(), p.max_half_angle()[1].to_degrees()],
            "pixel_centre": "x = (j - (W-1)/2) px, y = ((H-1)/2 - i) py; row 0 is the top row; y up",
        },
        "reference": reference,
        "objects": objects,
        "iterative": i.extra,
        "synthesis": {
            "method": match i.spec.method { crate::job::spec::Method::PointSum => "point-sum", crate::job::spec::Method::Iterative(_) => "iterative" },
            "approximation": s.approximation.name(),
            "precision": s.precision.name(),
            "path": i.sum_path.as_ref().map(|p| p.0),
            "recording_plane": i.sum_path.as_ref().and_then(|p| p.1.clone()),
            "obliquity": s.obliquity,
            "anti_aliasing": "emitter j contributes where |(d_j - d_R)_x| <= lambda / (2 px) and likewise in y (d: local direction cosines)",
            "fringe_term": "F = O conj(R), O = sum a_j exp(i (k r_j + phi_j)) / r_j",
            "emitters": i.emitters,
            "emitters_without_support": i.unreachable,
            "point_pixel_updates": i.updates,
        },
        "encoding": encoding,
        "output": output,
    })
}

/// Writes the sidecar under a temporary name and renames it into place.
pub fn write(path: &Path, i: &SidecarInput) -> Result<()> {
    let text = serde_json::to_string_pretty(&to_json(i)).expect("JSON of plain values") + "\n";
    write_atomically(path, text.as_bytes())
}

/// Writes `bytes` to `path.partial`, syncs, renames to `path`; removes the partial on failure.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<()> {
    use std::io::Write;
    let tmp = super::tiff::partial_path(path);
    let res = (|| -> std::io::Result<()> {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    res.map_err(|e| {
        let _ = std::fs::remove_file(&tmp);
        Error::io(path, e)
    })
}
