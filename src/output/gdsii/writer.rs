//! The streaming writer of [`super`]: rows in, rectangles out, checkpoints at strip ends.

use std::fs::{self, File, OpenOptions};
use std::io::{BufWriter, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use super::contour::{self, Run};
use super::{
    ascii, int2s, real8, record, FinishedGds, GdsLayout, GdsState, Merge, UnpublishedGds, DATE,
};
use crate::error::{Error, Result};
use crate::output::tiff::{hash_path, partial_path};

/// Streams packed binary rows into a GDSII file.
pub struct GdsWriter {
    final_path: PathBuf,
    partial: PathBuf,
    layout: GdsLayout,
    out: Option<BufWriter<File>>,
    pos: u64,
    rows_written: u32,
    boundaries: u64,
    /// XY points written (closing points included).
    vertices: u64,
    /// Contour merging: the runs of the current strip, traced at its end.
    strip: Vec<Run>,
    /// Open rectangles: (first column, end column, first row), by first column.
    open: Vec<(u32, u32, u32)>,
    /// Spans of the current row (recycled).
    spans: Vec<(u32, u32)>,
    /// Write fields: one file per field column holding the current field row's boundaries.
    columns: Vec<ColumnFile>,
    /// Checksums of the bytes written between checkpoints.
    hasher: crate::output::chunks::ChunkHasher,
    /// Column files of field rows already moved into the layout, and those retired before the
    /// last checkpoint (removed at the next one: the journal then no longer names them).
    retired: Vec<PathBuf>,
    retired_before: Vec<PathBuf>,
    /// A checkpoint was taken (the partial files stay for a resume when dropped).
    resumable: bool,
    /// Finished or abandoned (nothing left to clean up when dropped).
    closed: bool,
}

impl Drop for GdsWriter {
    /// Removes the partial layout and its column files unless the writer finished, was
    /// abandoned, or holds a checkpoint (then they stay for [`GdsWriter::resume`]).
    fn drop(&mut self) {
        if !self.closed && !self.resumable {
            self.out = None;
            self.remove_column_files();
            let _ = fs::remove_file(&self.partial);
        }
    }
}

/// The boundaries of one field column of the current field row, beside the partial file.
struct ColumnFile {
    path: PathBuf,
    out: BufWriter<File>,
    len: u64,
    /// Checksums of what each checkpoint added (verified on resume, like the layout's).
    hasher: crate::output::chunks::ChunkHasher,
}

/// The file of field column `col` of field row `row`. Each field row has its own files, kept
/// until a later checkpoint: a kill after a row's boundaries moved into the layout but before the
/// next checkpoint resumes from the older journal, which still needs them as they were.
fn column_path(partial: &Path, row: u32, col: u32) -> PathBuf {
    let mut s = partial.as_os_str().to_owned();
    s.push(format!(".r{row:05}.col{col:04}"));
    PathBuf::from(s)
}

/// Opens (or, resuming, reopens at the recorded lengths, their checksums verified) the
/// field-column files of field row `row`.
fn open_columns(
    partial: &Path,
    layout: &GdsLayout,
    row: u32,
    lens: Option<&[u64]>,
    chunks: &[Vec<crate::output::chunks::Chunk>],
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
            let path = column_path(partial, row, k);
            let mut f = match lens {
                Some(l) if l[k as usize] > 0 => {
                    OpenOptions::new().read(true).write(true).open(&path)
                }
                _ => File::create(&path),
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
            let mine = chunks.get(k as usize).cloned().unwrap_or_default();
            if len > 0 {
                crate::output::chunks::verify(&path, &mut f, &mine)?;
            }
            f.set_len(len)
                .and_then(|_| f.seek(SeekFrom::Start(len)).map(|_| ()))
                .map_err(|e| Error::io(&path, e))?;
            Ok(ColumnFile {
                path,
                out: BufWriter::with_capacity(1 << 16, f),
                len,
                hasher: crate::output::chunks::ChunkHasher::starting_at(
                    len,
                    if len > 0 { mine } else { Vec::new() },
                ),
            })
        })
        .collect()
}

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
        let columns = open_columns(&partial, &layout, 0, None, &[])?;
        let mut w = GdsWriter {
            final_path: final_path.to_path_buf(),
            partial,
            layout,
            out: Some(BufWriter::with_capacity(1 << 20, f)),
            pos: 0,
            rows_written: 0,
            boundaries: 0,
            vertices: 0,
            strip: Vec::new(),
            open: Vec::new(),
            spans: Vec::new(),
            columns,
            hasher: Default::default(),
            retired: Vec::new(),
            retired_before: Vec::new(),
            resumable: false,
            closed: false,
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
        let field_row = match layout.field {
            Some([_, fh]) => (state.rows_written / fh).min(layout.field_counts()[1] - 1),
            None => 0,
        };
        let columns = open_columns(
            &partial,
            &layout,
            field_row,
            Some(&state.column_lens),
            &state.column_chunks,
        )?;
        Ok(GdsWriter {
            final_path: final_path.to_path_buf(),
            partial,
            layout,
            out: Some(BufWriter::with_capacity(1 << 20, f)),
            pos: state.file_len,
            rows_written: state.rows_written,
            boundaries: state.boundaries,
            vertices: if state.vertices == 0 {
                5 * state.boundaries
            } else {
                state.vertices
            },
            strip: Vec::new(),
            open: Vec::new(),
            spans: Vec::new(),
            columns,
            hasher: crate::output::chunks::ChunkHasher::starting_at(state.file_len, state.chunks),
            retired: Vec::new(),
            retired_before: Vec::new(),
            resumable: true,
            closed: false,
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
        }
        // The next field row writes new files; these go at the checkpoint after next.
        let next = field_row + 1;
        if next < self.layout.field_counts()[1] {
            let fresh = open_columns(&self.partial, &self.layout, next, None, &[])?;
            for c in std::mem::replace(&mut self.columns, fresh) {
                self.retired.push(c.path);
            }
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

    /// A rectangle of columns `c0 .. c1` and rows `r0 .. r1`, from its lower-left corner.
    fn rect(&mut self, c0: u32, c1: u32, r0: u32, r1: u32) -> Result<()> {
        self.polygon(&[(c0, r1), (c1, r1), (c1, r0), (c0, r0)])
    }

    /// A boundary through lattice points (plate column, plate row of the pixel edges),
    /// counter-clockwise with y up, not closed (the first point is repeated here).
    fn polygon(&mut self, pts: &[(u32, u32)]) -> Result<()> {
        let l = &self.layout;
        // In a write field: coordinates from the field's lower-left corner.
        let (mut ox, mut oy) = (0, 0);
        let column = l.field.map(|f| {
            let c0 = pts.iter().map(|p| p.0).min().expect("points");
            let r0 = pts.iter().map(|p| p.1).min().expect("points");
            let (fc, fr) = (c0 / f[0], r0 / f[1]);
            let bottom = ((fr + 1) * f[1]).min(l.height);
            (ox, oy) = (l.x_edge(fc * f[0]), l.y_edge(bottom));
            fc as usize
        });
        let mut b = Vec::with_capacity(48 + 8 * pts.len());
        record(&mut b, 0x08, 0x00, &[]);
        record(&mut b, 0x0D, 0x02, &int2s(&[l.layer]));
        record(&mut b, 0x0E, 0x02, &int2s(&[l.datatype]));
        let xy: Vec<u8> = pts
            .iter()
            .chain(std::iter::once(&pts[0]))
            .flat_map(|&(c, r)| [l.x_edge(c) - ox, l.y_edge(r) - oy])
            .flat_map(|v| v.to_be_bytes())
            .collect();
        record(&mut b, 0x10, 0x03, &xy);
        record(&mut b, 0x11, 0x00, &[]);
        self.boundaries += 1;
        self.vertices += pts.len() as u64 + 1;
        match column {
            Some(k) => {
                let c = &mut self.columns[k];
                c.out.write_all(&b).map_err(|e| Error::io(&c.path, e))?;
                c.hasher.update(&b);
                c.len += b.len() as u64;
                Ok(())
            }
            None => self.put(&b),
        }
    }

    /// Closes the strip's shapes: the open rectangles, or the strip's traced regions.
    fn close_all(&mut self) -> Result<()> {
        if let Merge::Contour { max_vertices } = self.layout.merge {
            let runs = std::mem::take(&mut self.strip);
            for region in contour::regions(&runs) {
                contour::polygons(&region, max_vertices as usize, &mut |pts| self.polygon(pts))?;
            }
            return Ok(());
        }
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
            let r = self.rows_written;
            if let Merge::Contour { .. } = self.layout.merge {
                self.strip
                    .extend(spans.iter().map(|&(c0, c1)| Run { row: r, c0, c1 }));
            } else {
                self.merge_rectangles(&spans)?;
            }
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

    /// Rectangle merging: open rectangles continue where this row has the same span; the
    /// others close.
    fn merge_rectangles(&mut self, spans: &[(u32, u32)]) -> Result<()> {
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
        Ok(())
    }

    /// Rows written.
    pub fn rows_written(&self) -> u32 {
        self.rows_written
    }

    /// Flushes and syncs; the state to resume from (only at a strip boundary).
    pub fn checkpoint(&mut self) -> Result<GdsState> {
        if !self.open.is_empty() || !self.strip.is_empty() {
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
        self.resumable = true;
        // Files the previous journal no longer named can go now.
        for p in std::mem::replace(&mut self.retired_before, std::mem::take(&mut self.retired)) {
            let _ = fs::remove_file(p);
        }
        Ok(GdsState {
            rows_written: self.rows_written,
            file_len: self.pos,
            boundaries: self.boundaries,
            vertices: self.vertices,
            column_lens: self.columns.iter().map(|c| c.len).collect(),
            column_chunks: self
                .columns
                .iter_mut()
                .map(|c| c.hasher.checkpoint(c.len))
                .collect(),
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
        let out = self.out.take().expect("open writer");
        let f = out
            .into_inner()
            .map_err(|e| Error::io(&self.partial, e.into_error()))?;
        f.sync_all().map_err(|e| Error::io(&self.partial, e))?;
        drop(f);
        let (bytes, sha256) = hash_path(&self.partial)?;
        // Every field row's column files (a resumed run may have left older ones).
        self.remove_column_files();
        Ok(UnpublishedGds {
            partial: self.partial.clone(),
            gds: FinishedGds {
                path: self.final_path.clone(),
                bytes,
                sha256,
                boundaries: self.boundaries,
                vertices: self.vertices,
            },
        })
    }

    /// Removes the partial file.
    pub fn abandon(mut self) -> Result<()> {
        self.out = None;
        self.remove_column_files();
        fs::remove_file(&self.partial).map_err(|e| Error::io(&self.partial, e))
    }

    fn remove_column_files(&mut self) {
        self.closed = true;
        self.columns.clear();
        if self.layout.field.is_some() {
            let [nc, nr] = self.layout.field_counts();
            for r in 0..nr {
                for c in 0..nc {
                    let _ = fs::remove_file(column_path(&self.partial, r, c));
                }
            }
        }
    }
}
