//! The front plane held on disk and carried slab by slab in tiles with overlap margins, for scenes
//! whose front plane does not fit in memory (tiled propagation with overlap margins, streamed to
//! disk: the segmented frame buffer of Matsushima and Nakahara, Applied Optics 48, H54, 2009,
//! applied to the slab steps).
//!
//! One slab's step reaches only the slab's thickness times the steepest kept ray
//! ([`super::LayerSynthesis::step_halo`]): each tile of the plane is read with that margin around
//! it (zeros beyond the plane), carried in one periodic transform of the tile plus margins, masked
//! and added to over its core only, and written to the other of two files. Light that wraps around
//! the tile's period lands in the margins, never in the core. Memory: one tile with its margins,
//! its transfer function, the parity bits of the closed occluders (one bit per plane sample).

use std::fs::{File, OpenOptions};
use std::os::unix::fs::FileExt;
use std::path::PathBuf;

use num_complex::Complex32;
use rayon::prelude::*;

use super::slices::{LatticeRect, Slices};
use super::step::Step;
use super::transfer::smooth_size;
use super::LayerSynthesis;
use crate::error::{Error, Result};
use crate::scene::mesh::Mesh;

const SAMPLE: usize = 8;

/// A plane of complex f32 samples in a scratch file (row-major), removed when dropped.
pub struct PlaneFile {
    file: File,
    path: PathBuf,
    w: usize,
    h: usize,
}

impl PlaneFile {
    fn create(path: PathBuf, w: usize, h: usize) -> Result<PlaneFile> {
        let file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&path)
            .map_err(|e| Error::io(&path, e))?;
        file.set_len((w * h * SAMPLE) as u64)
            .map_err(|e| Error::io(&path, e))?;
        Ok(PlaneFile { file, path, w, h })
    }

    /// Rows from r0 x columns [c0, c0 + cols) into `out` (as many rows as it holds), zero outside
    /// the plane.
    fn read_rect(&self, r0: i64, c0: i64, cols: usize, out: &mut [Complex32]) -> Result<()> {
        out.fill(Complex32::new(0.0, 0.0));
        let (a, b) = (
            c0.max(0) as usize,
            ((c0 + cols as i64).min(self.w as i64)).max(0) as usize,
        );
        if a >= b {
            return Ok(());
        }
        let skip = (a as i64 - c0) as usize;
        out.par_chunks_mut(cols).enumerate().try_for_each_init(
            || vec![0u8; (b - a) * SAMPLE],
            |bytes, (i, dst)| {
                let r = r0 + i as i64;
                if r < 0 || r >= self.h as i64 {
                    return Ok(());
                }
                self.file
                    .read_exact_at(bytes, ((r as usize * self.w + a) * SAMPLE) as u64)
                    .map_err(|e| Error::io(&self.path, e))?;
                for (o, s) in dst[skip..].iter_mut().zip(bytes.chunks_exact(SAMPLE)) {
                    *o = Complex32::new(
                        f32::from_le_bytes([s[0], s[1], s[2], s[3]]),
                        f32::from_le_bytes([s[4], s[5], s[6], s[7]]),
                    );
                }
                Ok(())
            },
        )
    }

    fn write_rect(
        &self,
        r0: usize,
        c0: usize,
        rows: usize,
        cols: usize,
        data: &[Complex32],
    ) -> Result<()> {
        data[..rows * cols]
            .par_chunks(cols)
            .enumerate()
            .try_for_each_init(
                || Vec::with_capacity(cols * SAMPLE),
                |bytes, (i, row)| {
                    bytes.clear();
                    for v in row {
                        bytes.extend_from_slice(&v.re.to_le_bytes());
                        bytes.extend_from_slice(&v.im.to_le_bytes());
                    }
                    self.file
                        .write_all_at(bytes, (((r0 + i) * self.w + c0) * SAMPLE) as u64)
                        .map_err(|e| Error::io(&self.path, e))
                },
            )
    }

    /// Row `r` into `out` (the plane's width).
    pub fn read_row(&self, r: usize, out: &mut [Complex32]) -> Result<()> {
        self.read_rect(r as i64, 0, self.w, out)
    }
}

impl Drop for PlaneFile {
    fn drop(&mut self) {
        let _ = std::fs::remove_file(&self.path);
    }
}

impl LayerSynthesis {
    /// The front plane as [`LayerSynthesis::front_plane`] computes it, in tiles of `core` x `core`
    /// samples (the last ones smaller) through two scratch files; the file holding the result.
    pub fn front_plane_tiled(
        &self,
        core: usize,
        on_work: &mut dyn FnMut(f64),
    ) -> Result<PlaneFile> {
        let shaders = self.shaders()?;
        let rect = self.plane_rect();
        let [w, h] = rect.size;
        // Tiles of equal size, at most `core` on a side (a thin last tile would cost a whole
        // transform for a sliver).
        let even = |len: usize| len.div_ceil(len.div_ceil(core.max(1)));
        let core = [even(w), even(h)];
        let [hx, hy] = self.step_halo();
        let n = [smooth_size(core[0] + 2 * hx), smooth_size(core[1] + 2 * hy)];
        let count = self.slicing().count;
        let step = Step::new(n[0], n[1]);
        let hop = if count > 1 {
            self.spectral(n)
                .transfer_columns(self.slicing().spacing, &self.hop_window)
        } else {
            Vec::new()
        };
        let mut tiles = Vec::new();
        for r0 in (0..h).step_by(core[1]) {
            for c0 in (0..w).step_by(core[0]) {
                tiles.push(LatticeRect {
                    origin: [rect.origin[0] + c0 as i64, rect.origin[1] + r0 as i64],
                    size: [core[0].min(w - c0), core[1].min(h - r0)],
                });
            }
        }
        let meshes: Vec<&Mesh> = self.objects.iter().map(|o| &o.mesh).collect();
        let slices: Vec<Slices> = tiles
            .iter()
            .map(|t| Slices::new(&meshes, self.plate(), *t, self.slicing()))
            .collect();
        let mut behind = self.parity_bits();
        let dir = self.scratch_dir();
        let mut cur = PlaneFile::create(dir.join(format!(".{}.plane-a.partial", self.stem)), w, h)?;
        let mut next =
            PlaneFile::create(dir.join(format!(".{}.plane-b.partial", self.stem)), w, h)?;
        let mut buf = vec![Complex32::new(0.0, 0.0); n[0] * n[1]];
        let mut lit = false;
        for k in (0..count).rev() {
            let stepping = lit && k + 1 < count;
            let mut lit_now = lit;
            for (t, sl) in tiles.iter().zip(&slices) {
                let j0 = (t.origin[0] - rect.origin[0]) as usize;
                let i0 = (t.origin[1] - rect.origin[1]) as usize;
                let [tw, th] = t.size;
                let mut core_buf = vec![Complex32::new(0.0, 0.0); tw * th];
                if stepping {
                    cur.read_rect(i0 as i64 - hy as i64, j0 as i64 - hx as i64, n[0], &mut buf)?;
                    step.apply(&mut buf, &hop);
                    for i in 0..th {
                        core_buf[i * tw..(i + 1) * tw]
                            .copy_from_slice(&buf[(hy + i) * n[0] + hx..(hy + i) * n[0] + hx + tw]);
                    }
                }
                self.apply_slab(k, sl, t, &mut core_buf, &mut behind, &shaders, &mut lit_now);
                next.write_rect(i0, j0, th, tw, &core_buf)?;
            }
            lit = lit_now;
            std::mem::swap(&mut cur, &mut next);
            on_work(1.0 / count as f64);
        }
        Ok(cur)
    }
}
