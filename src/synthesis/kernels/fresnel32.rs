//! The fast Fresnel kernels (plane reference): the separable form of the paraxial phase in f32,
//! summed as a register-blocked complex matrix product.
//!
//! With a plane reference the Fresnel wave of emitter j factors into a column factor
//! u_j(x) = (a_j / z_j) exp(i 2 pi (x - x_j)^2 / (2 z_j lambda)) (zero outside the x half of the
//! support test) and a row factor v_j(y) = exp(i 2 pi t_j(y)) (zero outside the y half), so a band
//! is a sum of rank-one updates F += v_j u_j^T: a matrix product. The caller takes the emitters in
//! groups (the f32 flush groups of 256 indices), forms the column factors of a group chunk by
//! chunk of [`CHUNK`] columns (a panel), and tiles of [`TILE_ROWS`] rows by a few SIMD vectors of
//! columns keep their sums in registers while every emitter of the group live on the tile and
//! meeting the chunk is added ([`mac_tile_generic`]); the f32 sums then go straight into the f64
//! band. Band-limited supports cost what they cover, to a chunk and a tile.
//!
//! Precision: phases are formed in f64 and reduced to [-1/2, 1/2) cycles before the f32 sine and
//! cosine (error 3e-7); factors are rounded to f32 (6e-8 relative); the f32 row sums are flushed
//! into f64 at the end of each group of 256 emitter indices. Per term the error is below 1e-6 of
//! a_j / z_j.
//!
//! Determinism: each pixel's sum is one chain of `mul_add`s over the emitters in index order; an
//! absent emitter (outside the band, or outside the support, or left out of a tile's list) adds
//! exact zeros and leaves the chain's value unchanged (up to the sign of a zero), so results do
//! not depend on how rows are cut into bands, tiles or chunks.
//! The portable and SIMD copies compile this same source and give the same bits.

use super::exact32::sincos_half;
use super::{sincos_cycles, RowInputs};

/// Rows of a register tile.
pub const TILE_ROWS: usize = 4;

/// Columns of a panel: the emitters meeting a chunk are listed per tile (so a support edge wastes
/// at most a chunk's width), and a group's factors over it (at most 256 x 64 x 8 bytes = 128 KiB)
/// stay in the L2 cache while the band's tiles pass over it.
pub const CHUNK: usize = 64;

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
    // The phase in cycles reduced in f64, then sine and cosine in f32.
    let amp = (amplitude * (1.0 / z)) as f32;
    super::columns_with(ri, xj, z, c0, c1, amp, ure, uim, |t| {
        sincos_half((t - t.round_ties_even()) as f32)
    })
}

/// Row coefficients of one emitter (at height `yj`, distance `z`, phase `cycles0` in cycles)
/// over the rows at heights `ys`: the y half of the support test, |dy / z - ref_y| <= half band,
/// and the row factor exp(i 2 pi t), t = (z + dy^2 / 2z) / lambda + cycles0, phase and sine/cosine
/// in f64 (the f64 separable path's values), rounded to f32; zero outside. Returns the rows inside.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub fn row_coefs_generic(
    ys: &[f64],
    yj: f64,
    z: f64,
    cycles0: f64,
    ref_y: f64,
    half_band_y: f64,
    inv_lambda: f64,
    cre: &mut [f32],
    cim: &mut [f32],
) -> u64 {
    let inv_z = 1.0 / z;
    let (cre, cim) = (&mut cre[..ys.len()], &mut cim[..ys.len()]);
    let mut n = 0u64;
    for i in 0..ys.len() {
        let dy = ys[i] - yj;
        let inside = (dy * inv_z - ref_y).abs() <= half_band_y;
        let t = (z + dy * dy * 0.5 * inv_z) * inv_lambda + cycles0;
        let (s, c) = sincos_cycles(t - t.floor());
        cre[i] = if inside { c as f32 } else { 0.0 };
        cim[i] = if inside { s as f32 } else { 0.0 };
        n += inside as u64;
    }
    n
}

/// One step of [`mac_tile_generic`]: `N` columns from panel column `c` on the tile's rows.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
fn tile_step<const MR: usize, const N: usize>(
    ks: &[u32],
    coef: &[[f32; 2]],
    ure: &[f32],
    uim: &[f32],
    stride: usize,
    c: usize,
    rows: &[usize; MR],
    re: &mut [f64],
    im: &mut [f64],
) {
    let mut ar = [[0f32; N]; MR];
    let mut ai = [[0f32; N]; MR];
    for &k in ks {
        let k = k as usize;
        let o = k * stride + c;
        let ur: &[f32; N] = ure[o..o + N].try_into().unwrap();
        let ui: &[f32; N] = uim[o..o + N].try_into().unwrap();
        let cf: &[[f32; 2]; MR] = coef[k * MR..k * MR + MR].try_into().unwrap();
        for i in 0..MR {
            let [a, b] = cf[i];
            for l in 0..N {
                let r = a.mul_add(ur[l], ar[i][l]);
                ar[i][l] = (-b).mul_add(ui[l], r);
                let m = a.mul_add(ui[l], ai[i][l]);
                ai[i][l] = b.mul_add(ur[l], m);
            }
        }
    }
    for i in 0..MR {
        let (re, im) = (&mut re[rows[i] + c..][..N], &mut im[rows[i] + c..][..N]);
        for l in 0..N {
            re[l] += ar[i][l] as f64;
            im[l] += ai[i][l] as f64;
        }
    }
}

/// A register tile of the matrix product: for the `MR` rows whose f64 sums start at `rows[i]` in
/// `re`, `im` (offsets of panel column 0) and the panel columns [c0, c1), the f32 sum over k in
/// `ks` of (cr + i ci)(ure + i uim), with (cr, ci) = `coef[k * MR + i]` and emitter k's column
/// factors at `ure[k * stride..]`, is formed in registers from zero and then added to `re`, `im`.
///
/// Columns go `NR` at a time with the tile's 2 x MR x NR sums held in registers over the whole
/// emitter list (for AVX-512, MR = 4 and NR = 32: sixteen accumulators, four factor loads and
/// eight broadcasts per 32 multiply-adds), then one at a time at the end. Every pixel's f32 sum is
/// the chain re = fma(cr, ur, re), re = fma(-ci, ui, re), im = fma(cr, ui, im),
/// im = fma(ci, ur, im) over `ks` in order, whatever `MR` and `NR` are, so copies of any width
/// give the same bits, and so does leaving out an emitter whose factor or coefficient is zero.
/// The rows must be distinct.
#[allow(clippy::too_many_arguments)]
#[inline(always)]
pub fn mac_tile_generic<const MR: usize, const NR: usize>(
    ks: &[u32],
    coef: &[[f32; 2]],
    ure: &[f32],
    uim: &[f32],
    stride: usize,
    c0: usize,
    c1: usize,
    rows: &[usize; MR],
    re: &mut [f64],
    im: &mut [f64],
) {
    let mut c = c0;
    while c + NR <= c1 {
        tile_step::<MR, NR>(ks, coef, ure, uim, stride, c, rows, re, im);
        c += NR;
    }
    while c < c1 {
        tile_step::<MR, 1>(ks, coef, ure, uim, stride, c, rows, re, im);
        c += 1;
    }
}
