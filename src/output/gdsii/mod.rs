//! GDSII stream output (Calma stream format, release 6, the layout format mask shops read) for
//! binary plates: every pixel whose stored bit is 1 (clear, or pi) becomes part of a rectangle
//! BOUNDARY on one layer and datatype. Rectangles: the runs of set pixels along each row; a run
//! with the same first and last column in the next rows extends its rectangle downwards, within
//! a strip of `rows_per_strip` rows (rectangles close at each strip's end, so a checkpoint holds
//! no open shapes and a resumed file is byte-identical). Or, with [`Merge::Contour`], each
//! strip's 4-connected regions traced into simple polygons ([`contour`]). No pixel changes state.
//!
//! Coordinates are plate coordinates (physics.md: origin at the plate's centre, x right, y up,
//! row 0 on top) in database units: pixel (row i, column j) spans x in [(j - W/2) p, (j + 1 - W/2) p]
//! and y in [(H/2 - i - 1) p, (H/2 - i) p], exact integers when the pitch is a whole number of
//! database units and W p, H p are even numbers of them. Coordinates are 32-bit signed: a plate
//! whose half-size exceeds 2^31 - 1 units is refused.
//!
//! Records (length u16, record type, data type, then big-endian data): HEADER 600, BGNLIB,
//! LIBNAME, UNITS (user unit 1 um), BGNSTR, STRNAME, then per rectangle BOUNDARY, LAYER,
//! DATATYPE, XY (5 points for a rectangle, closed), ENDEL; ENDSTR, ENDLIB. With write fields each field is a
//! structure `NAME_Rrrr_Cccc` whose coordinates start at the field's lower-left corner (runs are
//! cut at field columns; strips divide the field height), and a last structure `NAME` places
//! every field by an SREF at that corner.
//! A field row's boundaries collect in one file per field column beside the partial file
//! (`.rRRRRR.colCCCC`) and are moved into the layout when the field row ends; the files stay
//! until the checkpoint after next, so an older journal can still resume from them. Dates are
//! fixed (1970-01-01) so the same job gives the same bytes. Like the TIFF writer, the file is
//! written under `NAME.partial`, synced, hashed and renamed when complete.

pub mod contour;
mod writer;

use std::fs::{self, File};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

pub use writer::GdsWriter;

/// What the layout holds and how coordinates are made.
#[derive(Clone, Debug, PartialEq)]
pub struct GdsLayout {
    /// Plate columns.
    pub width: u32,
    /// Plate rows.
    pub height: u32,
    /// Pixel pitch in database units [x, y].
    pub pitch_db: [u64; 2],
    /// Database unit, metres.
    pub db_unit: f64,
    /// Layer number.
    pub layer: i16,
    /// Datatype number.
    pub datatype: i16,
    /// Rows per strip: rectangles close at each strip's end.
    pub rows_per_strip: u32,
    /// Library and structure name.
    pub name: String,
    /// Write fields [w, h] pixels: one structure per field, placed by references in the top
    /// structure (rows per strip divide the field height).
    pub field: Option<[u32; 2]>,
    /// How set pixels become polygons.
    pub merge: Merge,
}

/// How the set pixels of a strip become boundaries.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Merge {
    /// Row runs, extended downwards while the next rows have the same span (4 vertices each).
    Rectangles,
    /// Whole 4-connected regions traced into rectilinear polygons of at most `max_vertices`
    /// vertices ([`contour`]).
    Contour {
        /// Vertices per boundary, the closing point not counted (4 ..= [`MAX_VERTICES`]).
        max_vertices: u32,
    },
}

/// Most vertices of one boundary: an XY record holds at most 8191 points (its length is a
/// 16-bit byte count: (65535 - 4) / 8), one of which repeats the first to close it.
pub const MAX_VERTICES: u32 = 8190;

/// Largest coordinate GDSII's 4-byte integers hold.
pub const MAX_COORD: i64 = i32::MAX as i64;

impl GdsLayout {
    /// Builds a layout from the pitch in metres, refusing pitches that are not whole numbers of
    /// database units and plates too large for 32-bit coordinates. Messages are one line.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        width: u32,
        height: u32,
        pitch: [f64; 2],
        db_unit: f64,
        layer: i16,
        datatype: i16,
        rows_per_strip: u32,
        name: &str,
    ) -> std::result::Result<GdsLayout, String> {
        let mut pitch_db = [0u64; 2];
        for a in 0..2 {
            let q = pitch[a] / db_unit;
            let r = q.round();
            if r < 1.0 || (q - r).abs() > 1e-6 * r.max(1.0) {
                return Err(format!(
                    "the pitch {:.6} um in {} is {q:.6} database units of {:.6} nm: GDSII pixel edges need a whole number (set [output] database_unit_nm to a divisor of the pitch)",
                    pitch[a] * 1e6,
                    ["x", "y"][a],
                    db_unit * 1e9
                ));
            }
            pitch_db[a] = r as u64;
        }
        for (a, n) in [(0, width), (1, height)] {
            let span = u64::from(n) * pitch_db[a];
            if span % 2 != 0 {
                return Err(format!(
                    "the plate's {} side is {span} database units, odd: its edges would fall on half units around the centred origin (halve database_unit_nm)",
                    ["x", "y"][a]
                ));
            }
            if (span / 2) as i64 > MAX_COORD {
                return Err(format!(
                    "the plate spans {span} database units in {}; GDSII's 32-bit coordinates hold +-{MAX_COORD} around the centre (a larger database_unit_nm, or a smaller plate)",
                    ["x", "y"][a]
                ));
            }
        }
        Ok(GdsLayout {
            width,
            height,
            pitch_db,
            db_unit,
            layer,
            datatype,
            rows_per_strip: rows_per_strip.clamp(1, height.max(1)),
            name: {
                // Letters, digits and '_', starting with a letter (common practice for
                // structure names); PLATE when nothing is left.
                let n: String = name
                    .chars()
                    .filter(|c| c.is_ascii_alphanumeric() || *c == '_')
                    .take(20)
                    .collect();
                match n.chars().next() {
                    None => "PLATE".into(),
                    Some(c) if !c.is_ascii_alphabetic() => format!("P{}", &n[..n.len().min(19)]),
                    Some(_) => n,
                }
            },
            field: None,
            merge: Merge::Rectangles,
        })
    }

    /// With another way of merging pixels into boundaries.
    pub fn with_merge(mut self, merge: Merge) -> GdsLayout {
        self.merge = merge;
        self
    }

    /// With write fields of [w, h] pixels (each a structure); `rows_per_strip` must divide h.
    pub fn with_fields(mut self, field: [u32; 2]) -> std::result::Result<GdsLayout, String> {
        let f = [
            field[0].clamp(1, self.width),
            field[1].clamp(1, self.height),
        ];
        if !f[1].is_multiple_of(self.rows_per_strip) {
            return Err(format!(
                "rows_per_strip = {} must divide the field height {}",
                self.rows_per_strip, f[1]
            ));
        }
        self.field = Some(f);
        Ok(self)
    }

    /// Field columns and rows.
    pub fn field_counts(&self) -> [u32; 2] {
        match self.field {
            Some(f) => [self.width.div_ceil(f[0]), self.height.div_ceil(f[1])],
            None => [1, 1],
        }
    }

    /// Name of the structure of field (row, col).
    pub fn field_name(&self, row: u32, col: u32) -> String {
        format!("{}_R{row:03}_C{col:03}", self.name)
    }

    /// Bytes per packed row of the binary plate (1 bit per pixel, MSB first).
    pub fn row_bytes(&self) -> usize {
        (self.width as usize).div_ceil(8)
    }

    fn x_edge(&self, col: u32) -> i32 {
        ((2 * i64::from(col) - i64::from(self.width)) * self.pitch_db[0] as i64 / 2) as i32
    }

    fn y_edge(&self, row: u32) -> i32 {
        ((i64::from(self.height) - 2 * i64::from(row)) * self.pitch_db[1] as i64 / 2) as i32
    }
}

/// What a checkpoint records (at a strip boundary: no rectangle open).
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct GdsState {
    /// Rows on disk.
    pub rows_written: u32,
    /// Length of the partial file holding them.
    pub file_len: u64,
    /// Boundaries written.
    pub boundaries: u64,
    /// XY points written, closing points included (0 in journals of rectangle-only writers:
    /// then 5 per boundary).
    #[serde(default)]
    pub vertices: u64,
    /// Write fields: the length of each field column's file of the current field row.
    #[serde(default)]
    pub column_lens: Vec<u64>,
    /// SHA-256 of the layout's bytes written between checkpoints (checked on resume).
    #[serde(default)]
    pub chunks: Vec<crate::output::chunks::Chunk>,
    /// The same for each field column's file of the current field row.
    #[serde(default)]
    pub column_chunks: Vec<Vec<crate::output::chunks::Chunk>>,
}

/// A finished layout file.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FinishedGds {
    /// Final path.
    pub path: PathBuf,
    /// Size.
    pub bytes: u64,
    /// SHA-256 of the file, lowercase hex.
    pub sha256: String,
    /// BOUNDARY elements.
    pub boundaries: u64,
    /// Vertices, counting each boundary's closing point (5 per rectangle).
    pub vertices: u64,
}

/// A complete layout still under its partial name.
pub struct UnpublishedGds {
    partial: PathBuf,
    /// What it will be.
    pub gds: FinishedGds,
}

impl UnpublishedGds {
    /// Renames it to its final name.
    pub fn publish(self) -> Result<FinishedGds> {
        fs::rename(&self.partial, &self.gds.path).map_err(|e| Error::io(&self.gds.path, e))?;
        if let Some(dir) = self.gds.path.parent() {
            let dir = if dir.as_os_str().is_empty() {
                Path::new(".")
            } else {
                dir
            };
            if let Ok(d) = File::open(dir) {
                let _ = d.sync_all();
            }
        }
        Ok(self.gds)
    }

    /// Removes it.
    pub fn discard(self) {
        let _ = fs::remove_file(&self.partial);
    }
}

pub(super) fn record(out: &mut Vec<u8>, rtype: u8, dtype: u8, data: &[u8]) {
    let len = 4 + data.len();
    debug_assert!(len <= 65534 && len.is_multiple_of(2));
    out.extend_from_slice(&(len as u16).to_be_bytes());
    out.push(rtype);
    out.push(dtype);
    out.extend_from_slice(data);
}

pub(super) fn int2s(v: &[i16]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_be_bytes()).collect()
}

pub(super) fn ascii(s: &str) -> Vec<u8> {
    let mut b = s.as_bytes().to_vec();
    if b.len() % 2 == 1 {
        b.push(0);
    }
    b
}

/// An 8-byte GDSII real: sign bit, 7-bit exponent of 16 in excess 64, 56-bit mantissa m with
/// value m / 2^56 * 16^(e - 64), the mantissa normalised to [1/16, 1) (the stream format's own
/// floating-point form), rounded to nearest.
pub fn real8(v: f64) -> [u8; 8] {
    if v == 0.0 || !v.is_finite() {
        return [0; 8];
    }
    let sign = if v < 0.0 { 0x80u8 } else { 0 };
    let mut a = v.abs();
    let mut e: i32 = 64;
    while a >= 1.0 {
        a /= 16.0;
        e += 1;
    }
    while a < 1.0 / 16.0 {
        a *= 16.0;
        e -= 1;
    }
    let mut m = (a * (1u64 << 56) as f64).round() as u64;
    if m >= 1u64 << 56 {
        m >>= 4;
        e += 1;
    }
    let mut b = [0u8; 8];
    b[0] = sign | (e.clamp(0, 127) as u8);
    b[1..].copy_from_slice(&m.to_be_bytes()[1..]);
    b
}

/// The value of an 8-byte GDSII real.
pub fn real8_value(b: [u8; 8]) -> f64 {
    let e = i32::from(b[0] & 0x7f) - 64;
    let mut mb = [0u8; 8];
    mb[1..].copy_from_slice(&b[1..]);
    let m = u64::from_be_bytes(mb) as f64 / (1u64 << 56) as f64;
    let v = m * 16f64.powi(e);
    if b[0] & 0x80 != 0 {
        -v
    } else {
        v
    }
}

pub(super) const DATE: [i16; 12] = [1970, 1, 1, 0, 0, 0, 1970, 1, 1, 0, 0, 0];

#[cfg(test)]
mod tests {
    use super::*;

    /// The stream format's reals: 1.0 = 0x41 10 00.. (1/16 x 16^1), 0.5 = 0x40 80 00..; a round trip
    /// holds 1e-9 and 1e-3 to 1e-15 relative (56-bit mantissa, normalised to [1/16, 1)).
    #[test]
    fn reals() {
        assert_eq!(real8(1.0), [0x41, 0x10, 0, 0, 0, 0, 0, 0]);
        assert_eq!(real8(0.5), [0x40, 0x80, 0, 0, 0, 0, 0, 0]);
        assert_eq!(real8(-2.0), [0xC1, 0x20, 0, 0, 0, 0, 0, 0]);
        for v in [1e-9, 1e-3, 0.25e-9, 123.456, 1e-12] {
            let back = real8_value(real8(v));
            assert!(((back - v) / v).abs() < 1e-15, "{v}: {back}");
        }
    }

    /// A kill after a field row's boundaries moved into the layout but before the next
    /// checkpoint: resuming from the checkpoint inside that field row gives the bytes of an
    /// uninterrupted write (each field row keeps its own column files until a later checkpoint).
    #[test]
    fn kill_after_a_field_row_moved_resumes() {
        let (w, h) = (20u32, 40u32);
        let rows: Vec<u8> = (0..h as usize * 3)
            .map(|k| (k as u8).wrapping_mul(37) ^ 0x5a)
            .collect();
        let layout = || {
            GdsLayout::new(w, h, [1e-6, 1e-6], 1e-9, 1, 0, 8, "k")
                .unwrap()
                .with_fields([8, 16])
                .unwrap()
        };
        let whole = tempfile::tempdir().unwrap();
        let p = whole.path().join("w.gds");
        let mut wr = GdsWriter::create(&p, layout()).unwrap();
        wr.write_rows(&rows).unwrap();
        wr.finish_unpublished().unwrap().publish().unwrap();
        let want = std::fs::read(&p).unwrap();

        let cut = tempfile::tempdir().unwrap();
        let p = cut.path().join("w.gds");
        let mut wr = GdsWriter::create(&p, layout()).unwrap();
        wr.write_rows(&rows[..8 * 3]).unwrap();
        let state = wr.checkpoint().unwrap(); // inside field row 0
        wr.write_rows(&rows[8 * 3..20 * 3]).unwrap(); // field row 0 moved, row 1 begun
        drop(wr); // killed before the next checkpoint
        let mut wr = GdsWriter::resume(&p, layout(), state).unwrap();
        wr.write_rows(&rows[8 * 3..]).unwrap();
        wr.finish_unpublished().unwrap().publish().unwrap();
        assert!(std::fs::read(&p).unwrap() == want);
        let left: Vec<_> = std::fs::read_dir(cut.path())
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(left.len(), 1, "{left:?}");
    }

    /// A field-column file damaged after its checkpoint is refused on resume (its checksum),
    /// and a writer dropped before any checkpoint leaves no file behind.
    #[test]
    fn damaged_column_files_are_refused_and_drops_clean_up() {
        let layout = || {
            GdsLayout::new(20, 40, [1e-6, 1e-6], 1e-9, 1, 0, 8, "k")
                .unwrap()
                .with_fields([8, 16])
                .unwrap()
        };
        let rows: Vec<u8> = (0..40 * 3)
            .map(|k| (k as u8).wrapping_mul(91) ^ 0x3c)
            .collect();
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("w.gds");
        let mut wr = GdsWriter::create(&p, layout()).unwrap();
        wr.write_rows(&rows[..8 * 3]).unwrap();
        let state = wr.checkpoint().unwrap();
        drop(wr);
        let col = d.path().join("w.gds.partial.r00000.col0001");
        let mut b = std::fs::read(&col).unwrap();
        assert!(!b.is_empty());
        let mid = b.len() / 2;
        b[mid] ^= 1;
        std::fs::write(&col, b).unwrap();
        let e = match GdsWriter::resume(&p, layout(), state) {
            Err(e) => e.to_string(),
            Ok(_) => panic!("a damaged column file was accepted"),
        };
        assert!(
            e.contains("col0001") && e.contains("changed since the checkpoint"),
            "{e}"
        );
        let d = tempfile::tempdir().unwrap();
        let mut wr = GdsWriter::create(&d.path().join("w.gds"), layout()).unwrap();
        wr.write_rows(&rows[..20 * 3]).unwrap();
        drop(wr);
        assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 0);
        // Names: letters first, never empty.
        assert_eq!(
            GdsLayout::new(2, 2, [1e-6; 2], 1e-9, 1, 0, 1, "-")
                .unwrap()
                .name,
            "PLATE"
        );
        assert_eq!(
            GdsLayout::new(2, 2, [1e-6; 2], 1e-9, 1, 0, 1, "7x")
                .unwrap()
                .name,
            "P7x"
        );
    }

    #[test]
    fn pitches_that_are_not_whole_units_are_refused() {
        assert!(GdsLayout::new(4, 4, [0.5e-6, 0.5e-6], 1e-9, 1, 0, 2, "p").is_ok());
        let e = GdsLayout::new(4, 4, [0.5005e-6, 0.5e-6], 1e-9, 1, 0, 2, "p").unwrap_err();
        assert!(e.contains("whole number"), "{e}");
        let e = GdsLayout::new(3, 4, [1e-9, 1e-9], 1e-9, 1, 0, 2, "p").unwrap_err();
        assert!(e.contains("odd"), "{e}");
        // 2^31 units of 1 nm = 2.1 m: a 4.4 m plate is too wide.
        let e = GdsLayout::new(4_400_000, 2, [1e-6, 1e-6], 1e-9, 1, 0, 2, "p").unwrap_err();
        assert!(e.contains("32-bit"), "{e}");
    }
}
