//! The fast Fresnel kernels (plane reference): the separable form of the paraxial phase in f32,
//! emitters applied eight at a time to each row.
//!
//! With a plane reference the Fresnel wave of emitter j factors into a column factor
//! u_j(x) = (a_j / z_j) exp(i 2 pi (x - x_j)^2 / (2 z_j lambda)) (zero outside the x half of the
//! support test) and a row factor v_j(y) = exp(i 2 pi t_j(y)) (zero outside the y half), so a band
//! is a sum of rank-one updates F += v_j u_j^T: a matrix product. Here the column factors of a
//! group of [`GROUP`] emitters are formed once per band, then every row adds the whole group in one
//! pass over its pixels, accumulators held in registers (eight complex multiply-adds per load and
//! store of the row).
//!
//! Precision: phases are formed in f64 and reduced to [-1/2, 1/2) cycles before the f32 sine and
//! cosine (error 3e-7); factors are rounded to f32 (6e-8 relative); the f32 row sums are flushed
//! into f64 by the caller every 256 emitters. Per term the error is below 1e-6 of a_j / z_j.
//!
//! Determinism: each pixel's sum is one chain of `mul_add`s over the group's emitters in index
//! order; an absent emitter (outside the band, or outside the support) has a zero factor and
//! leaves the chain's value unchanged, so results do not depend on how rows are cut into bands.
//! The portable and SIMD copies compile this same source and give the same bits.

use super::exact32::sincos_half;
use super::RowInputs;

/// Emitters applied together to a row.
pub const GROUP: usize = 8;

/// Column factor of one emitter over columns [c0, c1) in f32, written to `ure`, `uim`
/// (`c1 - c0` values); the x half of the support test as the f64 kernels apply it (same pixels).
/// Returns the number of columns inside.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub fn columns32_generic(
    ri: &RowInputs,
    xj: f64,
    z: f64,
    amplitude: f64,
    c0: usize,
    c1: usize,
    ure: &mut [f32],
    uim: &mut [f32],
) -> u64 {
    let (xs, rdx) = (&ri.xs[c0..c1], &ri.rdx[c0..c1]);
    let inv_z = 1.0 / z;
    let amp = (amplitude * inv_z) as f32;
    let q = 0.5 * inv_z * ri.inv_lambda;
    let bx = ri.half_band[0];
    let mut n = 0u64;
    for i in 0..xs.len() {
        let dx = xs[i] - xj;
        let inside = (dx * inv_z - rdx[i]).abs() <= bx;
        let t = dx * dx * q;
        let t = (t - t.round_ties_even()) as f32;
        let (s, c) = sincos_half(t);
        let w = if inside { amp } else { 0.0 };
        ure[i] = w * c;
        uim[i] = w * s;
        n += inside as u64;
    }
    n
}

/// re + i im += sum over the group of (cr_k + i ci_k)(ure_k + i uim_k), per pixel, emitters in
/// order; `ure[k * len..(k + 1) * len]` is emitter k's factor over the row's `len` pixels.
#[inline(always)]
pub fn mac_group_generic(
    coef: &[[f32; 2]; GROUP],
    ure: &[f32],
    uim: &[f32],
    re: &mut [f32],
    im: &mut [f32],
) {
    let len = re.len();
    for c in 0..len {
        let (mut r, mut m) = (re[c], im[c]);
        for (k, &[cr, ci]) in coef.iter().enumerate() {
            let (ur, ui) = (ure[k * len + c], uim[k * len + c]);
            r = cr.mul_add(ur, r);
            r = (-ci).mul_add(ui, r);
            m = cr.mul_add(ui, m);
            m = ci.mul_add(ur, m);
        }
        re[c] = r;
        im[c] = m;
    }
}

/// Two rows at once (`re0`/`im0` with `coef0`, `re1`/`im1` with `coef1`): each factor load feeds
/// both rows. Per pixel and row, the same chain of `mul_add`s as [`mac_group_generic`], so the
/// bits are those of two single-row calls.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub fn mac_group2_generic(
    coef0: &[[f32; 2]; GROUP],
    coef1: &[[f32; 2]; GROUP],
    ure: &[f32],
    uim: &[f32],
    re0: &mut [f32],
    im0: &mut [f32],
    re1: &mut [f32],
    im1: &mut [f32],
) {
    let len = re0.len();
    for c in 0..len {
        let (mut r0, mut m0, mut r1, mut m1) = (re0[c], im0[c], re1[c], im1[c]);
        for k in 0..GROUP {
            let (ur, ui) = (ure[k * len + c], uim[k * len + c]);
            let [a, b] = coef0[k];
            r0 = a.mul_add(ur, r0);
            r0 = (-b).mul_add(ui, r0);
            m0 = a.mul_add(ui, m0);
            m0 = b.mul_add(ur, m0);
            let [a, b] = coef1[k];
            r1 = a.mul_add(ur, r1);
            r1 = (-b).mul_add(ui, r1);
            m1 = a.mul_add(ui, m1);
            m1 = b.mul_add(ur, m1);
        }
        re0[c] = r0;
        im0[c] = m0;
        re1[c] = r1;
        im1[c] = m1;
    }
}
