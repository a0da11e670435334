//! Iterative phase retrieval: one phase-only pattern in the hologram plane whose replay matches
//! intensity targets in one or more planes.
//!
//! # Algorithms
//! * Gerchberg-Saxton (Gerchberg and Saxton, Optik 35, 237, 1972): propagate the hologram field to
//!   each replay plane, keep the computed phase and impose the target amplitude, propagate back,
//!   keep the phase and impose the illumination amplitude (uniform, 1).
//! * Weighted GS (Di Leonardo, Ianni and Ruocco, Optics Express 15, 1913, 2007): every lit target
//!   pixel carries a weight, updated each iteration by `w <- w * mean(r) / r` with `r = |U| / A`
//!   (replayed over target amplitude; for equal spots this is `mean|U_spots| / |U_spot|`); the
//!   imposed amplitude is `w A`.
//! * Mixed-region amplitude freedom (Pasienski and DeMarco, Optics Express 16, 2176, 2008): inside
//!   the signal window impose `m A`, outside it keep `(1 - m)` times the computed field.
//!
//! # Several planes
//! Each plane is constrained independently from the same hologram field; the back-propagated fields
//! are summed and the phase of the sum becomes the new hologram phase (averaged, "global" GS: common
//! practice). Each constrained field carries the power of its replay plane, so the planes weigh
//! equally when their propagators conserve power.
//!
//! # Error and stopping
//! The error of a plane is the normalised RMS difference between replayed and target amplitudes
//! over the signal area (the signal window for mixed-region, the whole plane otherwise), with the
//! target scaled to the replayed power in that area:
//! `e = sqrt(sum (|U| - s A)^2 / sum |U|^2)`, `s^2 = sum |U|^2 / sum A^2` (sums over the area).
//! With several planes the error is the RMS over planes. For plain GS with power-conserving
//! propagators this is exactly the quantity that GS cannot increase (Fienup, Applied Optics 21,
//! 2758, 1982). `errors[k]` is the error of the phase after `k` updates; the last entry is that of
//! the returned phase.
//!
//! # Quantization
//! With `levels = Some(N)` the last `quantize_last` iterations project the hologram phase onto the
//! phases the phase encoding shows: `g = round(N phi / 2 pi) mod N`, `s = round(g 2^b / N)`
//! (`b = 8` for `N <= 256`, else 16), phase `2 pi s / 2^b`. The returned phase is always that
//! projection when `levels` is set, so it is exactly what will be written.
//!
//! # Determinism
//! The start phase comes from SplitMix64 indexed by pixel; all reductions are per line (row, or column
//! when the replay planes are kept transposed, see below) and then summed in line order. Given propagators that are deterministic across thread counts, the result is
//! bit-identical whatever the rayon thread count.
//!
//!
//! # Layout
//! When every propagator carries a transposed middle plane at no cost
//! ([`Propagator::transposes_natively`]: Fourier and single-FFT Fresnel), the replay planes stay
//! column-major between the forward and the back propagation, the plane state is transposed once,
//! and the replay sums, the constraint and (one plane, free iterations) the new plate's unit
//! phasors run as hooks inside the FFT passes: 4 passes over the plane per iteration instead of 10.
//! The results differ from the row-major order by f32 rounding only
//! (`tests/iterative.rs::transposed_layout_matches_row_major_loop`).
//!
//! This module depends on [`crate::optics`] (propagation, the transpose, buffer allocation) and
//! rayon only.

use std::f64::consts::TAU;
use std::sync::Arc;

use num_complex::Complex;
use rayon::prelude::*;

use super::kernels::{self, KernelIsa};

mod plane;
mod run;

use crate::optics::pointwise::large_buffer;
use crate::optics::propagation::{Grid, Propagator};
use plane::*;
use run::Run;

/// Which constraint is imposed in the replay planes.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Algorithm {
    /// Plain Gerchberg-Saxton: impose the target amplitude everywhere.
    GerchbergSaxton,
    /// Weighted GS for uniform spot arrays: per-pixel weights on the lit target pixels.
    WeightedGs,
    /// Mixed-region amplitude freedom.
    MixedRegion {
        /// Signal window `[x, y, w, h]` in replay-plane pixels: columns `x..x+w`, rows `y..y+h`.
        signal: [usize; 4],
        /// Mixing parameter m in [0, 1]: weight of the target inside the window; `1 - m` scales the
        /// free field outside it.
        mix: f64,
    },
}

/// One replay plane: its target and the propagators that link it to the hologram plane.
#[derive(Clone)]
pub struct Plane {
    /// Target intensity, row-major `ny x nx` on the replay grid (`propagator.output()`), >= 0.
    pub target: Vec<f64>,
    /// Hologram plane -> this plane.
    pub propagator: Arc<dyn Propagator<f32>>,
    /// This plane -> hologram plane.
    pub back: Arc<dyn Propagator<f32>>,
}

/// Options of [`optimise`].
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct IterOptions {
    /// Constraint in the replay planes.
    pub algorithm: Algorithm,
    /// Maximum number of iterations (phase updates).
    pub iterations: usize,
    /// Seed of the random start phase.
    pub seed: u64,
    /// Number of phase levels of the encoding (2..=65536), or None for a continuous phase.
    pub levels: Option<u32>,
    /// How many of the last iterations project the phase onto the levels (ignored without
    /// `levels`). They always run, also after an early stop.
    pub quantize_last: usize,
    /// Early stop of the unquantized iterations when the best error of the last
    /// [`STALL_WINDOW`] iterations is less than this share below the best one before them (a
    /// relative improvement); <= 0 disables it. See [`stalled`].
    pub stall_tolerance: f64,
    /// No early stop before this many iterations.
    pub min_iterations: usize,
}

impl Default for IterOptions {
    fn default() -> Self {
        IterOptions {
            algorithm: Algorithm::GerchbergSaxton,
            iterations: 50,
            seed: 0,
            levels: None,
            quantize_last: 0,
            stall_tolerance: 0.0,
            min_iterations: 30,
        }
    }
}

/// Result of [`optimise`].
#[derive(Clone, Debug, PartialEq)]
pub struct IterResult {
    /// Hologram-plane phase in [0, 2 pi), row-major; the encoding's shown phases when `levels` is set.
    pub phase: Vec<f64>,
    /// Error (module docs) before each update, then of the returned phase: `iterations run + 1`
    /// entries.
    pub errors: Vec<f64>,
    /// True when the stall tolerance ended the unquantized iterations before `iterations`.
    pub stopped_early: bool,
}

/// Window of iterations over which the stall test measures the improvement.
pub const STALL_WINDOW: usize = 10;

/// The stall test on an error history (`errors[0]` before the first iteration, then one per
/// iteration): true when at least `min_iterations` (and a window) have run and the best error of
/// the last [`STALL_WINDOW`] is less than `tolerance` (relative) below the best before them.
/// Comparing bests, not the last values, keeps an algorithm whose error wavers while it still
/// improves (mixed region) from stopping on one bad iteration.
pub fn stalled(errors: &[f64], tolerance: f64, min_iterations: usize) -> bool {
    let m = errors.len();
    if !(tolerance > 0.0) || m < 1 + min_iterations.max(STALL_WINDOW) {
        return false;
    }
    let best = |e: &[f64]| e.iter().copied().fold(f64::INFINITY, f64::min);
    let (before, recent) = (
        best(&errors[..m - STALL_WINDOW]),
        best(&errors[m - STALL_WINDOW..]),
    );
    if !(before > 0.0) {
        return true;
    }
    (before - recent) / before < tolerance
}

/// SplitMix64 output number `index` of the stream seeded with `seed` (Steele, Lea and Flood,
/// OOPSLA 2014): a pure function of (seed, index).
#[inline]
pub(super) fn splitmix64(seed: u64, index: u64) -> u64 {
    let mut z = seed.wrapping_add(index.wrapping_add(1).wrapping_mul(0x9E37_79B9_7F4A_7C15));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Random start phase of pixel `index`, uniform in [0, 2 pi).
#[inline]
pub(super) fn start_phase(seed: u64, index: usize) -> f64 {
    TAU * ((splitmix64(seed, index as u64) >> 11) as f64 * (1.0 / (1u64 << 53) as f64))
}

/// The phase the phase encoding shows for a phase `phi` in [0, 2 pi) with `levels` levels:
/// `g = round(N phi / 2 pi) mod N`, `s = round(g 2^b / N)`, result `2 pi s / 2^b`.
pub fn shown_phase(phi: f64, levels: u32) -> f64 {
    let b = crate::encoding::phase_bits(levels) as u32;
    TAU * shown_sample(phi, levels) as f64 / (1u64 << b) as f64
}

/// The sample value s of [`shown_phase`] (0 ..= 2^b; 2^b only where the rounding reaches a full
/// turn).
pub(super) fn shown_sample(phi: f64, levels: u32) -> usize {
    let n = levels as u64;
    let g = ((levels as f64 * phi / TAU).round() as u64) % n;
    let b = crate::encoding::phase_bits(levels) as u32;
    ((2 * (g << b) + n) / (2 * n)) as usize
}

/// Phase of `v` in [0, 2 pi).
#[inline]
pub(super) fn arg_0_2pi(re: f64, im: f64) -> f64 {
    let mut phi = im.atan2(re);
    if phi < 0.0 {
        phi += TAU;
    }
    if phi >= TAU {
        phi = 0.0;
    }
    phi
}

/// Computes one phase-only hologram on `grid` whose replays through each plane's propagator match
/// the plane targets (module docs). `progress(k, error)` is called after each error evaluation.
///
/// # Panics
/// If `planes` is empty, a target or propagator does not fit `grid`, `levels` is outside
/// 2..=65536, a mixed-region window leaves the plane or its mix is outside [0, 1].
pub fn optimise(
    planes: &[Plane],
    grid: &Grid,
    opts: &IterOptions,
    progress: &mut dyn FnMut(usize, f64),
) -> IterResult {
    let window = check_inputs(planes, grid, opts);
    let mut run = Run::new(planes, grid, opts, window);
    let q_iters = if opts.levels.is_some() {
        opts.quantize_last.min(opts.iterations)
    } else {
        0
    };
    let free_iters = opts.iterations - q_iters;
    let mut errors: Vec<f64> = Vec::with_capacity(opts.iterations + 1);
    let mut stopped_early = false;
    for _ in 0..free_iters {
        run.step(false, &mut errors, progress);
        let m = errors.len();
        if stalled(&errors, opts.stall_tolerance, opts.min_iterations) {
            stopped_early = m < free_iters;
            break;
        }
    }
    for _ in 0..q_iters {
        run.step(true, &mut errors, progress);
    }
    run.settle_phase(q_iters);
    let e = run.error_of_plate();
    progress(errors.len(), e);
    errors.push(e);
    IterResult {
        phase: run.phase,
        errors,
        stopped_early,
    }
}

/// Checks the inputs of [`optimise`] (its panics) and returns the signal window.
fn check_inputs(planes: &[Plane], grid: &Grid, opts: &IterOptions) -> Option<[usize; 4]> {
    let (nx, ny, n) = (grid.nx, grid.ny, grid.len());
    assert!(!planes.is_empty(), "optimise: no replay plane");
    assert!(n > 0, "optimise: empty grid");
    for (k, p) in planes.iter().enumerate() {
        let (fi, fo, bi, bo) = (
            p.propagator.input(),
            p.propagator.output(),
            p.back.input(),
            p.back.output(),
        );
        for (what, g) in [
            ("propagator input", fi),
            ("propagator output", fo),
            ("back input", bi),
            ("back output", bo),
        ] {
            assert!(
                g.nx == nx && g.ny == ny,
                "optimise: plane {k}: {what} is {} x {}, hologram grid is {nx} x {ny}",
                g.nx,
                g.ny
            );
        }
        assert_eq!(
            p.target.len(),
            n,
            "optimise: plane {k}: target has the wrong length"
        );
        assert!(
            p.target.iter().all(|t| t.is_finite() && *t >= 0.0),
            "optimise: plane {k}: target intensities must be finite and >= 0"
        );
    }
    if let Some(l) = opts.levels {
        assert!(
            (2..=65536).contains(&l),
            "optimise: levels must be in 2..=65536, got {l}"
        );
    }
    match opts.algorithm {
        Algorithm::MixedRegion {
            signal: [x, y, w, h],
            mix,
        } => {
            assert!(
                w > 0 && h > 0 && x + w <= nx && y + h <= ny,
                "optimise: signal window {:?} does not fit {nx} x {ny}",
                [x, y, w, h]
            );
            assert!(
                (0.0..=1.0).contains(&mix),
                "optimise: mix must be in [0, 1], got {mix}"
            );
            Some([x, y, w, h])
        }
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn splitmix_is_the_reference_stream() {
        // First outputs of SplitMix64 seeded with 0 (Steele, Lea and Flood 2014 reference code).
        assert_eq!(splitmix64(0, 0), 0xE220_A839_7B1D_CDAF);
        assert_eq!(splitmix64(0, 1), 0x6E78_9E6A_A1B9_65F4);
    }

    #[test]
    fn shown_phase_is_a_fixed_point() {
        for &l in &[2u32, 3, 4, 7, 8, 255, 256, 1000] {
            for k in 0..997 {
                let phi = TAU * k as f64 / 997.0;
                let q = shown_phase(phi, l);
                assert!((0.0..TAU).contains(&q));
                assert_eq!(
                    shown_phase(q, l).to_bits(),
                    q.to_bits(),
                    "levels {l}, phi {phi}"
                );
            }
        }
    }
}
