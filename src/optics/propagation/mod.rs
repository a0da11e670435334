//! Free-space propagation of sampled complex fields between parallel planes.
//!
//! This module owns the [`Propagator`] trait, the sampling [`Grid`] it works on, and the shared
//! helpers of its implementations (one algorithm per file: [`angular_spectrum`], [`fresnel`],
//! [`fourier`]); [`planner`] chooses between them. It depends on [`crate::optics::fft2d`], rustfft
//! and rayon only: nothing here may depend on jobs, scenes, encodings or output.
//!
//! # Conventions (shared `physics.md`)
//! * SI units: metres.
//! * Fields are row-major, `ny` rows of `nx` samples; row 0 is the top row, y points up. Where the
//!   optical axis sits is the grid's [`Lattice`]: on a plate ([`Lattice::PixelCentres`]) pixel
//!   (row i, column j) has its centre at `x = (j - (nx-1)/2) px`, `y = ((ny-1)/2 - i) py` (the axis
//!   between pixels when a size is even); on the replay plane of a Fourier or single-FFT Fresnel
//!   transform ([`Lattice::FftAxis`]) the axis is the sample with index `floor(N/2)` on each axis,
//!   `x = (j - floor(nx/2)) px`, `y = (floor(ny/2) - i) py`, the `fftshift` layout every FFT
//!   library uses, so a plain DFT of the plate samples replays on the same lattice:
//!   `|U[k]| = |DFT(t)[k - floor(N/2)]|` (physics.md, "Replay lattices"). Those two propagators
//!   map one lattice to the other; the angular spectrum keeps its input's.
//! * Time dependence `exp(-i w t)`: a wave travelling towards +z gains `exp(+i k z)`, a wave diverging
//!   from a point is `exp(+i k r) / r`. A positive distance propagates towards +z, a negative one
//!   back-propagates.
//! * Fields carry absolute phase and amplitude: the propagators that change the pitch scale the field
//!   so that power, `sum |U|^2 dx dy`, is conserved between the planes.
//!
//! # Transposed middle plane
//! A 2-D FFT on row-major data transforms the rows, gathers the columns into a transposed buffer
//! to transform them, and transposes back: a third of its passes over memory only restore the
//! layout. A loop that propagates forward, works pointwise on the result and propagates back
//! (iterative phase retrieval) need not restore it: [`Propagator::propagate_into_transposed`]
//! leaves the middle plane column-major and [`Propagator::propagate_from_transposed`] starts
//! from there, with hooks that run on each line while it is in cache. Propagators whose last and
//! first steps are the column and row FFTs ([`Fourier`], [`SingleFftFresnel`]) do this at no
//! extra cost ([`Propagator::transposes_natively`]); the others fall back to a transpose.

use std::f64::consts::PI;

use num_complex::Complex;
use rayon::prelude::*;
use rustfft::num_traits::Float;
use rustfft::FftNum;

/// `impl Propagator` for a propagator that is one centred DFT between its grids (fields
/// `input`, `output`, `dft: fourier::CentredDft<T>`): the Fourier lens and single-FFT Fresnel.
macro_rules! centred_dft_propagator {
    ($ty:ident) => {
        impl<T: FieldFloat> Propagator<T> for $ty<T> {
            fn input(&self) -> Grid {
                self.input
            }
            fn output(&self) -> Grid {
                self.output
            }
            fn scratch_len(&self) -> usize {
                self.dft.scratch_len()
            }
            fn propagate_with_scratch(&self, field: &mut [Complex<T>], scratch: &mut [Complex<T>]) {
                self.dft.apply(field, scratch);
            }
            fn transposes_natively(&self) -> bool {
                true
            }
            fn propagate_into_transposed(
                &self,
                src: &[Complex<T>],
                work: &mut [Complex<T>],
                out_t: &mut [Complex<T>],
                after_col: LineHook<'_, T>,
            ) {
                self.dft.apply_into_transposed(src, work, out_t, after_col);
            }
            fn propagate_from_transposed(
                &self,
                in_t: &mut [Complex<T>],
                out: &mut [Complex<T>],
                before_col: LineHook<'_, T>,
                after_row: LineHook<'_, T>,
            ) {
                self.dft
                    .apply_from_transposed(in_t, out, before_col, after_row);
            }
        }
    };
}

pub mod angular_spectrum;
pub mod fourier;
pub mod fresnel;
pub mod planner;

pub use angular_spectrum::AngularSpectrum;
pub use fourier::Fourier;
pub use fresnel::SingleFftFresnel;
pub use planner::{PropagationPlanner, PropagationRecipe};

/// A sampled plane: its shape, its pitch and the wavelength of the light on it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Grid {
    /// Columns (samples along x).
    pub nx: usize,
    /// Rows (samples along y).
    pub ny: usize,
    /// Sample pitch [px, py], metres.
    pub pitch: [f64; 2],
    /// Wavelength, metres.
    pub wavelength: f64,
    /// Where the optical axis sits on the grid (module docs).
    pub lattice: Lattice,
}

/// Where the optical axis crosses a sampled plane.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Lattice {
    /// The plate's pixel-centre grid: the axis at the geometric centre, `(N - 1) / 2` on each
    /// axis (between two samples for even N).
    #[default]
    PixelCentres,
    /// The replay lattice of a Fourier or single-FFT Fresnel plane: the axis on the sample
    /// `floor(N / 2)` on each axis (the zero order of a plain DFT after `fftshift`).
    FftAxis,
}

impl Lattice {
    /// Twice the index of the axis on an axis of `n` samples: `n - 1` for pixel centres,
    /// `2 floor(n / 2)` for the FFT lattice (twice, so that both are integers).
    pub fn axis_twice(self, n: usize) -> u64 {
        match self {
            Lattice::PixelCentres => n as u64 - 1,
            Lattice::FftAxis => 2 * (n as u64 / 2),
        }
    }

    /// Index of the optical axis on an axis of `n` samples (half-integer for even-sized pixel
    /// centres).
    pub fn axis_index(self, n: usize) -> f64 {
        self.axis_twice(n) as f64 / 2.0
    }

    /// The lattice on the other side of a Fourier or single-FFT Fresnel transform.
    pub fn transformed(self) -> Lattice {
        match self {
            Lattice::PixelCentres => Lattice::FftAxis,
            Lattice::FftAxis => Lattice::PixelCentres,
        }
    }
}

impl Grid {
    /// Number of samples, `nx * ny`.
    pub fn len(&self) -> usize {
        self.nx * self.ny
    }

    /// True when the grid has no sample.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Area of one sample, `px py`, square metres.
    pub fn pixel_area(&self) -> f64 {
        self.pitch[0] * self.pitch[1]
    }

    /// x of the centre of column `j`, metres from the optical axis (see [`Lattice`]).
    pub fn x_of_col(&self, j: usize) -> f64 {
        (j as f64 - self.lattice.axis_index(self.nx)) * self.pitch[0]
    }

    /// y of the centre of row `i`, metres from the optical axis (row 0 is the top, y points up).
    pub fn y_of_row(&self, i: usize) -> f64 {
        (self.lattice.axis_index(self.ny) - i as f64) * self.pitch[1]
    }

    /// Critical distance `N p^2 / lambda` per axis, [x, y], metres (Voelz and Roggemann, Applied
    /// Optics 48, 6132, 2009). At this distance the single-FFT Fresnel output pitch equals the input
    /// pitch.
    pub fn critical_distance(&self) -> [f64; 2] {
        [
            self.nx as f64 * self.pitch[0] * self.pitch[0] / self.wavelength,
            self.ny as f64 * self.pitch[1] * self.pitch[1] / self.wavelength,
        ]
    }

    /// Power of a field on this grid, `sum |U|^2 px py`, accumulated in f64.
    ///
    /// # Panics
    /// If `field.len() != nx * ny`.
    pub fn power<T: FieldFloat>(&self, field: &[Complex<T>]) -> f64 {
        check_len(field.len(), self.len());
        let s: f64 = field
            .par_chunks(self.nx.max(1))
            .map(|row| {
                row.iter()
                    .map(|v| {
                        let (re, im) = (
                            v.re.to_f64().unwrap_or(f64::NAN),
                            v.im.to_f64().unwrap_or(f64::NAN),
                        );
                        re * re + im * im
                    })
                    .sum::<f64>()
            })
            .collect::<Vec<_>>()
            .iter()
            .sum();
        s * self.pixel_area()
    }

    /// Panics with a readable message unless the grid is usable: non-empty, finite positive pitch
    /// and wavelength.
    pub(crate) fn validate(&self, who: &str) {
        assert!(
            self.nx > 0 && self.ny > 0,
            "{who}: empty grid {} x {}",
            self.nx,
            self.ny
        );
        assert!(
            self.pitch.iter().all(|p| p.is_finite() && *p > 0.0),
            "{who}: pitch must be finite and > 0, got {:?}",
            self.pitch
        );
        assert!(
            self.wavelength.is_finite() && self.wavelength > 0.0,
            "{who}: wavelength must be finite and > 0, got {}",
            self.wavelength
        );
    }
}

/// Propagates a sampled complex field from one plane to a parallel one, in place.
///
/// Implementations are planned once (FFT plans, transfer functions, phase factors) and then shared:
/// `propagate` takes `&self`, so one propagator can serve many threads.
pub trait Propagator<T: FftNum>: Send + Sync {
    /// The sampling of the input plane.
    fn input(&self) -> Grid;

    /// The sampling of the output plane: same shape and wavelength as the input; the pitch may
    /// change (single-FFT Fresnel, Fourier).
    fn output(&self) -> Grid;

    /// Length of the scratch buffer that [`propagate_with_scratch`](Self::propagate_with_scratch)
    /// needs.
    fn scratch_len(&self) -> usize;

    /// Propagates `field` (row-major `ny x nx`, conventions of the module docs) in place, using
    /// `scratch` (at least [`scratch_len`](Self::scratch_len) elements, any content on entry).
    ///
    /// # Panics
    /// If `field.len() != nx * ny` or the scratch is too short.
    fn propagate_with_scratch(&self, field: &mut [Complex<T>], scratch: &mut [Complex<T>]);

    /// True when [`propagate_into_transposed`](Self::propagate_into_transposed) and
    /// [`propagate_from_transposed`](Self::propagate_from_transposed) cost no more than
    /// [`propagate_with_scratch`](Self::propagate_with_scratch) (their default versions add a
    /// transpose and a copy). Iterative loops pick the transposed layout only when every
    /// propagator they use says so.
    fn transposes_natively(&self) -> bool {
        false
    }

    /// Propagates `src` (row-major, not changed) and writes the output transposed into `out_t`:
    /// output column j is `out_t[j * ny..(j + 1) * ny]`. `after_col(j, col)` runs on each output
    /// column once it is final. `work` (`nx * ny` elements) is used as scratch.
    ///
    /// Loops that alternate a forward and a back propagation keep the middle plane transposed
    /// (module docs, "Transposed middle plane"). The default propagates a copy and transposes it.
    ///
    /// # Panics
    /// If a buffer does not hold `nx * ny` elements.
    fn propagate_into_transposed(
        &self,
        src: &[Complex<T>],
        work: &mut [Complex<T>],
        out_t: &mut [Complex<T>],
        after_col: LineHook<'_, T>,
    ) {
        let g = self.input();
        let (nx, ny) = (g.nx, g.ny);
        check_len(src.len(), nx * ny);
        check_len(work.len(), nx * ny);
        check_len(out_t.len(), nx * ny);
        work.copy_from_slice(src);
        let mut scratch = vec![Complex::new(T::zero(), T::zero()); self.scratch_len()];
        self.propagate_with_scratch(work, &mut scratch);
        crate::optics::fft2d::transpose_into(work, nx, 0, ny, out_t, ny, 0, None);
        out_t
            .par_chunks_mut(ny)
            .enumerate()
            .for_each(|(j, col)| after_col(j, col));
    }

    /// The mirror of [`propagate_into_transposed`](Self::propagate_into_transposed): `in_t` holds
    /// the input transposed (input column j at `in_t[j * ny..(j + 1) * ny]`); `before_col(j, col)`
    /// runs on each input column first, then the field is propagated and written row-major into
    /// `out`, and `after_row(i, row)` runs on each output row once it is final. `in_t` ends as
    /// scratch.
    ///
    /// # Panics
    /// If a buffer does not hold `nx * ny` elements.
    fn propagate_from_transposed(
        &self,
        in_t: &mut [Complex<T>],
        out: &mut [Complex<T>],
        before_col: LineHook<'_, T>,
        after_row: LineHook<'_, T>,
    ) {
        let g = self.input();
        let (nx, ny) = (g.nx, g.ny);
        check_len(in_t.len(), nx * ny);
        check_len(out.len(), nx * ny);
        in_t.par_chunks_mut(ny)
            .enumerate()
            .for_each(|(j, col)| before_col(j, col));
        crate::optics::fft2d::transpose_into(in_t, ny, 0, nx, out, nx, 0, None);
        let mut scratch = vec![Complex::new(T::zero(), T::zero()); self.scratch_len()];
        self.propagate_with_scratch(out, &mut scratch);
        out.par_chunks_mut(nx)
            .enumerate()
            .for_each(|(i, row)| after_row(i, row));
    }

    /// Propagates `field` in place, allocating the scratch.
    ///
    /// # Panics
    /// If `field.len() != nx * ny`.
    fn propagate(&self, field: &mut [Complex<T>]) {
        let mut scratch = vec![Complex::new(T::zero(), T::zero()); self.scratch_len()];
        self.propagate_with_scratch(field, &mut scratch);
    }
}

/// A function run on one line (row or column) of a field, with the line's index: the hooks of the
/// transposed propagation methods of [`Propagator`].
pub type LineHook<'a, T> = &'a (dyn Fn(usize, &mut [Complex<T>]) + Sync);

/// `exp(i 2 pi cycles)`, with the argument reduced to [-1/2, 1/2] cycle in f64 before the
/// trigonometry, so large phases keep their accuracy.
#[inline]
pub(crate) fn cis_cycles(cycles: f64) -> Complex<f64> {
    let t = cycles - cycles.round();
    let (s, c) = (2.0 * PI * t).sin_cos();
    Complex::new(c, s)
}

/// Converts an f64 complex to the field's precision.
#[inline]
pub(crate) fn to_t<T: FftNum>(v: Complex<f64>) -> Complex<T> {
    Complex::new(
        T::from_f64(v.re).expect("from f64"),
        T::from_f64(v.im).expect("from f64"),
    )
}

/// A pointwise factor that separates into a product of a per-column and a per-row term,
/// `f[i, j] = y[i] x[j]`. The terms are computed in f64 and stored in the field's precision.
#[derive(Clone, Debug)]
pub(crate) struct Separable<T> {
    pub(crate) x: Vec<Complex<T>>,
    pub(crate) y: Vec<Complex<T>>,
}

/// Applies `fac[k] * scale` to `v[k]`.
/// The floating-point types fields are propagated in (f32 for the iterative loop, f64 for exact
/// checks), each with the pointwise product it runs inside the FFT passes.
pub trait FieldFloat: FftNum + Float {
    /// `v[k] *= fac[k] * scale` over the common length.
    fn mul_by(v: &mut [Complex<Self>], fac: &[Complex<Self>], scale: Complex<Self>);
}

impl FieldFloat for f32 {
    /// The vectorized copy (`optics::pointwise`), the same bits as the plain loop.
    fn mul_by(v: &mut [Complex<f32>], fac: &[Complex<f32>], scale: Complex<f32>) {
        crate::optics::pointwise::mul_by_f32(v, fac, scale)
    }
}

impl FieldFloat for f64 {
    fn mul_by(v: &mut [Complex<f64>], fac: &[Complex<f64>], scale: Complex<f64>) {
        for (a, &b) in v.iter_mut().zip(fac) {
            *a *= b * scale;
        }
    }
}

/// `v[k] *= fac[k] * scale` in the type's own way ([`FieldFloat::mul_by`]).
#[inline]
pub(crate) fn mul_by<T: FieldFloat>(v: &mut [Complex<T>], fac: &[Complex<T>], scale: Complex<T>) {
    T::mul_by(v, fac, scale)
}

#[cold]
#[inline(never)]
pub(crate) fn check_len_failed(got: usize, want: usize) -> ! {
    panic!("propagation: field has {got} elements, expected {want}");
}

#[inline]
pub(crate) fn check_len(got: usize, want: usize) {
    if got != want {
        check_len_failed(got, want);
    }
}

#[cold]
#[inline(never)]
pub(crate) fn scratch_failed(got: usize, want: usize) -> ! {
    panic!("propagation: scratch has {got} elements, need at least {want}");
}
