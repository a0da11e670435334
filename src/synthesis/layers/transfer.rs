//! Free-space transfer in the frame of a plane reference, kept to the directions that carry
//! light from the scene to the plate.
//!
//! A grid of pitch p holds, after demodulation by the reference R = exp(i 2 pi f_R . x), the
//! frequencies f = f' + f_R with |f'| <= 1 / (2p) per axis (physics.md, Sampling limits). Free
//! space over a distance d, travelling towards the plate, multiplies the spectrum by
//! H(f) = exp(i 2 pi d sqrt(1 / lambda^2 - |f|^2)) (the angular spectrum, Goodman,
//! Introduction to Fourier Optics, 3rd ed., sec. 3.10; zero for evanescent f). Multiplying by H is
//! exact for the sampled field when nothing wraps around the periodic grid; what keeps wrap-around
//! out is a window of directions: a component of frequency f travels sideways by
//! d f / sqrt(1 / lambda^2 - |f|^2) (its ray's tangent times d), and only tangents in
//! [`Window`] are kept (the band-limited angular spectrum of Matsushima and Shimobaba, Optics
//! Express 17, 19662, 2009, with the limit set by the scene-to-plate geometry rather than the grid,
//! as in the shifted form: Matsushima, Optics Express 18, 18453, 2010).

use num_complex::Complex32;

/// Tangents (sideways travel per unit of distance travelled towards the plate, plate axes) that
/// are kept, per axis: weight 1 over `[lo, hi]`, then a quintic smooth step down to 0 over `soft`
/// beyond each end (0: a sharp cut).
///
/// A sharp cut in direction rings like a knife edge (Fresnel): a ray a distance x inside the cut
/// at distance z is off by about sqrt(lambda z) / (pi x sqrt 2) (Born and Wolf, Principles of
/// Optics, sec. 8.7), 5 % four Fresnel widths in. The last step's window is therefore soft, with
/// its flat part holding every ray from the scene to the plate, so the rays that matter keep full
/// weight and the edge diffracts nothing back onto them.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Window {
    /// x tangents.
    pub x: [f64; 2],
    /// y tangents (y up).
    pub y: [f64; 2],
    /// Width of the soft edge beyond each end, [x, y], in tangent.
    pub soft: [f64; 2],
}

/// 1 - s^3 (6 s^2 - 15 s + 10) for s = distance past the end / soft width, clamped.
#[inline]
fn roll_off(t: f64, lo: f64, hi: f64, soft: f64) -> f64 {
    let past = (lo - t).max(t - hi);
    if past <= 0.0 {
        return 1.0;
    }
    if soft <= 0.0 || past >= soft {
        return 0.0;
    }
    let s = past / soft;
    1.0 - s * s * s * (s * (6.0 * s - 15.0) + 10.0)
}

impl Window {
    /// The weight of a direction with these tangents.
    #[inline]
    pub fn weight(&self, tx: f64, ty: f64) -> f64 {
        roll_off(tx, self.x[0], self.x[1], self.soft[0])
            * roll_off(ty, self.y[0], self.y[1], self.soft[1])
    }
    /// Tangents with nonzero weight, [x, y] x [lo, hi].
    pub fn support(&self) -> [[f64; 2]; 2] {
        [
            [self.x[0] - self.soft[0], self.x[1] + self.soft[0]],
            [self.y[0] - self.soft[1], self.y[1] + self.soft[1]],
        ]
    }
}

/// The spectral grid of a periodic plane of `n` = [columns, rows] samples at `pitch`, for a
/// wavelength and a plane reference's frequency `f_r` (cycles per metre, plate axes).
#[derive(Clone, Copy, Debug)]
pub struct SpectralGrid {
    /// Samples [columns, rows].
    pub n: [usize; 2],
    /// Pitch [x, y], metres.
    pub pitch: [f64; 2],
    /// Wavelength, metres.
    pub wavelength: f64,
    /// Reference frequency, cycles per metre.
    pub f_r: [f64; 2],
    /// Share of the half band (per axis, from the reference's frequency) kept at full weight;
    /// the rest rolls off to zero at the Nyquist limit ([`crate::synthesis::kernels::edge_taper`]).
    /// A grid's band cut sharply at Nyquist gives every step's kernel tails falling off as
    /// 1 / distance, which wrap around a periodic grid (measured: 1 % of max |F| on a 100-pixel
    /// front plane); the soft band keeps them in the guard.
    pub band_flat: f64,
}

/// Signed DFT index of bin `k` of `n`: k for k < ceil(n/2), k - n above.
#[inline]
fn signed(k: usize, n: usize) -> f64 {
    if k < n.div_ceil(2) {
        k as f64
    } else {
        k as f64 - n as f64
    }
}

impl SpectralGrid {
    /// Physical x frequency of column bin `j` (cycles per metre).
    #[inline]
    pub fn fx(&self, j: usize) -> f64 {
        signed(j, self.n[0]) / (self.n[0] as f64 * self.pitch[0]) + self.f_r[0]
    }
    /// Physical y frequency of row bin `i`: the row index grows downwards while y grows upwards,
    /// so DFT bin k along the rows is the frequency -k / (N p).
    #[inline]
    pub fn fy(&self, i: usize) -> f64 {
        -signed(i, self.n[1]) / (self.n[1] as f64 * self.pitch[1]) + self.f_r[1]
    }

    /// H at physical frequency (fx, fy) over `distance`, zero outside `window` or evanescent.
    #[inline]
    pub fn transfer_at(&self, fx: f64, fy: f64, distance: f64, window: &Window) -> Complex32 {
        let inv_l2 = 1.0 / (self.wavelength * self.wavelength);
        let w2 = inv_l2 - fx * fx - fy * fy;
        if w2 <= 0.0 {
            return Complex32::new(0.0, 0.0);
        }
        let w = w2.sqrt();
        let band = crate::synthesis::kernels::edge_taper(
            ((fx - self.f_r[0]) * 2.0 * self.pitch[0]).abs(),
            self.band_flat,
        ) * crate::synthesis::kernels::edge_taper(
            ((fy - self.f_r[1]) * 2.0 * self.pitch[1]).abs(),
            self.band_flat,
        );
        let weight = window.weight(fx / w, fy / w) * band;
        if weight == 0.0 {
            return Complex32::new(0.0, 0.0);
        }
        // Whole cycles dropped in f64 before the sine: d w is up to ~1e5 cycles.
        let cycles = distance * w;
        let t = cycles - cycles.round();
        let (s, c) = (std::f64::consts::TAU * t).sin_cos();
        Complex32::new((c * weight) as f32, (s * weight) as f32)
    }

    /// H over `distance` for every bin, column-major (column j at `[j * rows, (j + 1) * rows)`),
    /// the order the FFT's column pass visits them in.
    pub fn transfer_columns(&self, distance: f64, window: &Window) -> Vec<Complex32> {
        use rayon::prelude::*;
        let [nx, ny] = self.n;
        let mut out = vec![Complex32::new(0.0, 0.0); nx * ny];
        out.par_chunks_mut(ny).enumerate().for_each(|(j, col)| {
            let fx = self.fx(j);
            for (i, h) in col.iter_mut().enumerate() {
                *h = self.transfer_at(fx, self.fy(i), distance, window);
            }
        });
        out
    }
}

/// Signed tangent range `[[x lo, x hi], [y lo, y hi]]` of the propagating directions in the band
/// of direction cosines `s_r +- half` per axis (the plate's band about the reference), sampled on an
/// (n + 1) x (n + 1) grid with its edges (the tangents are monotonic along each axis, so the
/// extremes sit on the edges). Directions within 1e-6 of grazing are left out: their tangents have
/// no bound, and the geometry of scene and plate (or a refusal, on the recording plane) bounds them
/// instead.
pub fn band_tangents(s_r: [f64; 2], half: [f64; 2], n: usize) -> [[f64; 2]; 2] {
    let mut t = [[f64::INFINITY, f64::NEG_INFINITY]; 2];
    for a in 0..=n {
        let ux = s_r[0] - half[0] + 2.0 * half[0] * a as f64 / n as f64;
        for b in 0..=n {
            let uy = s_r[1] - half[1] + 2.0 * half[1] * b as f64 / n as f64;
            let uz2 = 1.0 - ux * ux - uy * uy;
            if uz2 <= 1e-6 {
                continue;
            }
            let uz = uz2.sqrt();
            for (k, v) in [ux / uz, uy / uz].into_iter().enumerate() {
                t[k][0] = t[k][0].min(v);
                t[k][1] = t[k][1].max(v);
            }
        }
    }
    t
}

/// The smallest n' >= n whose only prime factors are 2, 3 and 5 (fast FFT sizes).
pub fn smooth_size(n: usize) -> usize {
    let mut m = n.max(1);
    loop {
        let mut r = m;
        for p in [2, 3, 5] {
            while r.is_multiple_of(p) {
                r /= p;
            }
        }
        if r == 1 {
            return m;
        }
        m += 1;
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn band_tangents_of_a_tilted_band() {
        // Band of half-width 0.25 about s = 0.5 in y, 0 in x: y tangents from
        // 0.25 / sqrt(1 - 0.0625) (at x = 0) to 0.75 / sqrt(1 - 0.5625 - 0.0625) (at a corner).
        let t = band_tangents([0.0, 0.5], [0.25, 0.25], 128);
        assert!((t[1][0] - 0.25 / (1.0f64 - 0.0625).sqrt()).abs() < 1e-12);
        assert!((t[1][1] - 0.75 / (1.0f64 - 0.5625 - 0.0625).sqrt()).abs() < 1e-12);
        assert!(t[0][0] < 0.0 && (t[0][0] + t[0][1]).abs() < 1e-12);
    }

    #[test]
    fn smooth_sizes() {
        assert_eq!(smooth_size(1), 1);
        assert_eq!(smooth_size(7), 8);
        assert_eq!(smooth_size(17700), 18000);
        assert_eq!(smooth_size(1025), 1080);
    }

    #[test]
    fn frequencies_follow_the_lattice() {
        // Row bins: y grows upwards, so bin 1 is a negative y frequency (the recording plane's
        // rule, tested there against the direct sum).
        let g = SpectralGrid {
            n: [8, 4],
            pitch: [1e-6, 2e-6],
            wavelength: 0.5e-6,
            f_r: [0.0, 1e5],
            band_flat: 1.0,
        };
        assert!((g.fx(1) - 1.0 / 8e-6).abs() < 1e-6);
        assert!((g.fx(7) + 1.0 / 8e-6).abs() < 1e-6);
        assert!((g.fy(1) - (1e5 - 1.0 / 8e-6)).abs() < 1e-6);
        // The direction window cuts: everything kept with a wide window, nothing with an
        // empty one.
        let wide = Window {
            x: [-10.0, 10.0],
            y: [-10.0, 10.0],
            soft: [0.0, 0.0],
        };
        let none = Window {
            x: [1.0, -1.0],
            y: [0.0, 0.0],
            soft: [0.0, 0.0],
        };
        // The soft edge: 1 inside, 1/2 half-way through the roll-off, 0 beyond.
        let soft = Window {
            x: [-0.1, 0.1],
            y: [-1.0, 1.0],
            soft: [0.1, 0.0],
        };
        assert_eq!(soft.weight(0.1, 0.0), 1.0);
        assert!((soft.weight(-0.15, 0.0) - 0.5).abs() < 1e-12);
        assert_eq!(soft.weight(0.2, 0.0), 0.0);
        assert_eq!(soft.weight(0.0, 1.0001), 0.0);
        let h = g.transfer_at(g.fx(1), g.fy(1), 1e-3, &wide);
        assert!((h.norm() - 1.0).abs() < 1e-6);
        assert_eq!(g.transfer_at(g.fx(1), g.fy(1), 1e-3, &none).norm(), 0.0);
        // Evanescent: |f| above 1 / lambda.
        assert_eq!(g.transfer_at(2.1e6, 0.0, 1e-3, &wide).norm(), 0.0);
    }
}
