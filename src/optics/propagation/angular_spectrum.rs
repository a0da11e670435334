//! Angular-spectrum propagation (transfer-function form), with zero padding and the band limit of
//! Matsushima and Shimobaba, for distances below the critical distance `N p^2 / lambda`.
//!
//! This file owns [`AngularSpectrum`]. It depends on [`crate::optics::fft2d`] and the shared types of
//! [`super`] only; nothing here may depend on jobs, scenes, encodings or output.
//!
//! # What is computed
//! The field is zero-padded to `pad * N` samples per axis (centred), transformed, multiplied by the
//! free-space transfer function
//!
//! `H(fx, fy) = exp(i 2 pi z sqrt(1 / lambda^2 - fx^2 - fy^2))`,
//!
//! transformed back and cropped to the centre. Evanescent components (`fx^2 + fy^2 >= 1 / lambda^2`)
//! are dropped. With `band_limited`, only `|fx| <= 1 / (lambda sqrt((2 df_x z)^2 + 1))` with
//! `df_x = 1 / (pad nx px)` (likewise y) are kept (Matsushima and Shimobaba, Optics Express 17, 19662,
//! 2009): beyond that limit the sampled transfer function aliases and the light would leave the padded
//! window anyway. Output pitch = input pitch; the output samples sit at the same (x, y) as the input
//! ones. The transfer phase is computed in f64 and reduced modulo one cycle before it is converted to
//! the field's precision, so f32 fields keep their accuracy at large `z / lambda`. A negative `z`
//! back-propagates (the conjugate transfer function). `1 / (Mx My)` of the inverse FFT is folded into
//! the stored transfer function.
//!
//! # Cost
//! `H` is even in `fx` and `fy`, so only one quadrant, `(Mx/2 + 1) (My/2 + 1)` values, is stored.
//! A propagation runs `ny` forward row FFTs of length `Mx` (the padding rows are zero and are skipped),
//! one fused pass per spectrum column (forward FFT, transfer, inverse FFT, while the column is in
//! cache; columns the band limit empties are only cleared), then `ny` inverse row FFTs whose centre is
//! kept. Scratch: `ny Mx + Mx My` complex values.

use std::sync::Arc;

use super::FieldFloat;
use num_complex::Complex;
use rayon::prelude::*;
use rustfft::FftNum;

use super::{check_len, cis_cycles, scratch_failed, to_t, Grid, Propagator};
use crate::optics::fft2d::{transpose_into, Fft2d};

/// Angular-spectrum propagation over a distance `z` (module docs).
#[derive(Clone, Debug)]
pub struct AngularSpectrum<T: FftNum> {
    grid: Grid,
    distance: f64,
    band_limited: bool,
    pad: usize,
    /// Padded shape.
    mx: usize,
    my: usize,
    /// Offset of the field inside the padded grid.
    ox: usize,
    oy: usize,
    fft: Arc<Fft2d<T>>,
    /// One quadrant of the transfer function, scaled by 1 / (mx my): row `qx` in `0..=mx/2`, column
    /// `qy` in `0..=my/2`, for |fx| = qx / (mx px) and |fy| = qy / (my py).
    h: Vec<Complex<T>>,
    /// Whether row `qx` of `h` holds any non-zero value.
    live: Vec<bool>,
}

impl<T: FieldFloat> AngularSpectrum<T> {
    /// Plans propagation of `grid` over `distance` metres (any finite value; negative
    /// back-propagates), zero-padded by the factor `pad` (1 = no padding, 2 = the usual 2N), with or
    /// without the band limit. `fft` must be planned for the padded shape `(pad nx, pad ny)`.
    ///
    /// # Panics
    /// If the grid is invalid, `distance` is not finite, `pad` is zero, or `fft` has another shape.
    pub fn new(
        grid: &Grid,
        distance: f64,
        band_limited: bool,
        pad: usize,
        fft: Arc<Fft2d<T>>,
    ) -> Self {
        grid.validate("AngularSpectrum");
        assert!(
            distance.is_finite(),
            "AngularSpectrum: distance must be finite, got {distance}"
        );
        assert!(pad >= 1, "AngularSpectrum: padding factor must be >= 1");
        let (mx, my) = (pad * grid.nx, pad * grid.ny);
        assert_eq!(
            (fft.nx(), fft.ny()),
            (mx, my),
            "AngularSpectrum: FFT plan is not for the padded shape"
        );
        let (hx, hy) = (mx / 2 + 1, my / 2 + 1);
        let z = distance;
        let lambda = grid.wavelength;
        let (dfx, dfy) = (
            1.0 / (mx as f64 * grid.pitch[0]),
            1.0 / (my as f64 * grid.pitch[1]),
        );
        let limit = |df: f64| {
            if band_limited {
                1.0 / (lambda * ((2.0 * df * z).powi(2) + 1.0).sqrt())
            } else {
                f64::INFINITY
            }
        };
        let (fx_lim, fy_lim) = (limit(dfx), limit(dfy));
        let inv_l2 = 1.0 / (lambda * lambda);
        let scale = 1.0 / (mx as f64 * my as f64);
        let mut h = vec![Complex::new(T::zero(), T::zero()); hx * hy];
        h.par_chunks_mut(hy).enumerate().for_each(|(qx, row)| {
            let fx = qx as f64 * dfx;
            for (qy, v) in row.iter_mut().enumerate() {
                let fy = qy as f64 * dfy;
                let w2 = inv_l2 - fx * fx - fy * fy;
                *v = if fx > fx_lim || fy > fy_lim || w2 <= 0.0 {
                    Complex::new(T::zero(), T::zero())
                } else {
                    // z sqrt(1/lambda^2 - f^2) cycles, reduced in f64 before conversion.
                    to_t(cis_cycles(z * w2.sqrt()) * scale)
                };
            }
        });
        let zero = Complex::new(T::zero(), T::zero());
        let live = h
            .chunks(hy)
            .map(|row| row.iter().any(|v| *v != zero))
            .collect();
        AngularSpectrum {
            grid: *grid,
            distance,
            band_limited,
            pad,
            mx,
            my,
            ox: (mx - grid.nx) / 2,
            oy: (my - grid.ny) / 2,
            fft,
            h,
            live,
        }
    }

    /// The propagation distance, metres.
    pub fn distance(&self) -> f64 {
        self.distance
    }

    /// Whether the Matsushima-Shimobaba band limit is applied.
    pub fn band_limited(&self) -> bool {
        self.band_limited
    }

    /// The zero-padding factor.
    pub fn pad(&self) -> usize {
        self.pad
    }
}

impl<T: FieldFloat> Propagator<T> for AngularSpectrum<T> {
    fn input(&self) -> Grid {
        self.grid
    }

    fn output(&self) -> Grid {
        self.grid
    }

    fn scratch_len(&self) -> usize {
        self.grid.ny * self.mx + self.mx * self.my
    }

    fn propagate_with_scratch(&self, field: &mut [Complex<T>], scratch: &mut [Complex<T>]) {
        let (nx, ny, mx, my, ox, oy) = (
            self.grid.nx,
            self.grid.ny,
            self.mx,
            self.my,
            self.ox,
            self.oy,
        );
        check_len(field.len(), nx * ny);
        if scratch.len() < self.scratch_len() {
            scratch_failed(scratch.len(), self.scratch_len());
        }
        let zero = Complex::new(T::zero(), T::zero());
        let (a, rest) = scratch.split_at_mut(ny * mx);
        let b = &mut rest[..mx * my];
        let (row_fwd, col_fwd) = self.fft.plans(false);
        let (row_inv, col_inv) = self.fft.plans(true);
        let row_scratch = row_fwd
            .get_inplace_scratch_len()
            .max(row_inv.get_inplace_scratch_len());
        let col_scratch = col_fwd
            .get_inplace_scratch_len()
            .max(col_inv.get_inplace_scratch_len());
        let min_rows = (4096 / mx).max(1);

        // 1. The ny non-zero rows of the padded field, each padded and transformed along x.
        a.par_chunks_mut(mx)
            .zip(field.par_chunks(nx))
            .with_min_len(min_rows)
            .for_each_init(
                || vec![zero; row_scratch],
                |s, (arow, frow)| {
                    arow[..ox].fill(zero);
                    arow[ox..ox + nx].copy_from_slice(frow);
                    arow[ox + nx..].fill(zero);
                    row_fwd.process_with_scratch(arow, s);
                },
            );
        // 2. Transpose into b (mx rows of my), the field rows landing at oy.., zeros elsewhere.
        transpose_into(a, mx, 0, ny, b, my, oy, Some(zero));
        // 3. Per spectrum column kx: FFT along y, transfer function, inverse FFT along y.
        let (h, hy, live) = (&self.h, my / 2 + 1, &self.live);
        b.par_chunks_mut(my)
            .enumerate()
            .with_min_len((4096 / my).max(1))
            .for_each_init(
                || vec![zero; col_scratch],
                |s, (kx, col)| {
                    let qx = kx.min(mx - kx);
                    if !live[qx] {
                        col.fill(zero);
                        return;
                    }
                    col_fwd.process_with_scratch(col, s);
                    let hrow = &h[qx * hy..(qx + 1) * hy];
                    let (lo, hi) = col.split_at_mut(hy);
                    for (v, &t) in lo.iter_mut().zip(hrow) {
                        *v = *v * t;
                    }
                    // ky in hy..my has |fy| index my - ky, running from my - hy down to 1.
                    for (v, &t) in hi.iter_mut().zip(hrow[1..=my - hy].iter().rev()) {
                        *v = *v * t;
                    }
                    col_inv.process_with_scratch(col, s);
                },
            );
        // 4. Transpose back only the rows that the crop keeps.
        transpose_into(b, my, oy, mx, a, mx, 0, None);
        // 5. Inverse FFT along x and crop to the centre.
        a.par_chunks_mut(mx)
            .zip(field.par_chunks_mut(nx))
            .with_min_len(min_rows)
            .for_each_init(
                || vec![zero; row_scratch],
                |s, (arow, frow)| {
                    row_inv.process_with_scratch(arow, s);
                    frow.copy_from_slice(&arow[ox..ox + nx]);
                },
            );
    }
}
