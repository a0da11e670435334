//! Fourier-transform propagation: a thin lens of focal length f between its two focal planes, or
//! the far field (Fraunhofer) scaled to a distance f.
//!
//! This file owns [`Fourier`] and the centred, scaled 2-D DFT that it shares with the single-FFT
//! Fresnel propagator (`CentredDft`). It depends on [`crate::optics::fft2d`] and the shared types of
//! [`super`] only; nothing here may depend on jobs, scenes, encodings or output.
//!
//! # What is computed
//! With the input in the front focal plane of a lens of focal length `f` and the output in its back
//! focal plane (Goodman, Introduction to Fourier Optics, sec. 5.2):
//!
//! `U2(u, v) = 1 / (i lambda f) * integral U1(x, y) exp(-i 2 pi (x u + y v) / (lambda f)) dx dy`,
//!
//! evaluated as a DFT from the plate's pixel-centre grid to the replay lattice of `physics.md`
//! ("Replay lattices": the optical axis on the sample `floor(N/2)`, as after an `fftshift`), or
//! back when the input grid is a replay lattice: output pitch `lambda |f| / (N p)` per axis. The
//! half-pixel offset of the plate's centre for even sizes is an exact phase ramp, so
//! `|U2[k]| = |DFT(U1)[k - floor(N/2)]|` sample for sample. The factor
//! `px py / (i lambda f)` makes the transform unitary in the sense of power:
//! `sum |U2|^2 du dv = sum |U1|^2 dx dy`.
//!
//! Phase factors dropped, on purpose:
//! * the constant `exp(i 2 k f)` of the path through the 2f system (a global phase);
//! * no quadratic phase is dropped in the focal-plane-to-focal-plane geometry: the output quadratic
//!   phase of a lens at distance f from its input is exactly zero. For an input placed against the
//!   lens, or for the far field at distance z = f without a lens, the true output carries an extra
//!   `exp(i k (u^2 + v^2) / (2 f))` (and `exp(i k f)`); this propagator leaves both out, so its
//!   intensity is right and its phase is that of the focal-plane geometry.
//!
//! A negative `f` gives the inverse transform (`+i` in the exponent, `1 / (i lambda f)` with `f < 0`):
//! it maps the back focal plane to the front one, and propagating by `f` then by `-f` returns the
//! input to rounding.

use std::sync::Arc;

use super::FieldFloat;
use num_complex::Complex;
use rustfft::FftNum;

use super::{
    check_len, cis_cycles, mul_by, scratch_failed, to_t, Grid, LineHook, Propagator, Separable,
};
use crate::optics::fft2d::Fft2d;

/// A 2-D DFT between two grids of the same shape whose optical axes sit at `ci` (input) and
/// `co` (output) on each axis,
/// `out[m, n] = post[m, n] * sum_{i, j} pre[i, j] in[i, j] exp(-+ i 2 pi ((j-cix)(m-cox)/nx + (i-ciy)(n-coy)/ny))`,
/// with separable `pre` and `post` factors that may carry chirps and a constant. The input is on
/// one [`super::Lattice`] and the output on the other (a plate's pixel centres `(N - 1) / 2` to the
/// replay lattice's `floor(N / 2)`, or back). Shared by [`Fourier`] and the single-FFT Fresnel
/// propagator.
#[derive(Clone, Debug)]
pub(crate) struct CentredDft<T: FftNum> {
    fft: Arc<Fft2d<T>>,
    inverse: bool,
    pre: Separable<T>,
    post: Separable<T>,
}

/// Per-axis factors of [`CentredDft`], in f64.
///
/// `inverse` selects the `+i` kernel; `a_in` and `a_out` are twice the axis index of the input and
/// output lattices ([`super::Lattice::axis_twice`]). `chirp_in(x)` and `chirp_out(u)` return extra phases
/// in cycles for the input sample at `x` and the output sample at `u` (metres from the axis).
#[allow(clippy::too_many_arguments)]
fn axis_factors(
    n: usize,
    p_in: f64,
    p_out: f64,
    inverse: bool,
    a_in: u64,
    a_out: u64,
    chirp_in: &dyn Fn(f64) -> f64,
    chirp_out: &dyn Fn(f64) -> f64,
) -> (Vec<Complex<f64>>, Vec<Complex<f64>>) {
    // With ci = a_in / 2 and co = a_out / 2:
    // exp(-s i 2 pi (j - ci)(m - co) / n) = exp(-s i 2 pi j m / n) exp(s i 2 pi j co / n)
    //                                       exp(s i 2 pi ci m / n) exp(-s i 2 pi ci co / n);
    // the ramps are reduced exactly in integers: j co / n = (j a_out mod 2n) / 2n, and so on.
    let s = if inverse { -1.0 } else { 1.0 };
    let n64 = n as u64;
    let ramp = |j: usize, a: u64| -> f64 { ((j as u64 * a) % (2 * n64)) as f64 / (2 * n64) as f64 };
    let cc = ((a_in * a_out) % (4 * n64)) as f64 / (4 * n64) as f64;
    let (ci, co) = (a_in as f64 / 2.0, a_out as f64 / 2.0);
    let pre = (0..n)
        .map(|j| cis_cycles(s * ramp(j, a_out) + chirp_in((j as f64 - ci) * p_in)))
        .collect();
    let post = (0..n)
        .map(|m| cis_cycles(s * (ramp(m, a_in) - cc) + chirp_out((m as f64 - co) * p_out)))
        .collect();
    (pre, post)
}

impl<T: FieldFloat> CentredDft<T> {
    /// Plans the transform from `input` to output pitch `out_pitch`. `constant` multiplies every
    /// output sample; `chirp_in` / `chirp_out` give extra phases in cycles as functions of the
    /// squared distance from the axis, `rho^2`, in square metres.
    pub(crate) fn new(
        fft: Arc<Fft2d<T>>,
        input: &Grid,
        out_pitch: [f64; 2],
        inverse: bool,
        constant: Complex<f64>,
        chirp_in: &dyn Fn(f64) -> f64,
        chirp_out: &dyn Fn(f64) -> f64,
    ) -> Self {
        assert_eq!(
            (fft.nx(), fft.ny()),
            (input.nx, input.ny),
            "CentredDft: plan shape mismatch"
        );
        // A chirp exp(i a rho^2) = exp(i a x^2) exp(i a y^2) separates by axis.
        let cin = |x: f64| chirp_in(x * x);
        let cout = |u: f64| chirp_out(u * u);
        let (li, lo) = (input.lattice, input.lattice.transformed());
        let (pre_x, post_x) = axis_factors(
            input.nx,
            input.pitch[0],
            out_pitch[0],
            inverse,
            li.axis_twice(input.nx),
            lo.axis_twice(input.nx),
            &cin,
            &cout,
        );
        // Rows: y = (c - i) p, so y v = (i - ci)(m - co) p p_out, the same form as x.
        let (pre_y, post_y) = axis_factors(
            input.ny,
            input.pitch[1],
            out_pitch[1],
            inverse,
            li.axis_twice(input.ny),
            lo.axis_twice(input.ny),
            &cin,
            &cout,
        );
        let conv = |v: Vec<Complex<f64>>| v.into_iter().map(to_t::<T>).collect::<Vec<_>>();
        CentredDft {
            fft,
            inverse,
            pre: Separable {
                x: conv(pre_x),
                y: conv(pre_y),
            },
            post: Separable {
                x: conv(post_x),
                y: conv(post_y.into_iter().map(|v| v * constant).collect()),
            },
        }
    }

    /// Scratch needed by [`apply`](Self::apply).
    pub(crate) fn scratch_len(&self) -> usize {
        self.fft.scratch_len()
    }

    /// Runs the transform in place. The pre factor is applied to each row just before its FFT and
    /// the post factor to each column just after its FFT, while the data is in cache.
    pub(crate) fn apply(&self, field: &mut [Complex<T>], scratch: &mut [Complex<T>]) {
        check_len(field.len(), self.fft.nx() * self.fft.ny());
        if scratch.len() < self.scratch_len() {
            scratch_failed(scratch.len(), self.scratch_len());
        }
        let (pre, post) = (&self.pre, &self.post);
        self.fft.run(
            field,
            scratch,
            self.inverse,
            |i, row| mul_by(row, &pre.x, pre.y[i]),
            |j, col| mul_by(col, &post.y, post.x[j]),
        );
    }
}

impl<T: FieldFloat> CentredDft<T> {
    /// [`apply`](Self::apply) reading `src` and leaving the output transposed in `out_t`
    /// ([`Propagator::propagate_into_transposed`]): the post factor and then `after_col` run on
    /// each output column.
    pub(crate) fn apply_into_transposed(
        &self,
        src: &[Complex<T>],
        work: &mut [Complex<T>],
        out_t: &mut [Complex<T>],
        after_col: LineHook<'_, T>,
    ) {
        let (pre, post) = (&self.pre, &self.post);
        self.fft.run_into_transposed(
            src,
            work,
            out_t,
            self.inverse,
            |i, row| mul_by(row, &pre.x, pre.y[i]),
            |j, col| {
                mul_by(col, &post.y, post.x[j]);
                after_col(j, col)
            },
        );
    }

    /// [`apply`](Self::apply) from a transposed input ([`Propagator::propagate_from_transposed`]):
    /// `before_col` and then the pre factor run on each input column before its FFT, the post
    /// factor and then `after_row` on each output row.
    pub(crate) fn apply_from_transposed(
        &self,
        in_t: &mut [Complex<T>],
        out: &mut [Complex<T>],
        before_col: LineHook<'_, T>,
        after_row: LineHook<'_, T>,
    ) {
        let (pre, post) = (&self.pre, &self.post);
        self.fft.run_from_transposed(
            in_t,
            out,
            self.inverse,
            |j, col| {
                before_col(j, col);
                mul_by(col, &pre.y, pre.x[j])
            },
            |i, row| {
                mul_by(row, &post.x, post.y[i]);
                after_row(i, row)
            },
        );
    }
}

/// Fourier-transform propagation through a lens of focal length `focal` (module docs): output pitch
/// `lambda |f| / (N p)`, power conserved.
#[derive(Clone, Debug)]
pub struct Fourier<T: FftNum> {
    input: Grid,
    output: Grid,
    focal: f64,
    dft: CentredDft<T>,
}

impl<T: FieldFloat> Fourier<T> {
    /// Plans the transform for `grid` and focal length `focal` (metres, non-zero; negative for the
    /// inverse transform). `fft` must be planned for the grid's shape.
    ///
    /// # Panics
    /// If the grid is invalid, `focal` is zero or not finite, or `fft` has another shape.
    pub fn new(grid: &Grid, focal: f64, fft: Arc<Fft2d<T>>) -> Self {
        grid.validate("Fourier");
        assert!(
            focal.is_finite() && focal != 0.0,
            "Fourier: focal length must be finite and non-zero, got {focal}"
        );
        let lambda = grid.wavelength;
        let out_pitch = [
            lambda * focal.abs() / (grid.nx as f64 * grid.pitch[0]),
            lambda * focal.abs() / (grid.ny as f64 * grid.pitch[1]),
        ];
        // px py / (i lambda f)
        let constant = Complex::new(0.0, -grid.pixel_area() / (lambda * focal));
        let none = |_: f64| 0.0;
        let dft = CentredDft::new(fft, grid, out_pitch, focal < 0.0, constant, &none, &none);
        Fourier {
            input: *grid,
            output: Grid {
                pitch: out_pitch,
                lattice: grid.lattice.transformed(),
                ..*grid
            },
            focal,
            dft,
        }
    }

    /// The focal length, metres.
    pub fn focal(&self) -> f64 {
        self.focal
    }
}

centred_dft_propagator!(Fourier);
