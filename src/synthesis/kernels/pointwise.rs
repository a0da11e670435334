//! Pointwise row steps of the iterative (Gerchberg-Saxton family) loop: the sums of a replay row,
//! the amplitude constraint, and the plate's unit phasors. Written without branches over fixed
//! lanes, so the AVX2 and AVX-512 copies vectorize them and every copy gives the same bits
//! (IEEE operations only; sums kept in [`SUM_LANES`] partial sums combined in a fixed order).

use num_complex::Complex;

/// Partial sums per row (lane l takes the pixels l, l + 8, ...), combined pairwise at the end.
pub const SUM_LANES: usize = 8;

/// Sums over one replay row: [sum |u|^2 over the row, sum |u|^2 over the area,
/// sum |u| a over the area, sum |u| / a over the lit area pixels (a > 0), count of those], the
/// area being the columns [a0, a1). Each pixel's |u|^2 is formed in f64 from the f32 parts.
#[inline(always)]
pub fn stats_row_generic(row: &[Complex<f32>], amp: &[f64], a0: usize, a1: usize) -> [f64; 5] {
    let n = row.len();
    let amp = &amp[..n];
    let mut sums = [[0f64; SUM_LANES]; 5];
    // Pixel c + l goes to lane l: whole groups of lanes through fixed-size views (so the copies
    // vectorize the step), then the tail in lanes 0, 1, ...
    let mut step = |r: &[Complex<f32>], a: &[f64], c: usize| {
        for l in 0..r.len() {
            let (re, im) = (r[l].re as f64, r[l].im as f64);
            let p = re * re + im * im;
            let i = c + l;
            let inside = if i >= a0 && i < a1 { 1.0 } else { 0.0 };
            // |u| and |u| / a in f32 (relative error 1e-7 per pixel; the sums stay f64): in f64
            // they were most of this loop's time.
            let mag32 = (p as f32).sqrt();
            let q = if a[l] > 0.0 {
                (mag32 / a[l] as f32) as f64
            } else {
                0.0
            };
            sums[0][l] += p;
            sums[1][l] += p * inside;
            sums[2][l] += mag32 as f64 * a[l] * inside;
            sums[3][l] += if inside > 0.0 { q } else { 0.0 };
            sums[4][l] += if a[l] > 0.0 { inside } else { 0.0 };
        }
    };
    let full = n / SUM_LANES * SUM_LANES;
    let mut c = 0;
    while c < full {
        let r: &[Complex<f32>; SUM_LANES] = row[c..c + SUM_LANES].try_into().unwrap();
        let a: &[f64; SUM_LANES] = amp[c..c + SUM_LANES].try_into().unwrap();
        step(r, a, c);
        c += SUM_LANES;
    }
    step(&row[full..], &amp[full..], full);
    sums.map(|v| {
        let q = [v[0] + v[4], v[1] + v[5], v[2] + v[6], v[3] + v[7]];
        (q[0] + q[2]) + (q[1] + q[3])
    })
}

/// The amplitude constraint on one row: columns [a0, a1) become `target(i) u / |u|` (phase 0
/// where u = 0) with target(i) = `scale` a_i w_i (`w` = 1 without weights); the others are
/// multiplied by `outside`.
#[inline(always)]
pub fn constrain_row_generic(
    row: &mut [Complex<f32>],
    amp: &[f64],
    weights: Option<&[f64]>,
    scale: f64,
    a0: usize,
    a1: usize,
    outside: f32,
) {
    let n = row.len();
    let (a0, a1) = (a0.min(n), a1.min(n).max(a0.min(n)));
    for u in &mut row[..a0] {
        *u *= outside;
    }
    for u in &mut row[a1..] {
        *u *= outside;
    }
    let (row, amp) = (&mut row[a0..a1], &amp[a0..a1]);
    match weights {
        Some(w) => constrain_area::<true>(row, amp, &w[a0..a1], scale),
        None => constrain_area::<false>(row, amp, amp, scale),
    }
}

#[inline(always)]
fn constrain_area<const WEIGHTED: bool>(
    row: &mut [Complex<f32>],
    amp: &[f64],
    w: &[f64],
    scale: f64,
) {
    let (amp, w) = (&amp[..row.len()], &w[..row.len()]);
    for i in 0..row.len() {
        let target = if WEIGHTED {
            scale * amp[i] * w[i]
        } else {
            scale * amp[i]
        };
        let (re, im) = (row[i].re as f64, row[i].im as f64);
        let m = (re * re + im * im).sqrt();
        let k = target / m;
        row[i] = if m > 0.0 {
            Complex::new((k * re) as f32, (k * im) as f32)
        } else {
            Complex::new(target as f32, 0.0)
        };
    }
}

/// The plate's phasors from the back-propagated field: h = u / |u| (1 where u = 0), in f64.
#[inline(always)]
pub fn unit_row_generic(h: &mut [Complex<f32>], u: &[Complex<f32>]) {
    let u = &u[..h.len()];
    for i in 0..h.len() {
        let (re, im) = (u[i].re as f64, u[i].im as f64);
        let m = (re * re + im * im).sqrt();
        h[i] = if m > 0.0 {
            Complex::new((re / m) as f32, (im / m) as f32)
        } else {
            Complex::new(1.0, 0.0)
        };
    }
}

/// `u = u / |u|` in place, element by element: the same formula and bits as
/// [`unit_row_generic`] with `h` and `u` the same row.
#[inline(always)]
pub fn unit_in_place_generic(u: &mut [Complex<f32>]) {
    for v in u.iter_mut() {
        let (re, im) = (v.re as f64, v.im as f64);
        let m = (re * re + im * im).sqrt();
        *v = if m > 0.0 {
            Complex::new((re / m) as f32, (im / m) as f32)
        } else {
            Complex::new(1.0, 0.0)
        };
    }
}

#[cfg(test)]
mod tests {
    use super::super::{available, constrain_row, stats_row, unit_in_place, unit_row};
    use num_complex::Complex;

    fn row(n: usize) -> (Vec<Complex<f32>>, Vec<f64>, Vec<f64>) {
        let mut s = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut u: Vec<Complex<f32>> = (0..n)
            .map(|_| Complex::new((next() * 4.0 - 2.0) as f32, (next() * 4.0 - 2.0) as f32))
            .collect();
        u[3] = Complex::new(0.0, 0.0); // a zero keeps phase 0
        let amp: Vec<f64> = (0..n)
            .map(|_| if next() < 0.3 { 0.0 } else { next() })
            .collect();
        let w: Vec<f64> = (0..n).map(|_| 0.5 + next()).collect();
        (u, amp, w)
    }

    /// The lane-wise sums against plain sequential f64 sums (the order of addition differs:
    /// relative 1e-13 on these 203 terms; |u| and |u| / a are taken in f32: relative 2e-7 for the
    /// two sums that use them), the same bits from every copy.
    #[test]
    fn stats_row_matches_plain_sums() {
        let (u, amp, _) = row(203);
        for (a0, a1) in [(0, 203), (17, 150), (0, 0), (200, 203)] {
            let mut plain = [0f64; 5];
            for i in 0..u.len() {
                let (re, im) = (u[i].re as f64, u[i].im as f64);
                let p = re * re + im * im;
                plain[0] += p;
                if i >= a0 && i < a1 {
                    plain[1] += p;
                    plain[2] += p.sqrt() * amp[i];
                    if amp[i] > 0.0 {
                        plain[3] += p.sqrt() / amp[i];
                        plain[4] += 1.0;
                    }
                }
            }
            let mut first = None;
            for isa in available() {
                let got = stats_row(isa, &u, &amp, a0, a1);
                for k in 0..5 {
                    let tol = if k == 2 || k == 3 { 2e-7 } else { 1e-13 };
                    assert!(
                        (got[k] - plain[k]).abs() <= tol * plain[k].abs().max(1.0),
                        "{isa:?} [{a0}, {a1}) sum {k}: {} vs {}",
                        got[k],
                        plain[k]
                    );
                }
                match first {
                    None => first = Some(got),
                    Some(f) => assert_eq!(f, got, "{isa:?}: copies differ in bits"),
                }
            }
        }
    }

    /// The constraint and the unit phasors against their formulas (Gerchberg and Saxton, Optik
    /// 35, 237, 1972: keep the phase, impose the amplitude): |u'| = target and arg u' = arg u to
    /// f32 rounding (2e-7 relative), outside the area u' = k u, a zero becomes (target, 0); the
    /// same bits from every copy.
    #[test]
    fn constraint_and_unit_phasors_match_formulas() {
        let (u, amp, w) = row(131);
        let (a0, a1, scale, outside) = (20, 100, 1.7, 0.25f32);
        type Pair = (Vec<Complex<f32>>, Vec<Complex<f32>>);
        let mut first: Option<Pair> = None;
        for isa in available() {
            for weighted in [false, true] {
                let mut c = u.clone();
                constrain_row(
                    isa,
                    &mut c,
                    &amp,
                    weighted.then_some(&w[..]),
                    scale,
                    a0,
                    a1,
                    outside,
                );
                for i in 0..u.len() {
                    if i < a0 || i >= a1 {
                        assert_eq!(c[i], u[i] * outside, "{isa:?} pixel {i} outside");
                        continue;
                    }
                    let target = scale * amp[i] * if weighted { w[i] } else { 1.0 };
                    let (cr, ci) = (c[i].re as f64, c[i].im as f64);
                    assert!(
                        ((cr * cr + ci * ci).sqrt() - target).abs() <= 2e-7 * target.max(1e-30)
                    );
                    if u[i].norm() == 0.0 {
                        assert_eq!(c[i], Complex::new(target as f32, 0.0));
                    } else if target > 0.0 {
                        let d = (c[i].arg() as f64 - u[i].arg() as f64).abs();
                        assert!(
                            d.min(std::f64::consts::TAU - d) <= 4e-7,
                            "{isa:?} pixel {i}"
                        );
                    }
                }
                if weighted {
                    let mut h = vec![Complex::new(9.0f32, 9.0); u.len()];
                    unit_row(isa, &mut h, &u);
                    for i in 0..u.len() {
                        let n = u[i].norm();
                        if n == 0.0 {
                            assert_eq!(h[i], Complex::new(1.0, 0.0));
                        } else {
                            assert!((h[i].norm() - 1.0).abs() <= 2e-7);
                            assert!((h[i] - u[i] / n).norm() <= 3e-7);
                        }
                    }
                    // The in-place copy gives the same bits as the two-buffer one.
                    let mut v = u.clone();
                    unit_in_place(isa, &mut v);
                    assert_eq!(v, h, "{isa:?}: in-place unit phasors differ");
                    match &first {
                        None => first = Some((c, h)),
                        Some((fc, fh)) => {
                            assert!(*fc == c && *fh == h, "{isa:?}: copies differ in bits")
                        }
                    }
                }
            }
        }
    }
}
