//! Replay: numerical reconstruction of a plate this tool wrote, before it is exposed or displayed.
//!
//! The TIFF and its sidecar give the pitch, wavelength, encoding and reference. The stored samples
//! of a window of the plate (only the strips it needs are read) are turned back into the
//! transmittance the device shows (phase levels -> exp(i phi), binary, amplitude), lit by the
//! recorded reference (or another plane wave) and propagated to the requested depths.
//!
//! Depth convention: replaying at distance D shows the plane z = D in front of the plate, where the
//! object points at depth D are sharp. The field just behind the plate is propagated by -D (the
//! virtual image, as an eye or camera focused at D sees it); the intensity equals that of the real
//! image formed by conjugate illumination at +D.
//!
//! Depends on `optics` (propagators), `encoding` (transmittance) and `output` (sidecar format).

pub mod metrics;

use std::path::{Path, PathBuf};

use num_complex::Complex;
use tiff::decoder::{Decoder, DecodingResult};

use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::propagation::{Grid, PropagationPlanner};
use crate::optics::{Plate, Reference};
use crate::output::sidecar::{EncodingRecord, OutputFiles, ReferenceRecord, Sidecar};

/// A plate on disk with what its sidecar says about it.
#[derive(Clone, Debug)]
pub struct PlateFile {
    /// The TIFF.
    pub tif: PathBuf,
    /// Geometry and wavelength.
    pub plate: Plate,
    /// The reference it was computed with.
    pub reference: Reference,
    /// The encoding of its samples.
    pub encoding: Encoding,
    /// Field files (a plate written as fields), or empty for one TIFF.
    pub fields: Vec<FieldFile>,
    /// The plate was designed for a real image at +D (iterative synthesis in Fresnel
    /// geometry: its target planes lie at +D along the propagation); depth replays then
    /// propagate by +D and draw the plane as the target was given, instead of the virtual image
    /// at -D seen by the viewer.
    pub real_image: bool,
}

/// One field file of a plate written as fields, from the fields manifest.
#[derive(Clone, Debug, PartialEq, Eq, serde::Deserialize)]
pub struct FieldFile {
    /// File name, beside the manifest.
    pub file: String,
    /// Plate pixel of its top-left corner [column, row].
    pub first_px: [u32; 2],
    /// Its size [columns, rows].
    pub size_px: [u32; 2],
}

/// The part of the fields manifest replay reads.
#[derive(serde::Deserialize)]
struct FieldsManifest {
    format: String,
    plate_px: [u32; 2],
    fields: Vec<FieldFile>,
}

/// A rectangle of plate pixels: first column, first row, width, height.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Window {
    /// First column.
    pub x: u32,
    /// First row (0 = top).
    pub y: u32,
    /// Columns.
    pub w: u32,
    /// Rows.
    pub h: u32,
}

impl Window {
    /// Parses `X,Y,W,H`.
    pub fn parse(s: &str) -> std::result::Result<Window, String> {
        let v: Vec<u32> = s
            .split(',')
            .map(|t| t.trim().parse::<u32>())
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| format!("'{s}': expected X,Y,W,H in whole pixels"))?;
        if v.len() != 4 || v[2] == 0 || v[3] == 0 {
            return Err(format!("'{s}': expected X,Y,W,H with W, H > 0"));
        }
        Ok(Window {
            x: v[0],
            y: v[1],
            w: v[2],
            h: v[3],
        })
    }
}

/// Sidecar path of a TIFF (`NAME.json`).
pub fn sidecar_of(tif: &Path) -> PathBuf {
    tif.with_extension("json")
}

impl PlateFile {
    /// Opens a plate: reads its sidecar (`NAME.json` beside `NAME.tif`) and checks the TIFF's size.
    pub fn open(tif: &Path) -> Result<PlateFile> {
        // A plate written as fields may be named by its manifest NAME.fields.json.
        let tif = &match tif.to_str().and_then(|t| t.strip_suffix(".fields.json")) {
            Some(stem) => PathBuf::from(format!("{stem}.tif")),
            None => tif.to_path_buf(),
        };
        let sc = sidecar_of(tif);
        let side = Sidecar::read(&sc)?;
        let h = &side.hologram;
        let positive = |v: f64, key: &str| -> Result<f64> {
            if v.is_finite() && v > 0.0 {
                Ok(v)
            } else {
                Err(Error::input(
                    &sc,
                    format!("sidecar field {key} = {v} must be > 0"),
                ))
            }
        };
        let plate = Plate {
            width: h.width_px,
            height: h.height_px,
            pitch: [
                positive(h.pitch_um[0], "hologram.pitch_um")? * 1e-6,
                positive(h.pitch_um[1], "hologram.pitch_um")? * 1e-6,
            ],
            wavelength: positive(h.wavelength_nm, "hologram.wavelength_nm")? * 1e-9,
        };
        let finite = |v: &[f64], key: &str| -> Result<()> {
            if v.iter().all(|x| x.is_finite()) {
                Ok(())
            } else {
                Err(Error::input(
                    &sc,
                    format!("sidecar field {key} is not finite"),
                ))
            }
        };
        let reference = match side.reference {
            ReferenceRecord::Plane { tilt_deg } => {
                finite(&tilt_deg, "reference.tilt_deg")?;
                Reference::Plane {
                    tilt: tilt_deg.map(f64::to_radians),
                }
            }
            ReferenceRecord::Spherical { position_mm } => {
                finite(&position_mm, "reference.position_mm")?;
                Reference::Spherical {
                    position: position_mm.map(|v| v * 1e-3),
                }
            }
        };
        let encoding = match side.encoding {
            EncodingRecord::Phase {
                levels,
                calibration,
                ..
            } => match calibration {
                None => Encoding::Phase { levels },
                Some(c) => {
                    let calibration = crate::encoding::Calibration::new(c.table, levels, c.source)
                        .map_err(|m| Error::input(&sc, format!("encoding.calibration: {m}")))?;
                    if calibration.level_to_grey != c.level_to_grey {
                        return Err(Error::input(
                            &sc,
                            "encoding.calibration.level_to_grey does not follow from its table by this version's rule; replay the plate with the version that wrote it",
                        ));
                    }
                    Encoding::CalibratedPhase {
                        levels,
                        calibration: std::sync::Arc::new(calibration),
                    }
                }
            },
            EncodingRecord::BinaryPhase { .. } => Encoding::BinaryPhase,
            EncodingRecord::BinaryAmplitude { .. } => Encoding::BinaryAmplitude,
            EncodingRecord::Amplitude {
                bits_per_sample,
                bipolar_scale,
                ..
            } => Encoding::Amplitude {
                bits: bits_per_sample,
                scale: positive(bipolar_scale, "encoding.bipolar_scale")?,
            },
        };
        let fields = match &side.output {
            OutputFiles::Tiff { .. } => {
                check_tiff_size(tif, [plate.width, plate.height])?;
                Vec::new()
            }
            OutputFiles::Fields {
                fields_manifest, ..
            } => {
                let name = fields_manifest
                    .as_deref()
                    .ok_or_else(|| Error::input(&sc, "output.fields_manifest is missing"))?;
                let mp = tif.with_file_name(name);
                let bytes = std::fs::read(&mp).map_err(|e| Error::io(&mp, e))?;
                let m: FieldsManifest = serde_json::from_slice(&bytes)
                    .map_err(|e| Error::input(&mp, format!("not a fields manifest: {e}")))?;
                if m.format != "fringemill-fields" || m.plate_px != [plate.width, plate.height] {
                    return Err(Error::input(
                        &mp,
                        format!(
                            "not the fields manifest of this {} x {} plate",
                            plate.width, plate.height
                        ),
                    ));
                }
                // The fields must tile the plate exactly, each file of its stated size.
                let mut covered = 0u64;
                for f in &m.fields {
                    let fits = f.first_px[0] as u64 + f.size_px[0] as u64 <= plate.width as u64
                        && f.first_px[1] as u64 + f.size_px[1] as u64 <= plate.height as u64;
                    if !fits || f.file.contains('/') || f.file.contains('\\') {
                        return Err(Error::input(
                            &mp,
                            format!("field {} leaves the plate", f.file),
                        ));
                    }
                    check_tiff_size(&tif.with_file_name(&f.file), f.size_px)?;
                    covered += f.size_px[0] as u64 * f.size_px[1] as u64;
                }
                if covered != plate.pixels() {
                    return Err(Error::input(&mp, "the fields do not cover the plate once"));
                }
                m.fields
            }
        };
        let real_image = side
            .iterative
            .as_ref()
            .is_some_and(|i| i.geometry == "fresnel");
        Ok(PlateFile {
            tif: tif.to_path_buf(),
            plate,
            reference,
            encoding,
            fields,
            real_image,
        })
    }

    /// Stored samples of a window, row-major; reads only the strips that overlap it.
    pub fn read_window(&self, win: Window) -> Result<Vec<u16>> {
        let p = &self.plate;
        if win.x as u64 + win.w as u64 > p.width as u64
            || win.y as u64 + win.h as u64 > p.height as u64
        {
            return Err(Error::job(
                &self.tif,
                format!(
                    "window {},{},{},{} leaves the {} x {} plate",
                    win.x, win.y, win.w, win.h, p.width, p.height
                ),
            ));
        }
        if self.fields.is_empty() {
            return self.read_tiff_window(&self.tif, win);
        }
        // Fields: each one overlapping the window gives its part.
        let mut out = vec![0u16; win.w as usize * win.h as usize];
        for f in &self.fields {
            let x0 = win.x.max(f.first_px[0]);
            let y0 = win.y.max(f.first_px[1]);
            let x1 = (win.x + win.w).min(f.first_px[0] + f.size_px[0]);
            let y1 = (win.y + win.h).min(f.first_px[1] + f.size_px[1]);
            if x0 >= x1 || y0 >= y1 {
                continue;
            }
            let part = self.read_tiff_window(
                &self.tif.with_file_name(&f.file),
                Window {
                    x: x0 - f.first_px[0],
                    y: y0 - f.first_px[1],
                    w: x1 - x0,
                    h: y1 - y0,
                },
            )?;
            let pw = (x1 - x0) as usize;
            for (r, row) in part.chunks_exact(pw).enumerate() {
                let o = (y0 - win.y) as usize + r;
                let c = (x0 - win.x) as usize;
                out[o * win.w as usize + c..][..pw].copy_from_slice(row);
            }
        }
        Ok(out)
    }

    /// Stored samples of a window of one TIFF (the plate's, or one field's, in its own pixels).
    fn read_tiff_window(&self, tif: &Path, win: Window) -> Result<Vec<u16>> {
        let f = std::fs::File::open(tif).map_err(|e| Error::io(tif, e))?;
        let mut d = Decoder::new(std::io::BufReader::new(f))
            .map_err(|e| Error::input(tif, e.to_string()))?;
        let (_, rps) = d.chunk_dimensions();
        let rps = rps.max(1);
        let bad = |e: tiff::TiffError| Error::input(tif, format!("cannot read strip: {e}"));
        let mut out = Vec::with_capacity(win.w as usize * win.h as usize);
        let bits = self.encoding.bits_per_sample();
        for s in win.y / rps..=(win.y + win.h - 1) / rps {
            let chunk = d.read_chunk(s).map_err(bad)?;
            let (cw, ch) = d.chunk_data_dimensions(s);
            for r in 0..ch {
                let row = s * rps + r;
                if row < win.y || row >= win.y + win.h {
                    continue;
                }
                let cols = win.x as usize..(win.x + win.w) as usize;
                match (&chunk, bits) {
                    (DecodingResult::U8(b), 1) => {
                        let rb = (cw as usize).div_ceil(8);
                        let base = r as usize * rb;
                        out.extend(cols.map(|c| ((b[base + c / 8] >> (7 - c % 8)) & 1) as u16));
                    }
                    (DecodingResult::U8(b), 8) => {
                        let base = r as usize * cw as usize;
                        out.extend(cols.map(|c| b[base + c] as u16));
                    }
                    (DecodingResult::U16(b), 16) => {
                        let base = r as usize * cw as usize;
                        out.extend(cols.map(|c| b[base + c]));
                    }
                    _ => {
                        return Err(Error::input(
                            tif,
                            format!(
                                "sample type does not match the {bits}-bit encoding of its sidecar"
                            ),
                        ))
                    }
                }
            }
        }
        Ok(out)
    }
}

/// Checks that `tif` is a readable TIFF of `size` = [columns, rows].
fn check_tiff_size(tif: &Path, size: [u32; 2]) -> Result<()> {
    let f = std::fs::File::open(tif).map_err(|e| Error::io(tif, e))?;
    let mut d = Decoder::new(std::io::BufReader::new(f))
        .map_err(|e| Error::input(tif, format!("not a readable TIFF: {e}")))?;
    let (w, h) = d
        .dimensions()
        .map_err(|e| Error::input(tif, e.to_string()))?;
    if [w, h] != size {
        return Err(Error::input(
            tif,
            format!(
                "is {w} x {h} px but its sidecar says {} x {}",
                size[0], size[1]
            ),
        ));
    }
    Ok(())
}

/// How the plate is lit.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Illumination {
    /// The reference recorded in the sidecar.
    Recorded,
    /// A plane wave with these tilts (radians).
    Plane([f64; 2]),
}

/// One replayed plane.
pub struct ReplayImage {
    /// Distance in front of the plate, metres.
    pub distance: f64,
    /// Sampling of the image plane (pitch may differ from the plate's).
    pub grid: Grid,
    /// Position of the image's centre in plate coordinates, metres (the window's centre).
    pub centre: [f64; 2],
    /// Intensity |U|^2, row-major, row 0 on top.
    pub intensity: Vec<f32>,
}

/// The transmittance of the window lit by the illumination: the field just behind the plate.
pub fn lit_window(pf: &PlateFile, win: Window, ill: Illumination) -> Result<Vec<Complex<f32>>> {
    let samples = pf.read_window(win)?;
    let p = &pf.plate;
    let k = p.k();
    let mut field = Vec::with_capacity(samples.len());
    // Transmittance per stored value, tabulated (at most 65536 entries).
    let levels = 1usize << pf.encoding.bits_per_sample();
    let table: Vec<Complex<f64>> = (0..levels)
        .map(|s| pf.encoding.transmittance(s as u16))
        .collect();
    for (i, row) in samples.chunks_exact(win.w as usize).enumerate() {
        let y = p.y_of_row((win.y as usize + i) as f64);
        for (j, &s) in row.iter().enumerate() {
            let x = p.x_of_col((win.x as usize + j) as f64);
            let phase = match ill {
                Illumination::Recorded => pf.reference.phase(x, y, k),
                Illumination::Plane(t) => k * (x * t[0].sin() + y * t[1].sin()),
            };
            let t = table[s as usize]
                * Complex::from_polar(1.0, phase.rem_euclid(2.0 * std::f64::consts::PI));
            field.push(Complex::new(t.re as f32, t.im as f32));
        }
    }
    Ok(field)
}

/// Largest window side replayed at once.
pub const MAX_WINDOW_SIDE: u32 = 8192;

/// Replays the window at each distance (metres). The planner picks angular spectrum or single-FFT
/// Fresnel per distance (physics.md: critical distance N p^2 / lambda) and reuses FFT plans.
pub fn replay(
    pf: &PlateFile,
    win: Window,
    ill: Illumination,
    distances: &[f64],
) -> Result<Vec<ReplayImage>> {
    replay_planes(pf, win, ill, distances, None)
}

/// As [`replay`]; with `focal = Some(f)` the plate is replayed through a lens of focal length f
/// onto its focal plane (Fourier geometry, pitch lambda f / (N p)) and `distances` is ignored.
pub fn replay_planes(
    pf: &PlateFile,
    win: Window,
    ill: Illumination,
    distances: &[f64],
    focal: Option<f64>,
) -> Result<Vec<ReplayImage>> {
    if win.w > MAX_WINDOW_SIDE || win.h > MAX_WINDOW_SIDE {
        return Err(Error::job(
            &pf.tif,
            format!("the replay window is {} x {} px; replay at most {MAX_WINDOW_SIDE} x {MAX_WINDOW_SIDE} at once (--window X,Y,W,H)", win.w, win.h),
        ));
    }
    let lit = lit_window(pf, win, ill)?;
    let p = &pf.plate;
    let grid = Grid {
        nx: win.w as usize,
        ny: win.h as usize,
        pitch: p.pitch,
        wavelength: p.wavelength,
        lattice: Default::default(),
    };
    let centre = [
        p.x_of_col(win.x as f64 + (win.w as f64 - 1.0) / 2.0),
        p.y_of_row(win.y as f64 + (win.h as f64 - 1.0) / 2.0),
    ];
    let mut planner = PropagationPlanner::<f32>::new();
    let mut out = Vec::new();
    if let Some(f) = focal {
        if !(f.is_finite() && f > 0.0) {
            return Err(Error::job(
                &pf.tif,
                format!("focal length {} mm must be > 0", f * 1e3),
            ));
        }
        let prop = planner.plan_recipe(
            &grid,
            0.0,
            crate::optics::propagation::PropagationRecipe::Fourier { focal: f },
        );
        let mut field = lit;
        prop.propagate(&mut field);
        out.push(ReplayImage {
            distance: f,
            grid: prop.output(),
            centre: [0.0, 0.0],
            intensity: field.iter().map(|c| c.norm_sqr()).collect(),
        });
        return Ok(out);
    }
    for &d in distances {
        if !(d.is_finite() && d > 0.0) {
            return Err(Error::job(
                &pf.tif,
                format!("replay distance {} mm must be > 0", d * 1e3),
            ));
        }
        // A design's own sign for real-image plates (iterative Fresnel geometry), else the
        // virtual image (module docs).
        let prop = planner.plan(&grid, if pf.real_image { d } else { -d });
        let mut field = lit.clone();
        prop.propagate(&mut field);
        out.push(ReplayImage {
            distance: d,
            grid: prop.output(),
            centre,
            intensity: field.iter().map(|c| c.norm_sqr()).collect(),
        });
    }
    Ok(out)
}

/// Largest oversampled Fourier replay, in samples (512 MiB of single-precision field).
pub const MAX_OVERSAMPLED_SAMPLES: usize = 8192 * 8192;

/// The focal plane of a Fourier replay sampled `factor` times finer: the lit window zero-padded
/// to factor N x factor M before the transform, so the replay pitch is lambda f / (factor N p)
/// and the optical axis is sample floor(factor N / 2). Sample floor(factor N / 2) + factor a of
/// the fine lattice is sample floor(N / 2) + a of the plain one (the DFT of a zero-padded
/// sequence at index factor a is the DFT of the sequence at index a); the samples in between
/// show what the plain lattice never samples (vortices, dips between designed points).
pub fn replay_fourier_oversampled(
    pf: &PlateFile,
    win: Window,
    ill: Illumination,
    focal: f64,
    factor: usize,
) -> Result<ReplayImage> {
    let (w, h) = (win.w as usize, win.h as usize);
    let (fw, fh) = (w * factor, h * factor);
    if fw * fh > MAX_OVERSAMPLED_SAMPLES {
        return Err(Error::job(
            &pf.tif,
            format!("the {factor}x oversampled replay would be {fw} x {fh} samples; at most {MAX_OVERSAMPLED_SAMPLES} at once (a smaller --window or --oversample)"),
        ));
    }
    if !(focal.is_finite() && focal > 0.0) {
        return Err(Error::job(
            &pf.tif,
            format!("focal length {} mm must be > 0", focal * 1e3),
        ));
    }
    let lit = lit_window(pf, win, ill)?;
    let mut field = vec![Complex::new(0.0f32, 0.0); fw * fh];
    for (r, row) in lit.chunks_exact(w).enumerate() {
        field[r * fw..r * fw + w].copy_from_slice(row);
    }
    drop(lit);
    let grid = Grid {
        nx: fw,
        ny: fh,
        pitch: pf.plate.pitch,
        wavelength: pf.plate.wavelength,
        lattice: Default::default(),
    };
    let mut planner = PropagationPlanner::<f32>::new();
    let prop = planner.plan_recipe(
        &grid,
        0.0,
        crate::optics::propagation::PropagationRecipe::Fourier { focal },
    );
    prop.propagate(&mut field);
    Ok(ReplayImage {
        distance: focal,
        grid: prop.output(),
        centre: [0.0, 0.0],
        intensity: field.iter().map(|c| c.norm_sqr()).collect(),
    })
}

/// Distances from `D` or a stack `A:B:S` (millimetres, inclusive of B when it falls on the grid).
pub fn parse_distances_mm(s: &str) -> std::result::Result<Vec<f64>, String> {
    let parts: Vec<&str> = s.split(':').collect();
    let p = |t: &str| {
        t.trim()
            .parse::<f64>()
            .ok()
            .filter(|v| v.is_finite() && *v > 0.0)
            .ok_or_else(|| format!("'{s}': distances are positive millimetres, D or A:B:STEP"))
    };
    match parts.len() {
        1 => Ok(vec![p(parts[0])? * 1e-3]),
        3 => {
            let (a, b, st) = (p(parts[0])?, p(parts[1])?, p(parts[2])?);
            if b < a {
                return Err(format!(
                    "'{s}': the stack must run from near to far (A <= B)"
                ));
            }
            let n = ((b - a) / st + 1e-9).floor() as usize + 1;
            if n > 1000 {
                return Err(format!("'{s}': {n} planes; at most 1000"));
            }
            Ok((0..n).map(|i| (a + i as f64 * st) * 1e-3).collect())
        }
        _ => Err(format!("'{s}': expected D or A:B:STEP in millimetres")),
    }
}

/// Everything `fringemill reconstruct` asks for.
#[derive(Clone, Debug)]
pub struct ReconstructRequest {
    /// The plate.
    pub tif: PathBuf,
    /// Depths, metres.
    pub distances: Vec<f64>,
    /// Replay through a lens of this focal length onto its focal plane instead (metres).
    pub focal: Option<f64>,
    /// Window of the plate; None for the whole plate.
    pub window: Option<Window>,
    /// Lighting.
    pub illumination: Illumination,
    /// Output PNG (a stack adds `-zD.DDDmm` before the extension).
    pub out: PathBuf,
    /// Grey mapping.
    pub scale: metrics::ToneScale,
    /// 8 or 16.
    pub bits: u8,
    /// Region of the replay image for power fraction, uniformity and speckle contrast.
    pub region: Option<metrics::Region>,
    /// Target image to compare with.
    pub target: Option<PathBuf>,
    /// How many peaks to report.
    pub peaks: usize,
    /// Fourier replays: also replay on a lattice this many times finer (zero padding).
    pub oversample: Option<usize>,
}

/// Runs a reconstruction: writes one PNG per depth and one JSON of metrics (`OUT.json`).
/// Returns the files written.
pub fn reconstruct(req: &ReconstructRequest) -> Result<Vec<PathBuf>> {
    let pf = PlateFile::open(&req.tif)?;
    let win = req.window.unwrap_or(Window {
        x: 0,
        y: 0,
        w: pf.plate.width,
        h: pf.plate.height,
    });
    let target = match &req.target {
        Some(t) => Some(crate::raster::read_grey(t)?),
        None => None,
    };
    if let Some(k) = req.oversample {
        if req.focal.is_none() {
            return Err(Error::job(
                &req.tif,
                "--oversample applies to Fourier replays (--focal-mm)",
            ));
        }
        if !(2..=8).contains(&k) {
            return Err(Error::job(
                &req.tif,
                format!("--oversample {k}: expected 2..=8"),
            ));
        }
    }
    let images = replay_planes(&pf, win, req.illumination, &req.distances, req.focal)?;
    let mut written = Vec::new();
    let mut planes = Vec::new();
    // Depth planes are drawn as the plate's viewer sees them (physics.md, "Viewing side"): the
    // viewer stands at z < 0 looking towards +z, so the image's right is plate -x and its columns
    // run opposite to the grid's. Fourier planes keep the FFT lattice (column = +x of the focal
    // plane, as a plain FFT after fftshift shows it), on which targets are designed.
    let mirrored = req.focal.is_none() && !pf.real_image;
    for img in &images {
        let (w, h) = (img.grid.nx, img.grid.ny);
        let drawn: Vec<f32> = if mirrored {
            img.intensity
                .chunks_exact(w)
                .flat_map(|row| row.iter().rev().copied())
                .collect()
        } else {
            img.intensity.clone()
        };
        let grid_col = |c: usize| if mirrored { w - 1 - c } else { c };
        let path = if images.len() == 1 {
            req.out.clone()
        } else {
            let stem = req
                .out
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_else(|| "replay".into());
            req.out
                .with_file_name(format!("{stem}-z{:.3}mm.png", img.distance * 1e3))
        };
        metrics::write_png(&path, w, h, &drawn, req.scale, req.bits)?;
        written.push(path.clone());
        let pk: Vec<metrics::Peak> = metrics::peaks(w, h, &drawn, req.peaks, 0.05)
            .into_iter()
            .map(|(c, r, rel)| metrics::Peak {
                col: c,
                row: r,
                x_mm: (img.centre[0] + img.grid.x_of_col(grid_col(c))) * 1e3,
                y_mm: (img.centre[1] + img.grid.y_of_row(r)) * 1e3,
                relative: rel,
            })
            .collect();
        let region = match req.region {
            Some(rg) => {
                Some(metrics::region_stats(w, h, &drawn, rg).map_err(|m| Error::job(&req.tif, m))?)
            }
            None => None,
        };
        let cmp = match &target {
            Some((tw, th, t)) => {
                if (*tw, *th) != (w, h) {
                    return Err(Error::input(
                        req.target.as_ref().unwrap(),
                        format!("is {tw} x {th} px; the replay image is {w} x {h}"),
                    ));
                }
                Some(metrics::compare(w, h, &drawn, t, req.region))
            }
            None => None,
        };
        // A target of isolated lit pixels is a spot array: figures per spot.
        let spots = match &target {
            Some((tw, _, t)) if *tw == w => {
                metrics::spot_target(w, h, t).map(|sp| metrics::spot_stats(w, &drawn, &sp))
            }
            _ => None,
        };
        planes.push(serde_json::json!({
            "image": path.file_name().map(|f| f.to_string_lossy().into_owned()),
            "distance_mm": if req.focal.is_some() { None } else { Some(img.distance * 1e3) },
            "focal_mm": req.focal.map(|f| f * 1e3),
            "width_px": w, "height_px": h,
            "pitch_um": [img.grid.pitch[0] * 1e6, img.grid.pitch[1] * 1e6],
            "centre_mm": [img.centre[0] * 1e3, img.centre[1] * 1e3],
            "total_power": img.intensity.iter().map(|&v| v as f64).sum::<f64>() * img.grid.pixel_area(),
            "peaks": pk,
            "region": region,
            "target": cmp,
            "spots": spots,
        }));
    }
    let mut oversampled = None;
    if let (Some(k), Some(f)) = (req.oversample, req.focal) {
        let img = replay_fourier_oversampled(&pf, win, req.illumination, f, k)?;
        let (fw, fh) = (img.grid.nx, img.grid.ny);
        let stem = req
            .out
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "replay".into());
        let path = req.out.with_file_name(format!("{stem}-os{k}.png"));
        metrics::write_png(&path, fw, fh, &img.intensity, req.scale, req.bits)?;
        written.push(path.clone());
        // The target's flat top, on the designed samples and on everything between them.
        let flat = match &target {
            Some((tw, th, t)) => {
                let cells = metrics::flat_cells(*tw, *th, t);
                let (w, h) = (*tw, *th);
                let fine = |r: usize, c: usize, dr: usize, dc: usize| {
                    let fr = fh / 2 + k * r + dr - k * (h / 2);
                    let fc = fw / 2 + k * c + dc - k * (w / 2);
                    img.intensity[fr * fw + fc] as f64
                };
                let on = metrics::FlatStats::of(cells.iter().map(|&(c, r)| fine(r, c, 0, 0)));
                let all = metrics::FlatStats::of(cells.iter().flat_map(|&(c, r)| {
                    (0..k)
                        .flat_map(move |dr| (0..k).map(move |dc| (dr, dc)))
                        .map(move |(dr, dc)| fine(r, c, dr, dc))
                }));
                on.map(|on| serde_json::json!({
                    "cells": cells.len(),
                    "what": "the target's flat top (pixels at its maximum whose right, lower and lower-right neighbours are too): on the designed samples, and on every fine sample of the cells they span",
                    "on_samples": on,
                    "between_samples": all,
                }))
            }
            None => None,
        };
        oversampled = Some(serde_json::json!({
            "factor": k,
            "image": path.file_name().map(|f| f.to_string_lossy().into_owned()),
            "width_px": fw, "height_px": fh,
            "pitch_um": [img.grid.pitch[0] * 1e6, img.grid.pitch[1] * 1e6],
            "lattice": "the plate window zero-padded to factor N before the transform: axis on sample floor(factor N / 2); fine sample floor(factor N / 2) + factor a is plain sample floor(N / 2) + a",
            "flat": flat,
        }));
    }
    let json = serde_json::json!({
        "plate": req.tif.file_name().map(|f| f.to_string_lossy().into_owned()),
        "window": [win.x, win.y, win.w, win.h],
        "illumination": match req.illumination {
            Illumination::Recorded => serde_json::json!("recorded reference"),
            Illumination::Plane(t) => serde_json::json!({"plane_tilt_deg": [t[0].to_degrees(), t[1].to_degrees()]}),
        },
        "drawn_as": if pf.real_image && req.focal.is_none() { "the design plane of an iterative Fresnel plate: the field propagated by +D (the real image its targets describe), drawn as the targets are given (image right = +x of the plane)" } else if mirrored { "seen by the plate's viewer (standing at z < 0, looking towards +z through the plate): image right = plate -x, image up = plate +y; peak col/row count in the image" } else { "the FFT lattice of the focal plane (optical axis on sample floor(N/2), as a plain FFT after fftshift): image right = +x of the focal plane, image up = +y" },
        "depth_convention": if req.focal.is_some() { "focal plane of a lens of focal length focal_mm behind the plate (Fourier geometry); centre_mm is the optical axis" } else if pf.real_image { "distance D is the design plane of the plate's targets, a real image at +D (field propagated by +D)" } else { "distance D shows the plane z = D in front of the plate (field propagated by -D)" },
        "planes": planes,
        "oversampled": oversampled,
    });
    let jp = req.out.with_extension("json");
    crate::output::atomic::write_atomically(
        &jp,
        (serde_json::to_string_pretty(&json).expect("plain data") + "\n").as_bytes(),
    )?;
    written.push(jp);
    Ok(written)
}
