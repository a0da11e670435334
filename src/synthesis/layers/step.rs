//! One slab's step in place on the front plane's grid: rows forward, then columns gathered in
//! blocks, transformed, multiplied by the transfer function and transformed back, then rows back.
//!
//! Against a 2-D transform through a transposed copy (`optics::fft2d`), this holds one grid, not
//! two: the column blocks in flight are a few megabytes. Every 1-D transform is the same rustfft
//! plan on the same data whatever the thread count, so the bits do not depend on it.

use std::sync::Arc;

use num_complex::Complex32;
use rayon::prelude::*;
use rustfft::{Fft, FftPlanner};

/// Columns gathered per block.
const BLOCK: usize = 32;

/// The plans of a step on a `w` x `h` grid.
pub struct Step {
    w: usize,
    h: usize,
    fx: Arc<dyn Fft<f32>>,
    ix: Arc<dyn Fft<f32>>,
    fy: Arc<dyn Fft<f32>>,
    iy: Arc<dyn Fft<f32>>,
}

impl Step {
    /// Plans a step on `w` columns x `h` rows.
    pub fn new(w: usize, h: usize) -> Step {
        let mut p = FftPlanner::<f32>::new();
        Step {
            w,
            h,
            fx: p.plan_fft_forward(w),
            ix: p.plan_fft_inverse(w),
            fy: p.plan_fft_forward(h),
            iy: p.plan_fft_inverse(h),
        }
    }

    fn rows(&self, u: &mut [Complex32], fft: &Arc<dyn Fft<f32>>, scale: f32) {
        let len = fft.get_inplace_scratch_len();
        u.par_chunks_mut(self.w).for_each_init(
            || vec![Complex32::new(0.0, 0.0); len],
            |s, row| {
                fft.process_with_scratch(row, s);
                if scale != 1.0 {
                    for v in row.iter_mut() {
                        *v *= scale;
                    }
                }
            },
        );
    }

    /// u <- IFFT2(transfer . FFT2(u)), `transfer` column-major (column j at `[j h, (j + 1) h)`).
    ///
    /// # Panics
    /// If a buffer has the wrong length.
    pub fn apply(&self, u: &mut [Complex32], transfer: &[Complex32]) {
        let (w, h) = (self.w, self.h);
        assert!(
            u.len() == w * h && transfer.len() == w * h,
            "step buffer mismatch"
        );
        self.rows(u, &self.fx, 1.0);
        let blocks: Vec<usize> = (0..w).step_by(BLOCK).collect();
        let group = 4 * rayon::current_num_threads().max(1);
        let len = self
            .fy
            .get_inplace_scratch_len()
            .max(self.iy.get_inplace_scratch_len());
        for starts in blocks.chunks(group) {
            // Gather and transform each block of columns (reads only).
            let done: Vec<Vec<Complex32>> = starts
                .par_iter()
                .map_init(
                    || vec![Complex32::new(0.0, 0.0); len],
                    |s, &c0| {
                        let n = BLOCK.min(w - c0);
                        let mut cols = vec![Complex32::new(0.0, 0.0); n * h];
                        for i in 0..h {
                            for k in 0..n {
                                cols[k * h + i] = u[i * w + c0 + k];
                            }
                        }
                        for (k, col) in cols.chunks_exact_mut(h).enumerate() {
                            self.fy.process_with_scratch(col, s);
                            for (v, t) in col.iter_mut().zip(&transfer[(c0 + k) * h..]) {
                                *v *= t;
                            }
                            self.iy.process_with_scratch(col, s);
                        }
                        cols
                    },
                )
                .collect();
            // Scatter back, row by row.
            u.par_chunks_mut(w).enumerate().for_each(|(i, row)| {
                for (&c0, cols) in starts.iter().zip(&done) {
                    let n = cols.len() / h;
                    for k in 0..n {
                        row[c0 + k] = cols[k * h + i];
                    }
                }
            });
        }
        self.rows(u, &self.ix, 1.0 / (w as f32 * h as f32));
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;
    use crate::optics::fft2d::Fft2d;

    /// The in-place step equals the 2-D transform through the transposed copy, on an odd,
    /// non-square grid wider than one block.
    #[test]
    fn step_equals_the_plain_2d_transform() {
        let (w, h) = (75, 42);
        let mut s = 7u64;
        let mut rnd = || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            (s % 2001) as f32 / 1000.0 - 1.0
        };
        let u0: Vec<Complex32> = (0..w * h).map(|_| Complex32::new(rnd(), rnd())).collect();
        let t: Vec<Complex32> = (0..w * h).map(|_| Complex32::new(rnd(), rnd())).collect();
        let mut a = u0.clone();
        Step::new(w, h).apply(&mut a, &t);
        let fft = Fft2d::<f32>::new(w, h);
        let mut b = u0.clone();
        let mut scr = vec![Complex32::new(0.0, 0.0); fft.scratch_len()];
        fft.run(
            &mut b,
            &mut scr,
            false,
            |_, _| {},
            |j, col| {
                for (v, x) in col.iter_mut().zip(&t[j * h..(j + 1) * h]) {
                    *v *= x;
                }
            },
        );
        fft.process_inverse_with_scratch(&mut b, &mut scr);
        let err = a
            .iter()
            .zip(&b)
            .map(|(x, y)| (x - y).norm())
            .fold(0.0, f32::max);
        let max = b.iter().map(|x| x.norm()).fold(0.0, f32::max);
        assert!(err <= 1e-5 * max, "error {err} of {max}");
    }
}
