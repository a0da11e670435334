//! GDSII stream output (Calma stream format, release 6, the layout format mask shops read) for
//! binary plates: every pixel whose stored bit is 1 (clear, or pi) becomes part of a rectangle
//! BOUNDARY on one layer and datatype. Rectangles: the runs of set pixels along each row; a run
//! with the same first and last column in the next rows extends its rectangle downwards, within
//! a strip of `rows_per_strip` rows (rectangles close at each strip's end, so a checkpoint holds
//! no open shapes and a resumed file is byte-identical). No pixel changes state.
//!
//! Coordinates are plate coordinates (physics.md: origin at the plate's centre, x right, y up,
//! row 0 on top) in database units: pixel (row i, column j) spans x in [(j - W/2) p, (j + 1 - W/2) p]
//! and y in [(H/2 - i - 1) p, (H/2 - i) p], exact integers when the pitch is a whole number of
//! database units and W p, H p are even numbers of them. Coordinates are 32-bit signed: a plate
//! whose half-size exceeds 2^31 - 1 units is refused.
//!
//! Records (length u16, record type, data type, then big-endian data): HEADER 600, BGNLIB,
//! LIBNAME, UNITS (user unit 1 um), BGNSTR, STRNAME, then per rectangle BOUNDARY, LAYER,
//! DATATYPE, XY (5 points, closed), ENDEL; ENDSTR, ENDLIB. With write fields each field is a
//! structure `NAME_Rrrr_Cccc` whose coordinates start at the field's lower-left corner (runs are
//! cut at field columns; strips divide the field height), and a last structure `NAME` places
//! every field by an SREF at that corner.
//! A field row's boundaries collect in one file per field column beside the partial file
//! (`.colNNNN`) and are moved into the layout when the field row ends. Dates are fixed (1970-01-01) so the same
//! job gives the same bytes. Like the TIFF writer, the file is written under `NAME.partial`,
//! synced, hashed and renamed when complete.

use std::fs::{self, File, OpenOptions};
use std::io::{BufWriter, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use super::tiff::{hash_path, partial_path};
use crate::error::{Error, Result};

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
}

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
            name: name
                .chars()
                .filter(|c| c.is_ascii_alphanumeric() || *c == '_')
                .take(20)
                .collect(),
            field: None,
        })
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
    /// Write fields: the length of each field column's file of the current field row.
    #[serde(default)]
    pub column_lens: Vec<u64>,
    /// SHA-256 of the layout's bytes written between checkpoints (checked on resume).
    #[serde(default)]
    pub chunks: Vec<crate::output::chunks::Chunk>,
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

/// Streams packed binary rows into a GDSII file.
pub struct GdsWriter {
    final_path: PathBuf,
    partial: PathBuf,
    layout: GdsLayout,
    out: Option<BufWriter<File>>,
    pos: u64,
    rows_written: u32,
    boundaries: u64,
    /// Open rectangles: (first column, end column, first row), by first column.
    open: Vec<(u32, u32, u32)>,
    /// Spans of the current row (recycled).
    spans: Vec<(u32, u32)>,
    /// Write fields: one file per field column holding the current field row's boundaries.
    columns: Vec<ColumnFile>,
    /// Checksums of the bytes written between checkpoints.
    hasher: crate::output::chunks::ChunkHasher,
}

/// The boundaries of one field column of the current field row, beside the partial file.
struct ColumnFile {
    path: PathBuf,
    out: BufWriter<File>,
    len: u64,
}

fn column_path(partial: &Path, col: u32) -> PathBuf {
    let mut s = partial.as_os_str().to_owned();
    s.push(format!(".col{col:04}"));
    PathBuf::from(s)
}

fn record(out: &mut Vec<u8>, rtype: u8, dtype: u8, data: &[u8]) {
    let len = 4 + data.len();
    debug_assert!(len <= 65534 && len.is_multiple_of(2));
    out.extend_from_slice(&(len as u16).to_be_bytes());
    out.push(rtype);
    out.push(dtype);
    out.extend_from_slice(data);
}

fn int2s(v: &[i16]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_be_bytes()).collect()
}

fn ascii(s: &str) -> Vec<u8> {
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

/// Opens (or, resuming, reopens at the recorded lengths) the field-column files.
fn open_columns(
    partial: &Path,
    layout: &GdsLayout,
    lens: Option<&[u64]>,
) -> Result<Vec<ColumnFile>> {
    if layout.field.is_none() {
        return Ok(Vec::new());
    }
    let n = layout.field_counts()[0];
    if let Some(l) = lens {
        if l.len() != n as usize {
            return Err(Error::input(
                partial,
                "resume journal: GDSII field columns differ; rerun with --restart",
            ));
        }
    }
    (0..n)
        .map(|k| {
            let path = column_path(partial, k);
            let mut f = match lens {
                None => File::create(&path),
                Some(_) => OpenOptions::new().read(true).write(true).open(&path),
            }
            .map_err(|e| Error::io(&path, e))?;
            let len = lens.map_or(0, |l| l[k as usize]);
            let have = f.metadata().map_err(|e| Error::io(&path, e))?.len();
            if have < len {
                return Err(Error::input(
                    &path,
                    "shorter than its journal recorded; rerun with --restart",
                ));
            }
            f.set_len(len)
                .and_then(|_| f.seek(SeekFrom::Start(len)).map(|_| ()))
                .map_err(|e| Error::io(&path, e))?;
            Ok(ColumnFile {
                path,
                out: BufWriter::with_capacity(1 << 16, f),
                len,
            })
        })
        .collect()
}

const DATE: [i16; 12] = [1970, 1, 1, 0, 0, 0, 1970, 1, 1, 0, 0, 0];

impl GdsWriter {
    /// Starts `NAME.partial` beside `final_path` with the library and structure headers.
    pub fn create(final_path: &Path, layout: GdsLayout) -> Result<GdsWriter> {
        let partial = partial_path(final_path);
        let f = File::create(&partial).map_err(|e| Error::io(&partial, e))?;
        let mut head = Vec::new();
        record(&mut head, 0x00, 0x02, &int2s(&[600]));
        record(&mut head, 0x01, 0x02, &int2s(&DATE));
        record(
            &mut head,
            0x02,
            0x06,
            &ascii(&format!("{}.DB", layout.name)),
        );
        let mut units = Vec::new();
        units.extend_from_slice(&real8(layout.db_unit / 1e-6));
        units.extend_from_slice(&real8(layout.db_unit));
        record(&mut head, 0x03, 0x05, &units);
        if layout.field.is_none() {
            record(&mut head, 0x05, 0x02, &int2s(&DATE));
            record(&mut head, 0x06, 0x06, &ascii(&layout.name));
        }
        let columns = open_columns(&partial, &layout, None)?;
        let mut w = GdsWriter {
            final_path: final_path.to_path_buf(),
            partial,
            layout,
            out: Some(BufWriter::with_capacity(1 << 20, f)),
            pos: 0,
            rows_written: 0,
            boundaries: 0,
            open: Vec::new(),
            spans: Vec::new(),
            columns,
            hasher: Default::default(),
        };
        w.put(&head)?;
        Ok(w)
    }

    /// Reopens the partial file at a checkpoint.
    pub fn resume(final_path: &Path, layout: GdsLayout, state: GdsState) -> Result<GdsWriter> {
        let partial = partial_path(final_path);
        if state.rows_written > layout.height
            || (!state.rows_written.is_multiple_of(layout.rows_per_strip)
                && state.rows_written != layout.height)
        {
            return Err(Error::input(
                &partial,
                "resume journal: GDSII checkpoint not at a strip boundary; rerun with --restart",
            ));
        }
        let mut f = OpenOptions::new()
            .read(true)
            .write(true)
            .open(&partial)
            .map_err(|e| Error::io(&partial, e))?;
        let len = f.metadata().map_err(|e| Error::io(&partial, e))?.len();
        if len < state.file_len {
            return Err(Error::input(
                &partial,
                format!("is {len} bytes, shorter than the {} its journal recorded; rerun with --restart", state.file_len),
            ));
        }
        crate::output::chunks::verify(&partial, &mut f, &state.chunks)?;
        f.set_len(state.file_len)
            .and_then(|_| f.seek(SeekFrom::Start(state.file_len)).map(|_| ()))
            .map_err(|e| Error::io(&partial, e))?;
        let columns = open_columns(&partial, &layout, Some(&state.column_lens))?;
        Ok(GdsWriter {
            final_path: final_path.to_path_buf(),
            partial,
            layout,
            out: Some(BufWriter::with_capacity(1 << 20, f)),
            pos: state.file_len,
            rows_written: state.rows_written,
            boundaries: state.boundaries,
            open: Vec::new(),
            spans: Vec::new(),
            columns,
            hasher: crate::output::chunks::ChunkHasher::starting_at(state.file_len, state.chunks),
        })
    }

    /// Moves each field column's boundaries of the finished field row into the main file as a
    /// structure (BGNSTR, STRNAME, boundaries, ENDSTR), then empties the column files.
    fn close_field_row(&mut self, field_row: u32) -> Result<()> {
        use std::io::Read;
        for k in 0..self.columns.len() {
            let mut head = Vec::new();
            record(&mut head, 0x05, 0x02, &int2s(&DATE));
            record(
                &mut head,
                0x06,
                0x06,
                &ascii(&self.layout.field_name(field_row, k as u32)),
            );
            self.put(&head)?;
            let c = &mut self.columns[k];
            c.out.flush().map_err(|e| Error::io(&c.path, e))?;
            let mut f = File::open(&c.path).map_err(|e| Error::io(&c.path, e))?;
            let mut left = c.len;
            let mut buf = vec![0u8; 1 << 20];
            while left > 0 {
                let n = (left as usize).min(buf.len());
                f.read_exact(&mut buf[..n])
                    .map_err(|e| Error::io(&self.columns[k].path, e))?;
                self.put(&buf[..n])?;
                left -= n as u64;
            }
            let mut tail = Vec::new();
            record(&mut tail, 0x07, 0x00, &[]);
            self.put(&tail)?;
            let c = &mut self.columns[k];
            let file = c.out.get_mut();
            file.set_len(0)
                .and_then(|_| file.seek(SeekFrom::Start(0)).map(|_| ()))
                .map_err(|e| Error::io(&c.path, e))?;
            c.len = 0;
        }
        Ok(())
    }

    fn put(&mut self, b: &[u8]) -> Result<()> {
        let out = self.out.as_mut().expect("open writer");
        out.write_all(b).map_err(|e| Error::io(&self.partial, e))?;
        self.hasher.update(b);
        self.pos += b.len() as u64;
        Ok(())
    }

    fn rect(&mut self, c0: u32, c1: u32, r0: u32, r1: u32) -> Result<()> {
        let l = &self.layout;
        let (mut x0, mut x1, mut y0, mut y1) =
            (l.x_edge(c0), l.x_edge(c1), l.y_edge(r1), l.y_edge(r0));
        // In a write field: coordinates from the field's lower-left corner.
        let column = l.field.map(|f| {
            let (fc, fr) = (c0 / f[0], r0 / f[1]);
            let bottom = ((fr + 1) * f[1]).min(l.height);
            let (ox, oy) = (l.x_edge(fc * f[0]), l.y_edge(bottom));
            x0 -= ox;
            x1 -= ox;
            y0 -= oy;
            y1 -= oy;
            fc as usize
        });
        let mut b = Vec::with_capacity(64);
        record(&mut b, 0x08, 0x00, &[]);
        record(&mut b, 0x0D, 0x02, &int2s(&[l.layer]));
        record(&mut b, 0x0E, 0x02, &int2s(&[l.datatype]));
        let xy: Vec<u8> = [x0, y0, x1, y0, x1, y1, x0, y1, x0, y0]
            .iter()
            .flat_map(|v| v.to_be_bytes())
            .collect();
        record(&mut b, 0x10, 0x03, &xy);
        record(&mut b, 0x11, 0x00, &[]);
        self.boundaries += 1;
        match column {
            Some(k) => {
                let c = &mut self.columns[k];
                c.out.write_all(&b).map_err(|e| Error::io(&c.path, e))?;
                c.len += b.len() as u64;
                Ok(())
            }
            None => self.put(&b),
        }
    }

    fn close_all(&mut self) -> Result<()> {
        let r = self.rows_written;
        for (c0, c1, r0) in std::mem::take(&mut self.open) {
            self.rect(c0, c1, r0, r)?;
        }
        Ok(())
    }

    /// Appends whole packed rows (1 bit per pixel, MSB first, rows padded to bytes).
    pub fn write_rows(&mut self, rows: &[u8]) -> Result<()> {
        let rb = self.layout.row_bytes();
        if !rows.len().is_multiple_of(rb)
            || self.rows_written as usize + rows.len() / rb > self.layout.height as usize
        {
            return Err(Error::job(
                &self.final_path,
                "GDSII writer: rows beyond the plate",
            ));
        }
        let w = self.layout.width;
        for row in rows.chunks_exact(rb) {
            // The runs of set bits of this row.
            let mut spans = std::mem::take(&mut self.spans);
            spans.clear();
            let mut start: Option<u32> = None;
            for c in 0..w {
                let set = row[(c / 8) as usize] >> (7 - c % 8) & 1 == 1;
                match (set, start) {
                    (true, None) => start = Some(c),
                    (false, Some(s)) => {
                        spans.push((s, c));
                        start = None;
                    }
                    _ => {}
                }
            }
            if let Some(s) = start {
                spans.push((s, w));
            }
            // Runs do not cross write-field columns.
            if let Some([fw, _]) = self.layout.field {
                let mut cut = Vec::with_capacity(spans.len());
                for &(a, b) in &spans {
                    let mut a = a;
                    while a / fw != (b - 1) / fw {
                        let edge = (a / fw + 1) * fw;
                        cut.push((a, edge));
                        a = edge;
                    }
                    cut.push((a, b));
                }
                spans = cut;
            }
            // Open rectangles continue where this row has the same span; the others close.
            let r = self.rows_written;
            let open = std::mem::take(&mut self.open);
            let mut next = Vec::with_capacity(spans.len());
            let (mut i, mut k) = (0, 0);
            while i < open.len() || k < spans.len() {
                let o = open.get(i).copied();
                let s = spans.get(k).copied();
                match (o, s) {
                    (Some((c0, c1, r0)), Some(sp)) if (c0, c1) == sp => {
                        next.push((c0, c1, r0));
                        i += 1;
                        k += 1;
                    }
                    (Some((c0, c1, r0)), Some(sp)) if c0 < sp.0 || (c0 == sp.0 && c1 < sp.1) => {
                        self.rect(c0, c1, r0, r)?;
                        i += 1;
                    }
                    (Some((c0, c1, r0)), None) => {
                        self.rect(c0, c1, r0, r)?;
                        i += 1;
                    }
                    (_, Some(sp)) => {
                        next.push((sp.0, sp.1, r));
                        k += 1;
                    }
                    (None, None) => unreachable!(),
                }
            }
            self.open = next;
            self.spans = spans;
            self.rows_written += 1;
            if self.rows_written.is_multiple_of(self.layout.rows_per_strip)
                || self.rows_written == self.layout.height
            {
                self.close_all()?;
                if let Some([_, fh]) = self.layout.field {
                    if self.rows_written.is_multiple_of(fh)
                        || self.rows_written == self.layout.height
                    {
                        self.close_field_row((self.rows_written - 1) / fh)?;
                    }
                }
            }
        }
        Ok(())
    }

    /// Rows written.
    pub fn rows_written(&self) -> u32 {
        self.rows_written
    }

    /// Flushes and syncs; the state to resume from (only at a strip boundary).
    pub fn checkpoint(&mut self) -> Result<GdsState> {
        if !self.open.is_empty() {
            return Err(Error::job(
                &self.final_path,
                "GDSII writer: checkpoint inside a strip",
            ));
        }
        let out = self.out.as_mut().expect("open writer");
        out.flush()
            .and_then(|_| out.get_ref().sync_data())
            .map_err(|e| Error::io(&self.partial, e))?;
        for c in &mut self.columns {
            c.out
                .flush()
                .and_then(|_| c.out.get_ref().sync_data())
                .map_err(|e| Error::io(&c.path, e))?;
        }
        Ok(GdsState {
            rows_written: self.rows_written,
            file_len: self.pos,
            boundaries: self.boundaries,
            column_lens: self.columns.iter().map(|c| c.len).collect(),
            chunks: self.hasher.checkpoint(self.pos),
        })
    }

    /// Writes ENDSTR and ENDLIB, syncs and hashes the file, still under its partial name.
    pub fn finish_unpublished(mut self) -> Result<UnpublishedGds> {
        if self.rows_written != self.layout.height {
            return Err(Error::job(
                &self.final_path,
                format!(
                    "GDSII output incomplete: {} of {} rows were written",
                    self.rows_written, self.layout.height
                ),
            ));
        }
        self.close_all()?;
        let mut tail = Vec::new();
        if let Some(f) = self.layout.field {
            // The top structure: one reference per field, at its lower-left corner.
            let l = &self.layout;
            record(&mut tail, 0x05, 0x02, &int2s(&DATE));
            record(&mut tail, 0x06, 0x06, &ascii(&l.name));
            let [nc, nr] = l.field_counts();
            for r in 0..nr {
                for c in 0..nc {
                    let bottom = ((r + 1) * f[1]).min(l.height);
                    record(&mut tail, 0x0A, 0x00, &[]);
                    record(&mut tail, 0x12, 0x06, &ascii(&l.field_name(r, c)));
                    let xy: Vec<u8> = [l.x_edge(c * f[0]), l.y_edge(bottom)]
                        .iter()
                        .flat_map(|v| v.to_be_bytes())
                        .collect();
                    record(&mut tail, 0x10, 0x03, &xy);
                    record(&mut tail, 0x11, 0x00, &[]);
                }
            }
        }
        record(&mut tail, 0x07, 0x00, &[]);
        record(&mut tail, 0x04, 0x00, &[]);
        self.put(&tail)?;
        for c in std::mem::take(&mut self.columns) {
            drop(c.out);
            let _ = fs::remove_file(&c.path);
        }
        let out = self.out.take().expect("open writer");
        let f = out
            .into_inner()
            .map_err(|e| Error::io(&self.partial, e.into_error()))?;
        f.sync_all().map_err(|e| Error::io(&self.partial, e))?;
        drop(f);
        let (bytes, sha256) = hash_path(&self.partial)?;
        Ok(UnpublishedGds {
            partial: self.partial.clone(),
            gds: FinishedGds {
                path: self.final_path.clone(),
                bytes,
                sha256,
                boundaries: self.boundaries,
                vertices: 5 * self.boundaries,
            },
        })
    }

    /// Removes the partial file.
    pub fn abandon(mut self) -> Result<()> {
        self.out = None;
        for c in std::mem::take(&mut self.columns) {
            drop(c.out);
            let _ = fs::remove_file(&c.path);
        }
        fs::remove_file(&self.partial).map_err(|e| Error::io(&self.partial, e))
    }
}

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
