//! The fast exact kernel: spherical waves in f32 lanes, phase anchored in f64.
//!
//! k r is about 10^6 rad, far beyond what f32 holds, so r / lambda is split per segment of
//! pixels around an anchor column a: r_a / lambda in f64, reduced to [0, 1) cycles, plus the
//! small remainder (r - r_a) / lambda in f32. Two ways to get the remainder:
//!
//! * Polynomial path (emitters at least [`poly_min_distance`] from the row, which is nearly all
//!   of a display scene): a cubic in the lane offset n about the anchor, coefficients from f64,
//!   Taylor remainder below [`POLY_PHASE_TOL`] = 2e-6 cycles; amplitude as a quadratic in n.
//!   No square root or division per pixel. Segments of 16, 32 or 64 pixels ([`POLY_WIDTHS`], the
//!   widest the emitter's distance allows) whose support
//!   margins at the anchor (f64) exceed what the segment can change are taken whole; the others
//!   get the f64 test per pixel (bounds in `exact32_poly`).
//! * Near path (closer emitters): per pixel, r - r_a = u (u + 2 dx_a) / (r + r_a) with
//!   u = x - x_a and r from an f32 square root (no cancellation: the numerator is exact to f32
//!   rounding, the denominator only needs relative accuracy). With |u| <= 4 pitches the remainder
//!   is at most 4 p / lambda cycles, carried with a relative error near 3e-7. Its support test is
//!   done in f32 (absolute error below 5e-7 in direction cosines); lanes with a margin under
//!   [`AMBIGUOUS`] = 2e-6 are decided again by the f64 expression.
//!
//! Either way the pixel set is exactly the f64 test's, and the phase error per term stays below
//! 3e-5 rad (f32 rounding of a remainder of a few cycles, plus the f32 sincos, 3e-7). Sums run in
//! f32 per row; the caller flushes them into f64 every 256 emitters, so their rounding never
//! grows with the scene.
//!
//! Every step is written lane by lane over fixed arrays with IEEE operations only (sqrt,
//! division, `mul_add`, round-half-even): the portable copy and the AVX2+FMA and AVX-512 copies
//! compile the same source and give the same bits.

use super::{EmitterRow, RowInputs};

/// Pixels per segment of the near path (one f64 anchor each).
pub const LANES: usize = 8;
/// Pixels per segment of the polynomial path (one f64 anchor and expansion each).
pub const POLY_LANES: usize = 16;
/// Pixels per segment of the polynomial path for emitters far enough for the longer expansion
/// ([`poly_min_distance`] with this many lanes): half the f64 work per pixel.
pub const POLY_LANES_WIDE: usize = 32;
/// Pixels per segment for emitters farther still (display scenes tens of millimetres away).
pub const POLY_LANES_XWIDE: usize = 64;
/// The polynomial path's segment widths, narrowest first; `Row32::poly_min_distance[i]` is the
/// distance from which width `i` keeps the expansion within [`POLY_PHASE_TOL`].
pub const POLY_WIDTHS: [usize; 3] = [POLY_LANES, POLY_LANES_WIDE, POLY_LANES_XWIDE];
/// Segments of the polynomial path whose coefficients are computed together.
const POLY_SEGMENTS: usize = 4;
/// Padding the f32 row buffers need past the last column a kernel call touches.
pub const PAD: usize = if BLOCK > POLY_LANES_XWIDE * POLY_SEGMENTS {
    BLOCK
} else {
    POLY_LANES_XWIDE * POLY_SEGMENTS
};

/// Margin (in direction cosines) below which the f32 support test defers to the f64 one.
pub const AMBIGUOUS: f32 = 2e-6;

/// Per-row inputs of the f32 kernel, besides [`RowInputs`].
pub struct Row32<'a> {
    /// Reference direction cosines per column in f32, at least `width + PAD` long (padding).
    pub rdx: &'a [f32],
    /// Same for y.
    pub rdy: &'a [f32],
    /// Column pitch, metres (`xs[c + i] = xs[c] + i p`).
    pub pitch: f64,
    /// Largest change of the reference direction cosines (x, y) between neighbouring columns
    /// of the row (0 for a plane reference).
    pub ref_step: [f64; 2],
    /// Emitters at least `poly_min_distance[i]` from the row (sqrt(dy^2 + z^2), metres) take
    /// the polynomial path with segments of `POLY_WIDTHS[i]` pixels (the widest that applies);
    /// nearer ones the per-pixel square root. See [`poly_min_distance`].
    pub poly_min_distance: [f64; 3],
}

/// Phase error allowed to the cubic expansion of r over a segment, cycles.
pub const POLY_PHASE_TOL: f64 = 2e-6;

/// The distance from which the cubic expansion of r about a segment's anchor is within
/// [`POLY_PHASE_TOL`] with segments of `lanes` pixels: with |u| <= U = (lanes / 2) p, the Taylor
/// remainder is |r''''| U^4 / 24 <= U^4 / (2 rho^3) (|r''''| <= 12 / rho^3 for
/// r = sqrt(x^2 + rho^2)), so rho^3 >= U^4 / (2 lambda tol).
pub fn poly_min_distance(lanes: usize, pitch: f64, wavelength: f64) -> f64 {
    let u = (lanes / 2) as f64 * pitch;
    (u.powi(4) / (2.0 * wavelength * POLY_PHASE_TOL)).cbrt()
}

/// sin(2 pi t), cos(2 pi t) in f32 for t in [-1/2, 1/2]: Taylor series of sin and cos of
/// a = pi t (|a| <= pi/2) to degree 11 and 12 (remainders below 5.7e-8 and 6.4e-9), then the
/// double-angle formulas.
#[inline(always)]
pub(super) fn sincos_half(t: f32) -> (f32, f32) {
    let a = std::f32::consts::PI * t;
    let a2 = a * a;
    let s = a2.mul_add(-1.0 / 39_916_800.0, 1.0 / 362_880.0);
    let s = a2.mul_add(s, -1.0 / 5040.0);
    let s = a2.mul_add(s, 1.0 / 120.0);
    let s = a2.mul_add(s, -1.0 / 6.0);
    let s = a2.mul_add(s, 1.0);
    let s = a * s;
    let c = a2.mul_add(1.0 / 479_001_600.0, -1.0 / 3_628_800.0);
    let c = a2.mul_add(c, 1.0 / 40320.0);
    let c = a2.mul_add(c, -1.0 / 720.0);
    let c = a2.mul_add(c, 1.0 / 24.0);
    let c = a2.mul_add(c, -0.5);
    let c = a2.mul_add(c, 1.0);
    let sc = s * c;
    (sc + sc, (-2.0 * s).mul_add(s, 1.0))
}

/// The reference kernel's f64 support test for column `c` (same expression, same rounding).
#[inline(always)]
fn inside_f64(ri: &RowInputs, e: &EmitterRow, c2: f64, c: usize) -> bool {
    let dx = ri.xs[c] - e.xj;
    let r = (dx * dx + c2).sqrt();
    let inv_r = 1.0 / r;
    ((dx * inv_r - ri.rdx[c]).abs() <= ri.half_band[0])
        & ((e.dy * inv_r - ri.rdy[c]).abs() <= ri.half_band[1])
}

/// Segments (of [`LANES`] pixels, one anchor each) computed together, for instruction-level
/// parallelism: four independent chains of sqrt, division and polynomial.
const SEGMENTS: usize = 4;
/// Pixels per block.
const BLOCK: usize = LANES * SEGMENTS;

/// Adds one emitter's exact wave over columns [c0, c1) into the f32 row sums `re`, `im`
/// (at least `c1 + PAD` long), by the polynomial path when the emitter is far enough from the
/// row, else by the per-pixel square root. Returns the pixels inside the support.
#[inline(always)]
pub fn exact32_generic<const OBLIQUE: bool>(
    ri: &RowInputs,
    r32: &Row32,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f32],
    im: &mut [f32],
) -> u64 {
    if ri.taper_start < 1.0 {
        // Soft support edges (the recording plane): the emitters sit close to the plane, where
        // the per-pixel path is the one that applies anyway.
        return exact32_near::<OBLIQUE, true>(ri, r32, e, c0, c1, re, im);
    }
    let rho = (e.dy * e.dy + e.z * e.z).sqrt();
    let d = &r32.poly_min_distance;
    if rho >= d[2] {
        exact32_poly::<OBLIQUE, POLY_LANES_XWIDE>(ri, r32, e, c0, c1, re, im)
    } else if rho >= d[1] {
        exact32_poly::<OBLIQUE, POLY_LANES_WIDE>(ri, r32, e, c0, c1, re, im)
    } else if rho >= d[0] {
        exact32_poly::<OBLIQUE, POLY_LANES>(ri, r32, e, c0, c1, re, im)
    } else {
        exact32_near::<OBLIQUE, false>(ri, r32, e, c0, c1, re, im)
    }
}

/// The polynomial path. Per segment of `L` pixels, in f64 about the anchor a (u = n p, n the
/// lane's offset from the anchor, -L/2..L/2):
///
///   r / lambda = r_a / lambda + n b1 + n^2 b2 + n^3 b3 + R4,
///   b1 = s p / lambda,  b2 = (1 - s^2) p^2 / (2 r_a lambda),  b3 = -s (1 - s^2) p^3 / (2 r_a^2 lambda),
///
/// s = dx_a / r_a, |R4| <= POLY_PHASE_TOL cycles (see [`poly_min_distance`]); the amplitude
/// g = A r^-m (m = 1, or 2 with obliquity) as g0 + n g1 + n^2 g2 with g1 = -m s A p r_a^-(m+1),
/// g2 = m ((m + 2) s^2 - 1) A p^2 r_a^-(m+2) / 2, relative remainder of order (4 p / rho)^3, below
/// 1e-6 at the path's distances. Only the reduced r_a / lambda and the small coefficients go to f32.
///
/// Support: the test quantities dx / r and dy / r change by at most |u| / rho over the segment
/// (both derivatives are bounded by 1 / rho), the reference cosines by 7 `ref_step`; a segment
/// whose f64 margins at the anchor exceed those changes is wholly inside (or outside) the
/// support; the rest (edge segments) get the f64 test pixel by pixel.
#[inline(always)]
fn exact32_poly<const OBLIQUE: bool, const L: usize>(
    ri: &RowInputs,
    r32: &Row32,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f32],
    im: &mut [f32],
) -> u64 {
    const S: usize = POLY_SEGMENTS;
    let anchor = L / 2;
    let c2 = e.dy * e.dy + e.z * e.z;
    let rho = c2.sqrt();
    let p = r32.pitch;
    let il = ri.inv_lambda;
    let [bx, by] = ri.half_band;
    let reach = anchor as f64 * p / rho;
    let reach_x = reach + (L - 1) as f64 * r32.ref_step[0] + 1e-12;
    let reach_y = reach + (L - 1) as f64 * r32.ref_step[1] + 1e-12;
    let (m, amp) = if OBLIQUE {
        (2.0, e.amplitude * e.z)
    } else {
        (1.0, e.amplitude)
    };
    let mut nl = [0f32; L];
    let mut lane = [0f32; L];
    for i in 0..L {
        nl[i] = i as f32 - anchor as f32;
        lane[i] = i as f32;
    }
    let last = ri.xs.len() - 1;
    let mut count = 0u64;
    let mut c = c0;
    while c < c1 {
        // Anchors and coefficients of S segments in f64: plain arithmetic over arrays, which the
        // compiler turns into f64 vector code.
        let x0 = ri.xs[c] - e.xj;
        let mut dxa = [0f64; S];
        let mut ir = [0f64; S];
        let mut sa = [0f64; S];
        let mut ta = [0f32; S];
        let mut b = [[0f32; S]; 3];
        let mut g = [[0f32; S]; 3];
        for k in 0..S {
            dxa[k] = x0 + (k * L + anchor) as f64 * p;
            let ra = (dxa[k] * dxa[k] + c2).sqrt();
            ir[k] = 1.0 / ra;
            let s = dxa[k] * ir[k];
            sa[k] = s;
            let t = ra * il + e.phase_cycles;
            ta[k] = (t - t.floor()) as f32;
            let q = 1.0 - s * s;
            let pl = p * il;
            // Whole cycles per pixel do nothing at integer offsets n: keep b1 within half a cycle,
            // so n b1 stays below L / 4 cycles (16 for 64 lanes) and its f32 rounding small: the
            // Horner chain's few roundings at that size are below 2e-6 cycles (1.2e-5 rad).
            let b1 = s * pl;
            b[0][k] = (b1 - b1.round_ties_even()) as f32;
            b[1][k] = (q * p * pl * 0.5 * ir[k]) as f32;
            b[2][k] = (-s * q * p * p * pl * 0.5 * ir[k] * ir[k]) as f32;
            let irm = if OBLIQUE { ir[k] * ir[k] } else { ir[k] };
            let g0 = amp * irm;
            g[0][k] = g0 as f32;
            g[1][k] = (-m * s * p * g0 * ir[k]) as f32;
            g[2][k] = (m * ((m + 2.0) * s * s - 1.0) * 0.5 * p * p * g0 * ir[k] * ir[k]) as f32;
        }
        // Support class per segment: 0 outside, 1 inside, 2 edge.
        let mut class = [0u8; S];
        for k in 0..S {
            let cr = (c + k * L + anchor).min(last);
            let mx = bx - (sa[k] - ri.rdx[cr]).abs();
            let my = by - (e.dy * ir[k] - ri.rdy[cr]).abs();
            class[k] = if mx > reach_x && my > reach_y {
                1
            } else if -mx > reach_x || -my > reach_y {
                0
            } else {
                2
            };
        }
        for k in 0..S {
            let cs = c + k * L;
            if cs >= c1 || class[k] == 0 {
                continue;
            }
            let live = (c1 - cs).min(L);
            // Weights: lanes past the span are dropped arithmetically; an edge segment's lanes
            // also by the f64 test. (Full segments read a constant array, never one just written
            // lane by lane: a wide load of narrow stores stalls store forwarding.)
            let full = class[k] == 1;
            let mut edge = [0f32; L];
            if full {
                count += live as u64;
            } else {
                for (i, v) in edge.iter_mut().enumerate().take(live) {
                    let inside = inside_f64(ri, e, c2, cs + i);
                    *v = if inside { 1.0 } else { 0.0 };
                    count += inside as u64;
                }
            }
            let live_f = live as f32;
            let (t0, b1, b2, b3) = (ta[k], b[0][k], b[1][k], b[2][k]);
            let (g0, g1, g2) = (g[0][k], g[1][k], g[2][k]);
            let (re, im) = (&mut re[cs..cs + L], &mut im[cs..cs + L]);
            if full && live == L {
                // The common case, without lane weights (a weight of 1 is exact: same bits).
                for i in 0..L {
                    let n = nl[i];
                    let t = n.mul_add(n.mul_add(n.mul_add(b3, b2), b1), t0);
                    let t = t - t.round_ties_even();
                    let (sn, co) = sincos_half(t);
                    let a = n.mul_add(n.mul_add(g2, g1), g0);
                    re[i] = a.mul_add(co, re[i]);
                    im[i] = a.mul_add(sn, im[i]);
                }
                continue;
            }
            for i in 0..L {
                let n = nl[i];
                let t = n.mul_add(n.mul_add(n.mul_add(b3, b2), b1), t0);
                let t = t - t.round_ties_even();
                let (sn, co) = sincos_half(t);
                let on = if lane[i] >= live_f {
                    0.0
                } else if full {
                    1.0
                } else {
                    edge[i]
                };
                let a = n.mul_add(n.mul_add(g2, g1), g0) * on;
                re[i] = a.mul_add(co, re[i]);
                im[i] = a.mul_add(sn, im[i]);
            }
        }
        c += S * L;
    }
    count
}

/// [`super::edge_taper`] in f32 (the same smooth step; absolute error below 1e-6).
#[inline(always)]
fn edge_taper32(u: f32, start: f32, inv_width: f32) -> f32 {
    let s = ((u - start) * inv_width).clamp(0.0, 1.0);
    1.0 - s * s * s * s.mul_add(s.mul_add(6.0, -15.0), 10.0)
}

/// The per-pixel square-root path, for emitters close to the row. With `TAPER`, each pixel's
/// weight is also multiplied by the soft edge of its support margins ([`super::edge_taper`] of
/// `|dx / r - rdx| / bx` and `|dy / r - rdy| / by`, in f32 from the same f32 quantities as the
/// support test).
#[inline(always)]
fn exact32_near<const OBLIQUE: bool, const TAPER: bool>(
    ri: &RowInputs,
    r32: &Row32,
    e: &EmitterRow,
    c0: usize,
    c1: usize,
    re: &mut [f32],
    im: &mut [f32],
) -> u64 {
    const ANCHOR: usize = LANES / 2;
    let c2 = e.dy * e.dy + e.z * e.z;
    let c2f = c2 as f32;
    let dyf = e.dy as f32;
    let bx = ri.half_band[0] as f32;
    let by = ri.half_band[1] as f32;
    let inv_lambda = ri.inv_lambda as f32;
    let (inv_bx, inv_by) = (1.0 / bx, 1.0 / by);
    let t_start = ri.taper_start as f32;
    let t_inv_width = if TAPER { 1.0 / (1.0 - t_start) } else { 0.0 };
    // The soft edge of a pixel from its f32 distances to the band edge (gx, gy <= 0 inside).
    let taper = |gx: f32, gy: f32| -> f32 {
        edge_taper32((gx + bx) * inv_bx, t_start, t_inv_width)
            * edge_taper32((gy + by) * inv_by, t_start, t_inv_width)
    };
    let amp = if OBLIQUE {
        (e.amplitude * e.z) as f32
    } else {
        e.amplitude as f32
    };
    // Offset of each lane from its segment's anchor, and the lane's index in the block.
    let mut u = [0f32; BLOCK];
    let mut lane = [0f32; BLOCK];
    for i in 0..BLOCK {
        u[i] = (((i % LANES) as f64 - ANCHOR as f64) * r32.pitch) as f32;
        lane[i] = i as f32;
    }
    let mut n = 0u64;
    let mut c = c0;
    while c < c1 {
        let live_lanes = (c1 - c).min(BLOCK) as f32;
        // Anchors in f64, one per segment: the column ANCHOR lanes into it (it may lie past the
        // plate's edge; only its distance is used).
        let mut dxa = [0f64; SEGMENTS];
        let mut ta = [0f64; SEGMENTS];
        let mut ra = [0f64; SEGMENTS];
        for k in 0..SEGMENTS {
            dxa[k] = ri.xs[c] + (k * LANES + ANCHOR) as f64 * r32.pitch - e.xj;
            ra[k] = (dxa[k] * dxa[k] + c2).sqrt();
            let t = ra[k] * ri.inv_lambda + e.phase_cycles;
            ta[k] = t - t.floor();
        }
        let mut dxl = [0f32; BLOCK];
        let mut ral = [0f32; BLOCK];
        let mut tal = [0f32; BLOCK];
        let mut twol = [0f32; BLOCK];
        for i in 0..BLOCK {
            let k = i / LANES;
            dxl[i] = dxa[k] as f32;
            ral[i] = ra[k] as f32;
            tal[i] = ta[k] as f32;
            twol[i] = (2.0 * dxa[k]) as f32;
        }
        let rdx = &r32.rdx[c..c + BLOCK];
        let rdy = &r32.rdy[c..c + BLOCK];
        let mut w = [0f32; BLOCK];
        let mut amb = [0u32; BLOCK];
        let mut ins = [0u32; BLOCK];
        let mut cs = [0f32; BLOCK];
        let mut sn = [0f32; BLOCK];
        for i in 0..BLOCK {
            let dx = dxl[i] + u[i];
            let s2 = dx.mul_add(dx, c2f);
            let r = s2.sqrt();
            let rr = r + ral[i];
            let d = 1.0 / (r * rr);
            let ir = rr * d;
            let dr = (u[i] * (u[i] + twol[i])) * (r * d);
            let t = dr.mul_add(inv_lambda, tal[i]);
            let gx = (dx * ir - rdx[i]).abs() - bx;
            let gy = (dyf * ir - rdy[i]).abs() - by;
            let live = lane[i] < live_lanes;
            let inside = live & (gx <= 0.0) & (gy <= 0.0);
            amb[i] = (live & ((gx.abs() < AMBIGUOUS) | (gy.abs() < AMBIGUOUS))) as u32;
            ins[i] = inside as u32;
            let a = if OBLIQUE { amp * ir * ir } else { amp * ir };
            let a = if TAPER { a * taper(gx, gy) } else { a };
            w[i] = if inside { a } else { 0.0 };
            let t = t - t.round_ties_even();
            let (s, co) = sincos_half(t);
            sn[i] = s;
            cs[i] = co;
        }
        if amb.iter().fold(0, |x, &y| x | y) != 0 {
            for i in 0..BLOCK {
                if amb[i] != 0 {
                    let inside = inside_f64(ri, e, c2, c + i);
                    ins[i] = inside as u32;
                    // The same f32 expression as the vector lanes, so the value is identical.
                    let dx = dxl[i] + u[i];
                    let r = dx.mul_add(dx, c2f).sqrt();
                    let rr = r + ral[i];
                    let ir = rr * (1.0 / (r * rr));
                    let a = if OBLIQUE { amp * ir * ir } else { amp * ir };
                    let a = if TAPER {
                        let gx = (dx * ir - rdx[i]).abs() - bx;
                        let gy = (dyf * ir - rdy[i]).abs() - by;
                        a * taper(gx, gy)
                    } else {
                        a
                    };
                    w[i] = if inside { a } else { 0.0 };
                }
            }
        }
        n += ins.iter().sum::<u32>() as u64;
        let (re, im) = (&mut re[c..c + BLOCK], &mut im[c..c + BLOCK]);
        for i in 0..BLOCK {
            re[i] = w[i].mul_add(cs[i], re[i]);
            im[i] = w[i].mul_add(sn[i], im[i]);
        }
        c += BLOCK;
    }
    n
}
