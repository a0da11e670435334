//! Two-dimensional FFT over a row-major buffer, built on rustfft's one-dimensional plans.
//!
//! This module owns the 2-D transform used by every FFT-based propagator: row FFTs run in parallel
//! with rayon, columns are transformed after a cache-blocked transpose into a scratch buffer (so every
//! 1-D FFT runs on contiguous memory), and the result is transposed back. It also owns the blocked
//! transpose and the `fftshift` / `ifftshift` helpers. It depends only on rustfft and rayon: nothing
//! here may depend on scenes, jobs, encodings or output.
//!
//! # Normalization
//! The forward transform is unnormalized,
//! `X[m, n] = sum_{i, j} x[i, j] exp(-2 pi i (j n / nx + i m / ny))` (row index i, column index j).
//! [`Fft2d::process_inverse`] uses the opposite sign and multiplies by `1 / (nx ny)`, so a forward
//! transform followed by an inverse one returns the input. [`Fft2d::process_inverse_unnormalized`]
//! skips that factor.
//!
//! # Output order
//! Standard FFT order: index 0 is the zero frequency along each axis, negative frequencies occupy the
//! upper half. [`fftshift`] moves the zero frequency to index `n / 2` (rounded down) along both axes,
//! [`ifftshift`] undoes it (the two differ for odd sizes).
//!
//! # Determinism
//! Every row and column is transformed independently by the same plan, so the result does not depend
//! on the number of rayon threads: it is bit-for-bit identical for any pool size.

use std::sync::Arc;

use num_complex::Complex;
use rayon::prelude::*;
use rustfft::{Fft, FftNum, FftPlanner};

/// Edge of the square tiles used by the blocked transpose. 32 x 32 complex f64 values are 16 KiB,
/// which keeps one source and one destination tile inside a typical L1 data cache.
const TILE: usize = 32;

/// Minimum number of elements handed to one rayon task by the row passes, so tiny transforms are
/// not split into tasks that cost more to schedule than to run.
const MIN_TASK_ELEMS: usize = 4096;

/// A planned 2-D FFT of shape `ny` rows x `nx` columns (row-major), forward and inverse.
///
/// The four 1-D plans are built once and shared (`Arc`), so a `Fft2d` is cheap to clone and may be
/// used from many threads at once.
///
/// ```
/// use fringemill::optics::fft2d::Fft2d;
/// use num_complex::Complex64;
/// let fft = Fft2d::<f64>::new(4, 3);
/// let mut data = vec![Complex64::new(1.0, 0.0); 12];
/// fft.process(&mut data);
/// assert!((data[0].re - 12.0).abs() < 1e-12); // unnormalized: the DC bin is the sum
/// fft.process_inverse(&mut data);
/// assert!((data[5].re - 1.0).abs() < 1e-12);
/// ```
#[derive(Clone)]
pub struct Fft2d<T: FftNum> {
    nx: usize,
    ny: usize,
    row_forward: Arc<dyn Fft<T>>,
    row_inverse: Arc<dyn Fft<T>>,
    col_forward: Arc<dyn Fft<T>>,
    col_inverse: Arc<dyn Fft<T>>,
}

impl<T: FftNum> std::fmt::Debug for Fft2d<T> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Fft2d")
            .field("nx", &self.nx)
            .field("ny", &self.ny)
            .finish()
    }
}

impl<T: FftNum> Fft2d<T> {
    /// Plans a transform of `ny` rows by `nx` columns with a fresh rustfft planner.
    ///
    /// # Panics
    /// If `nx` or `ny` is zero.
    pub fn new(nx: usize, ny: usize) -> Self {
        Self::with_planner(&mut FftPlanner::new(), nx, ny)
    }

    /// Plans a transform of `ny` rows by `nx` columns, reusing the 1-D plans cached in `planner`.
    ///
    /// # Panics
    /// If `nx` or `ny` is zero.
    pub fn with_planner(planner: &mut FftPlanner<T>, nx: usize, ny: usize) -> Self {
        assert!(nx > 0 && ny > 0, "Fft2d: empty shape {nx} x {ny}");
        Fft2d {
            nx,
            ny,
            row_forward: planner.plan_fft_forward(nx),
            row_inverse: planner.plan_fft_inverse(nx),
            col_forward: planner.plan_fft_forward(ny),
            col_inverse: planner.plan_fft_inverse(ny),
        }
    }

    /// Number of columns (length of one row).
    pub fn nx(&self) -> usize {
        self.nx
    }

    /// Number of rows.
    pub fn ny(&self) -> usize {
        self.ny
    }

    /// Length of the scratch buffer that the `*_with_scratch` methods need: `nx * ny`.
    pub fn scratch_len(&self) -> usize {
        self.nx * self.ny
    }

    /// The 1-D plans (rows of length `nx`, columns of length `ny`), forward or inverse.
    pub(crate) fn plans(&self, inverse: bool) -> (&Arc<dyn Fft<T>>, &Arc<dyn Fft<T>>) {
        if inverse {
            (&self.row_inverse, &self.col_inverse)
        } else {
            (&self.row_forward, &self.col_forward)
        }
    }

    /// Forward transform in place (unnormalized). Allocates its scratch.
    ///
    /// # Panics
    /// If `data.len() != nx * ny`.
    pub fn process(&self, data: &mut [Complex<T>]) {
        let mut scratch = vec![Complex::new(T::zero(), T::zero()); self.scratch_len()];
        self.process_with_scratch(data, &mut scratch);
    }

    /// Forward transform in place (unnormalized), with caller-provided scratch of
    /// [`scratch_len`](Self::scratch_len) elements. The scratch content on entry is irrelevant.
    ///
    /// # Panics
    /// If `data.len() != nx * ny` or `scratch.len() < nx * ny`.
    pub fn process_with_scratch(&self, data: &mut [Complex<T>], scratch: &mut [Complex<T>]) {
        self.run(data, scratch, false, |_, _| {}, |_, _| {});
    }

    /// Inverse transform in place, scaled by `1 / (nx ny)`. Allocates its scratch.
    ///
    /// # Panics
    /// If `data.len() != nx * ny`.
    pub fn process_inverse(&self, data: &mut [Complex<T>]) {
        let mut scratch = vec![Complex::new(T::zero(), T::zero()); self.scratch_len()];
        self.process_inverse_with_scratch(data, &mut scratch);
    }

    /// Inverse transform in place, scaled by `1 / (nx ny)`, with caller-provided scratch.
    ///
    /// # Panics
    /// If `data.len() != nx * ny` or `scratch.len() < nx * ny`.
    pub fn process_inverse_with_scratch(
        &self,
        data: &mut [Complex<T>],
        scratch: &mut [Complex<T>],
    ) {
        let scale = T::from_f64(1.0 / (self.nx as f64 * self.ny as f64)).expect("FftNum from f64");
        self.run(
            data,
            scratch,
            true,
            |_, _| {},
            move |_, col| {
                for v in col.iter_mut() {
                    *v = *v * scale;
                }
            },
        );
    }

    /// Inverse transform in place without the `1 / (nx ny)` factor, with caller-provided scratch.
    ///
    /// # Panics
    /// If `data.len() != nx * ny` or `scratch.len() < nx * ny`.
    pub fn process_inverse_unnormalized(
        &self,
        data: &mut [Complex<T>],
        scratch: &mut [Complex<T>],
    ) {
        self.run(data, scratch, true, |_, _| {}, |_, _| {});
    }

    /// The whole 2-D pass with two hooks, used by the propagators to fuse their pointwise factors
    /// into the FFT passes while the data is in cache:
    /// * `row_hook(i, row)` runs on row `i` (length `nx`) just before its 1-D FFT;
    /// * `col_hook(j, col)` runs on column `j` (length `ny`, contiguous in the transposed scratch)
    ///   just after its 1-D FFT.
    ///
    /// No normalization is applied here.
    pub(crate) fn run<R, C>(
        &self,
        data: &mut [Complex<T>],
        scratch: &mut [Complex<T>],
        inverse: bool,
        row_hook: R,
        col_hook: C,
    ) where
        R: Fn(usize, &mut [Complex<T>]) + Sync,
        C: Fn(usize, &mut [Complex<T>]) + Sync,
    {
        let (nx, ny) = (self.nx, self.ny);
        if data.len() != nx * ny {
            length_error("data", data.len(), nx * ny);
        }
        if scratch.len() < nx * ny {
            length_error("scratch", scratch.len(), nx * ny);
        }
        let scratch = &mut scratch[..nx * ny];
        let (row_fft, col_fft) = self.plans(inverse);

        rows_in_place(data, nx, row_fft, |i, row| row_hook(i, row), |_, _| {});
        columns_into(data, nx, ny, col_fft, scratch, |j, col| col_hook(j, col));
        transpose_into(scratch, ny, 0, nx, data, nx, 0, None);
    }
}

impl<T: FftNum> Fft2d<T> {
    /// First half of a pass that leaves its output transposed: rows of `src` are copied into
    /// `work`, `row_hook(i, row)` runs and the row FFTs follow, then the column FFTs write the
    /// spectrum transposed into `out_t` (column j is `out_t[j * ny..(j + 1) * ny]`), calling
    /// `col_hook(j, col)` after each. `src` is not changed; `work` ends as scratch.
    ///
    /// Against [`run`](Self::run) this saves the transpose back and the copy of the input: two
    /// of the three passes over memory that a loop alternating forward and back transforms would
    /// otherwise spend on layout. No normalization is applied.
    ///
    /// # Panics
    /// If a buffer does not hold `nx * ny` elements.
    pub(crate) fn run_into_transposed<R, C>(
        &self,
        src: &[Complex<T>],
        work: &mut [Complex<T>],
        out_t: &mut [Complex<T>],
        inverse: bool,
        row_hook: R,
        col_hook: C,
    ) where
        R: Fn(usize, &mut [Complex<T>]) + Sync,
        C: Fn(usize, &mut [Complex<T>]) + Sync,
    {
        let (nx, ny) = (self.nx, self.ny);
        for (what, len) in [
            ("source", src.len()),
            ("work", work.len()),
            ("output", out_t.len()),
        ] {
            if len != nx * ny {
                length_error(what, len, nx * ny);
            }
        }
        let (row_fft, col_fft) = self.plans(inverse);
        let scratch_len = row_fft.get_inplace_scratch_len();
        let min_rows = (MIN_TASK_ELEMS / nx).max(1);
        work.par_chunks_mut(nx)
            .zip(src.par_chunks(nx))
            .with_min_len(min_rows)
            .enumerate()
            .for_each_init(
                || vec![Complex::new(T::zero(), T::zero()); scratch_len],
                |fft_scratch, (i, (row, s))| {
                    row.copy_from_slice(s);
                    row_hook(i, row);
                    row_fft.process_with_scratch(row, fft_scratch);
                },
            );
        columns_into(work, nx, ny, col_fft, out_t, col_hook);
    }

    /// Second half, the mirror of [`run_into_transposed`](Self::run_into_transposed): `in_t`
    /// holds the input transposed (column j at `in_t[j * ny..(j + 1) * ny]`); `col_hook(j, col)`
    /// runs on each column before its FFT (in place, contiguous), then the row FFTs write the
    /// result row-major into `out`, calling `row_hook(i, row)` after each. `in_t` ends as
    /// scratch. No normalization is applied.
    ///
    /// # Panics
    /// If a buffer does not hold `nx * ny` elements.
    pub(crate) fn run_from_transposed<C, R>(
        &self,
        in_t: &mut [Complex<T>],
        out: &mut [Complex<T>],
        inverse: bool,
        col_hook: C,
        row_hook: R,
    ) where
        C: Fn(usize, &mut [Complex<T>]) + Sync,
        R: Fn(usize, &mut [Complex<T>]) + Sync,
    {
        let (nx, ny) = (self.nx, self.ny);
        for (what, len) in [("input", in_t.len()), ("output", out.len())] {
            if len != nx * ny {
                length_error(what, len, nx * ny);
            }
        }
        let (row_fft, col_fft) = self.plans(inverse);
        rows_in_place(in_t, ny, col_fft, col_hook, |_, _| {});
        // The columns of the transposed buffer (nx rows of length ny) are the output's rows.
        columns_into(in_t, ny, nx, row_fft, out, row_hook);
    }
}

/// Runs `fft` on every row (length `len`) of `data` in parallel, calling `before(i, row)` ahead of
/// the FFT and `after(i, row)` behind it. One rustfft scratch buffer per rayon task.
pub(crate) fn rows_in_place<T, B, A>(
    data: &mut [Complex<T>],
    len: usize,
    fft: &Arc<dyn Fft<T>>,
    before: B,
    after: A,
) where
    T: FftNum,
    B: Fn(usize, &mut [Complex<T>]) + Sync,
    A: Fn(usize, &mut [Complex<T>]) + Sync,
{
    debug_assert_eq!(fft.len(), len);
    let scratch_len = fft.get_inplace_scratch_len();
    let min_rows = (MIN_TASK_ELEMS / len.max(1)).max(1);
    data.par_chunks_mut(len)
        .with_min_len(min_rows)
        .enumerate()
        .for_each_init(
            || vec![Complex::new(T::zero(), T::zero()); scratch_len],
            |fft_scratch, (i, row)| {
                before(i, row);
                fft.process_with_scratch(row, fft_scratch);
                after(i, row);
            },
        );
}

/// Columns per task of [`columns_into`]: a strip of 16 columns reads whole 128-byte row segments
/// (complex f32) and its transposed copy (16 x ny values) stays in L2 while it is transformed.
const STRIP: usize = 16;

/// Column FFTs fused with the transpose: for each strip of [`STRIP`] columns of the row-major
/// `ny x nx` buffer `data`, copies the columns into their place in `out` (transposed layout:
/// column j is `out[j * ny..(j + 1) * ny]`), runs `fft` on each while it is in cache, then
/// `after(j, col)`. One pass over memory instead of a transpose followed by a row pass.
pub(crate) fn columns_into<T, A>(
    data: &[Complex<T>],
    nx: usize,
    ny: usize,
    fft: &Arc<dyn Fft<T>>,
    out: &mut [Complex<T>],
    after: A,
) where
    T: FftNum,
    A: Fn(usize, &mut [Complex<T>]) + Sync,
{
    debug_assert_eq!(fft.len(), ny);
    let scratch_len = fft.get_inplace_scratch_len();
    out[..nx * ny]
        .par_chunks_mut(ny * STRIP)
        .enumerate()
        .for_each_init(
            || vec![Complex::new(T::zero(), T::zero()); scratch_len],
            |fft_scratch, (s, chunk)| {
                let c0 = s * STRIP;
                let bc = chunk.len() / ny;
                // Gather in row blocks so each destination column segment is written while the
                // block's rows are in L1.
                let mut r0 = 0;
                while r0 < ny {
                    let r1 = (r0 + TILE).min(ny);
                    for b in 0..bc {
                        let dst = &mut chunk[b * ny + r0..b * ny + r1];
                        for (k, d) in dst.iter_mut().enumerate() {
                            *d = data[(r0 + k) * nx + c0 + b];
                        }
                    }
                    r0 = r1;
                }
                for (b, col) in chunk.chunks_exact_mut(ny).enumerate() {
                    fft.process_with_scratch(col, fft_scratch);
                    after(c0 + b, col);
                }
            },
        );
}

/// Cache-blocked, parallel, out-of-place transpose of a sub-block.
///
/// Source: `src_rows` rows of stride `src_stride`, columns `src_col0 .. src_col0 + n` where
/// `n = dst.len() / dst_stride` is the number of destination rows. Destination row `c` receives source
/// column `src_col0 + c` at positions `dst_col0 .. dst_col0 + src_rows`:
/// `dst[c * dst_stride + dst_col0 + r] = src[r * src_stride + src_col0 + c]`.
/// With `fill = Some(v)` the rest of every destination row is set to `v`; with `None` it is left as is.
///
/// # Panics
/// If the block does not fit in either buffer.
#[allow(clippy::too_many_arguments)]
pub(crate) fn transpose_into<V: Copy + Send + Sync>(
    src: &[V],
    src_stride: usize,
    src_col0: usize,
    src_rows: usize,
    dst: &mut [V],
    dst_stride: usize,
    dst_col0: usize,
    fill: Option<V>,
) {
    assert!(
        dst_stride > 0 && dst.len().is_multiple_of(dst_stride),
        "transpose: ragged destination"
    );
    let n = dst.len() / dst_stride;
    assert!(
        src_col0 + n <= src_stride,
        "transpose: source columns out of range"
    );
    assert!(
        src_rows * src_stride <= src.len(),
        "transpose: source rows out of range"
    );
    assert!(
        dst_col0 + src_rows <= dst_stride,
        "transpose: destination columns out of range"
    );
    dst.par_chunks_mut(dst_stride * TILE)
        .enumerate()
        .for_each(|(block, chunk)| {
            let c0 = block * TILE;
            let bc = chunk.len() / dst_stride;
            if let Some(v) = fill {
                for c in 0..bc {
                    let row = &mut chunk[c * dst_stride..(c + 1) * dst_stride];
                    row[..dst_col0].fill(v);
                    row[dst_col0 + src_rows..].fill(v);
                }
            }
            // Copy a tile of source rows (contiguous reads) into a small buffer, then write each
            // destination row segment contiguously from it (the strided reads stay in L1).
            let mut tile: Vec<V> = Vec::with_capacity(TILE * bc);
            let mut r0 = 0;
            while r0 < src_rows {
                let r1 = (r0 + TILE).min(src_rows);
                tile.clear();
                for r in r0..r1 {
                    let start = r * src_stride + src_col0 + c0;
                    tile.extend_from_slice(&src[start..start + bc]);
                }
                for c in 0..bc {
                    let start = c * dst_stride + dst_col0 + r0;
                    let out = &mut chunk[start..start + (r1 - r0)];
                    for (d, &v) in out.iter_mut().zip(tile[c..].iter().step_by(bc)) {
                        *d = v;
                    }
                }
                r0 = r1;
            }
        });
}

/// Moves the zero frequency of a row-major `ny x nx` spectrum from index 0 to index `n / 2` (rounded
/// down) along both axes, as numpy's `fftshift` does.
///
/// # Panics
/// If `data.len() != nx * ny`.
pub fn fftshift<V: Copy + Send>(data: &mut [V], nx: usize, ny: usize) {
    rotate_2d(data, nx, ny, nx / 2, ny / 2);
}

/// Inverse of [`fftshift`]: moves index `n / 2` back to index 0 along both axes.
///
/// # Panics
/// If `data.len() != nx * ny`.
pub fn ifftshift<V: Copy + Send>(data: &mut [V], nx: usize, ny: usize) {
    rotate_2d(data, nx, ny, nx - nx / 2, ny - ny / 2);
}

/// Cyclic shift right by `sx` columns and `sy` rows.
fn rotate_2d<V: Copy + Send>(data: &mut [V], nx: usize, ny: usize, sx: usize, sy: usize) {
    if data.len() != nx * ny {
        length_error("data", data.len(), nx * ny);
    }
    if nx == 0 || ny == 0 {
        return;
    }
    data.par_chunks_mut(nx)
        .for_each(|row| row.rotate_right(sx % nx));
    data.rotate_right((sy % ny) * nx);
}

#[cold]
#[inline(never)]
fn length_error(what: &str, got: usize, want: usize) -> ! {
    panic!("Fft2d: {what} has {got} elements, expected {want}");
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn transpose_sub_block_with_fill() {
        // Source 3 x 5, take columns 1..4 (three of them) into a 3 x 6 destination at column 2.
        let src: Vec<i32> = (0..15).collect();
        let mut dst = vec![-7; 3 * 6];
        transpose_into(&src, 5, 1, 3, &mut dst, 6, 2, Some(0));
        #[rustfmt::skip]
        let want = vec![
            0, 0, 1, 6, 11, 0,
            0, 0, 2, 7, 12, 0,
            0, 0, 3, 8, 13, 0,
        ];
        assert_eq!(dst, want);
    }

    #[test]
    fn transpose_larger_than_a_tile_round_trips() {
        let (r, c) = (70, 45);
        let src: Vec<u32> = (0..(r * c) as u32).collect();
        let mut t = vec![0; r * c];
        transpose_into(&src, c, 0, r, &mut t, r, 0, None);
        for i in 0..r {
            for j in 0..c {
                assert_eq!(t[j * r + i], src[i * c + j]);
            }
        }
        let mut back = vec![0; r * c];
        transpose_into(&t, r, 0, c, &mut back, c, 0, None);
        assert_eq!(back, src);
    }

    #[test]
    fn shift_odd_and_even() {
        // Common practice (numpy.fft.fftshift): [0 1 2 3 4] -> [3 4 0 1 2]; [0 1 2 3] -> [2 3 0 1].
        let mut a = vec![0, 1, 2, 3, 4];
        fftshift(&mut a, 5, 1);
        assert_eq!(a, vec![3, 4, 0, 1, 2]);
        ifftshift(&mut a, 5, 1);
        assert_eq!(a, vec![0, 1, 2, 3, 4]);
        let mut b: Vec<i32> = (0..12).collect(); // 3 rows x 4 columns
        fftshift(&mut b, 4, 3);
        assert_eq!(b, vec![10, 11, 8, 9, 2, 3, 0, 1, 6, 7, 4, 5]);
        ifftshift(&mut b, 4, 3);
        assert_eq!(b, (0..12).collect::<Vec<_>>());
    }
}
