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
use crate::synthesis::{Approximation, PointSumOptions};

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
    pub points: Option<String>,
    #[serde(default)]
    pub offset_mm: Option<[f64; 3]>,
    pub scale: Option<f64>,
    /// Multiplies every amplitude of this object (default 1).
    pub gain: Option<f64>,
}

/// `[synthesis]`
#[derive(Deserialize, Debug, Clone, Default)]
#[serde(deny_unknown_fields)]
pub struct RawSynthesis {
    pub method: Option<String>,
    pub approximation: Option<String>,
    /// Include the obliquity factor z / r (default false).
    pub obliquity: Option<bool>,
    /// Rows computed together per task (default: chosen from the width).
    pub band_rows: Option<i64>,
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
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum EncodingRequest {
    /// Fully known.
    Fixed(Encoding),
    /// Amplitude with B0 to be measured before streaming.
    AmplitudeAuto {
        /// 8 or 16.
        bits: u8,
    },
}

/// One validated `[[object]]`.
#[derive(Clone, Debug, PartialEq)]
pub struct ObjectSpec {
    /// Point file, resolved against the job's folder.
    pub points: PathBuf,
    /// Added after scaling, metres.
    pub offset: [f64; 3],
    /// Multiplies the file's coordinates.
    pub scale: f64,
    /// Multiplies the amplitudes.
    pub gain: f64,
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
    /// Rows per band, if set.
    pub band_rows: Option<usize>,
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
    text.as_bytes()[..offset.min(text.len())].iter().filter(|&&b| b == b'\n').count() + 1
}

impl JobSpec {
    /// Reads and validates a job file.
    pub fn load(path: &Path) -> Result<JobSpec> {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        let text = String::from_utf8(bytes.clone()).map_err(|e| Error::input(path, format!("not UTF-8 text (byte {})", e.utf8_error().valid_up_to())))?;
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
        for (name, v) in [("[hologram] width_px", h.width_px), ("[hologram] height_px", h.height_px)] {
            if v < 1 || v > MAX_SIDE_PX {
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
        let plate = Plate { width: h.width_px as u32, height: h.height_px as u32, pitch: [pitch_um[0] * 1e-6, pitch_um[1] * 1e-6], wavelength: wl * 1e-9 };

        let r = &raw.reference;
        let reference = match r.kind.as_str() {
            "plane" => {
                if r.position_mm.is_some() {
                    return Err(bad("[reference] position_mm belongs to kind = \"spherical\", not \"plane\"".into()));
                }
                let t = r.tilt_deg.unwrap_or([0.0, 0.0]);
                for v in t {
                    if !(finite("[reference] tilt_deg", v)?.abs() < 90.0) {
                        return Err(bad(format!("[reference] tilt_deg = {v} must be between -90 and 90")));
                    }
                }
                Reference::Plane { tilt: [t[0].to_radians(), t[1].to_radians()] }
            }
            "spherical" => {
                if r.tilt_deg.is_some() {
                    return Err(bad("[reference] tilt_deg belongs to kind = \"plane\", not \"spherical\"".into()));
                }
                let p = r.position_mm.ok_or_else(|| bad("[reference] kind = \"spherical\" needs position_mm = [x, y, z]".into()))?;
                for v in p {
                    finite("[reference] position_mm", v)?;
                }
                if p[2] == 0.0 {
                    return Err(bad("[reference] position_mm: z must not be 0 (the source cannot sit on the plate)".into()));
                }
                Reference::Spherical { position: [p[0] * 1e-3, p[1] * 1e-3, p[2] * 1e-3] }
            }
            other => return Err(bad(format!("[reference] kind = \"{other}\" is not one of \"plane\", \"spherical\""))),
        };

        if raw.object.is_empty() {
            return Err(bad("no [[object]] table: nothing to record".into()));
        }
        let mut objects = Vec::new();
        for (i, o) in raw.object.iter().enumerate() {
            let n = i + 1;
            let points = o.points.as_ref().ok_or_else(|| bad(format!("[[object]] #{n} needs points = \"file.ply\" or \"file.csv\"")))?;
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
            objects.push(ObjectSpec { points: dir.join(points), offset: [off[0] * 1e-3, off[1] * 1e-3, off[2] * 1e-3], scale, gain });
        }

        let s = &raw.synthesis;
        match s.method.as_deref().unwrap_or("point-sum") {
            "point-sum" => {}
            other => return Err(bad(format!("[synthesis] method = \"{other}\" is not one of \"point-sum\""))),
        }
        let approximation = match s.approximation.as_deref().unwrap_or("exact") {
            "exact" => Approximation::Exact,
            "fresnel" => Approximation::Fresnel,
            other => return Err(bad(format!("[synthesis] approximation = \"{other}\" is not one of \"exact\", \"fresnel\""))),
        };
        let band_rows = match s.band_rows {
            None => None,
            Some(b) if (1..=65536).contains(&b) => Some(b as usize),
            Some(b) => return Err(bad(format!("[synthesis] band_rows = {b} is outside 1..=65536"))),
        };

        let e = &raw.encoding;
        let only = |key: &str, present: bool, kinds: &str| -> Result<()> {
            if present {
                Err(bad(format!("[encoding] {key} does not apply to kind = \"{}\" (only {kinds})", e.kind)))
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
                EncodingRequest::Fixed(Encoding::Phase { levels: levels as u32 })
            }
            "binary-phase" | "binary-amplitude" => {
                only("levels", e.levels.is_some(), "\"phase\"")?;
                only("bits", e.bits.is_some(), "\"amplitude\"")?;
                only("bipolar_scale", e.bipolar_scale.is_some(), "\"amplitude\"")?;
                EncodingRequest::Fixed(if e.kind == "binary-phase" { Encoding::BinaryPhase } else { Encoding::BinaryAmplitude })
            }
            "amplitude" => {
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
            other => return Err(bad(format!("[output] compression = \"{other}\" is not one of \"none\", \"deflate\""))),
        };
        let rows_per_strip = match o.rows_per_strip {
            None => None,
            Some(r) if r >= 1 && r <= h.height_px => Some(r as u32),
            Some(r) => return Err(bad(format!("[output] rows_per_strip = {r} is outside 1..=height_px"))),
        };

        Ok(JobSpec {
            path: path.to_path_buf(),
            sha256,
            text: String::new(),
            plate,
            reference,
            objects,
            synthesis: PointSumOptions { approximation, obliquity: s.obliquity.unwrap_or(false), anti_alias: true },
            band_rows,
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
                            return Err(bad(format!("[output] rows_per_strip = {r} must divide the field height {}", f[1])));
                        }
                    }
                    Some([f[0].min(plate.width), f[1].min(plate.height)])
                }
            },
        })
    }
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}
