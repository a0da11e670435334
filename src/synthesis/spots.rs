//! Phase patterns for lists of spots in 3-D (optical traps): superposition of gratings and lenses,
//! then weighted Gerchberg-Saxton computed on the spots' complex amplitudes directly, not on an
//! FFT grid (Di Leonardo, Ianni and Ruocco, Optics Express 15, 1913, 2007, "GSW").
//!
//! Model (paraxial, the paper's eq. 1): a panel of N pixels with phases phi_j at (x_j, y_j)
//! (physics.md pixel centres), uniformly lit, in the front focal plane of a lens of focal length
//! f. Spot m sits at (x_m, y_m) in the focal plane (x along the replay lattice's columns, y up:
//! the FFT lattice of physics.md, "Replay lattices") and z_m beyond it along the axis. Its field is
//!
//!   V_m = (1/N) sum_j exp(i (phi_j - D_jm)),
//!   D_jm = 2 pi (x_j x_m + y_j y_m) / (lambda f) + pi z_m (x_j^2 + y_j^2) / (lambda f^2),
//!
//! the grating that sends light to (x_m, y_m) plus the lens that moves its focus by z_m (with the
//! panel in the lens's front focal plane, an added lens of power P moves the focus by
//! z = -f^2 P, exactly in the paraxial limit: Newton's lens equation; the lens phase
//! -pi P r^2 / lambda is then pi z r^2 / (lambda f^2)). |V_m|^2 is the fraction of the panel's power in
//! spot m (Parseval, for spots on the FFT lattice; the pixels' own sinc envelope is left out, as
//! in the FFT replay). D separates into a column and a row factor, so each iteration costs
//! about 2 x spots x pixels complex multiply-adds and no transcendental per spot and pixel.
//!
//! Iteration (paper, eqs. 9-10): weights w_m <- w_m mean(|V| / a) / (|V_m| / a_m) for target amplitudes
//! a_m = sqrt(weight_m), and phi_j = arg sum_m w_m a_m exp(i D_jm) V_m / |V_m| (or exp(i phase_m)
//! where a spot's phase is given).

use num_complex::Complex64;
use rayon::prelude::*;

use crate::optics::Plate;

pub use crate::scene::spots::Spot;

/// The algorithm.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SpotAlgorithm {
    /// Superposition of gratings and lenses with random phases, no iteration ("SR").
    Superposition,
    /// Gerchberg-Saxton on the spot amplitudes (weights fixed at 1).
    Gs,
    /// Weighted GS ("GSW").
    WeightedGs,
}

/// Figures of merit of a pattern at its spots (paper, eqs. 4-6).
#[derive(Clone, Debug, PartialEq)]
pub struct SpotFigures {
    /// |V_m|^2: fraction of the panel's power in each spot.
    pub intensity: Vec<f64>,
    /// Sum of the intensities.
    pub efficiency: f64,
    /// 1 - (max - min) / (max + min) of the intensities divided by the weights.
    pub uniformity: f64,
}

impl SpotFigures {
    /// Figures from the spots' fields.
    pub fn of(fields: &[Complex64], spots: &[Spot]) -> SpotFigures {
        let intensity: Vec<f64> = fields.iter().map(|v| v.norm_sqr()).collect();
        let rel = intensity.iter().zip(spots).map(|(i, s)| i / s.weight);
        let (lo, hi) = rel.fold((f64::INFINITY, 0.0f64), |(l, h), v| (l.min(v), h.max(v)));
        SpotFigures {
            efficiency: intensity.iter().sum(),
            uniformity: if hi + lo > 0.0 {
                1.0 - (hi - lo) / (hi + lo)
            } else {
                0.0
            },
            intensity,
        }
    }
}

/// The result of a design.
#[derive(Clone, Debug)]
pub struct SpotDesign {
    /// Phase per panel pixel, row-major, radians in [0, 2 pi).
    pub phase: Vec<f64>,
    /// Figures after each iteration (first: the superposition start).
    pub history: Vec<(f64, f64)>,
    /// Figures of the final pattern (quantized to the encoding's levels when given).
    pub figures: SpotFigures,
}

/// The spots' separable phase factors over one panel.
pub struct SpotFactors {
    w: usize,
    h: usize,
    /// exp(i D) column factors, spot-major: cols[m * w + j].
    cols: Vec<Complex64>,
    /// exp(i D) row factors, spot-major: rows[m * h + i].
    rows: Vec<Complex64>,
    spots: usize,
}

impl SpotFactors {
    /// Factors for `spots` on `plate` in front of a lens of focal length `focal` (metres).
    pub fn new(plate: &Plate, focal: f64, spots: &[Spot]) -> SpotFactors {
        let (w, h) = (plate.width as usize, plate.height as usize);
        let lam = plate.wavelength;
        let tau = std::f64::consts::TAU;
        let factor = |u: f64, s: f64, z: f64| {
            // In cycles, reduced before the exponential so large panels keep f64 precision.
            let t = u * s / (lam * focal) + 0.5 * z * u * u / (lam * focal * focal);
            Complex64::from_polar(1.0, tau * (t - t.floor()))
        };
        let mut cols = Vec::with_capacity(spots.len() * w);
        let mut rows = Vec::with_capacity(spots.len() * h);
        for s in spots {
            cols.extend((0..w).map(|j| factor(plate.x_of_col(j as f64), s.x, s.z)));
            rows.extend((0..h).map(|i| factor(plate.y_of_row(i as f64), s.y, s.z)));
        }
        SpotFactors {
            w,
            h,
            cols,
            rows,
            spots: spots.len(),
        }
    }

    /// V_m for the panel field `e` (unit phasors exp(i phi), row-major).
    pub fn fields(&self, e: &[Complex64]) -> Vec<Complex64> {
        let (w, m) = (self.w, self.spots);
        assert_eq!(e.len(), w * self.h, "panel field size");
        let n = e.len() as f64;
        // Per-row sums in parallel, then added in row order: the same bits for any thread count.
        let per_row: Vec<Vec<Complex64>> = e
            .par_chunks_exact(w)
            .enumerate()
            .map(|(i, row)| {
                (0..m)
                    .map(|k| {
                        let c = &self.cols[k * w..][..w];
                        let s = row
                            .iter()
                            .zip(c)
                            .fold(Complex64::new(0.0, 0.0), |s, (&v, &f)| s + v * f.conj());
                        s * self.rows[k * self.h + i].conj()
                    })
                    .collect()
            })
            .collect();
        let mut sum = vec![Complex64::new(0.0, 0.0); m];
        for r in per_row {
            for (a, v) in sum.iter_mut().zip(r) {
                *a += v;
            }
        }
        sum.into_iter().map(|v| v / n).collect()
    }

    /// phi_j = arg sum_m g_m exp(i D_jm) into `phase`, and exp(i phi_j) into `e`.
    pub fn superpose(&self, g: &[Complex64], phase: &mut [f64], e: &mut [Complex64]) {
        let w = self.w;
        phase
            .par_chunks_exact_mut(w)
            .zip(e.par_chunks_exact_mut(w))
            .enumerate()
            .for_each(|(i, (prow, erow))| {
                let gr: Vec<Complex64> = (0..self.spots)
                    .map(|k| g[k] * self.rows[k * self.h + i])
                    .collect();
                for j in 0..w {
                    let a = gr
                        .iter()
                        .enumerate()
                        .fold(Complex64::new(0.0, 0.0), |s, (k, &gk)| {
                            s + gk * self.cols[k * w + j]
                        });
                    let p = a.arg().rem_euclid(std::f64::consts::TAU);
                    prow[j] = p;
                    erow[j] = Complex64::from_polar(1.0, p);
                }
            });
    }
}

/// Largest panel side for spot-list designs (whole-panel arrays in memory, as iterative cells).
pub const MAX_SIDE: u32 = 8192;

/// Largest memory of the spots' phase factors, bytes (spots x (width + height) complex values).
pub const MAX_FACTOR_BYTES: u64 = 512 << 20;

/// Checks that the panel can make the spots: its size within [`MAX_SIDE`], the factors within
/// [`MAX_FACTOR_BYTES`], and no spot's grating-plus-lens fringe finer than the pitch holds
/// anywhere on the panel: the local frequency of D_jm along x, (x_m + z_m x / f) / (lambda f),
/// stays within 1 / (2 p) at both edges (physics.md, "Sampling limits"), likewise along y.
pub fn check(plate: &Plate, focal: f64, spots: &[Spot]) -> Result<(), String> {
    if plate.width > MAX_SIDE || plate.height > MAX_SIDE {
        return Err(format!(
            "a spot-list design holds the whole {} x {} panel in memory; at most {MAX_SIDE} x {MAX_SIDE}",
            plate.width, plate.height
        ));
    }
    let bytes = spots.len() as u64 * (u64::from(plate.width) + u64::from(plate.height)) * 16;
    if bytes > MAX_FACTOR_BYTES {
        return Err(format!(
            "{} spots on a {} x {} panel need {:.0} MiB of phase factors; at most {} MiB (fewer spots)",
            spots.len(),
            plate.width,
            plate.height,
            bytes as f64 / f64::from(1 << 20),
            MAX_FACTOR_BYTES >> 20
        ));
    }
    let lam = plate.wavelength;
    let half = [plate.size()[0] / 2.0, plate.size()[1] / 2.0];
    for (k, s) in spots.iter().enumerate() {
        for (axis, pos, edge, pitch) in [
            ("x", s.x, half[0], plate.pitch[0]),
            ("y", s.y, half[1], plate.pitch[1]),
        ] {
            let limit = lam * focal / (2.0 * pitch);
            let worst = (pos + s.z * edge / focal)
                .abs()
                .max((pos - s.z * edge / focal).abs());
            if worst > limit {
                return Err(format!(
                    "spot {} needs a fringe finer than the pitch holds in {axis}: its position plus the defocus's tilt at the panel's edge reach {:.1} um in the focal plane, beyond the {:.1} um (lambda f / 2p) the panel replays without aliasing",
                    k + 1,
                    worst * 1e6,
                    limit * 1e6
                ));
            }
        }
    }
    Ok(())
}

/// What to design: the panel, the lens and the spots.
#[derive(Clone, Copy, Debug)]
pub struct SpotProblem<'a> {
    /// The panel (its pixel grid, pitch and wavelength).
    pub plate: &'a Plate,
    /// Focal length of the Fourier lens, metres.
    pub focal: f64,
    /// The spots.
    pub spots: &'a [Spot],
}

/// How to design it.
#[derive(Clone, Copy, Debug)]
pub struct SpotOptions {
    /// The algorithm.
    pub algorithm: SpotAlgorithm,
    /// Iterations after the superposition start.
    pub iterations: usize,
    /// Seed of the start phases.
    pub seed: u64,
    /// The encoding's phase levels: the final figures are of the quantized pattern.
    pub levels: Option<u32>,
}

/// Designs the pattern: superposition start with phases from the seed (or the spots' own), then
/// the iterations of the algorithm; `on_step` sees each iteration's (efficiency, uniformity).
pub fn design(
    problem: SpotProblem,
    opts: SpotOptions,
    on_step: &mut dyn FnMut(usize, f64, f64),
) -> SpotDesign {
    let SpotProblem {
        plate,
        focal,
        spots,
    } = problem;
    let SpotOptions {
        algorithm,
        iterations,
        seed,
        levels,
    } = opts;
    let f = SpotFactors::new(plate, focal, spots);
    let n = plate.width as usize * plate.height as usize;
    let amp: Vec<f64> = spots.iter().map(|s| s.weight.sqrt()).collect();
    // Random start phases (splitmix64), or the spots' own.
    let mut x = seed;
    let mut next = || {
        x = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = x;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    };
    let start: Vec<Complex64> = spots
        .iter()
        .zip(&amp)
        .map(|(s, &a)| {
            let p = s.phase.unwrap_or_else(|| std::f64::consts::TAU * next());
            Complex64::from_polar(a, p)
        })
        .collect();
    let mut phase = vec![0.0; n];
    let mut e = vec![Complex64::new(0.0, 0.0); n];
    f.superpose(&start, &mut phase, &mut e);
    let mut weights = vec![1.0; spots.len()];
    let mut history = Vec::new();
    let mut v = f.fields(&e);
    let figs = SpotFigures::of(&v, spots);
    history.push((figs.efficiency, figs.uniformity));
    let steps = if algorithm == SpotAlgorithm::Superposition {
        0
    } else {
        iterations
    };
    for k in 0..steps {
        if algorithm == SpotAlgorithm::WeightedGs {
            let mean = v.iter().zip(&amp).map(|(v, a)| v.norm() / a).sum::<f64>() / v.len() as f64;
            for ((w, vm), a) in weights.iter_mut().zip(&v).zip(&amp) {
                let r = vm.norm() / a;
                if r > 0.0 {
                    *w *= mean / r;
                }
            }
            // Keep the weights near 1 (only their ratios matter).
            let s = weights.iter().sum::<f64>() / weights.len() as f64;
            weights.iter_mut().for_each(|w| *w /= s);
        }
        let g: Vec<Complex64> = spots
            .iter()
            .zip(&v)
            .zip(weights.iter().zip(&amp))
            .map(|((s, vm), (w, a))| {
                let u = match s.phase {
                    Some(p) => Complex64::from_polar(1.0, p),
                    None if vm.norm() > 0.0 => vm / vm.norm(),
                    None => Complex64::new(1.0, 0.0),
                };
                u * (w * a)
            })
            .collect();
        f.superpose(&g, &mut phase, &mut e);
        v = f.fields(&e);
        let figs = SpotFigures::of(&v, spots);
        history.push((figs.efficiency, figs.uniformity));
        on_step(k, figs.efficiency, figs.uniformity);
    }
    let figures = match levels {
        Some(l) => {
            // The levels the phase encoding will store for this pattern, by its own rule.
            let mut g = vec![0u32; e.len()];
            crate::encoding::phase_levels_row(&e, l, &mut g);
            let step = std::f64::consts::TAU / f64::from(l);
            let q: Vec<Complex64> = g
                .iter()
                .map(|&g| Complex64::from_polar(1.0, step * f64::from(g)))
                .collect();
            SpotFigures::of(&f.fields(&q), spots)
        }
        None => SpotFigures::of(&v, spots),
    };
    SpotDesign {
        phase,
        history,
        figures,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn plate(w: u32, h: u32) -> Plate {
        Plate {
            width: w,
            height: h,
            pitch: [8e-6, 8e-6],
            wavelength: 1.064e-6,
        }
    }

    /// The separable fields equal the plain double sum of the model (module docs), term by term.
    #[test]
    fn separable_fields_match_the_plain_sum() {
        let p = plate(37, 23);
        let f = 0.2;
        let spots = [
            Spot {
                x: 40e-6,
                y: -75e-6,
                z: 30e-6,
                weight: 1.0,
                phase: None,
            },
            Spot {
                x: -310e-6,
                y: 120e-6,
                z: -55e-6,
                weight: 2.0,
                phase: None,
            },
        ];
        let e: Vec<Complex64> = (0..37 * 23)
            .map(|k| Complex64::from_polar(1.0, (k as f64 * 0.37).sin() * 3.0))
            .collect();
        let got = SpotFactors::new(&p, f, &spots).fields(&e);
        let lam = p.wavelength;
        for (s, g) in spots.iter().zip(&got) {
            let mut want = Complex64::new(0.0, 0.0);
            for i in 0..23 {
                for j in 0..37 {
                    let (x, y) = (p.x_of_col(j as f64), p.y_of_row(i as f64));
                    let d = std::f64::consts::TAU * (x * s.x + y * s.y) / (lam * f)
                        + std::f64::consts::PI * s.z * (x * x + y * y) / (lam * f * f);
                    want += e[i * 37 + j] * Complex64::from_polar(1.0, -d);
                }
            }
            want /= (37 * 23) as f64;
            assert!((g - want).norm() < 1e-12, "{g} vs {want}");
        }
    }
}
