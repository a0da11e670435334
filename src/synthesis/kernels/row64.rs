//! The f64 row kernels: exact and Fresnel spherical waves added to a row span, the separable
//! Fresnel column factor and its multiply-accumulate, and the product with conj(R); a portable
//! copy and an AVX2 copy of each (the same bits).

use num_complex::Complex64;

use super::*;

#[inline(always)]
fn exact_generic<const TAPER: bool>(
    ri: &RowInputs,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f64],
    im: &mut [f64],
) -> u64 {
    let (xs, rdx, rdy) = (&ri.xs[c0..c1], &ri.rdx[c0..c1], &ri.rdy[c0..c1]);
    let (re, im) = (&mut re[c0..c1], &mut im[c0..c1]);
    let c2 = e.dy * e.dy + e.z * e.z;
    let [bx, by] = ri.half_band;
    let mut n = 0u64;
    for i in 0..xs.len() {
        let dx = xs[i] - e.xj;
        let r = (dx * dx + c2).sqrt();
        let inv_r = 1.0 / r;
        let (gx, gy) = ((dx * inv_r - rdx[i]).abs(), (e.dy * inv_r - rdy[i]).abs());
        let inside = (gx <= bx) & (gy <= by);
        let w = if !inside {
            0.0
        } else if TAPER {
            edge_taper(gx / bx, ri.taper_start) * edge_taper(gy / by, ri.taper_start)
        } else {
            1.0
        };
        let amp = if e.obliquity {
            e.amplitude * e.z * inv_r * inv_r
        } else {
            e.amplitude * inv_r
        };
        let (s, c) = sincos_cycles(r * ri.inv_lambda + e.phase_cycles);
        let a = w * amp;
        re[i] += a * c;
        im[i] += a * s;
        n += inside as u64;
    }
    n
}

#[inline(always)]
fn fresnel_generic(
    ri: &RowInputs,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f64],
    im: &mut [f64],
) -> u64 {
    let (xs, rdx, rdy) = (&ri.xs[c0..c1], &ri.rdx[c0..c1], &ri.rdy[c0..c1]);
    let (re, im) = (&mut re[c0..c1], &mut im[c0..c1]);
    let inv_z = 1.0 / e.z;
    let amp = e.amplitude * inv_z;
    // t = (z + (dx^2 + dy^2) / 2z) / lambda + phi / 2 pi; the per-row part reduced first.
    let t_row = (e.z + e.dy * e.dy * 0.5 * inv_z) * ri.inv_lambda + e.phase_cycles;
    let t_row = t_row - t_row.floor();
    let q = 0.5 * inv_z * ri.inv_lambda;
    let sy = e.dy * inv_z;
    let [bx, by] = ri.half_band;
    let mut n = 0u64;
    for i in 0..xs.len() {
        let dx = xs[i] - e.xj;
        let inside = ((dx * inv_z - rdx[i]).abs() <= bx) & ((sy - rdy[i]).abs() <= by);
        let w = if inside { amp } else { 0.0 };
        let (s, c) = sincos_cycles(t_row + dx * dx * q);
        re[i] += w * c;
        im[i] += w * s;
        n += inside as u64;
    }
    n
}

/// Fresnel column factor of one emitter over columns [c0, c1): u = w a/z exp(i 2 pi dx^2 / (2 z lambda)),
/// w the 0/1 support weight in x (the x half of the test, as in `fresnel_generic`). Returns the
/// number of columns inside. With a plane reference the Fresnel phase separates into this factor and
/// a row factor, so a band needs one phasor per column and emitter instead of one per pixel.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn fresnel_columns_generic(
    ri: &RowInputs,
    xj: f64,
    z: f64,
    amplitude: f64,
    c0: usize,
    c1: usize,
    ure: &mut [f64],
    uim: &mut [f64],
) -> u64 {
    columns_with(
        ri,
        xj,
        z,
        c0,
        c1,
        amplitude * (1.0 / z),
        ure,
        uim,
        sincos_cycles,
    )
}

/// re + i im += (cr + i ci) (ure + i uim), element by element.
#[inline(always)]
fn mac_generic(cr: f64, ci: f64, ure: &[f64], uim: &[f64], re: &mut [f64], im: &mut [f64]) {
    for i in 0..ure.len() {
        re[i] += cr * ure[i] - ci * uim[i];
        im[i] += cr * uim[i] + ci * ure[i];
    }
}

avx2_kernel!(
    /// Fills the Fresnel column factor of one emitter (see `fresnel_columns_generic`); `ure`, `uim`
    /// hold `c1 - c0` values. Returns the columns inside the x support.
    pub fn fresnel_columns = fresnel_columns_generic, fresnel_columns_avx2,
    (ri: &RowInputs, xj: f64, z: f64, amplitude: f64, c0: usize, c1: usize, ure: &mut [f64], uim: &mut [f64]) -> u64,
    check {
        assert!(ure.len() == c1 - c0 && uim.len() == c1 - c0, "column factor length");
    }
);

avx2_kernel!(
    /// re + i im += (cr + i ci) (ure + i uim), element by element.
    ///
    /// # Panics
    /// If the slices differ in length.
    pub fn mac = mac_generic, mac_avx2,
    (cr: f64, ci: f64, ure: &[f64], uim: &[f64], re: &mut [f64], im: &mut [f64]) -> (),
    check {
        let n = ure.len();
        assert!(uim.len() == n && re.len() == n && im.len() == n, "mac length");
    }
);

/// out = (re + i im) exp(-i 2 pi t) per pixel: the sum times conj(R), R's phase given in cycles.
#[inline(always)]
fn conj_reference_generic(t: &[f64], re: &[f64], im: &[f64], out: &mut [Complex64]) {
    for i in 0..out.len() {
        let (s, c) = sincos_cycles(t[i]);
        out[i] = Complex64::new(re[i] * c + im[i] * s, im[i] * c - re[i] * s);
    }
}

avx2_kernel!(
    /// Writes F = (re + i im) conj(R) into `out`, with R = exp(i 2 pi t).
    ///
    /// # Panics
    /// If the slices differ in length.
    pub fn conj_reference = conj_reference_generic, conj_reference_avx2,
    (t: &[f64], re: &[f64], im: &[f64], out: &mut [Complex64]) -> (),
    check {
        let n = out.len();
        assert!(t.len() == n && re.len() == n && im.len() == n, "row length");
    }
);

/// The exact kernel with the soft edge or the plain 0/1 support.
#[inline(always)]
fn exact_either(
    ri: &RowInputs,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f64],
    im: &mut [f64],
) -> u64 {
    if ri.taper_start < 1.0 {
        exact_generic::<true>(ri, e, c0, c1, re, im)
    } else {
        exact_generic::<false>(ri, e, c0, c1, re, im)
    }
}

avx2_kernel!(
    /// Adds one emitter's exact spherical wave over columns [c0, c1) into `re`, `im`.
    /// Returns the number of pixels that passed the support test.
    pub fn accumulate_exact = exact_either, exact_avx2,
    (ri: &RowInputs, e: &EmitterRow, c0: usize, c1: usize, re: &mut [f64], im: &mut [f64]) -> u64
);

avx2_kernel!(
    /// Adds one emitter's Fresnel wave over columns [c0, c1) into `re`, `im`.
    pub fn accumulate_fresnel = fresnel_generic, fresnel_avx2,
    (ri: &RowInputs, e: &EmitterRow, c0: usize, c1: usize, re: &mut [f64], im: &mut [f64]) -> u64
);
