//! Single-FFT Fresnel propagation (impulse-response form), for distances beyond the critical
//! distance `N p^2 / lambda`.
//!
//! This file owns [`SingleFftFresnel`]. It depends on the centred DFT of [`super::fourier`] and the
//! shared types of [`super`] only; nothing here may depend on jobs, scenes, encodings or output.
//!
//! # What is computed
//! The Fresnel diffraction integral (Goodman, Introduction to Fourier Optics, sec. 4.2),
//!
//! `U2(u, v) = exp(i k z) / (i lambda z) * exp(i k (u^2 + v^2) / (2 z))
//!            * integral U1(x, y) exp(i k (x^2 + y^2) / (2 z)) exp(-i 2 pi (x u + y v) / (lambda z)) dx dy`,
//!
//! evaluated with one 2-D FFT from the plate's pixel-centre grid to the replay lattice (optical axis
//! on sample `floor(N/2)`, physics.md "Replay lattices"), or back from a replay lattice to pixel
//! centres: output pitch `lambda |z| / (N p)` per axis. All
//! factors are kept (the constant `exp(i k z) / (i lambda z)` and both quadratic phases), so the output
//! has the correct absolute phase, and the sample area `px py` makes the discrete transform
//! power-conserving: `sum |U2|^2 du dv = sum |U1|^2 dx dy`.
//!
//! A negative `z` back-propagates (the `+i` kernel); propagating by `z` and then by `-z` returns the
//! input to rounding, because the two discrete operators are exact inverses.
//!
//! Sampling: the input chirp is sampled without aliasing when `|z| >= N p^2 / lambda` (Voelz and
//! Roggemann, Applied Optics 48, 6132, 2009); the planner uses this propagator only there.

use std::sync::Arc;

use super::FieldFloat;
use num_complex::Complex;
use rustfft::FftNum;

use super::fourier::CentredDft;
use super::{cis_cycles, Grid, LineHook, Propagator};
use crate::optics::fft2d::Fft2d;

/// Single-FFT Fresnel propagation over a distance `z` (module docs).
#[derive(Clone, Debug)]
pub struct SingleFftFresnel<T: FftNum> {
    input: Grid,
    output: Grid,
    distance: f64,
    dft: CentredDft<T>,
}

impl<T: FieldFloat> SingleFftFresnel<T> {
    /// Plans propagation of `grid` over `distance` metres (non-zero; negative back-propagates).
    /// `fft` must be planned for the grid's shape.
    ///
    /// # Panics
    /// If the grid is invalid, `distance` is zero or not finite, or `fft` has another shape.
    pub fn new(grid: &Grid, distance: f64, fft: Arc<Fft2d<T>>) -> Self {
        grid.validate("SingleFftFresnel");
        let z = distance;
        assert!(
            z.is_finite() && z != 0.0,
            "SingleFftFresnel: distance must be finite and non-zero, got {z}"
        );
        let lambda = grid.wavelength;
        let out_pitch = [
            lambda * z.abs() / (grid.nx as f64 * grid.pitch[0]),
            lambda * z.abs() / (grid.ny as f64 * grid.pitch[1]),
        ];
        // exp(i k z) / (i lambda z) * px py; the phase k z is reduced in cycles (z / lambda).
        let constant =
            cis_cycles(z / lambda) * Complex::new(0.0, -grid.pixel_area() / (lambda * z));
        // exp(i k rho^2 / (2 z)) = exp(i 2 pi rho^2 / (2 lambda z)).
        let chirp = move |rho2: f64| rho2 / (2.0 * lambda * z);
        let dft = CentredDft::new(fft, grid, out_pitch, z < 0.0, constant, &chirp, &chirp);
        SingleFftFresnel {
            input: *grid,
            output: Grid {
                pitch: out_pitch,
                lattice: grid.lattice.transformed(),
                ..*grid
            },
            distance: z,
            dft,
        }
    }

    /// The propagation distance, metres.
    pub fn distance(&self) -> f64 {
        self.distance
    }
}

centred_dft_propagator!(SingleFftFresnel);
