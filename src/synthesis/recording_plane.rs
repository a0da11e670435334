//! Wavefront recording plane (Shimobaba, Masuda and Ito, Optics Letters 34, 3133, 2009): the
//! emitters are summed onto a plane parallel to the plate and close to them, where each one's
//! support is small, and that plane is carried to the plate by one angular-spectrum step.
//!
//! # What is computed
//! With a plane reference R = exp(i 2 pi f_R . x), f_R = (sin tx, sin ty) / lambda, the fringe term
//! F = O conj(R) holds the frequencies f_R + f' with |f'_x| <= 1 / (2 p_x), |f'_y| <= 1 / (2 p_y):
//! exactly the band a grid of pitch p carries, centred on f_R (physics.md, Sampling limits). So:
//!
//! 1. On the recording plane, at distance z_w from the plate (between plate and scene), the
//!    demodulated field G = O_w conj(R) is summed by the point-sum engine itself, with the same
//!    per-pixel support rule, each emitter at distance z_j - z_w;
//! 2. G's spectrum is multiplied by the transfer function of free space over z_w evaluated at the
//!    physical frequency f = f' + f_R: H = exp(i 2 pi z_w sqrt(1 / lambda^2 - |f|^2)) (zero for
//!    evanescent f), and transformed back: that is O conj(R) on the plate.
//!
//! exp(i k r) / r is an exact solution of the wave equation, so step 2 carries each emitter's wave
//! to the plate without approximation. What must be handled is the window: a support cut sharply
//! at the recording plane diffracts over z_w, and wherever an emitter is nearer that plane than the
//! plate is, the ringing reaches the middle of its support on the plate (measured: 5-25 % of |F|).
//! So the window is soft on both sides: each emitter's wave on the plane is weighted by a smooth
//! step of its support margin (1 up to [`TAPER_START`] = 80 % of the half band, 0 at the Nyquist
//! limit; [`PointSum::with_edge_taper`]) and the plane's spectrum by the same roll-off. Where every
//! emitter is seen within 80 % of the band, the plate equals the direct sum to about 4e-4 of
//! max |F| (`tests/recording_plane.rs`); in the outer fifth of each support it fades instead of
//! stopping at a pixel. It is a valid band-limited hologram of the scene, not the same plate as the
//! direct sum's, and a job says which it wants (`[synthesis] path`).
//!
//! # Tiles
//! The plate is computed band by band (the runner's bands) and across the width in column tiles.
//! A tile's recording-plane grid adds a margin on every side: the largest lateral distance a ray of
//! the band travels over z_w (z_w tan theta), plus four ringing widths and 8 pixels. The grid is
//! transformed as one periodic cell; light that would wrap around lands in the margin, never in the
//! tile. Memory per band in flight: two grids of (tile + 2 margins) complex f64.
//!
//! Applies to exact spherical waves without the obliquity factor, one plane reference whose band
//! stays inside the unit circle of directions (|s_R| + lambda / 2p per axis), no occlusion; other
//! jobs take the direct sum.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use num_complex::Complex64;

use super::kernels;
use super::point_sum::{BandScratch, PointSum};
use super::{Approximation, Emitter, PointSumOptions};
use crate::optics::fft2d::Fft2d;
use crate::optics::{Plate, Reference};

/// A planned grid: its FFT and the transfer function on it (FFT order).
struct GridPlan {
    fft: Fft2d<f64>,
    transfer: Vec<Complex64>,
}

/// The recording-plane synthesis of one scene on one plate.
pub struct RecordingPlane {
    plate: Plate,
    tilt: [f64; 2],
    emitters: Vec<Emitter>,
    opts: PointSumOptions,
    /// Distance plate -> recording plane, metres.
    z_w: f64,
    /// Margin of the recording-plane grid on each side, pixels [x, y].
    margin: [usize; 2],
    /// Largest |tan| of the band's directions [x, y].
    tan_max: [f64; 2],
    /// Columns per tile.
    tile_cols: usize,
    /// Preferred rows per band.
    band_rows: usize,
    /// Emitters whose support misses the plate (counted by the direct sum's supports).
    unreachable: usize,
    plans: Mutex<HashMap<(usize, usize), Arc<GridPlan>>>,
}

/// Largest |u_x / u_z| and |u_y / u_z| over the propagating directions of the band
/// |u - s_R| <= half (per axis), sampled on a 65 x 65 grid including the corners
/// ([`super::layers::transfer::band_tangents`]).
fn band_tangents(s_r: [f64; 2], half: [f64; 2]) -> [f64; 2] {
    let t = super::layers::transfer::band_tangents(s_r, half, 64);
    [0, 1].map(|a| t[a][0].abs().max(t[a][1].abs()).max(0.0))
}

/// Share of each emitter's band (from its centre, per axis) kept at full weight; the rest rolls
/// off to zero at the Nyquist limit ([`PointSum::with_edge_taper`]).
pub const TAPER_START: f64 = 0.8;

impl RecordingPlane {
    /// Prepares the synthesis. `gap` is the distance from the nearest emitter to the recording
    /// plane (metres; default: 1/8 of that emitter's distance to the plate, at least 16 pixels'
    /// Nyquist reach). Returns why the method does not apply to this job, if it does not.
    pub fn new(
        plate: Plate,
        reference: Reference,
        emitters: Vec<Emitter>,
        opts: PointSumOptions,
        gap: Option<f64>,
    ) -> Result<Self, String> {
        let tilt = match reference {
            Reference::Plane { tilt } => tilt,
            Reference::Spherical { .. } => {
                return Err("the recording plane needs a plane reference".into())
            }
        };
        if opts.approximation != Approximation::Exact {
            return Err(
                "the recording plane carries exact waves (approximation = \"exact\")".into(),
            );
        }
        if opts.obliquity {
            return Err("the recording plane does not apply the obliquity factor".into());
        }
        if !opts.anti_alias {
            return Err("the recording plane needs the anti-aliasing support".into());
        }
        let z_min = emitters
            .iter()
            .map(|e| e.pos[2])
            .fold(f64::INFINITY, f64::min);
        if !(z_min.is_finite() && z_min > 0.0) {
            return Err("no emitter in front of the plate".into());
        }
        let half = plate.nyquist_cosines();
        let p = plate.pitch[0].max(plate.pitch[1]);
        let reach = half[0].max(half[1]).min(0.99);
        let gap = gap
            .unwrap_or_else(|| (z_min / 8.0).max(16.0 * p / reach * (1.0 - reach * reach).sqrt()));
        if !(gap.is_finite() && gap > 0.0) {
            return Err(format!("recording-plane gap {gap} m is not positive"));
        }
        let z_w = z_min - gap;
        if z_w <= 0.0 {
            return Err(format!(
                "the nearest emitter ({:.3} mm) is closer to the plate than the recording-plane gap ({:.3} mm)",
                z_min * 1e3,
                gap * 1e3
            ));
        }
        let s_r = [tilt[0].sin(), tilt[1].sin()];
        // The band's farthest direction cosines. Where they reach the unit circle, the band holds
        // propagating directions as close to grazing as the grid reaches (the soft edge still
        // weights them), whose lateral travel over z_w has no bound: no finite margin keeps their
        // wrap-around out of the tile (and `band_tangents` would return whatever its samples
        // nearest uz = 0 give).
        let far = [0, 1].map(|a| s_r[a].abs() + half[a]);
        if far[0] * far[0] + far[1] * far[1] >= 1.0 - 1e-6 {
            return Err(format!(
                "the reference tilt plus the plate's half-angle reaches grazing incidence (direction cosines up to ({:.3}, {:.3}), length {:.3} >= 1): the recording plane's grid would need an unbounded margin",
                far[0],
                far[1],
                far[0].hypot(far[1])
            ));
        }
        let tan_max = band_tangents(s_r, half);
        let ring = (plate.wavelength * z_w).sqrt();
        let margin =
            [0, 1].map(|a| ((z_w * tan_max[a] + 4.0 * ring) / plate.pitch[a]).ceil() as usize + 8);
        let tile_cols = (2 * margin[0]).max(512).min(plate.width as usize);
        let band_rows = (2 * margin[1]).max(256).min(plate.height as usize);
        Ok(RecordingPlane {
            plate,
            tilt,
            emitters,
            opts,
            z_w,
            margin,
            tan_max,
            tile_cols,
            band_rows,
            unreachable: 0,
            plans: Mutex::new(HashMap::new()),
        })
    }

    /// Records how many emitters miss the plate (the direct sum's count, for the sidecar).
    pub fn with_unreachable(mut self, n: usize) -> Self {
        self.unreachable = n;
        self
    }
    /// Emitters whose support misses the plate, as recorded by [`Self::with_unreachable`].
    pub fn unreachable(&self) -> usize {
        self.unreachable
    }

    /// The plate.
    pub fn plate(&self) -> &Plate {
        &self.plate
    }
    /// Distance from the plate to the recording plane, metres.
    pub fn distance(&self) -> f64 {
        self.z_w
    }
    /// Grid margins [x, y], pixels.
    pub fn margins(&self) -> [usize; 2] {
        self.margin
    }
    /// Rows per band this method is efficient with (the margins are paid once per band).
    pub fn band_rows(&self) -> usize {
        self.band_rows
    }
    /// The emitters, in summation order.
    pub fn emitters(&self) -> &[Emitter] {
        &self.emitters
    }

    fn plan(&self, gw: usize, gh: usize) -> Arc<GridPlan> {
        let mut plans = self.plans.lock().unwrap_or_else(|e| e.into_inner());
        plans
            .entry((gw, gh))
            .or_insert_with(|| {
                let p = &self.plate;
                let inv_l2 = 1.0 / (p.wavelength * p.wavelength);
                let f_r = [
                    self.tilt[0].sin() / p.wavelength,
                    self.tilt[1].sin() / p.wavelength,
                ];
                let signed = |k: usize, n: usize| -> f64 {
                    if k < n.div_ceil(2) {
                        k as f64
                    } else {
                        k as f64 - n as f64
                    }
                };
                let mut transfer = Vec::with_capacity(gw * gh);
                for i in 0..gh {
                    // Row index grows downwards while y grows upwards: DFT index k along the
                    // rows is the physical frequency -k / (N p).
                    let ky = signed(i, gh) / gh as f64; // f'_y p_y, in [-1/2, 1/2)
                    let fy = -ky / p.pitch[1] + f_r[1];
                    for j in 0..gw {
                        let kx = signed(j, gw) / gw as f64;
                        let fx = kx / p.pitch[0] + f_r[0];
                        let fz2 = inv_l2 - fx * fx - fy * fy;
                        // The same roll-off on the plane's spectrum (stationary phase maps an
                        // emitter's direction to this frequency): it takes out what the sampled
                        // window leaves near the band's edge.
                        let taper = kernels::edge_taper(2.0 * kx.abs(), TAPER_START)
                            * kernels::edge_taper(2.0 * ky.abs(), TAPER_START);
                        transfer.push(if fz2 > 0.0 && taper > 0.0 {
                            let cycles = self.z_w * fz2.sqrt();
                            let t = cycles - cycles.round();
                            let (s, c) = (std::f64::consts::TAU * t).sin_cos();
                            Complex64::new(c * taper, s * taper)
                        } else {
                            Complex64::new(0.0, 0.0)
                        });
                    }
                }
                Arc::new(GridPlan {
                    fft: Fft2d::new(gw, gh),
                    transfer,
                })
            })
            .clone()
    }

    /// Column tiles: (first column of the tile, first column it writes). Every tile has
    /// `tile_cols` columns (the last one shifted left to end at the plate's edge), so all grids of
    /// a band share one shape and one plan.
    fn tiles(&self) -> Vec<(usize, usize)> {
        let w = self.plate.width as usize;
        let tc = self.tile_cols;
        let mut out = Vec::new();
        let mut c = 0;
        while c < w {
            let start = c.min(w - tc);
            out.push((start, c));
            c += tc;
        }
        out
    }

    /// Computes F for rows [row0, row0 + rows) into `out` (row-major, `rows * width`). Returns the
    /// point-pixel updates done on the recording plane.
    ///
    /// # Panics
    /// If `out` has the wrong length or the rows leave the plate (a bug in the caller).
    pub fn compute_band(
        &self,
        row0: usize,
        rows: usize,
        out: &mut [Complex64],
        _scratch: &mut BandScratch,
    ) -> u64 {
        let p = self.plate;
        let w = p.width as usize;
        assert!(
            out.len() == rows * w && row0 + rows <= p.height as usize,
            "band buffer mismatch"
        );
        let [mx, my] = self.margin;
        let (gw, gh) = (self.tile_cols + 2 * mx, rows + 2 * my);
        let plan = self.plan(gw, gh);
        let k = p.k();
        let s_r = [self.tilt[0].sin(), self.tilt[1].sin()];
        let mut grid = vec![Complex64::new(0.0, 0.0); gw * gh];
        let mut scratch = vec![Complex64::new(0.0, 0.0); plan.fft.scratch_len()];
        let mut ps_scratch = BandScratch::default();
        let mut updates = 0u64;
        let grid_plate = Plate {
            width: gw as u32,
            height: gh as u32,
            ..p
        };
        let half_w = [gw as f64 * p.pitch[0] / 2.0, gh as f64 * p.pitch[1] / 2.0];
        let tiles = self.tiles();
        for (ti, &(c0, write0)) in tiles.iter().enumerate() {
            let write1 = tiles.get(ti + 1).map_or(w, |t| t.1);
            // Centre of the grid in plate coordinates.
            let xc = p.x_of_col(c0 as f64 - mx as f64 + (gw as f64 - 1.0) / 2.0);
            let yc = p.y_of_row(row0 as f64 - my as f64 + (gh as f64 - 1.0) / 2.0);
            // Emitters whose recording-plane support can reach the grid, in grid coordinates.
            let local: Vec<Emitter> = self
                .emitters
                .iter()
                .filter_map(|e| {
                    let d = e.pos[2] - self.z_w;
                    let (dx, dy) = ((e.pos[0] - xc).abs(), (e.pos[1] - yc).abs());
                    let reach = [d * self.tan_max[0], d * self.tan_max[1]];
                    (dx <= half_w[0] + reach[0] + p.pitch[0]
                        && dy <= half_w[1] + reach[1] + p.pitch[1])
                        .then(|| Emitter {
                            pos: [e.pos[0] - xc, e.pos[1] - yc, d],
                            ..*e
                        })
                })
                .collect();
            if local.is_empty() {
                for r in 0..rows {
                    out[r * w + write0..r * w + write1].fill(Complex64::new(0.0, 0.0));
                }
                continue;
            }
            let sum = PointSum::new(
                grid_plate,
                Reference::Plane { tilt: self.tilt },
                local,
                self.opts,
            )
            .with_edge_taper(TAPER_START);
            updates += sum.compute_band(0, gh, &mut grid, &mut ps_scratch);
            plan.fft.process_with_scratch(&mut grid, &mut scratch);
            for (g, h) in grid.iter_mut().zip(&plan.transfer) {
                *g *= h;
            }
            plan.fft
                .process_inverse_with_scratch(&mut grid, &mut scratch);
            // The engine demodulated with R about the grid's centre: back to the plate's origin.
            let cycles = -k * (s_r[0] * xc + s_r[1] * yc) / std::f64::consts::TAU;
            let t = cycles - cycles.round();
            let (s, c) = (std::f64::consts::TAU * t).sin_cos();
            let phase = Complex64::new(c, s);
            for r in 0..rows {
                let src = (my + r) * gw + mx + (write0 - c0);
                let dst = r * w + write0;
                for (o, g) in out[dst..dst + write1 - write0]
                    .iter_mut()
                    .zip(&grid[src..src + write1 - write0])
                {
                    *o = g * phase;
                }
            }
        }
        updates
    }

    /// Estimated cost of the whole plate: the updates on the recording plane (each emitter's
    /// support there, within the grid) at `update_weight` each, plus the transforms, one grid
    /// element of one radix-2 pass at `fft_weight`.
    pub fn estimate_cost(&self, update_weight: f64, fft_weight: f64) -> f64 {
        let p = &self.plate;
        let half = p.nyquist_cosines();
        let mut updates = 0.0;
        for e in &self.emitters {
            let d = e.pos[2] - self.z_w;
            // Support on the recording plane: about 2 d tan(theta) per axis around the foot.
            let sx = (2.0 * d * (half[0] / (1.0 - half[0] * half[0]).max(1e-6).sqrt())
                / p.pitch[0])
                .min(p.width as f64 + 2.0 * self.margin[0] as f64)
                .max(1.0);
            let sy = (2.0 * d * (half[1] / (1.0 - half[1] * half[1]).max(1e-6).sqrt())
                / p.pitch[1])
                .min(p.height as f64 + 2.0 * self.margin[1] as f64)
                .max(1.0);
            updates += sx * sy;
        }
        let bands = (p.height as usize).div_ceil(self.band_rows) as f64;
        let tiles = self.tiles().len() as f64;
        let gw = (self.tile_cols + 2 * self.margin[0]) as f64;
        let gh = (self.band_rows.min(p.height as usize) + 2 * self.margin[1]) as f64;
        let n = gw * gh;
        // Each band grid is filled for every tile; overlapping grids repeat a share of the updates.
        let overlap = (gw * gh) / (self.tile_cols as f64 * self.band_rows as f64);
        updates * overlap * update_weight + bands * tiles * 2.0 * n * n.log2() * fft_weight
    }
}
