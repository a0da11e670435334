//! The production point-source engine: F = O conj(R) over a band of rows.
//!
//! Per band it keeps only the emitters whose support reaches the band (conservative y-extent),
//! per row and emitter it walks only the columns of the support span
//! ([`super::support::row_columns`]) and applies the exact per-pixel test inside, so the result is the
//! same pixel set as the reference, at a cost that follows the real support rather than the plate.
//!
//! Summation order is fixed: for every pixel, emitters are added in input order, whatever the band
//! size or thread count, so results are bit-identical across runs and machines with the same build.
//! The phase k r (10^5 to 10^7 rad) is computed in f64 and reduced modulo 2 pi before the sine and
//! cosine; the absolute phase error is about 1e-16 k r, below 1e-9 rad for r < 1 m at 400 nm.
//! The inner loop allocates nothing; the band buffers are the caller's.

use num_complex::Complex64;

use super::support::{direction_window, in_support, plate_rows, row_columns};
use super::{Approximation, Emitter, PointSumOptions};
use crate::optics::{Plate, Reference};

const TWO_PI: f64 = 2.0 * std::f64::consts::PI;
const INV_TWO_PI: f64 = 1.0 / TWO_PI;

/// sin and cos of `phase` after reduction to [-pi, pi].
#[inline(always)]
fn cis_reduced(phase: f64) -> (f64, f64) {
    let t = phase * INV_TWO_PI;
    let t = t - t.round();
    (TWO_PI * t).sin_cos()
}

/// A prepared point-source summation over a plate.
pub struct PointSum {
    plate: Plate,
    reference: Reference,
    emitters: Vec<Emitter>,
    opts: PointSumOptions,
    /// Rows [start, end) each emitter may reach (conservative), or None.
    rows: Vec<Option<(usize, usize)>>,
    half_band: [f64; 2],
}

/// Scratch buffers a worker reuses from band to band.
#[derive(Default)]
pub struct BandScratch {
    candidates: Vec<u32>,
    ref_dir_x: Vec<f64>,
    ref_dir_y: Vec<f64>,
}

impl PointSum {
    /// Prepares the summation: computes each emitter's conservative row range on the plate.
    pub fn new(plate: Plate, reference: Reference, emitters: Vec<Emitter>, opts: PointSumOptions) -> Self {
        let half_band = if opts.anti_alias { plate.nyquist_cosines() } else { [f64::INFINITY; 2] };
        let size = plate.size();
        let (sx, sy) = reference.direction_range([-size[0] / 2.0, size[0] / 2.0], [-size[1] / 2.0, size[1] / 2.0]);
        let (wx, wy) = direction_window(sx, sy, half_band);
        let rows = emitters
            .iter()
            .map(|e| {
                if opts.anti_alias {
                    plate_rows(&plate, e, wx, wy, opts.approximation)
                } else {
                    Some((0, plate.height as usize))
                }
            })
            .collect();
        PointSum { plate, reference, emitters, opts, rows, half_band }
    }

    /// The plate.
    pub fn plate(&self) -> &Plate {
        &self.plate
    }
    /// The emitters, in summation order.
    pub fn emitters(&self) -> &[Emitter] {
        &self.emitters
    }
    /// Emitters whose support misses the plate entirely (they contribute nothing).
    pub fn unreachable(&self) -> usize {
        self.rows.iter().filter(|r| r.is_none()).count()
    }

    /// Direction window (emitter directions that may pass the test) on the row at height y.
    fn row_window(&self, y: f64) -> ([f64; 2], [f64; 2]) {
        let half = self.plate.size()[0] / 2.0;
        let (sx, sy) = self.reference.direction_range([-half, half], [y, y]);
        direction_window(sx, sy, self.half_band)
    }

    /// Column span [start, end) of emitter `j` on row `row` (conservative), as the kernel walks it.
    pub fn row_span(&self, j: usize, row: usize) -> Option<(usize, usize)> {
        let e = &self.emitters[j];
        if !self.opts.anti_alias {
            return Some((0, self.plate.width as usize));
        }
        let y = self.plate.y_of_row(row as f64);
        let (wx, wy) = self.row_window(y);
        row_columns(&self.plate, e, y, wx, wy, self.opts.approximation)
    }

    /// Computes F for rows [row0, row0 + rows) into `out` (row-major, `rows * width` values).
    /// Returns the number of point-pixel updates done (pixels that passed the support test).
    ///
    /// # Panics
    /// If `out` has the wrong length or the rows leave the plate (a bug in the caller).
    pub fn compute_band(&self, row0: usize, rows: usize, out: &mut [Complex64], scratch: &mut BandScratch) -> u64 {
        let w = self.plate.width as usize;
        assert!(out.len() == rows * w && row0 + rows <= self.plate.height as usize, "band buffer mismatch");
        let k = self.plate.k();
        scratch.candidates.clear();
        for (j, r) in self.rows.iter().enumerate() {
            if let Some((a, b)) = *r {
                if a < row0 + rows && b > row0 {
                    scratch.candidates.push(j as u32);
                }
            }
        }
        scratch.ref_dir_x.resize(w, 0.0);
        scratch.ref_dir_y.resize(w, 0.0);
        let mut updates = 0u64;
        for (ri, orow) in out.chunks_exact_mut(w).enumerate() {
            let row = row0 + ri;
            let y = self.plate.y_of_row(row as f64);
            orow.fill(Complex64::new(0.0, 0.0));
            for c in 0..w {
                let d = self.reference.direction(self.plate.x_of_col(c as f64), y);
                scratch.ref_dir_x[c] = d[0];
                scratch.ref_dir_y[c] = d[1];
            }
            let (wx, wy) = self.row_window(y);
            for &j in &scratch.candidates {
                let e = &self.emitters[j as usize];
                let span = if self.opts.anti_alias {
                    match row_columns(&self.plate, e, y, wx, wy, self.opts.approximation) {
                        Some(s) => s,
                        None => continue,
                    }
                } else {
                    (0, w)
                };
                updates += self.accumulate_row(e, y, k, span, orow, &scratch.ref_dir_x, &scratch.ref_dir_y);
            }
            // F = O conj(R).
            for (c, f) in orow.iter_mut().enumerate() {
                let psi = self.reference.phase(self.plate.x_of_col(c as f64), y, k);
                let (s, co) = cis_reduced(psi);
                *f *= Complex64::new(co, -s);
            }
        }
        updates
    }

    #[inline]
    #[allow(clippy::too_many_arguments)]
    fn accumulate_row(
        &self,
        e: &Emitter,
        y: f64,
        k: f64,
        (c0, c1): (usize, usize),
        orow: &mut [Complex64],
        rdx: &[f64],
        rdy: &[f64],
    ) -> u64 {
        let [xj, yj, zj] = e.pos;
        let dy = y - yj;
        let hb = self.half_band;
        let mut n = 0u64;
        match self.opts.approximation {
            Approximation::Exact => {
                let c2 = dy * dy + zj * zj;
                for c in c0..c1 {
                    let dx = self.plate.x_of_col(c as f64) - xj;
                    let r = (dx * dx + c2).sqrt();
                    let inv_r = 1.0 / r;
                    if !in_support([dx * inv_r, dy * inv_r], [rdx[c], rdy[c]], hb) {
                        continue;
                    }
                    let amp = if self.opts.obliquity { e.amplitude * zj * inv_r * inv_r } else { e.amplitude * inv_r };
                    let (s, co) = cis_reduced(k * r + e.phase);
                    orow[c] += Complex64::new(amp * co, amp * s);
                    n += 1;
                }
            }
            Approximation::Fresnel => {
                let inv_z = 1.0 / zj;
                let amp = e.amplitude * inv_z;
                for c in c0..c1 {
                    let dx = self.plate.x_of_col(c as f64) - xj;
                    if !in_support([dx * inv_z, dy * inv_z], [rdx[c], rdy[c]], hb) {
                        continue;
                    }
                    let (s, co) = cis_reduced(k * (zj + (dx * dx + dy * dy) * 0.5 * inv_z) + e.phase);
                    orow[c] += Complex64::new(amp * co, amp * s);
                    n += 1;
                }
            }
        }
        n
    }

    /// Point-pixel updates the whole plate will take, estimated from the support spans of up to
    /// `max_rows` sampled rows per emitter (exact when the emitter's rows are fewer).
    pub fn estimate_updates(&self, max_rows: usize) -> f64 {
        let mut total = 0.0;
        for (j, r) in self.rows.iter().enumerate() {
            let Some((a, b)) = *r else { continue };
            let n = b - a;
            let step = (n as f64 / max_rows.max(1) as f64).max(1.0);
            let mut sum = 0.0;
            let mut samples = 0usize;
            let mut t = a as f64;
            while (t as usize) < b {
                if let Some((c0, c1)) = self.row_span(j, t as usize) {
                    sum += (c1 - c0) as f64;
                }
                samples += 1;
                t += step;
            }
            if samples > 0 {
                total += sum / samples as f64 * n as f64;
            }
        }
        total
    }
}
