//! The slow, obviously correct reference: F at one pixel as a plain f64 sum over every emitter,
//! written straight from the formulas in physics.md with no precomputation, no spans, no reduction
//! of the phase. Meant for tiny grids in tests; every fast path is compared with it.

use num_complex::Complex64;

use super::{Approximation, Emitter, PointSumOptions};
use crate::optics::{Plate, Reference};

/// F = O conj(R) at pixel (row, col).
pub fn fringe_at(
    plate: &Plate,
    reference: &Reference,
    emitters: &[Emitter],
    opts: &PointSumOptions,
    row: u32,
    col: u32,
) -> Complex64 {
    let lambda = plate.wavelength;
    let k = 2.0 * std::f64::consts::PI / lambda;
    let x = (col as f64 - (plate.width as f64 - 1.0) / 2.0) * plate.pitch[0];
    let y = ((plate.height as f64 - 1.0) / 2.0 - row as f64) * plate.pitch[1];
    // Reference phase and its local frequency.
    let (psi_r, fr) = match *reference {
        Reference::Plane { tilt } => (
            k * (x * tilt[0].sin() + y * tilt[1].sin()),
            [tilt[0].sin() / lambda, tilt[1].sin() / lambda],
        ),
        Reference::Spherical { position: p } => {
            let rr = ((x - p[0]).powi(2) + (y - p[1]).powi(2) + p[2].powi(2)).sqrt();
            (
                k * rr,
                [(x - p[0]) / (lambda * rr), (y - p[1]) / (lambda * rr)],
            )
        }
    };
    let mut o = Complex64::new(0.0, 0.0);
    for e in emitters {
        let [xj, yj, zj] = e.pos;
        let r = ((x - xj).powi(2) + (y - yj).powi(2) + zj * zj).sqrt();
        let (phase, amp, f) = match opts.approximation {
            Approximation::Exact => {
                let ob = if opts.obliquity { zj / r } else { 1.0 };
                (
                    k * r + e.phase,
                    e.amplitude * ob / r,
                    [(x - xj) / (lambda * r), (y - yj) / (lambda * r)],
                )
            }
            Approximation::Fresnel => (
                k * (zj + ((x - xj).powi(2) + (y - yj).powi(2)) / (2.0 * zj)) + e.phase,
                e.amplitude / zj,
                [(x - xj) / (lambda * zj), (y - yj) / (lambda * zj)],
            ),
        };
        let fx = f[0] - fr[0];
        let fy = f[1] - fr[1];
        if opts.anti_alias
            && (fx.abs() > 1.0 / (2.0 * plate.pitch[0]) || fy.abs() > 1.0 / (2.0 * plate.pitch[1]))
        {
            continue;
        }
        o += Complex64::from_polar(amp, phase);
    }
    o * Complex64::from_polar(1.0, -psi_r)
}
