//! Zernike circle polynomials with Noll's normalisation (Noll, "Zernike polynomials and
//! atmospheric turbulence", JOSA 66, 207, 1976), and the aberration correction a modulator adds to
//! every pattern: Zernike terms over a pupil and an optional measured phase map.
//!
//! Z_n^m(rho, theta) = N_n^m R_n^|m|(rho) * (cos(m theta) for m > 0, sin(|m| theta) for m < 0,
//! 1 for m = 0), with N_n^m = sqrt(2 (n + 1)) for m != 0 and sqrt(n + 1) for m = 0, so that
//! (1 / pi) * integral over the unit disc of Z_j Z_k = delta_jk: a coefficient c (in waves) is the
//! term's rms over the pupil. R_n^m(rho) = sum_{s=0}^{(n-m)/2} (-1)^s (n - s)! /
//! (s! ((n + m)/2 - s)! ((n - m)/2 - s)!) rho^(n - 2 s) (Noll eq. 2 to 4; Born and Wolf,
//! Principles of Optics, sec. 9.2). theta is measured from plate +x towards plate +y.

use crate::error::{Error, Result};

/// The radial polynomial R_n^m(rho), m >= 0, n - m even.
pub fn radial(n: u32, m: u32, rho: f64) -> f64 {
    debug_assert!(m <= n && (n - m).is_multiple_of(2));
    let mut sum = 0.0;
    for s in 0..=(n - m) / 2 {
        let c = fact(n - s) / (fact(s) * fact((n + m) / 2 - s) * fact((n - m) / 2 - s));
        let term = c * rho.powi((n - 2 * s) as i32);
        sum += if s % 2 == 0 { term } else { -term };
    }
    sum
}

fn fact(k: u32) -> f64 {
    (1..=k).map(f64::from).product()
}

/// Z_n^m at polar (rho, theta) on the unit disc, Noll-normalised.
pub fn zernike(n: u32, m: i32, rho: f64, theta: f64) -> f64 {
    let am = m.unsigned_abs();
    let r = radial(n, am, rho);
    if m == 0 {
        f64::from(n + 1).sqrt() * r
    } else if m > 0 {
        (2.0 * f64::from(n + 1)).sqrt() * r * (f64::from(am) * theta).cos()
    } else {
        (2.0 * f64::from(n + 1)).sqrt() * r * (f64::from(am) * theta).sin()
    }
}

/// Noll's single index j (1-based) of (n, m): j grows with n, then with |m|; within a pair
/// +-|m|, the cosine term (m > 0) has the even j (Noll, JOSA 66, 207, Table 1).
pub fn noll_index(n: u32, m: i32) -> u32 {
    let am = m.unsigned_abs();
    let first = n * (n + 1) / 2 + 1; // first j of row n
                                     // Within the row, |m| runs from n mod 2 upwards in steps of 2, two j per |m| > 0.
    let mut j = first;
    let mut k = n % 2;
    while k < am {
        j += if k == 0 { 1 } else { 2 };
        k += 2;
    }
    if am == 0 {
        return j;
    }
    // The pair (j, j + 1): even j gets the cosine (m > 0).
    let even_first = j.is_multiple_of(2);
    match (m > 0, even_first) {
        (true, true) | (false, false) => j,
        _ => j + 1,
    }
}

/// A correction term: Z_n^m with coefficient `waves` (rms waves over the pupil).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ZernikeTerm {
    /// Radial order n.
    pub n: u32,
    /// Azimuthal order m (|m| <= n, n - |m| even).
    pub m: i32,
    /// Coefficient, waves rms.
    pub waves: f64,
}

impl ZernikeTerm {
    /// Checks (n, m) and the coefficient; `what` names the term in the message.
    pub fn new(n: u32, m: i32, waves: f64, what: &str) -> std::result::Result<Self, String> {
        let am = m.unsigned_abs();
        if n > 30 {
            return Err(format!("{what}: n = {n} is above 30"));
        }
        if am > n || !(n - am).is_multiple_of(2) {
            return Err(format!(
                "{what}: (n, m) = ({n}, {m}) is not a Zernike term (|m| <= n and n - |m| even)"
            ));
        }
        if !waves.is_finite() || waves.abs() > 1e4 {
            return Err(format!(
                "{what}: coefficient {waves} waves is not a finite number within 1e4"
            ));
        }
        Ok(ZernikeTerm { n, m, waves })
    }
}

/// The correction added to every modulator pattern: Zernike terms over a circular pupil, plus an
/// optional measured phase map of the panel's size (radians), both modulo 2 pi.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Correction {
    /// Zernike terms.
    pub terms: Vec<ZernikeTerm>,
    /// Pupil radius, metres.
    pub pupil_radius: f64,
    /// Pupil centre on the plate, metres [x, y].
    pub pupil_centre: [f64; 2],
    /// Measured map, radians, row-major, plate-sized (width, height, values).
    pub map: Option<(usize, usize, Vec<f32>)>,
}

impl Correction {
    /// Whether it adds anything.
    pub fn is_empty(&self) -> bool {
        self.terms.is_empty() && self.map.is_none()
    }

    /// The Zernike part at plate point (x, y), radians: 2 pi sum c Z inside the pupil, 0 outside
    /// (outside the pupil the optics pass no light the correction is for).
    pub fn zernike_phase(&self, x: f64, y: f64) -> f64 {
        if self.terms.is_empty() || self.pupil_radius <= 0.0 {
            return 0.0;
        }
        let (dx, dy) = (x - self.pupil_centre[0], y - self.pupil_centre[1]);
        let rho = (dx * dx + dy * dy).sqrt() / self.pupil_radius;
        if rho > 1.0 {
            return 0.0;
        }
        let theta = dy.atan2(dx);
        std::f64::consts::TAU
            * self
                .terms
                .iter()
                .map(|t| t.waves * zernike(t.n, t.m, rho, theta))
                .sum::<f64>()
    }

    /// The whole correction at pixel (row, col) with plate coordinates (x, y), radians.
    pub fn phase(&self, row: usize, col: usize, x: f64, y: f64) -> f64 {
        let map = self
            .map
            .as_ref()
            .map_or(0.0, |(w, _, v)| f64::from(v[row * w + col]));
        self.zernike_phase(x, y) + map
    }

    /// Refuses a map whose size is not the plate's.
    pub fn check_map_size(&self, path: &std::path::Path, width: u32, height: u32) -> Result<()> {
        if let Some((w, h, _)) = &self.map {
            if (*w, *h) != (width as usize, height as usize) {
                return Err(Error::input(
                    path,
                    format!(
                        "the correction map is {w} x {h} px; the panel is {width} x {height} px"
                    ),
                ));
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    /// Closed forms (Noll 1976, Table 1; Born and Wolf sec. 9.2) against the general sum.
    #[test]
    fn polynomials_match_their_closed_forms() {
        type Closed = fn(f64, f64) -> f64;
        let cases: [(u32, i32, Closed); 10] = [
            (0, 0, |_, _| 1.0),
            (1, 1, |r, t| 2.0 * r * t.cos()),
            (1, -1, |r, t| 2.0 * r * t.sin()),
            (2, 0, |r, _| 3f64.sqrt() * (2.0 * r * r - 1.0)),
            (2, 2, |r, t| 6f64.sqrt() * r * r * (2.0 * t).cos()),
            (2, -2, |r, t| 6f64.sqrt() * r * r * (2.0 * t).sin()),
            (3, 1, |r, t| {
                8f64.sqrt() * (3.0 * r.powi(3) - 2.0 * r) * t.cos()
            }),
            (3, -3, |r, t| 8f64.sqrt() * r.powi(3) * (3.0 * t).sin()),
            (4, 0, |r, _| {
                5f64.sqrt() * (6.0 * r.powi(4) - 6.0 * r * r + 1.0)
            }),
            (4, 2, |r, t| {
                10f64.sqrt() * (4.0 * r.powi(4) - 3.0 * r * r) * (2.0 * t).cos()
            }),
        ];
        for (n, m, f) in cases {
            for k in 0..50 {
                let (r, t) = (k as f64 / 49.0, k as f64 * 0.77);
                let (got, want) = (zernike(n, m, r, t), f(r, t));
                assert!(
                    (got - want).abs() < 1e-12,
                    "Z({n},{m}) at {r},{t}: {got} vs {want}"
                );
            }
        }
    }

    /// Gauss-Legendre nodes and weights on [0, 1] (Newton on P_n; Abramowitz and Stegun 25.4.29).
    fn gauss_legendre(n: usize) -> Vec<(f64, f64)> {
        (0..n)
            .map(|i| {
                let mut x = (PI * (i as f64 + 0.75) / (n as f64 + 0.5)).cos();
                let mut dp = 0.0;
                for _ in 0..100 {
                    let (mut p0, mut p1) = (1.0, x);
                    for k in 2..=n {
                        let p2 = ((2 * k - 1) as f64 * x * p1 - (k - 1) as f64 * p0) / k as f64;
                        p0 = p1;
                        p1 = p2;
                    }
                    dp = n as f64 * (x * p1 - p0) / (x * x - 1.0);
                    let dx = p1 / dp;
                    x -= dx;
                    if dx.abs() < 1e-15 {
                        break;
                    }
                }
                let w = 2.0 / ((1.0 - x * x) * dp * dp);
                ((x + 1.0) / 2.0, w / 2.0)
            })
            .collect()
    }

    /// (1/pi) integral over the unit disc of Z_j Z_k = delta_jk for every term up to n = 6
    /// (Noll 1976, eq. 5): Gauss-Legendre in rho (exact for the degree-13 integrands) and the
    /// trapezoid rule in theta (exact for trigonometric degree below 64).
    #[test]
    fn noll_polynomials_are_orthonormal_on_the_unit_disc() {
        let mut terms = Vec::new();
        for n in 0..=6u32 {
            for m in (-(n as i32)..=n as i32).filter(|m| (n as i32 - m.abs()) % 2 == 0) {
                terms.push((n, m));
            }
        }
        assert_eq!(terms.len(), 28);
        let rs = gauss_legendre(12);
        let nt = 64;
        for (a, &(n1, m1)) in terms.iter().enumerate() {
            for &(n2, m2) in &terms[a..] {
                let mut s = 0.0;
                for &(r, wr) in &rs {
                    for j in 0..nt {
                        let t = 2.0 * PI * j as f64 / nt as f64;
                        s += wr * zernike(n1, m1, r, t) * zernike(n2, m2, r, t) * r;
                    }
                }
                let v = s * (2.0 * PI / nt as f64) / PI;
                let want = if (n1, m1) == (n2, m2) { 1.0 } else { 0.0 };
                assert!(
                    (v - want).abs() < 1e-12,
                    "<Z({n1},{m1}), Z({n2},{m2})> = {v}"
                );
            }
        }
    }

    /// Noll's numbering, Table 1 of the paper (from memory for j > 11: Z11 = spherical (4, 0)).
    #[test]
    fn noll_indices() {
        let table = [
            (1, 0, 0),
            (2, 1, 1),
            (3, 1, -1),
            (4, 2, 0),
            (5, 2, -2),
            (6, 2, 2),
            (7, 3, -1),
            (8, 3, 1),
            (9, 3, -3),
            (10, 3, 3),
            (11, 4, 0),
            (12, 4, 2),
            (13, 4, -2),
            (14, 4, 4),
            (15, 4, -4),
        ];
        for (j, n, m) in table {
            assert_eq!(noll_index(n, m), j, "({n}, {m})");
        }
    }

    #[test]
    fn bad_terms_are_refused() {
        assert!(ZernikeTerm::new(3, 2, 0.1, "t").is_err());
        assert!(ZernikeTerm::new(2, 4, 0.1, "t").is_err());
        assert!(ZernikeTerm::new(2, 0, f64::NAN, "t").is_err());
        assert!(ZernikeTerm::new(2, 0, 0.1, "t").is_ok());
    }
}
