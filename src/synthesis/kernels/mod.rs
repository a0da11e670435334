//! Inner loops of the point sum and the iterative loop: one emitter added to one row span,
//! branch-free so the compiler vectorizes them, each compiled as a portable copy and copies with
//! wider vector units enabled (AVX2 + FMA, and AVX-512 F/VL/DQ where a kernel gains from it),
//! chosen at run time through a [`KernelIsa`] token.
//!
//! Every copy compiles the same source: Rust does not contract a * b + c into a fused
//! multiply-add or reassociate sums on its own, so all copies run the very same IEEE operations
//! in the same order and give bit-identical results on any machine (tested in `unit_tests`);
//! a wider copy only works on more pixels at a time. The support test is applied as a 0/1 weight, so the pixel set equals the
//! exact per-pixel test of [`super::support::in_support`].
//!
//! Phase: the number of cycles t = r / lambda + phi / 2 pi is formed in f64 and reduced to
//! [-1/2, 1/2) by subtracting floor(t + 1/2); sine and cosine of pi t (half the angle, within
//! [-pi/2, pi/2]) come from their Taylor series to degree 15 and 16 (remainders below 6.1e-12 and
//! 5.4e-13), then sin 2a = 2 sin a cos a and cos 2a = 1 - 2 sin^2 a. The doubling amplifies the
//! truncation to at most 2 (6.1e-12 + 5.4e-13) for the sine and 4 x 6.1e-12 = 2.5e-11 for the cosine:
//! each unit phasor is within 3e-11 of libm's (tested in `unit_tests`); the f64 rounding of t adds at most
//! 2^-52 t cycles, about 1e-11 rad for r = 1 m at 400 nm.
//!
//! Soundness: calling a `#[target_feature]` copy is `unsafe` because it must not run on a CPU
//! without those features. A [`KernelIsa`] names the copy to run and can only be made by
//! [`detect`] or [`available`] after the CPU reported the features of its level (its field is
//! private; [`KernelIsa::PORTABLE`] needs none), and every call into a copy goes through the
//! one `dispatch!` macro below, which holds the safety argument once. (`encoding` and
//! `optics::pointwise` keep AVX2 copies of their own hot loops behind `crate::cpu`'s detection,
//! with the same environment rule.)

pub mod exact32;
pub mod fresnel32;
pub mod pointwise;
pub use exact32::{poly_min_distance, Row32, AMBIGUOUS, LANES, PAD};

/// The vector level a copy of the kernels is compiled for.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum IsaLevel {
    /// Portable code (SSE2 on x86-64).
    Portable,
    /// AVX2 and FMA: four f64 or eight f32 lanes.
    Avx2,
    /// AVX-512 (F, VL, DQ) besides AVX2 and FMA: the f32 kernels in sixteen lanes; the f64
    /// kernels run their AVX2 copies.
    Avx512,
}

/// Which copy of the kernels runs: a token that only [`detect`] and [`available`] make, after
/// the CPU reported the features of its level, so holding one proves the copy can run here.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct KernelIsa {
    level: IsaLevel,
}

impl KernelIsa {
    /// The portable copy, which runs on any CPU.
    pub const PORTABLE: KernelIsa = KernelIsa {
        level: IsaLevel::Portable,
    };

    /// The level this token names.
    pub fn level(self) -> IsaLevel {
        self.level
    }

    /// "portable", "avx2" or "avx512".
    pub fn name(self) -> &'static str {
        match self.level {
            IsaLevel::Portable => "portable",
            IsaLevel::Avx2 => "avx2",
            IsaLevel::Avx512 => "avx512",
        }
    }
}

/// Runs the copy a [`KernelIsa`] names: `dispatch!(isa, avx2 call, avx512 call, portable call)`.
///
/// SAFETY (for every use): a `KernelIsa` at level `Avx2` exists only after the CPU reported AVX2
/// and FMA, and at level `Avx512` only after it reported AVX-512 F, VL and DQ besides (the token's
/// field is private and only `detect` and `available` set it); the copies' bodies are the safe
/// portable code (checked indexing) compiled with those features enabled. So the
/// `#[target_feature]` functions named here never run on a CPU that lacks their features.
macro_rules! dispatch {
    ($isa:expr, $avx2:expr, $avx512:expr, $portable:expr) => {
        match $isa.level {
            #[cfg(target_arch = "x86_64")]
            // SAFETY: see the macro's documentation.
            IsaLevel::Avx2 => unsafe { $avx2 },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: see the macro's documentation.
            IsaLevel::Avx512 => unsafe { $avx512 },
            _ => $portable,
        }
    };
}

/// An AVX2 copy of a portable kernel: `avx2_copy!(name = portable, (args) -> ret)` compiles the
/// portable body again with AVX2 enabled (the f64 kernels, which AVX-512 does not speed up).
/// Call it only through `dispatch!`.
macro_rules! avx2_copy {
    ($name:ident = $generic:path, ($($arg:ident: $ty:ty),*) -> $ret:ty) => {
        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2")]
        #[allow(clippy::too_many_arguments)]
        unsafe fn $name($($arg: $ty),*) -> $ret {
            $generic($($arg),*)
        }
    };
}

/// A kernel with an [`avx2_copy!`] and its dispatching function (AVX-512 CPUs run the AVX2
/// copy): `pub fn $name(isa, args...)`, after the optional `check` block (argument asserts).
macro_rules! avx2_kernel {
    ($(#[$m:meta])* pub fn $name:ident = $generic:path, $avx2:ident,
     ($($arg:ident: $ty:ty),*) -> $ret:ty $(, check $check:block)?) => {
        avx2_copy!($avx2 = $generic, ($($arg: $ty),*) -> $ret);
        $(#[$m])*
        #[allow(clippy::too_many_arguments)]
        pub fn $name(isa: KernelIsa, $($arg: $ty),*) -> $ret {
            $($check)?
            dispatch!(isa, $avx2($($arg),*), $avx2($($arg),*), $generic($($arg),*))
        }
    };
}

mod row64;
pub use row64::{accumulate_exact, accumulate_fresnel, conj_reference, fresnel_columns, mac};

/// Per-row inputs shared by every emitter.
pub struct RowInputs<'a> {
    /// x of each column centre, metres.
    pub xs: &'a [f64],
    /// Reference direction cosines per column.
    pub rdx: &'a [f64],
    /// Reference direction cosines per column.
    pub rdy: &'a [f64],
    /// lambda / (2 p) per axis.
    pub half_band: [f64; 2],
    /// 1 / lambda.
    pub inv_lambda: f64,
    /// Soft support edge of the f64 exact kernel: below 1, each emitter's wave is weighted by
    /// [`edge_taper`] of its margin on both axes (the recording-plane path); 1 or more: the
    /// plain 0/1 support. The other kernels ignore it.
    pub taper_start: f64,
}

/// Weight of a support margin: `u` = |d_j - d_R| / (lambda / 2p) on one axis; 1 up to `start`,
/// then the quintic smoothstep 1 - s^3 (6 s^2 - 15 s + 10), s = (u - start) / (1 - start), down to
/// 0 at `u` = 1 and beyond (continuous with two derivatives, so its own diffraction is weak).
/// Branch-free (clamps only), so the kernels stay vectorized.
#[inline(always)]
pub fn edge_taper(u: f64, start: f64) -> f64 {
    let s = ((u - start) / (1.0 - start)).clamp(0.0, 1.0);
    1.0 - s * s * s * (s * (6.0 * s - 15.0) + 10.0)
}

/// One emitter on one row.
#[derive(Clone, Copy, Debug)]
pub struct EmitterRow {
    /// x_j.
    pub xj: f64,
    /// y - y_j.
    pub dy: f64,
    /// z_j.
    pub z: f64,
    /// a_j.
    pub amplitude: f64,
    /// phi_j / (2 pi), cycles.
    pub phase_cycles: f64,
    /// Multiply by z / r.
    pub obliquity: bool,
}

/// The Fresnel column factor loop of the f64 and f32 kernels: over columns [c0, c1),
/// u = w amp exp(i 2 pi t), t = dx^2 / (2 z lambda) cycles, w the 0/1 x support weight
/// (|dx / z - d_R,x| <= lambda / 2p), `phasor(t)` giving (sin, cos) in the kernel's precision.
/// Writes `c1 - c0` values; returns the columns inside.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn columns_with<T: Copy + Default + std::ops::Mul<Output = T>>(
    ri: &RowInputs,
    xj: f64,
    z: f64,
    c0: usize,
    c1: usize,
    amp: T,
    ure: &mut [T],
    uim: &mut [T],
    phasor: impl Fn(f64) -> (T, T),
) -> u64 {
    let (xs, rdx) = (&ri.xs[c0..c1], &ri.rdx[c0..c1]);
    // Equal lengths up front: no bounds checks in the loop, and no scalar epilogue forced on it.
    let (ure, uim) = (&mut ure[..xs.len()], &mut uim[..xs.len()]);
    let inv_z = 1.0 / z;
    let q = 0.5 * inv_z * ri.inv_lambda;
    let bx = ri.half_band[0];
    let mut n = 0u64;
    for i in 0..xs.len() {
        let dx = xs[i] - xj;
        let inside = (dx * inv_z - rdx[i]).abs() <= bx;
        let (s, c) = phasor(dx * dx * q);
        let w = if inside { amp } else { T::default() };
        ure[i] = w * c;
        uim[i] = w * s;
        n += inside as u64;
    }
    n
}

/// sin(2 pi t) and cos(2 pi t) for any finite t (reduced here).
#[inline(always)]
pub fn sincos_cycles(t: f64) -> (f64, f64) {
    let u = t - (t + 0.5).floor(); // [-1/2, 1/2)
    let a = std::f64::consts::PI * u; // [-pi/2, pi/2)
    let a2 = a * a;
    // sin a = a (1 - a^2/3! + a^4/5! - ... - a^14/15!)
    let s = a
        * (1.0
            + a2 * (-1.0 / 6.0
                + a2 * (1.0 / 120.0
                    + a2 * (-1.0 / 5040.0
                        + a2 * (1.0 / 362880.0
                            + a2 * (-1.0 / 39916800.0
                                + a2 * (1.0 / 6227020800.0 + a2 * (-1.0 / 1307674368000.0))))))));
    // cos a = 1 - a^2/2! + ... + a^16/16!
    let c = 1.0
        + a2 * (-0.5
            + a2 * (1.0 / 24.0
                + a2 * (-1.0 / 720.0
                    + a2 * (1.0 / 40320.0
                        + a2 * (-1.0 / 3628800.0
                            + a2 * (1.0 / 479001600.0
                                + a2 * (-1.0 / 87178291200.0 + a2 * (1.0 / 20922789888000.0))))))));
    (2.0 * s * c, 1.0 - 2.0 * s * s)
}

/// The f32 exact kernel with or without the obliquity factor (decided once per call, outside
/// the loop).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn exact32_either(
    ri: &RowInputs,
    r32: &Row32,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f32],
    im: &mut [f32],
) -> u64 {
    if e.obliquity {
        exact32::exact32_generic::<true>(ri, r32, e, c0, c1, re, im)
    } else {
        exact32::exact32_generic::<false>(ri, r32, e, c0, c1, re, im)
    }
}

macro_rules! simd_copies {
    ($avx2:ident, $avx512:ident, $generic:path, ($($arg:ident: $ty:ty),*) -> $ret:ty) => {
        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2,fma")]
        #[allow(clippy::too_many_arguments)]
        unsafe fn $avx2($($arg: $ty),*) -> $ret {
            $generic($($arg),*)
        }
        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2,fma,avx512f,avx512vl,avx512dq")]
        #[allow(clippy::too_many_arguments)]
        unsafe fn $avx512($($arg: $ty),*) -> $ret {
            $generic($($arg),*)
        }
    };
}

simd_copies!(
    mac_tile_avx2,
    mac_tile_avx512,
    mac_tile_for_isa,
    (ks: &[u32], coef: &[[f32; 2]], ure: &[f32], uim: &[f32], stride: usize, c0: usize, c1: usize, rows: &[usize; fresnel32::TILE_ROWS], re: &mut [f64], im: &mut [f64], nr: usize) -> ()
);

/// A kernel with [`simd_copies!`] and its dispatching function: `pub fn $name(isa, args...)` runs
/// the copy `isa` names, the portable one otherwise. Kernels whose arguments need checking before
/// the copies run keep a hand-written wrapper.
macro_rules! simd_kernel {
    ($(#[$m:meta])* pub fn $name:ident = $generic:path, $avx2:ident, $avx512:ident,
     ($($arg:ident: $ty:ty),*) -> $ret:ty $(, check $check:block)?) => {
        simd_copies!($avx2, $avx512, $generic, ($($arg: $ty),*) -> $ret);
        $(#[$m])*
        #[allow(clippy::too_many_arguments)]
        pub fn $name(isa: KernelIsa, $($arg: $ty),*) -> $ret {
            $($check)?
            dispatch!(isa, $avx2($($arg),*), $avx512($($arg),*), $generic($($arg),*))
        }
    };
}

simd_kernel!(
    /// Adds one emitter's exact spherical wave over columns [c0, c1) into the f32 row sums `re`,
    /// `im` (see [`exact32`] for the phase split and the error bound). Returns the pixels inside
    /// the support, the same set as [`accumulate_exact`].
    ///
    /// # Panics
    /// If `re`, `im`, `r32.rdx` or `r32.rdy` are shorter than `c1 + PAD`.
    pub fn accumulate_exact32 = exact32_either, exact32_avx2, exact32_avx512,
    (ri: &RowInputs, r32: &Row32, e: &EmitterRow, c0: usize, c1: usize, re: &mut [f32], im: &mut [f32]) -> u64,
    check {
        let n = c1 + PAD;
        assert!(
            re.len() >= n && im.len() >= n && r32.rdx.len() >= n && r32.rdy.len() >= n && ri.xs.len() >= c1,
            "f32 row buffers must be padded by PAD"
        );
    }
);

simd_kernel!(
    /// Row coefficients of one emitter over a band's rows for the f32 separable Fresnel path (see
    /// [`fresnel32::row_coefs_generic`]); the same bits from every copy. Returns the rows inside.
    ///
    /// # Panics
    /// If `cre` or `cim` is shorter than `ys`.
    pub fn fresnel_row_coefs32 = fresnel32::row_coefs_generic, row_coefs_avx2, row_coefs_avx512,
    (ys: &[f64], yj: f64, z: f64, cycles0: f64, ref_y: f64, half_band_y: f64, inv_lambda: f64, cre: &mut [f32], cim: &mut [f32]) -> u64
);
simd_kernel!(
    /// Sums of one replay row of the iterative loop (see [`pointwise::stats_row_generic`]).
    ///
    /// # Panics
    /// If `amp` is shorter than `row`.
    pub fn stats_row = pointwise::stats_row_generic, stats_row_avx2, stats_row_avx512,
    (row: &[num_complex::Complex<f32>], amp: &[f64], a0: usize, a1: usize) -> [f64; 5]
);
simd_kernel!(
    /// The amplitude constraint on one replay row (see [`pointwise::constrain_row_generic`]).
    ///
    /// # Panics
    /// If `amp` (or `weights`) is shorter than the area's end.
    pub fn constrain_row = pointwise::constrain_row_generic, constrain_row_avx2, constrain_row_avx512,
    (row: &mut [num_complex::Complex<f32>], amp: &[f64], weights: Option<&[f64]>, scale: f64, a0: usize, a1: usize, outside: f32) -> ()
);
simd_kernel!(
    /// h = u / |u| element by element (see [`pointwise::unit_row_generic`]).
    ///
    /// # Panics
    /// If `u` is shorter than `h`.
    pub fn unit_row = pointwise::unit_row_generic, unit_row_avx2, unit_row_avx512,
    (h: &mut [num_complex::Complex<f32>], u: &[num_complex::Complex<f32>]) -> ()
);

simd_kernel!(
    /// u = u / |u| in place (see [`pointwise::unit_in_place_generic`]): the bits of [`unit_row`].
    pub fn unit_in_place = pointwise::unit_in_place_generic, unit_in_place_avx2, unit_in_place_avx512,
    (u: &mut [num_complex::Complex<f32>]) -> ()
);

/// The tile kernel at the column width `nr` chosen for a copy ([`tile_columns`]): AVX-512 holds
/// 4 x 32 complex sums in 16 registers, AVX2 4 x 8 in 8 (16 would leave no room for loads).
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn mac_tile_for_isa(
    ks: &[u32],
    coef: &[[f32; 2]],
    ure: &[f32],
    uim: &[f32],
    stride: usize,
    c0: usize,
    c1: usize,
    rows: &[usize; fresnel32::TILE_ROWS],
    re: &mut [f64],
    im: &mut [f64],
    nr: usize,
) {
    const MR: usize = fresnel32::TILE_ROWS;
    if nr == 32 {
        fresnel32::mac_tile_generic::<MR, 32>(ks, coef, ure, uim, stride, c0, c1, rows, re, im)
    } else {
        fresnel32::mac_tile_generic::<MR, 8>(ks, coef, ure, uim, stride, c0, c1, rows, re, im)
    }
}

/// Columns per register tile for a copy of the Fresnel tile kernel; panels are laid out in
/// multiples of it.
pub fn tile_columns(isa: KernelIsa) -> usize {
    match isa.level {
        IsaLevel::Avx512 => 32,
        _ => 8,
    }
}

/// Adds a group of emitters, summed in f32, to a tile of [`fresnel32::TILE_ROWS`] rows of f64
/// sums over the panel columns [c0, c1) (see [`fresnel32::mac_tile_generic`]); the same bits
/// from every copy.
///
/// # Panics
/// If the rows are not distinct, or an index falls outside the slices.
#[allow(clippy::too_many_arguments)]
pub fn mac_tile32(
    isa: KernelIsa,
    ks: &[u32],
    coef: &[[f32; 2]],
    ure: &[f32],
    uim: &[f32],
    stride: usize,
    c0: usize,
    c1: usize,
    rows: &[usize; fresnel32::TILE_ROWS],
    re: &mut [f64],
    im: &mut [f64],
) {
    for i in 0..rows.len() {
        assert!(!rows[..i].contains(&rows[i]), "tile rows must be distinct");
    }
    assert!(c1 <= stride && re.len() == im.len(), "tile bounds");
    let nr = tile_columns(isa);
    dispatch!(
        isa,
        mac_tile_avx2(ks, coef, ure, uim, stride, c0, c1, rows, re, im, nr),
        mac_tile_avx512(ks, coef, ure, uim, stride, c0, c1, rows, re, im, nr),
        mac_tile_for_isa(ks, coef, ure, uim, stride, c0, c1, rows, re, im, nr)
    )
}

simd_kernel!(
    /// The f32 Fresnel column factor of one emitter (see [`fresnel32`]); `ure`, `uim` hold
    /// `c1 - c0` values. Returns the columns inside the x support.
    pub fn fresnel_columns32 = fresnel32::columns32_generic, columns32_avx2, columns32_avx512,
    (ri: &RowInputs, xj: f64, z: f64, amplitude: f64, c0: usize, c1: usize, ure: &mut [f32], uim: &mut [f32]) -> u64,
    check {
        assert!(
            ure.len() == c1 - c0 && uim.len() == c1 - c0 && c1 <= ri.xs.len(),
            "column factor length"
        );
    }
);

/// Every copy this CPU can run, portable first (tests and benches compare them), whatever the
/// environment says.
pub fn available() -> Vec<KernelIsa> {
    let mut v = vec![KernelIsa::PORTABLE];
    #[cfg(target_arch = "x86_64")]
    {
        if std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
        {
            v.push(KernelIsa {
                level: IsaLevel::Avx2,
            });
            if std::arch::is_x86_feature_detected!("avx512f")
                && std::arch::is_x86_feature_detected!("avx512vl")
                && std::arch::is_x86_feature_detected!("avx512dq")
            {
                v.push(KernelIsa {
                    level: IsaLevel::Avx512,
                });
            }
        }
    }
    v
}

/// The best copy this CPU runs, by the detection of [`crate::cpu`] (asked once per process): in
/// the environment, `FRINGEMILL_PORTABLE=1` forces the portable copy and
/// `FRINGEMILL_NO_AVX512=1` stops at AVX2.
pub fn detect() -> KernelIsa {
    let level = if crate::cpu::avx512() {
        IsaLevel::Avx512
    } else if crate::cpu::avx2_fma() {
        IsaLevel::Avx2
    } else {
        IsaLevel::Portable
    };
    KernelIsa { level }
}

#[cfg(test)]
mod unit_tests;
