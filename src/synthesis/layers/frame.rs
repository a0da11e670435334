//! The last step, from the scene's front plane to the plate, as one periodic transform over a
//! frame larger than memory, streamed through two scratch files (a segmented frame buffer in the
//! sense of Matsushima and Nakahara, Applied Optics 48, H54, 2009, here segmented by rows and by
//! column blocks).
//!
//! The frame is `n` = [nx, ny] samples on the plate's lattice, periodic, large enough that no
//! kept ray wraps onto the plate: at least the plate's plus the front plane's extent per axis
//! plus a guard (light from a point of the plane that travels by d lands at the point + d; within
//! the window of directions d stays inside a span of those two extents, so a period longer than
//! that never folds a ray back onto the plate). Passes:
//!
//! 1. **rows**: each row of the front plane, placed at its lattice columns modulo nx and
//!    transformed along x, is written to file A (plane rows x nx);
//! 2. **column blocks**: for a block of columns, the plane rows are read from A, placed at their
//!    lattice rows modulo ny, transformed along y, multiplied by the transfer function, transformed
//!    back along y; the plate's rows of the block are written to file B (plate rows x nx);
//! 3. **bands** (when the plate asks for rows): rows of B transformed back along x, the plate's
//!    columns kept.
//!
//! Memory: one plane row per thread, one column block (at most [`BLOCK_BYTES`]), one band. Every
//! 1-D transform is a fixed rustfft plan applied to one row or column, so results do not depend on
//! the thread count or on how the plate is cut into bands.

use std::fs::{File, OpenOptions};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use num_complex::{Complex32, Complex64};
use rayon::prelude::*;
use rustfft::{Fft, FftPlanner};

use super::transfer::{SpectralGrid, Window};
use crate::error::{Error, Result};

/// Largest column block of pass 2, bytes.
pub const BLOCK_BYTES: usize = 64 << 20;

const SAMPLE: usize = 8; // bytes per Complex32

fn to_bytes(v: &[Complex32], out: &mut Vec<u8>) {
    out.clear();
    out.reserve(v.len() * SAMPLE);
    for c in v {
        out.extend_from_slice(&c.re.to_le_bytes());
        out.extend_from_slice(&c.im.to_le_bytes());
    }
}

fn from_bytes(b: &[u8], out: &mut [Complex32]) {
    for (c, s) in out.iter_mut().zip(b.chunks_exact(SAMPLE)) {
        *c = Complex32::new(
            f32::from_le_bytes([s[0], s[1], s[2], s[3]]),
            f32::from_le_bytes([s[4], s[5], s[6], s[7]]),
        );
    }
}

/// A scratch file removed when dropped.
struct Scratch {
    file: File,
    path: PathBuf,
}

impl Scratch {
    fn create(path: PathBuf) -> Result<Scratch> {
        let file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
        Ok(Scratch { file, path })
    }
    fn write(&self, bytes: &[u8], at: u64) -> Result<()> {
        self.file
            .write_all_at(bytes, at)
            .map_err(|e| Error::io(&self.path, e))
    }
    fn read(&self, bytes: &mut [u8], at: u64) -> std::io::Result<()> {
        self.file.read_exact_at(bytes, at)
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

/// Where the front plane sits and where the plate sits, on the frame's lattice.
#[derive(Clone, Copy, Debug)]
pub struct FrameLayout {
    /// Frame samples [nx, ny].
    pub n: [usize; 2],
    /// Front plane samples [columns, rows].
    pub plane: [usize; 2],
    /// Lattice column and row of the plane's sample (0, 0) (the plate's is (0, 0)).
    pub plane_origin: [i64; 2],
    /// Plate [columns, rows].
    pub plate: [usize; 2],
}

impl FrameLayout {
    /// Bytes of the two scratch files.
    pub fn scratch_bytes(&self) -> u64 {
        (self.plane[1] as u64 + self.plate[1] as u64) * self.n[0] as u64 * SAMPLE as u64
    }
    /// Columns per block of pass 2.
    pub fn block_cols(&self) -> usize {
        (BLOCK_BYTES / (SAMPLE * (self.n[1] + self.plate[1]))).clamp(1, self.n[0])
    }
}

/// The plate's rows of the propagated frame, transformed along y and waiting for the x inverse.
pub struct Frame {
    b: Scratch,
    layout: FrameLayout,
    inverse_x: Arc<dyn Fft<f32>>,
    power: f64,
}

impl Frame {
    /// Propagates the front plane over `distance` to the plate; `plane_row(r, out)` reads its row
    /// r (of `layout.plane[1]`) into `out` (`layout.plane[0]` samples). `stem` names the scratch
    /// files in `dir`; `on_work` gets the share of the work done by each step (they add up to 1).
    #[allow(clippy::too_many_arguments)]
    pub fn build(
        plane_row: &(dyn Fn(usize, &mut [Complex32]) -> Result<()> + Sync),
        layout: FrameLayout,
        spectral: SpectralGrid,
        distance: f64,
        window: &Window,
        dir: &Path,
        stem: &str,
        on_work: &mut dyn FnMut(f64),
    ) -> Result<Frame> {
        let [nx, ny] = layout.n;
        let [pw, ph] = layout.plane;
        assert!(pw + layout.plate[0] <= nx && ph + layout.plate[1] <= ny);
        let mut planner = FftPlanner::<f32>::new();
        let (fx, ix) = (planner.plan_fft_forward(nx), planner.plan_fft_inverse(nx));
        let (fy, iy) = (planner.plan_fft_forward(ny), planner.plan_fft_inverse(ny));
        let a = Scratch::create(dir.join(format!(".{stem}.frame-a.partial")))?;
        let b = Scratch::create(dir.join(format!(".{stem}.frame-b.partial")))?;
        let wrap = |v: i64, n: usize| v.rem_euclid(n as i64) as usize;
        // Pass 1: rows along x.
        let row_share = 0.2;
        let chunk = 64usize;
        for first in (0..ph).step_by(chunk) {
            let rows = chunk.min(ph - first);
            (first..first + rows).into_par_iter().try_for_each_init(
                || {
                    (
                        vec![Complex32::new(0.0, 0.0); nx],
                        vec![Complex32::new(0.0, 0.0); fx.get_inplace_scratch_len()],
                        Vec::new(),
                        vec![Complex32::new(0.0, 0.0); pw],
                    )
                },
                |(row, scr, bytes, src), r| {
                    plane_row(r, src)?;
                    row.fill(Complex32::new(0.0, 0.0));
                    for (j, v) in src.iter().enumerate() {
                        row[wrap(layout.plane_origin[0] + j as i64, nx)] = *v;
                    }
                    fx.process_with_scratch(row, scr);
                    to_bytes(row, bytes);
                    a.write(bytes, (r * nx * SAMPLE) as u64)
                },
            )?;
            on_work(row_share * rows as f64 / ph as f64);
        }
        // Pass 2: column blocks along y, the transfer function, back along y.
        let bc = layout.block_cols();
        let mut cols = vec![Complex32::new(0.0, 0.0); bc * ny];
        let mut out = vec![Complex32::new(0.0, 0.0); bc * layout.plate[1]];
        let mut bytes = vec![0u8; bc * SAMPLE];
        let mut vals = vec![Complex32::new(0.0, 0.0); bc];
        let mut power = 0.0f64;
        let mut c0 = 0;
        while c0 < nx {
            let c1 = (c0 + bc).min(nx);
            let w = c1 - c0;
            cols[..w * ny].fill(Complex32::new(0.0, 0.0));
            for r in 0..ph {
                a.read(&mut bytes[..w * SAMPLE], ((r * nx + c0) * SAMPLE) as u64)
                    .map_err(|e| Error::io(&a.path, e))?;
                from_bytes(&bytes[..w * SAMPLE], &mut vals[..w]);
                let row = wrap(layout.plane_origin[1] + r as i64, ny);
                for (k, v) in vals[..w].iter().enumerate() {
                    cols[k * ny + row] = *v;
                }
            }
            cols[..w * ny].par_chunks_mut(ny).enumerate().for_each_init(
                || {
                    vec![
                        Complex32::new(0.0, 0.0);
                        fy.get_inplace_scratch_len()
                            .max(iy.get_inplace_scratch_len())
                    ]
                },
                |scr, (k, col)| {
                    fy.process_with_scratch(col, scr);
                    let f_x = spectral.fx(c0 + k);
                    for (i, v) in col.iter_mut().enumerate() {
                        *v *= spectral.transfer_at(f_x, spectral.fy(i), distance, window);
                    }
                    iy.process_with_scratch(col, scr);
                },
            );
            // The plate's rows sit at frame rows 0..plate rows (its lattice origin is 0).
            for r in 0..layout.plate[1] {
                for k in 0..w {
                    out[r * bc + k] = cols[k * ny + r];
                }
            }
            let mut rb = Vec::new();
            for r in 0..layout.plate[1] {
                // Parseval along x: sum_x |F|^2 = N_x sum_k |out|^2 / (N_x N_y)^2.
                power += out[r * bc..r * bc + w]
                    .iter()
                    .map(|v| f64::from(v.norm_sqr()))
                    .sum::<f64>();
                to_bytes(&out[r * bc..r * bc + w], &mut rb);
                b.write(&rb, ((r * nx + c0) * SAMPLE) as u64)?;
            }
            on_work((1.0 - row_share) * w as f64 / nx as f64);
            c0 = c1;
        }
        b.file.sync_data().map_err(|e| Error::io(&b.path, e))?;
        drop(a);
        Ok(Frame {
            power: power * nx as f64 / (nx as f64 * ny as f64).powi(2),
            b,
            layout,
            inverse_x: ix,
        })
    }

    /// sum |F|^2 over the plate's rows across the whole frame width (Parseval, summed in a fixed
    /// order): the plate's own power plus what lands beside it.
    pub fn plate_power(&self) -> f64 {
        self.power
    }

    /// F on plate rows [r0, r0 + n) into `out` (n x plate columns).
    ///
    /// # Panics
    /// If the scratch file cannot be read back (it was written and synced by [`Frame::build`];
    /// the message names it), or `out` has the wrong length.
    ///
    /// Values with |F| below `floor` are written as 0 (see [`super::LayerSynthesis::prepare`]).
    pub fn read_band(&self, r0: usize, n: usize, out: &mut [Complex64], floor: f64) {
        let [nx, ny] = self.layout.n;
        let w = self.layout.plate[0];
        assert_eq!(out.len(), n * w, "band buffer mismatch");
        let scale = 1.0 / (nx as f64 * ny as f64);
        let mut bytes = vec![0u8; nx * SAMPLE];
        let mut row = vec![Complex32::new(0.0, 0.0); nx];
        let mut scr = vec![Complex32::new(0.0, 0.0); self.inverse_x.get_inplace_scratch_len()];
        for (r, dst) in out.chunks_exact_mut(w).enumerate() {
            let at = ((r0 + r) * nx * SAMPLE) as u64;
            if let Err(e) = self.b.read(&mut bytes, at) {
                panic!(
                    "{}: reading back the propagated frame failed: {e}",
                    self.b.path.display()
                );
            }
            from_bytes(&bytes, &mut row);
            self.inverse_x.process_with_scratch(&mut row, &mut scr);
            for (o, v) in dst.iter_mut().zip(&row[..w]) {
                let f = Complex64::new(f64::from(v.re) * scale, f64::from(v.im) * scale);
                *o = if f.norm_sqr() < floor * floor {
                    Complex64::new(0.0, 0.0)
                } else {
                    f
                };
            }
        }
    }
}
