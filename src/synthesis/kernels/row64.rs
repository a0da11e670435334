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
    let (xs, rdx) = (&ri.xs[c0..c1], &ri.rdx[c0..c1]);
    let inv_z = 1.0 / z;
    let amp = amplitude * inv_z;
    let q = 0.5 * inv_z * ri.inv_lambda;
    let bx = ri.half_band[0];
    let mut n = 0u64;
    for i in 0..xs.len() {
        let dx = xs[i] - xj;
        let inside = (dx * inv_z - rdx[i]).abs() <= bx;
        let w = if inside { amp } else { 0.0 };
        let (s, c) = sincos_cycles(dx * dx * q);
        ure[i] = w * c;
        uim[i] = w * s;
        n += inside as u64;
    }
    n
}

/// re + i im += (cr + i ci) (ure + i uim), element by element.
#[inline(always)]
fn mac_generic(cr: f64, ci: f64, ure: &[f64], uim: &[f64], re: &mut [f64], im: &mut [f64]) {
    for i in 0..ure.len() {
        re[i] += cr * ure[i] - ci * uim[i];
        im[i] += cr * uim[i] + ci * ure[i];
    }
}

avx2_copy!(
    fresnel_columns_avx2 = fresnel_columns_generic,
    (ri: &RowInputs, xj: f64, z: f64, amplitude: f64, c0: usize, c1: usize, ure: &mut [f64], uim: &mut [f64]) -> u64
);

avx2_copy!(
    mac_avx2 = mac_generic,
    (cr: f64, ci: f64, ure: &[f64], uim: &[f64], re: &mut [f64], im: &mut [f64]) -> ()
);

/// Fills the Fresnel column factor of one emitter (see `fresnel_columns_generic`); `ure`, `uim`
/// hold `c1 - c0` values. Returns the columns inside the x support.
#[allow(clippy::too_many_arguments)]
pub fn fresnel_columns(
    isa: KernelIsa,
    ri: &RowInputs,
    xj: f64,
    z: f64,
    amplitude: f64,
    c0: usize,
    c1: usize,
    ure: &mut [f64],
    uim: &mut [f64],
) -> u64 {
    assert!(
        ure.len() == c1 - c0 && uim.len() == c1 - c0,
        "column factor length"
    );
    dispatch!(
        isa,
        fresnel_columns_avx2(ri, xj, z, amplitude, c0, c1, ure, uim),
        fresnel_columns_avx2(ri, xj, z, amplitude, c0, c1, ure, uim),
        fresnel_columns_generic(ri, xj, z, amplitude, c0, c1, ure, uim)
    )
}

/// re + i im += (cr + i ci) (ure + i uim).
///
/// # Panics
/// If the slices differ in length.
pub fn mac(
    isa: KernelIsa,
    cr: f64,
    ci: f64,
    ure: &[f64],
    uim: &[f64],
    re: &mut [f64],
    im: &mut [f64],
) {
    assert!(
        uim.len() == ure.len() && re.len() == ure.len() && im.len() == ure.len(),
        "mac length"
    );
    dispatch!(
        isa,
        mac_avx2(cr, ci, ure, uim, re, im),
        mac_avx2(cr, ci, ure, uim, re, im),
        mac_generic(cr, ci, ure, uim, re, im)
    )
}

/// out = (re + i im) exp(-i 2 pi t) per pixel: the sum times conj(R), R's phase given in cycles.
#[inline(always)]
fn conj_reference_generic(t: &[f64], re: &[f64], im: &[f64], out: &mut [Complex64]) {
    for i in 0..out.len() {
        let (s, c) = sincos_cycles(t[i]);
        out[i] = Complex64::new(re[i] * c + im[i] * s, im[i] * c - re[i] * s);
    }
}

avx2_copy!(
    conj_reference_avx2 = conj_reference_generic,
    (t: &[f64], re: &[f64], im: &[f64], out: &mut [Complex64]) -> ()
);

/// Writes F = (re + i im) conj(R) into `out`, with R = exp(i 2 pi t).
///
/// # Panics
/// If the slices differ in length.
pub fn conj_reference(isa: KernelIsa, t: &[f64], re: &[f64], im: &[f64], out: &mut [Complex64]) {
    assert!(
        t.len() == out.len() && re.len() == out.len() && im.len() == out.len(),
        "row length"
    );
    dispatch!(
        isa,
        conj_reference_avx2(t, re, im, out),
        conj_reference_avx2(t, re, im, out),
        conj_reference_generic(t, re, im, out)
    )
}

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

avx2_copy!(
    exact_avx2 = exact_either,
    (ri: &RowInputs, e: &EmitterRow, c0: usize, c1: usize, re: &mut [f64], im: &mut [f64]) -> u64
);

avx2_copy!(
    fresnel_avx2 = fresnel_generic,
    (ri: &RowInputs, e: &EmitterRow, c0: usize, c1: usize, re: &mut [f64], im: &mut [f64]) -> u64
);

/// Adds one emitter's exact spherical wave over columns [c0, c1) into `re`, `im`.
/// Returns the number of pixels that passed the support test.
pub fn accumulate_exact(
    isa: KernelIsa,
    ri: &RowInputs,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f64],
    im: &mut [f64],
) -> u64 {
    dispatch!(
        isa,
        exact_avx2(ri, e, c0, c1, re, im),
        exact_avx2(ri, e, c0, c1, re, im),
        exact_either(ri, e, c0, c1, re, im)
    )
}

/// Adds one emitter's Fresnel wave over columns [c0, c1) into `re`, `im`.
pub fn accumulate_fresnel(
    isa: KernelIsa,
    ri: &RowInputs,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f64],
    im: &mut [f64],
) -> u64 {
    dispatch!(
        isa,
        fresnel_avx2(ri, e, c0, c1, re, im),
        fresnel_avx2(ri, e, c0, c1, re, im),
        fresnel_generic(ri, e, c0, c1, re, im)
    )
}
