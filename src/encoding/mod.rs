//! Encodings: the fringe term F, pixel by pixel, to the samples a device renders
//! (physics.md, "Fringe term and encodings"). Every encoding is a function of F alone.
//!
//! * phase, N levels: phi = arg F in [0, 2 pi); g = round(N phi / 2 pi) mod N; stored with b = 8 bits
//!   for N <= 256, else 16; stored value s = round(g 2^b / N).
//! * binary-phase: 1 bit, s = 1 (phase pi) where Re F < 0.
//! * binary-amplitude: 1 bit, s = 1 (clear) where Re F >= 0.
//! * amplitude: bipolar intensity B = Re F, s = round((1 + B / B0) / 2 (2^b - 1)), clipped.
//!
//! Rows come out in file layout: 1-bit packed MSB first, each row padded to a whole byte;
//! 16-bit little-endian. This module depends on nothing but num-complex and `cpu` (which SIMD
//! copy of the level loop runs).

use num_complex::Complex64;

/// A modulator's grey-to-phase response, applied when writing N-level phase.
///
/// The response is the table's points joined by straight lines (every integer grey between two
/// tabulated ones gets the interpolated phase). It must be monotonic in grey (rising or falling);
/// reversals of up to [`Calibration::REVERSAL_TOLERANCE`] rad, as measurement noise gives, are
/// flattened. One branch is used: the greys from the lowest tabulated one whose phase, counted
/// from that grey's phase, lies in [0, 2 pi). Level g (phase 2 pi g / N, up to the constant
/// phase of the lowest grey, which no replay sees) is written as the grey of that branch whose
/// phase is nearest to it modulo 2 pi, ties (within 1e-9 rad) to the lower grey; so neighbouring levels get
/// neighbouring greys and the level -> grey map rises (or, for a falling response, is read
/// backwards) with one wrap at most. A stroke short of 2 pi sends the unreachable levels to the
/// nearer end of the branch.
#[derive(Clone, Debug, PartialEq)]
pub struct Calibration {
    /// Bits of the stored grey values: 8 when every grey used fits, else 16.
    pub bits: u8,
    /// The response as used: (grey, phase in radians) by rising grey, scaled when the table was
    /// measured at another wavelength.
    pub table: Vec<(u16, f64)>,
    /// Grey value written for each level g = 0..N.
    pub level_to_grey: Vec<u16>,
    /// Phase covered by the branch, radians (2 pi or less).
    pub stroke: f64,
    /// Phase step between the branch's last two greys, radians: the branch reaches round to
    /// 2 pi when `2 pi - stroke` is no more than this (the next grey would be 2 pi, zero again).
    pub top_step: f64,
    /// Where the response came from, in words (for the sidecar).
    pub source: String,
}

impl Calibration {
    /// Reversals of the response up to this (radians) are taken as measurement noise and
    /// flattened; larger ones refuse the table.
    pub const REVERSAL_TOLERANCE: f64 = 0.05;

    /// The branch stops short of 2 pi: the gap above its last grey is more than one of the
    /// `levels` levels and more than the panel's own last grey step (a panel that reaches
    /// 2 pi at grey G stops at G - 1, one step below: that is not short).
    pub fn short_of_two_pi(&self, levels: u32) -> bool {
        let step = 2.0 * std::f64::consts::PI / f64::from(levels.max(1));
        2.0 * std::f64::consts::PI - self.stroke > step.max(self.top_step) + 1e-6
    }

    /// Builds the level -> grey map for `levels` levels from a response table.
    ///
    /// # Errors
    /// A message when the table is empty, has one grey twice, or is not monotonic.
    pub fn new(
        table: Vec<(u16, f64)>,
        levels: u32,
        source: impl Into<String>,
    ) -> Result<Calibration, String> {
        let two_pi = 2.0 * std::f64::consts::PI;
        let mut table = table;
        table.sort_by_key(|&(g, _)| g);
        if table.is_empty() {
            return Err("the calibration table is empty".into());
        }
        if let Some(w) = table.windows(2).find(|w| w[0].0 == w[1].0) {
            return Err(format!("grey {} is given twice", w[0].0));
        }
        if table.iter().any(|&(_, p)| !p.is_finite()) {
            return Err("a phase is not a finite number".into());
        }
        if table.len() < 2 {
            return Err("the calibration table needs at least two greys".into());
        }
        // Direction of the response: the sign of its overall change.
        let (g0, p0) = table[0];
        let rise = table[table.len() - 1].1 - p0;
        if rise == 0.0 {
            return Err("the measured phase does not change with grey".into());
        }
        let sign = rise.signum();
        // u: phase counted from the lowest grey, in the direction of the response; flattened
        // where noise makes it step back a little.
        let mut knots: Vec<(u32, f64)> = Vec::with_capacity(table.len());
        let mut top = 0.0f64;
        for &(g, p) in &table {
            let u = sign * (p - p0);
            if u < top - Self::REVERSAL_TOLERANCE {
                return Err(format!(
                    "the response is not monotonic: the phase at grey {g} ({p:.4} rad) turns back by {:.3} rad; use one monotonic branch (smooth the measurement)",
                    top - u
                ));
            }
            top = top.max(u);
            knots.push((g as u32, top));
        }
        // Every integer grey of the branch with its interpolated phase.
        let mut u_of = Vec::new();
        'outer: for w in knots.windows(2) {
            let ((ga, ua), (gb, ub)) = (w[0], w[1]);
            for g in ga..gb {
                let u = ua + (ub - ua) * (g - ga) as f64 / (gb - ga) as f64;
                if u >= two_pi {
                    break 'outer;
                }
                u_of.push(u);
            }
        }
        let (gl, ul) = knots[knots.len() - 1];
        if ul < two_pi && u_of.len() == (gl - g0 as u32) as usize {
            u_of.push(ul);
        }
        let stroke = *u_of.last().expect("at least the lowest grey");
        let top_step = if u_of.len() >= 2 {
            stroke - u_of[u_of.len() - 2]
        } else {
            0.0
        };
        let level_to_grey: Vec<u16> = (0..levels)
            .map(|l| {
                let theta = two_pi * l as f64 / levels as f64;
                // The level's phase in the response's direction, in [0, 2 pi).
                let want = if sign > 0.0 || l == 0 {
                    theta
                } else {
                    two_pi - theta
                };
                let dist = |u: f64| {
                    let d = (u - want).abs();
                    d.min(two_pi - d)
                };
                // u_of rises: the nearest is next to the first grey at or above `want`, or the
                // lowest grey (whose phase is want - 2 pi away the other way round).
                const TIE: f64 = 1e-9;
                let k = u_of.partition_point(|&u| u < want);
                let mut best = (dist(u_of[0]), 0usize);
                for c in [k.saturating_sub(1), k.min(u_of.len() - 1)] {
                    let d = dist(u_of[c]);
                    // Distances within TIE rad are ties (a linear panel's half-way levels
                    // differ only by rounding), won by the lower grey.
                    if d < best.0 - TIE || (d <= best.0 + TIE && c < best.1) {
                        best = (d, c);
                    }
                }
                (g0 as usize + best.1) as u16
            })
            .collect();
        let bits = if levels > 256 || level_to_grey.iter().any(|&g| g > 255) {
            16
        } else {
            8
        };
        Ok(Calibration {
            bits,
            table,
            level_to_grey,
            stroke,
            top_step,
            source: source.into(),
        })
    }

    /// A linear response reaching 2 pi at grey `two_pi_grey` (phase 2 pi s / two_pi_grey): level
    /// g is written as round(g two_pi_grey / N), halves down.
    ///
    /// # Errors
    /// When `two_pi_grey` is below 2.
    pub fn linear(
        two_pi_grey: u16,
        levels: u32,
        source: impl Into<String>,
    ) -> Result<Calibration, String> {
        if two_pi_grey < 2 {
            return Err(format!("two_pi_grey = {two_pi_grey} must be at least 2"));
        }
        Calibration::new(
            vec![(0, 0.0), (two_pi_grey, 2.0 * std::f64::consts::PI)],
            levels,
            source,
        )
    }

    /// Measured phase of a grey value: the response interpolated between tabulated greys, held
    /// at the ends.
    pub fn phase_of(&self, grey: u16) -> f64 {
        let t = &self.table;
        let k = t.partition_point(|&(g, _)| g < grey);
        if k == 0 {
            return t[0].1;
        }
        if k == t.len() {
            return t[t.len() - 1].1;
        }
        let ((ga, pa), (gb, pb)) = (t[k - 1], t[k]);
        pa + (pb - pa) * (grey - ga) as f64 / (gb - ga) as f64
    }
}

/// A hologram encoding with its parameters resolved.
#[derive(Clone, Debug, PartialEq)]
pub enum Encoding {
    /// N-level phase (kinoform), 2 <= levels <= 65536.
    Phase {
        /// N.
        levels: u32,
    },
    /// N-level phase written through a modulator's calibration table.
    CalibratedPhase {
        /// N.
        levels: u32,
        /// The measured response.
        calibration: std::sync::Arc<Calibration>,
    },
    /// Two phase levels, 0 and pi.
    BinaryPhase,
    /// Clear / opaque.
    BinaryAmplitude,
    /// Grey-level bipolar intensity.
    Amplitude {
        /// 8 or 16.
        bits: u8,
        /// B0: Re F = B0 maps to white, -B0 to black.
        scale: f64,
    },
}

impl Encoding {
    /// The job-file spelling of the kind.
    pub fn kind_name(&self) -> &'static str {
        match self {
            Encoding::Phase { .. } | Encoding::CalibratedPhase { .. } => "phase",
            Encoding::BinaryPhase => "binary-phase",
            Encoding::BinaryAmplitude => "binary-amplitude",
            Encoding::Amplitude { .. } => "amplitude",
        }
    }

    /// Bits per stored sample: 1, 8 or 16.
    pub fn bits_per_sample(&self) -> u8 {
        match *self {
            Encoding::Phase { levels } => phase_bits(levels),
            Encoding::CalibratedPhase {
                ref calibration, ..
            } => calibration.bits,
            Encoding::BinaryPhase | Encoding::BinaryAmplitude => 1,
            Encoding::Amplitude { bits, .. } => bits,
        }
    }

    /// Bytes of one encoded row of `width` pixels.
    pub fn row_bytes(&self, width: usize) -> usize {
        match self.bits_per_sample() {
            1 => width.div_ceil(8),
            8 => width,
            _ => 2 * width,
        }
    }

    /// The stored sample value of one pixel (before packing).
    #[inline]
    pub fn sample(&self, f: Complex64) -> u16 {
        match *self {
            Encoding::Phase { levels } => phase_sample(f, levels),
            Encoding::CalibratedPhase {
                levels,
                ref calibration,
            } => calibration.level_to_grey[phase_level(f, levels) as usize],
            Encoding::BinaryPhase => (f.re < 0.0) as u16,
            Encoding::BinaryAmplitude => (f.re >= 0.0) as u16,
            Encoding::Amplitude { bits, scale } => amplitude_sample(f.re, scale, bits),
        }
    }

    /// Encodes one row of F into `out` (exactly `row_bytes(f.len())` bytes).
    ///
    /// # Panics
    /// If `out` has the wrong length (a bug in the caller).
    pub fn encode_row(&self, f: &[Complex64], out: &mut [u8]) {
        assert_eq!(out.len(), self.row_bytes(f.len()), "encoded row length");
        // The copies differ only in the vector width; each stored sample is exact (phase levels
        // near an edge go through the formula itself), so all give the same bytes.
        #[cfg(target_arch = "x86_64")]
        if crate::cpu::avx512() {
            // SAFETY: AVX-512 F, VL, DQ, AVX2 and FMA were reported by the CPU
            // (`cpu::avx512`); the body is safe code.
            return unsafe { self.encode_row_avx512(f, out) };
        }
        #[cfg(target_arch = "x86_64")]
        if crate::cpu::avx2_fma() {
            // SAFETY: AVX2 and FMA were reported by the CPU (`cpu::avx2_fma`); the body is
            // safe code.
            return unsafe { self.encode_row_avx2(f, out) };
        }
        self.encode_row_generic(f, out)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn encode_row_avx2(&self, f: &[Complex64], out: &mut [u8]) {
        self.encode_row_generic(f, out)
    }

    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma,avx512f,avx512vl,avx512dq")]
    unsafe fn encode_row_avx512(&self, f: &[Complex64], out: &mut [u8]) {
        self.encode_row_generic(f, out)
    }

    #[inline(always)]
    fn encode_row_generic(&self, f: &[Complex64], out: &mut [u8]) {
        // One loop per encoding, so the per-pixel test is inlined (a point-sum run's
        // encoding stays a small fraction of its time).
        match *self {
            Encoding::BinaryAmplitude => pack_bits(f, out, |v| v.re >= 0.0),
            Encoding::BinaryPhase => pack_bits(f, out, |v| v.re < 0.0),
            Encoding::Phase { levels } => {
                let mut g = [0u32; LEVEL_CHUNK];
                if levels <= 256 {
                    let mut stored = [0u8; 256];
                    for (l, s) in stored.iter_mut().enumerate().take(levels as usize) {
                        *s = phase_stored(l as u32, levels) as u8;
                    }
                    for (fc, oc) in f.chunks(LEVEL_CHUNK).zip(out.chunks_mut(LEVEL_CHUNK)) {
                        let g = &mut g[..fc.len()];
                        phase_levels_generic(fc, levels, g);
                        for (o, &l) in oc.iter_mut().zip(g.iter()) {
                            *o = stored[l as usize & 255];
                        }
                    }
                } else {
                    for (fc, oc) in f.chunks(LEVEL_CHUNK).zip(out.chunks_mut(2 * LEVEL_CHUNK)) {
                        let g = &mut g[..fc.len()];
                        phase_levels_generic(fc, levels, g);
                        for (o, &l) in oc.chunks_exact_mut(2).zip(g.iter()) {
                            o.copy_from_slice(&(phase_stored_f64(l, levels) as u16).to_le_bytes());
                        }
                    }
                }
            }
            Encoding::CalibratedPhase {
                levels,
                ref calibration,
            } => {
                let mut g = [0u32; LEVEL_CHUNK];
                let grey = &calibration.level_to_grey;
                let wide = calibration.bits > 8;
                for (k, fc) in f.chunks(LEVEL_CHUNK).enumerate() {
                    let g = &mut g[..fc.len()];
                    phase_levels_generic(fc, levels, g);
                    for (i, &l) in g.iter().enumerate() {
                        let s = grey[l as usize];
                        let p = k * LEVEL_CHUNK + i;
                        if wide {
                            out[2 * p..2 * p + 2].copy_from_slice(&s.to_le_bytes());
                        } else {
                            out[p] = s as u8;
                        }
                    }
                }
            }
            Encoding::Amplitude { bits: 8, scale } => {
                for (o, &v) in out.iter_mut().zip(f) {
                    *o = amplitude_sample(v.re, scale, 8) as u8;
                }
            }
            Encoding::Amplitude { bits: 16, scale } => {
                for (o, &v) in out.chunks_exact_mut(2).zip(f) {
                    o.copy_from_slice(&amplitude_sample(v.re, scale, 16).to_le_bytes());
                }
            }
            _ => match self.bits_per_sample() {
                1 => pack_bits(f, out, |v| self.sample(v) != 0),
                8 => {
                    for (o, &v) in out.iter_mut().zip(f) {
                        *o = self.sample(v) as u8;
                    }
                }
                _ => {
                    for (o, &v) in out.chunks_exact_mut(2).zip(f) {
                        o.copy_from_slice(&self.sample(v).to_le_bytes());
                    }
                }
            },
        }
    }

    /// Phase in radians that a stored sample `s` stands for (phase encodings), or the transmittance
    /// (amplitude encodings): what a replay rebuilds from the file.
    pub fn transmittance(&self, s: u16) -> Complex64 {
        match *self {
            Encoding::CalibratedPhase {
                ref calibration, ..
            } => Complex64::from_polar(1.0, calibration.phase_of(s)),
            Encoding::Phase { levels } => {
                let b = phase_bits(levels);
                Complex64::from_polar(
                    1.0,
                    2.0 * std::f64::consts::PI * s as f64 / (1u32 << b) as f64,
                )
            }
            Encoding::BinaryPhase => Complex64::new(if s != 0 { -1.0 } else { 1.0 }, 0.0),
            Encoding::BinaryAmplitude => Complex64::new(if s != 0 { 1.0 } else { 0.0 }, 0.0),
            Encoding::Amplitude { bits, .. } => {
                Complex64::new(s as f64 / ((1u32 << bits) - 1) as f64, 0.0)
            }
        }
    }
}

/// Packs one bit per pixel, most significant bit first (TIFF FillOrder 1), set where `bit` holds.
#[inline(always)]
fn pack_bits(f: &[Complex64], out: &mut [u8], bit: impl Fn(Complex64) -> bool) {
    for (o, px) in out.iter_mut().zip(f.chunks(8)) {
        let mut b = 0u8;
        for (i, &v) in px.iter().enumerate() {
            b |= (bit(v) as u8) << (7 - i);
        }
        *o = b;
    }
}

/// Phase level g = round(N phi / 2 pi) mod N of phi = arg F in [0, 2 pi).
#[inline]
pub fn phase_level(f: Complex64, levels: u32) -> u32 {
    let mut phi = f.im.atan2(f.re);
    if phi < 0.0 {
        phi += 2.0 * std::f64::consts::PI;
    }
    let g = (levels as f64 * phi / (2.0 * std::f64::consts::PI)).round() as u64;
    (g % levels as u64) as u32
}

/// Pixels per call of [`phase_levels_row`] inside `encode_row` (stack buffers, in cache).
const LEVEL_CHUNK: usize = 256;

/// `atan(a) = a P(a^2)` on [0, 1]: a degree-8 least-squares fit of `atan(a) / a` in `a^2`
/// (Chebyshev basis on [0, 1], converted to monomials); its largest error, sampled densely
/// against `f64::atan`, is 4.7e-8 rad (unit test `fast_atan_stays_inside_its_bound`).
const ATAN_P: [f64; 9] = [
    0.999999988082807,
    -0.33333120781001524,
    0.19993716142620946,
    -0.14213196196366384,
    0.10681421030789783,
    -0.07596809863136392,
    0.043855599012925905,
    -0.016827448506070118,
    0.0030499680647242014,
];

/// The bound [`phase_levels_row`] assumes for the polynomial arctangent, radians (twice the
/// measured error).
pub const ATAN_BOUND: f64 = 1e-7;

/// `arg F` in levels, `N atan2(im, re) / 2 pi` brought to [0, N), by the polynomial
/// arctangent: within `N ATAN_BOUND / 2 pi` (plus rounding, about 1e-13 N) of the exact value
/// for finite F (zero F, of either sign in each part, as `atan2` gives it).
#[inline(always)]
fn approx_level(v: Complex64, n: f64) -> f64 {
    use std::f64::consts::{FRAC_PI_2, PI};
    let (x, y) = (v.re, v.im);
    let (ax, ay) = (x.abs(), y.abs());
    // Plain selects (not max / min, whose NaN rules do not vectorize as well); a NaN operand
    // is caught below.
    let (mx, mn) = if ay > ax { (ay, ax) } else { (ax, ay) };
    // Zero F (a plate area no emitter reaches) takes atan2's value for signed zeros below: 0,
    // or pi where re is -0. Sending it to the exact path instead cost 2.5x on sparse plates.
    let a = if mx == 0.0 { 0.0 } else { mn / mx };
    let s = a * a;
    // Fused where the CPU has FMA (the copies with `fma` enabled), emulated elsewhere: either
    // way inside the bound, which the unit test checks on the copy this CPU runs.
    let mut q = ATAN_P[8];
    for &c in ATAN_P[..8].iter().rev() {
        q = q.mul_add(s, c);
    }
    let mut p = a * q;
    p = if ay > ax { FRAC_PI_2 - p } else { p };
    // Signs as atan2 reads them, -0 included (the same as `< 0` for non-zero values).
    p = if x.is_sign_negative() { PI - p } else { p };
    p = if y.is_sign_negative() { -p } else { p };
    let t = p * (n / (2.0 * PI));
    let t = if t < 0.0 { t + n } else { t };
    // Non-finite F gives NaN (sent to the exact path).
    if x.is_finite() && y.is_finite() {
        t
    } else {
        f64::NAN
    }
}

/// Phase levels `g = round(N arg F / 2 pi) mod N` of a row, the same as [`phase_level`] pixel
/// for pixel: a polynomial arctangent decides every pixel whose level lies farther than the
/// polynomial's bound from a rounding edge (all but about `2 N ATAN_BOUND / 2 pi` of them);
/// the rest, and non-finite F, go through [`phase_level`] itself.
///
/// # Panics
/// If `out` is shorter than `f`.
pub fn phase_levels_row(f: &[Complex64], levels: u32, out: &mut [u32]) {
    let out = &mut out[..f.len()];
    #[cfg(target_arch = "x86_64")]
    if crate::cpu::avx2_fma() {
        // SAFETY: AVX2 and FMA were reported by the CPU (`cpu::avx2_fma`); the body is safe
        // code. Rust does not fuse `a * b + c`, so both copies round alike; and the result is
        // exact either way (edges go through `phase_level`).
        return unsafe { phase_levels_avx2(f, levels, out) };
    }
    phase_levels_generic(f, levels, out)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn phase_levels_avx2(f: &[Complex64], levels: u32, out: &mut [u32]) {
    phase_levels_generic(f, levels, out)
}

#[inline(always)]
fn phase_levels_generic(f: &[Complex64], levels: u32, out: &mut [u32]) {
    let n = levels as f64;
    // Rounding edges at frac = 1/2 only (round half up for positive values); the slack covers
    // the polynomial, the f64 steps here and in phase_level.
    let delta = n * (ATAN_BOUND / (2.0 * std::f64::consts::PI)) + 1e-9 * n.max(1.0);
    // Adding 1.5 2^52 rounds t in [0, 2^31) to the nearest integer, which then sits in the low
    // 32 bits of the sum's bit pattern (no float-to-int conversion, so the loop vectorizes).
    const MAGIC: f64 = 6_755_399_441_055_744.0;
    let unsure_at = |t: f64| {
        let d = t - ((t + MAGIC) - MAGIC);
        // |d| is 1/2 at an edge; NaN (zero or non-finite F) fails the comparison.
        !((d.abs() - 0.5).abs() > delta)
    };
    let mut flags = [false; LEVEL_CHUNK];
    for (fc, oc) in f.chunks(LEVEL_CHUNK).zip(out.chunks_mut(LEVEL_CHUNK)) {
        let flags = &mut flags[..fc.len()];
        let mut unsure = false;
        for ((o, &v), u) in oc.iter_mut().zip(fc).zip(flags.iter_mut()) {
            let t = approx_level(v, n);
            let g = (t + MAGIC).to_bits() as u32;
            *o = if g == levels { 0 } else { g };
            *u = unsure_at(t);
            unsure |= *u;
        }
        if unsure {
            for ((o, &v), &u) in oc.iter_mut().zip(fc).zip(flags.iter()) {
                if u {
                    *o = phase_level(v, levels);
                }
            }
        }
    }
}

/// [`phase_stored`] in f64 arithmetic that vectorizes: `floor((2 g 2^b + N) / 2N)`. Exact: the
/// numerator and denominator are integers below 2^35, so a non-integer quotient lies at least
/// 1 / 2N from an integer, far more than the division's rounding.
#[inline(always)]
fn phase_stored_f64(g: u32, levels: u32) -> u32 {
    let b = phase_bits(levels) as u32;
    let num = (2 * ((g as u64) << b) + levels as u64) as f64;
    (num / (2 * levels as u64) as f64) as u32
}

/// Bits b of a stored sample of N phase levels: 8 for N <= 256, else 16 (physics.md).
#[inline]
pub fn phase_bits(levels: u32) -> u8 {
    if levels <= 256 {
        8
    } else {
        16
    }
}

/// Stored value s = round(g 2^b / N) in exact integer arithmetic (no ties can occur for N <= 2^b).
#[inline]
pub fn phase_stored(g: u32, levels: u32) -> u16 {
    let b = phase_bits(levels) as u64;
    let num = (g as u64) << b;
    ((2 * num + levels as u64) / (2 * levels as u64)) as u16
}

#[inline]
fn phase_sample(f: Complex64, levels: u32) -> u16 {
    phase_stored(phase_level(f, levels), levels)
}

/// s = round((1 + B / B0) / 2 (2^b - 1)), clipped to [0, 2^b - 1].
#[inline]
pub fn amplitude_sample(b: f64, b0: f64, bits: u8) -> u16 {
    let max = ((1u32 << bits) - 1) as f64;
    ((1.0 + b / b0) / 2.0 * max).round().clamp(0.0, max) as u16
}

#[cfg(test)]
mod unit_tests;
