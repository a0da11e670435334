//! Chooses and builds propagators.
//!
//! This file owns [`PropagationRecipe`] (a plain description of a propagator, so the choice can be
//! tested as data without computing anything) and [`PropagationPlanner`] (which turns a recipe into a
//! ready [`Propagator`], reusing 2-D FFT plans by shape). It depends on the propagators of [`super`]
//! and on [`crate::optics::fft2d`] only; nothing here may depend on jobs, scenes, encodings or output.
//!
//! # The choice
//! With the critical distance `z_c = N p^2 / lambda` (Voelz and Roggemann, Applied Optics 48, 6132,
//! 2009), the transfer function of the angular spectrum is well sampled for `|z| < z_c` and the
//! impulse response of the single-FFT Fresnel form for `|z| >= z_c`. On a grid whose axes differ,
//! `z_c` is the larger of the two axes' values, so single-FFT Fresnel is used only where both axes
//! sample its chirp. Below `z_c` the recipe is the band-limited angular spectrum with 2x zero
//! padding; the Fourier recipe is never chosen automatically (it is a different geometry, not a
//! distance).

use std::collections::HashMap;
use std::sync::Arc;

use rustfft::{FftNum, FftPlanner};

use super::{AngularSpectrum, FieldFloat, Fourier, Grid, Propagator, SingleFftFresnel};
use crate::optics::fft2d::Fft2d;

/// What a propagator does, as data.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum PropagationRecipe {
    /// Angular spectrum: transfer function, zero padding by the factor `pad` (1 = none, 2 = 2N),
    /// optionally band-limited (Matsushima and Shimobaba 2009). Output pitch = input pitch.
    AngularSpectrum {
        /// Apply the Matsushima-Shimobaba band limit.
        band_limited: bool,
        /// Zero-padding factor per axis, >= 1.
        pad: usize,
    },
    /// Single-FFT Fresnel (impulse response); output pitch `lambda |z| / (N p)`.
    SingleFftFresnel,
    /// Lens of focal length `focal` between its focal planes (or far field); output pitch
    /// `lambda |f| / (N p)`. The planner's `distance` argument is not used by this recipe.
    Fourier {
        /// Focal length, metres (negative for the inverse transform).
        focal: f64,
    },
}

/// Builds propagators and caches the 2-D FFT plans they need, by shape.
pub struct PropagationPlanner<T: FftNum> {
    fft_planner: FftPlanner<T>,
    cache: HashMap<(usize, usize), Arc<Fft2d<T>>>,
}

impl<T: FieldFloat> Default for PropagationPlanner<T> {
    fn default() -> Self {
        Self::new()
    }
}

impl<T: FieldFloat> PropagationPlanner<T> {
    /// An empty planner.
    pub fn new() -> Self {
        PropagationPlanner {
            fft_planner: FftPlanner::new(),
            cache: HashMap::new(),
        }
    }

    /// The recipe the planner uses for `grid` and `distance` (module docs). Pure: computes nothing
    /// and caches nothing.
    ///
    /// ```
    /// use fringemill::optics::propagation::{Grid, PropagationPlanner, PropagationRecipe};
    /// let grid = Grid { nx: 1000, ny: 1000, pitch: [8e-6; 2], wavelength: 500e-9, lattice: Default::default() };
    /// let planner = PropagationPlanner::<f32>::new();
    /// // z_c = 1000 * (8 um)^2 / 500 nm = 0.128 m
    /// assert_eq!(planner.recipe(&grid, 0.1),
    ///            PropagationRecipe::AngularSpectrum { band_limited: true, pad: 2 });
    /// assert_eq!(planner.recipe(&grid, 0.2), PropagationRecipe::SingleFftFresnel);
    /// ```
    pub fn recipe(&self, grid: &Grid, distance: f64) -> PropagationRecipe {
        let zc = grid.critical_distance();
        if distance.abs() < zc[0].max(zc[1]) {
            PropagationRecipe::AngularSpectrum {
                band_limited: true,
                pad: 2,
            }
        } else {
            PropagationRecipe::SingleFftFresnel
        }
    }

    /// A 2-D FFT plan for `ny` rows by `nx` columns, built once per shape and shared afterwards.
    pub fn fft2d(&mut self, nx: usize, ny: usize) -> Arc<Fft2d<T>> {
        let planner = &mut self.fft_planner;
        self.cache
            .entry((nx, ny))
            .or_insert_with(|| Arc::new(Fft2d::with_planner(planner, nx, ny)))
            .clone()
    }

    /// Plans propagation of `grid` over `distance` with the recipe of [`recipe`](Self::recipe).
    ///
    /// # Panics
    /// If the grid is invalid or `distance` is not finite.
    pub fn plan(&mut self, grid: &Grid, distance: f64) -> Arc<dyn Propagator<T>> {
        let recipe = self.recipe(grid, distance);
        self.plan_recipe(grid, distance, recipe)
    }

    /// Plans propagation of `grid` over `distance` with the given recipe.
    ///
    /// # Panics
    /// If the grid is invalid, `distance` is not finite (or zero, for single-FFT Fresnel), `pad` is
    /// zero, or a focal length is zero or not finite.
    pub fn plan_recipe(
        &mut self,
        grid: &Grid,
        distance: f64,
        recipe: PropagationRecipe,
    ) -> Arc<dyn Propagator<T>> {
        grid.validate("PropagationPlanner");
        match recipe {
            PropagationRecipe::AngularSpectrum { band_limited, pad } => {
                assert!(pad >= 1, "PropagationPlanner: padding factor must be >= 1");
                let fft = self.fft2d(pad * grid.nx, pad * grid.ny);
                Arc::new(AngularSpectrum::new(grid, distance, band_limited, pad, fft))
            }
            PropagationRecipe::SingleFftFresnel => {
                let fft = self.fft2d(grid.nx, grid.ny);
                Arc::new(SingleFftFresnel::new(grid, distance, fft))
            }
            PropagationRecipe::Fourier { focal } => {
                let fft = self.fft2d(grid.nx, grid.ny);
                Arc::new(Fourier::new(grid, focal, fft))
            }
        }
    }
}
