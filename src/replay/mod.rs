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
//! An iterative plate in Fresnel geometry is the exception: it is designed for a real image at
//! +D, so it is propagated by +D (the sidecar's `iterative.replay_sign`).
//!
//! Depends on `optics` (propagators), `encoding` (transmittance), `output` (sidecar format, the
//! output guard), `raster` (targets), `synthesis` (the spot-list model whose figures a Fourier
//! replay reports) and `error`.

pub mod metrics;
pub mod orders;
mod plate_file;
mod reconstruct;

pub use plate_file::{sidecar_of, FieldFile, PlateFile, Window};
pub use reconstruct::{reconstruct, ReconstructRequest};

use num_complex::Complex;

use crate::error::{Error, Result};
use crate::optics::propagation::{Grid, PropagationPlanner};

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
