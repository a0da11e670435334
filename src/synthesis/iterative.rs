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
use crate::optics::pointwise::large_buffer;
use crate::optics::propagation::{Grid, Propagator};

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
fn splitmix64(seed: u64, index: u64) -> u64 {
    let mut z = seed.wrapping_add(index.wrapping_add(1).wrapping_mul(0x9E37_79B9_7F4A_7C15));
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// Random start phase of pixel `index`, uniform in [0, 2 pi).
#[inline]
fn start_phase(seed: u64, index: usize) -> f64 {
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
fn shown_sample(phi: f64, levels: u32) -> usize {
    let n = levels as u64;
    let g = ((levels as f64 * phi / TAU).round() as u64) % n;
    let b = crate::encoding::phase_bits(levels) as u32;
    ((2 * (g << b) + n) / (2 * n)) as usize
}

/// Phase of `v` in [0, 2 pi).
#[inline]
fn arg_0_2pi(re: f64, im: f64) -> f64 {
    let mut phi = im.atan2(re);
    if phi < 0.0 {
        phi += TAU;
    }
    if phi >= TAU {
        phi = 0.0;
    }
    phi
}

/// Per-plane state: normalised target amplitude, signal mask and weights.
struct PlaneState {
    /// sqrt(target), scaled so that its squares sum to 1 over the signal area.
    amp: Vec<f64>,
    /// Signal window, or None for the whole plane.
    window: Option<[usize; 4]>,
    /// Weighted-GS weights (lit pixels only carry meaning), normalised so sum (w A)^2 = 1.
    weights: Vec<f64>,
}

impl PlaneState {
    /// The same state for the transposed layout of an `nx x ny` plane: line j is column j.
    fn transposed(&self, nx: usize, ny: usize) -> PlaneState {
        let t = |v: &[f64]| {
            let mut out = vec![0.0; v.len()];
            crate::optics::fft2d::transpose_into(v, nx, 0, ny, &mut out, ny, 0, None);
            out
        };
        PlaneState {
            amp: t(&self.amp),
            window: self.window.map(|[x, y, w, h]| [y, x, h, w]),
            weights: t(&self.weights),
        }
    }
}

/// True when (row, col) is in the signal area: the window, or the whole plane without one.
#[inline]
fn in_area(window: Option<[usize; 4]>, row: usize, col: usize) -> bool {
    match window {
        None => true,
        Some([x, y, w, h]) => col >= x && col < x + w && row >= y && row < y + h,
    }
}

/// Sums of one forward propagation, in f64.
#[derive(Clone, Copy, Default)]
struct Stats {
    /// sum |U|^2 over the whole plane.
    p_all: f64,
    /// sum |U|^2 over the signal area.
    p_area: f64,
    /// sum |U| A over the signal area.
    cross: f64,
    /// sum |U| / A over the lit pixels.
    ratio_sum: f64,
    /// number of lit pixels.
    lit: f64,
}

impl Stats {
    fn add(mut self, o: Stats) -> Stats {
        self.p_all += o.p_all;
        self.p_area += o.p_area;
        self.cross += o.cross;
        self.ratio_sum += o.ratio_sum;
        self.lit += o.lit;
        self
    }

    /// The error of the module docs (A has unit power over the area).
    fn error(&self) -> f64 {
        if self.p_area <= 0.0 {
            return 1.0;
        }
        (2.0 - 2.0 * self.cross / self.p_area.sqrt())
            .max(0.0)
            .sqrt()
    }
}

/// Columns [a0, a1) of row `row` in the signal area (empty when the row misses the window).
fn area_columns(window: Option<[usize; 4]>, row: usize, nx: usize) -> (usize, usize) {
    match window {
        None => (0, nx),
        Some([x, y, w, h]) if row >= y && row < y + h => (x.min(nx), (x + w).min(nx)),
        Some(_) => (0, 0),
    }
}

/// Sums of line `i` (length `len`) of a plane in the state's layout.
#[inline]
fn line_stats(
    i: usize,
    row: &[Complex<f32>],
    st: &PlaneState,
    len: usize,
    isa: KernelIsa,
) -> Stats {
    let (a0, a1) = area_columns(st.window, i, len);
    let [p_all, p_area, cross, ratio_sum, lit] =
        kernels::stats_row(isa, row, &st.amp[i * len..(i + 1) * len], a0, a1);
    Stats {
        p_all,
        p_area,
        cross,
        ratio_sum,
        lit,
    }
}

fn stats(field: &[Complex<f32>], st: &PlaneState, nx: usize, isa: KernelIsa) -> Stats {
    let rows: Vec<Stats> = field
        .par_chunks(nx)
        .enumerate()
        .map(|(i, row)| line_stats(i, row, st, nx, isa))
        .collect();
    rows.into_iter().fold(Stats::default(), Stats::add)
}

/// Per-line sums written by a propagation hook (one slot per line, so the sum over lines keeps
/// its order whatever the thread count).
struct LineSums(Vec<std::sync::Mutex<Stats>>);

impl LineSums {
    fn new(lines: usize) -> Self {
        LineSums((0..lines).map(|_| Default::default()).collect())
    }
    fn set(&self, i: usize, s: Stats) {
        *self.0[i].lock().unwrap_or_else(|e| e.into_inner()) = s;
    }
    fn total(&self) -> Stats {
        self.0
            .iter()
            .map(|m| *m.lock().unwrap_or_else(|e| e.into_inner()))
            .fold(Stats::default(), Stats::add)
    }
}

/// Updates the weighted-GS weights in place: `w <- w mean(r) / r`, then normalises so that
/// `sum (w A)^2 = 1`.
fn update_weights(field: &[Complex<f32>], st: &mut PlaneState, s: &Stats, nx: usize) {
    if s.lit == 0.0 {
        return;
    }
    let mean = s.ratio_sum / s.lit;
    let floor = 1e-6 * mean;
    let amp = &st.amp;
    let rows: Vec<f64> = st
        .weights
        .par_chunks_mut(nx)
        .zip(field.par_chunks(nx))
        .zip(amp.par_chunks(nx))
        .map(|((w, row), amp)| {
            let mut acc = 0.0;
            for ((w, u), &a) in w.iter_mut().zip(row).zip(amp) {
                if a > 0.0 {
                    let (re, im) = (u.re as f64, u.im as f64);
                    let r = ((re * re + im * im).sqrt() / a).max(floor);
                    *w *= mean / r;
                    acc += (*w * a) * (*w * a);
                }
            }
            acc
        })
        .collect();
    let total: f64 = rows.iter().sum();
    if total > 0.0 && total.is_finite() {
        let k = 1.0 / total.sqrt();
        st.weights.par_iter_mut().for_each(|w| *w *= k);
    }
}

/// The replay-plane constraint of one iteration, from the plane's sums.
struct Constraint {
    weighted: bool,
    /// sqrt(P) (times the mix): the target amplitude's scale inside the signal area.
    scale: f64,
    /// Factor of the free field outside the area (mixed region only).
    outside: f32,
}

impl Constraint {
    fn new(s: &Stats, alg: &Algorithm) -> Self {
        let mix = match alg {
            Algorithm::MixedRegion { mix, .. } => Some(*mix),
            _ => None,
        };
        // Inside the signal area: target amplitude sqrt(P) a (w) (mix), the field's phase kept.
        // Outside it (mixed region only): the field kept, scaled by 1 - mix.
        Constraint {
            weighted: matches!(alg, Algorithm::WeightedGs),
            scale: s.p_all.sqrt() * mix.unwrap_or(1.0),
            outside: (1.0 - mix.unwrap_or(0.0)) as f32,
        }
    }

    /// Imposes the constraint on line `i` (length `len`) of a plane in the state's layout.
    #[inline]
    fn line(
        &self,
        i: usize,
        row: &mut [Complex<f32>],
        st: &PlaneState,
        len: usize,
        isa: KernelIsa,
    ) {
        let (a0, a1) = area_columns(st.window, i, len);
        let span = i * len..(i + 1) * len;
        let w = self.weighted.then(|| &st.weights[span.clone()]);
        kernels::constrain_row(isa, row, &st.amp[span], w, self.scale, a0, a1, self.outside);
    }
}

/// Imposes the replay-plane constraint on `field` in place.
fn constrain(
    field: &mut [Complex<f32>],
    st: &PlaneState,
    s: &Stats,
    alg: &Algorithm,
    nx: usize,
    isa: KernelIsa,
) {
    let c = Constraint::new(s, alg);
    field
        .par_chunks_mut(nx)
        .enumerate()
        .for_each(|(i, row)| c.line(i, row, st, nx, isa));
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
    assert!(!planes.is_empty(), "optimise: no replay plane");
    let (nx, ny, n) = (grid.nx, grid.ny, grid.len());
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
    let window = match opts.algorithm {
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
    };

    // Per-plane state.
    let mut states: Vec<PlaneState> = planes
        .iter()
        .map(|p| {
            let mut st = PlaneState {
                amp: p.target.iter().map(|t| t.sqrt()).collect(),
                window,
                weights: vec![1.0; n],
            };
            // Normalise the target to unit power over the signal area.
            let mut power = 0.0;
            for i in 0..ny {
                for j in 0..nx {
                    if in_area(st.window, i, j) {
                        power += p.target[i * nx + j];
                    }
                }
            }
            assert!(
                power > 0.0,
                "optimise: a target has no light in its signal area"
            );
            let k = 1.0 / power.sqrt();
            for (i, a) in st.amp.iter_mut().enumerate() {
                if in_area(window, i / nx, i % nx) {
                    *a *= k;
                } else {
                    *a = 0.0;
                }
            }
            st
        })
        .collect();

    // The replay planes stay transposed between the forward and the back propagation when every
    // propagator does that at no extra cost (optics::propagation, "Transposed middle plane"):
    // the state then follows that layout, lines of length ny.
    let transposed = planes
        .iter()
        .all(|p| p.propagator.transposes_natively() && p.back.transposes_natively());
    if transposed {
        states = states.iter().map(|st| st.transposed(nx, ny)).collect();
    }
    let line_len = if transposed { ny } else { nx };

    // Buffers, allocated once.
    let mut phase: Vec<f64> = (0..n).map(|i| start_phase(opts.seed, i)).collect();
    // Whole-plane buffers on huge pages where the system offers them (the column passes visit one
    // page per row otherwise).
    let zero = Complex::<f32>::new(0.0, 0.0);
    let mut holo = large_buffer(n, zero);
    let mut work = large_buffer(n, zero);
    let mut acc: Vec<Complex<f64>> = if planes.len() > 1 {
        large_buffer(n, Complex::new(0.0, 0.0))
    } else {
        Vec::new()
    };
    // The propagators' scratch; in the transposed layout, the replay plane.
    let scratch_len = if transposed {
        n
    } else {
        planes
            .iter()
            .map(|p| p.propagator.scratch_len().max(p.back.scratch_len()))
            .max()
            .unwrap_or(0)
    };
    let mut scratch = large_buffer(scratch_len, zero);
    let line_sums = LineSums::new(if transposed { nx } else { 0 });

    let load = |holo: &mut [Complex<f32>], phase: &[f64]| {
        holo.par_iter_mut()
            .zip(phase.par_iter())
            .for_each(|(h, &p)| {
                let (s, c) = p.sin_cos();
                *h = Complex::new(c as f32, s as f32);
            });
    };
    load(&mut holo, &phase);

    let levels = opts.levels;
    let q_iters = if levels.is_some() {
        opts.quantize_last.min(opts.iterations)
    } else {
        0
    };
    let free_iters = opts.iterations - q_iters;
    let mut errors: Vec<f64> = Vec::with_capacity(opts.iterations + 1);
    // Plate phasors of the shown samples s = 0 ..= 2^b (projected iterations).
    let phasors: Vec<Complex<f32>> = match levels {
        Some(l) => {
            let b: u32 = if l <= 256 { 8 } else { 16 };
            (0..=(1usize << b))
                .map(|s| {
                    let (si, c) = (TAU * s as f64 / (1u64 << b) as f64).sin_cos();
                    Complex::new(c as f32, si as f32)
                })
                .collect()
        }
        None => Vec::new(),
    };
    // True while `holo` is ahead of `phase` (free iterations update the plate only).
    let mut phase_stale = false;
    let mut stopped_early = false;

    // One iteration: error of the current phase, constraint, back-propagation, new phase.
    let isa = kernels::detect();
    let mut step = |quantize: bool,
                    phase: &mut Vec<f64>,
                    holo: &mut Vec<Complex<f32>>,
                    errors: &mut Vec<f64>,
                    phase_stale: &mut bool,
                    progress: &mut dyn FnMut(usize, f64)| {
        let mut e2 = 0.0;
        // With one plane, a free iteration's new plate is made in place by the back
        // propagation's last hook (transposed layout only).
        let unit_fused = transposed && planes.len() == 1 && !quantize;
        for (k, (p, st)) in planes.iter().zip(states.iter_mut()).enumerate() {
            if transposed {
                // Forward into the transposed replay plane (`scratch`), summing each line as it
                // leaves the column FFT; the constraint runs on each line ahead of the back
                // propagation's column FFT.
                let hook = |j: usize, col: &mut [Complex<f32>]| {
                    line_sums.set(j, line_stats(j, col, st, line_len, isa))
                };
                p.propagator
                    .propagate_into_transposed(holo, &mut work, &mut scratch, &hook);
                let s = line_sums.total();
                e2 += s.error() * s.error();
                if matches!(opts.algorithm, Algorithm::WeightedGs) {
                    update_weights(&scratch, st, &s, line_len);
                }
                let c = Constraint::new(&s, &opts.algorithm);
                let st: &PlaneState = st;
                let before = |j: usize, col: &mut [Complex<f32>]| c.line(j, col, st, line_len, isa);
                let unit = |_: usize, row: &mut [Complex<f32>]| {
                    if unit_fused {
                        kernels::unit_in_place(isa, row)
                    }
                };
                p.back
                    .propagate_from_transposed(&mut scratch, &mut work, &before, &unit);
            } else {
                work.copy_from_slice(holo);
                p.propagator.propagate_with_scratch(&mut work, &mut scratch);
                let s = stats(&work, st, nx, isa);
                e2 += s.error() * s.error();
                if matches!(opts.algorithm, Algorithm::WeightedGs) {
                    update_weights(&work, st, &s, nx);
                }
                constrain(&mut work, st, &s, &opts.algorithm, nx, isa);
                p.back.propagate_with_scratch(&mut work, &mut scratch);
            }
            if planes.len() > 1 {
                if k == 0 {
                    acc.par_iter_mut().zip(work.par_iter()).for_each(|(a, w)| {
                        *a = Complex::new(w.re as f64, w.im as f64);
                    });
                } else {
                    acc.par_iter_mut().zip(work.par_iter()).for_each(|(a, w)| {
                        *a += Complex::new(w.re as f64, w.im as f64);
                    });
                }
            }
        }
        let e = (e2 / planes.len() as f64).sqrt();
        progress(errors.len(), e);
        errors.push(e);
        // The new plate: the back-propagated field's phase. Free iterations keep the field
        // divided by its modulus (no angle needed; a zero keeps phase 0); projected iterations
        // go through the angle to the phase the encoding shows.
        let field: &[Complex<f64>] = &acc; // the sum over planes (empty with one plane)
        let unit = |re: f64, im: f64| -> Complex<f32> {
            let m = (re * re + im * im).sqrt();
            if m > 0.0 {
                Complex::new((re / m) as f32, (im / m) as f32)
            } else {
                Complex::new(1.0, 0.0)
            }
        };
        match (quantize, levels) {
            (true, Some(l)) => {
                // Phase and plate from the shown sample: the plate's phasors come from a table
                // made with the same expressions as `load` (same bits, no sin/cos per pixel).
                let b: u32 = if l <= 256 { 8 } else { 16 };
                let shown = |re: f64, im: f64| shown_sample(arg_0_2pi(re, im), l);
                let set = |p: &mut f64, h: &mut Complex<f32>, s: usize| {
                    *p = TAU * s as f64 / (1u64 << b) as f64;
                    *h = phasors[s];
                };
                if planes.len() > 1 {
                    phase
                        .par_iter_mut()
                        .zip(holo.par_iter_mut())
                        .zip(field.par_iter())
                        .for_each(|((p, h), a)| set(p, h, shown(a.re, a.im)));
                } else {
                    phase
                        .par_iter_mut()
                        .zip(holo.par_iter_mut())
                        .zip(work.par_iter())
                        .for_each(|((p, h), w)| set(p, h, shown(w.re as f64, w.im as f64)));
                }
                *phase_stale = false;
            }
            _ => {
                if unit_fused {
                    // `work` holds the new plate already; the old one becomes the work buffer.
                    std::mem::swap(holo, &mut work);
                } else if planes.len() > 1 {
                    holo.par_iter_mut()
                        .zip(field.par_iter())
                        .for_each(|(h, a)| *h = unit(a.re, a.im));
                } else {
                    holo.par_chunks_mut(nx)
                        .zip(work.par_chunks(nx))
                        .for_each(|(h, w)| kernels::unit_row(isa, h, w));
                }
                *phase_stale = true;
            }
        }
    };

    for _ in 0..free_iters {
        step(
            false,
            &mut phase,
            &mut holo,
            &mut errors,
            &mut phase_stale,
            progress,
        );
        let m = errors.len();
        if stalled(&errors, opts.stall_tolerance, opts.min_iterations) {
            stopped_early = m < free_iters;
            break;
        }
    }
    for _ in 0..q_iters {
        step(
            true,
            &mut phase,
            &mut holo,
            &mut errors,
            &mut phase_stale,
            progress,
        );
    }
    if phase_stale {
        phase
            .par_iter_mut()
            .zip(holo.par_iter())
            .for_each(|(p, h)| *p = arg_0_2pi(h.re as f64, h.im as f64));
    }
    if let Some(l) = levels {
        if q_iters == 0 {
            phase.par_iter_mut().for_each(|p| *p = shown_phase(*p, l));
            load(&mut holo, &phase);
        }
    }

    // Error of the returned phase.
    let mut e2 = 0.0;
    for (p, st) in planes.iter().zip(states.iter()) {
        let e = if transposed {
            let isa = kernels::detect();
            let hook = |j: usize, col: &mut [Complex<f32>]| {
                line_sums.set(j, line_stats(j, col, st, line_len, isa))
            };
            p.propagator
                .propagate_into_transposed(&holo, &mut work, &mut scratch, &hook);
            line_sums.total().error()
        } else {
            work.copy_from_slice(&holo);
            p.propagator.propagate_with_scratch(&mut work, &mut scratch);
            stats(&work, st, nx, kernels::detect()).error()
        };
        e2 += e * e;
    }
    let e = (e2 / planes.len() as f64).sqrt();
    progress(errors.len(), e);
    errors.push(e);

    IterResult {
        phase,
        errors,
        stopped_early,
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
