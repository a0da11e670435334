//! Plates as PNG images a modulator shows full-screen: grey samples of the plate's own bit depth
//! (1, 8 or 16 bits; the same stored values as the TIFF, calibration applied), optionally placed
//! on a larger panel. The plate's centre sample (floor(W/2), floor(H/2)) lands on the panel's
//! centre sample (floor(Wp/2), floor(Hp/2)), so the optical axis stays on the replay lattice's
//! axis (physics.md, "Replay lattices"); the rest of the panel is filled with the stored value of
//! zero phase, or with the plate repeated periodically around that placement ("tile"). The
//! image is held in memory (a modulator's panel, at most [`MAX_SIDE`] a side), written under
//! `NAME.partial`, synced, hashed and renamed.

use std::io::Write;

pub use super::tiff::partial_path as png_partial_path;
use std::path::{Path, PathBuf};

use super::tiff::{hash_path, partial_path};
use crate::error::{Error, Result};

/// Largest side of a panel image, pixels.
pub const MAX_SIDE: u32 = 16384;

/// How the panel around the plate is filled.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum PanelFill {
    /// The stored value of zero phase (or of F = 0 for the amplitude encoding).
    ZeroPhase,
    /// The plate repeated periodically.
    Tile,
}

/// The image: plate size, panel size, bit depth, fill and the fill's stored value.
#[derive(Clone, Debug, PartialEq)]
pub struct PanelLayout {
    /// Plate [w, h].
    pub plate: [u32; 2],
    /// Panel [w, h] (the plate's own size when not set).
    pub panel: [u32; 2],
    /// 1, 8 or 16.
    pub bits: u8,
    /// Fill.
    pub fill: PanelFill,
    /// Stored value of the fill (ZeroPhase).
    pub fill_value: u16,
}

impl PanelLayout {
    /// The plate's top-left pixel on the panel [column, row] (negative: the plate is cut).
    pub fn origin(&self) -> [i64; 2] {
        [
            i64::from(self.panel[0] / 2) - i64::from(self.plate[0] / 2),
            i64::from(self.panel[1] / 2) - i64::from(self.plate[1] / 2),
        ]
    }

    fn plate_row_bytes(&self) -> usize {
        (self.plate[0] as usize * self.bits as usize).div_ceil(8)
    }
}

/// A finished image.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FinishedPng {
    /// Path.
    pub path: PathBuf,
    /// Size.
    pub bytes: u64,
    /// SHA-256, lowercase hex.
    pub sha256: String,
}

/// Collects the plate's rows (as the TIFF stores them) and writes the panel image.
pub struct PanelWriter {
    path: PathBuf,
    layout: PanelLayout,
    rows: Vec<u8>,
}

impl PanelWriter {
    /// A writer for `path`.
    pub fn new(path: &Path, layout: PanelLayout) -> PanelWriter {
        PanelWriter {
            path: path.to_path_buf(),
            rows: Vec::with_capacity(layout.plate_row_bytes() * layout.plate[1] as usize),
            layout,
        }
    }

    /// Appends whole plate rows (TIFF sample layout: 1-bit MSB first, 8-bit, 16-bit little-endian).
    pub fn write_rows(&mut self, rows: &[u8]) -> Result<()> {
        if self.rows.len() + rows.len()
            > self.layout.plate_row_bytes() * self.layout.plate[1] as usize
        {
            return Err(Error::job(&self.path, "PNG writer: rows beyond the plate"));
        }
        self.rows.extend_from_slice(rows);
        Ok(())
    }

    /// The stored value of plate pixel (row, col).
    fn sample(&self, row: usize, col: usize) -> u16 {
        let rb = self.layout.plate_row_bytes();
        let r = &self.rows[row * rb..(row + 1) * rb];
        match self.layout.bits {
            1 => u16::from(r[col / 8] >> (7 - col % 8) & 1),
            8 => u16::from(r[col]),
            _ => u16::from_le_bytes([r[2 * col], r[2 * col + 1]]),
        }
    }

    /// Encodes the panel image and writes it under its partial name, synced and hashed; the caller
    /// renames it (`std::fs::rename(partial_path(&path), &path)`) once its sidecar is written.
    pub fn finish_unpublished(self) -> Result<FinishedPng> {
        let l = &self.layout;
        if self.rows.len() != l.plate_row_bytes() * l.plate[1] as usize {
            return Err(Error::job(&self.path, "PNG output incomplete"));
        }
        let [pw, ph] = [l.plate[0] as i64, l.plate[1] as i64];
        let [ox, oy] = l.origin();
        let (w, h) = (l.panel[0] as usize, l.panel[1] as usize);
        let rb = (w * l.bits as usize).div_ceil(8);
        let mut data = vec![0u8; rb * h];
        for (r, out) in data.chunks_exact_mut(rb).enumerate() {
            for c in 0..w {
                let (pr, pc) = (r as i64 - oy, c as i64 - ox);
                let v = match l.fill {
                    _ if (0..ph).contains(&pr) && (0..pw).contains(&pc) => {
                        self.sample(pr as usize, pc as usize)
                    }
                    PanelFill::Tile => {
                        self.sample(pr.rem_euclid(ph) as usize, pc.rem_euclid(pw) as usize)
                    }
                    PanelFill::ZeroPhase => l.fill_value,
                };
                match l.bits {
                    1 => out[c / 8] |= ((v & 1) as u8) << (7 - c % 8),
                    8 => out[c] = v as u8,
                    _ => out[2 * c..2 * c + 2].copy_from_slice(&v.to_be_bytes()),
                }
            }
        }
        let partial = partial_path(&self.path);
        let write = || -> std::result::Result<(), String> {
            let f = std::fs::File::create(&partial).map_err(|e| e.to_string())?;
            let mut buf = std::io::BufWriter::new(f);
            {
                let mut enc = png::Encoder::new(&mut buf, w as u32, h as u32);
                enc.set_color(png::ColorType::Grayscale);
                enc.set_depth(match l.bits {
                    1 => png::BitDepth::One,
                    8 => png::BitDepth::Eight,
                    _ => png::BitDepth::Sixteen,
                });
                let mut wr = enc.write_header().map_err(|e| e.to_string())?;
                wr.write_image_data(&data).map_err(|e| e.to_string())?;
                wr.finish().map_err(|e| e.to_string())?;
            }
            buf.flush().map_err(|e| e.to_string())?;
            buf.get_ref().sync_all().map_err(|e| e.to_string())
        };
        if let Err(m) = write() {
            let _ = std::fs::remove_file(&partial);
            return Err(Error::job(&partial, format!("PNG not written: {m}")));
        }
        let (bytes, sha256) = hash_path(&partial)?;
        Ok(FinishedPng {
            path: self.path.clone(),
            bytes,
            sha256,
        })
    }
}
