//! Write fields: the plate split into a grid of complete TIFF files (the unit many writers expose
//! at once), `NAME_rRRR_cCCC.tif` by field row and column, listed in a manifest `NAME.fields.json`
//! with each field's physical origin, size and SHA-256.
//!
//! Rows stream through one row of fields at a time: a [`FieldSink`] holds the writers of the
//! current field row only, so memory stays set by the band, whatever the plate.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};
use crate::optics::Plate;
use crate::output::tiff::{StripWriter, TiffLayout, WriterState};

pub use crate::output::manifest::FieldEntry;

/// Resume state of a field run: fields done and the writers of the field row in progress.
#[derive(Clone, Debug, Serialize, Deserialize, PartialEq, Default)]
pub struct FieldsState {
    /// Finished fields, in order.
    pub done: Vec<FieldEntry>,
    /// Checkpoints of the writers of field row `row` (empty before the first band).
    pub writers: Vec<WriterState>,
    /// Field row of `writers`. A checkpoint taken right after a field row's last band still
    /// holds that row's writers (they finish when the next row starts), so the row cannot be
    /// derived from the next plate row.
    #[serde(default)]
    pub row: u32,
}

/// The grid of fields of a plate.
#[derive(Clone, Debug)]
pub struct FieldGrid {
    /// Field size [w, h] (the last row and column may be smaller).
    pub field: [u32; 2],
    /// Plate.
    pub plate: Plate,
    /// Final output path NAME.tif (fields are named after it).
    pub output: PathBuf,
    /// Layout template (width/height replaced per field).
    pub layout: TiffLayout,
}

impl FieldGrid {
    /// Number of field columns and rows.
    pub fn counts(&self) -> [u32; 2] {
        [
            self.plate.width.div_ceil(self.field[0]),
            self.plate.height.div_ceil(self.field[1]),
        ]
    }
    /// Column ranges [c0, c1) of the field columns.
    pub fn column_blocks(&self) -> Vec<(usize, usize)> {
        (0..self.counts()[0])
            .map(|c| {
                (
                    (c * self.field[0]) as usize,
                    ((c + 1) * self.field[0]).min(self.plate.width) as usize,
                )
            })
            .collect()
    }
    /// Path of field (row, col).
    pub fn path(&self, row: u32, col: u32) -> PathBuf {
        let n = self.counts();
        let digits = n[0].max(n[1]).saturating_sub(1).to_string().len().max(3);
        let stem = self
            .output
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        let ext = self
            .output
            .extension()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "tif".into());
        self.output
            .with_file_name(format!("{stem}_r{row:0digits$}_c{col:0digits$}.{ext}"))
    }
    /// Manifest path NAME.fields.json.
    pub fn manifest_path(&self) -> PathBuf {
        let stem = self
            .output
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        self.output.with_file_name(format!("{stem}.fields.json"))
    }
    fn layout(&self, row: u32, col: u32) -> TiffLayout {
        let mut l = self.layout.clone();
        l.width = ((col + 1) * self.field[0]).min(self.plate.width) - col * self.field[0];
        l.height = ((row + 1) * self.field[1]).min(self.plate.height) - row * self.field[1];
        l.rows_per_strip = l.rows_per_strip.min(l.height);
        l
    }
    fn entry(&self, row: u32, col: u32, bytes: u64, sha256: String, path: &Path) -> FieldEntry {
        let l = self.layout(row, col);
        let p = &self.plate;
        let (c0, r0) = (col * self.field[0], row * self.field[1]);
        FieldEntry {
            file: path
                .file_name()
                .map(|f| f.to_string_lossy().into_owned())
                .unwrap_or_default(),
            row,
            col,
            first_px: [c0, r0],
            size_px: [l.width, l.height],
            origin_mm: [
                (p.x_of_col(c0 as f64) - p.pitch[0] / 2.0) * 1e3,
                (p.y_of_row(r0 as f64) + p.pitch[1] / 2.0) * 1e3,
            ],
            size_mm: [
                l.width as f64 * p.pitch[0] * 1e3,
                l.height as f64 * p.pitch[1] * 1e3,
            ],
            bytes,
            sha256,
        }
    }
}

/// Streams rows into the fields of one field row at a time.
pub struct FieldSink {
    grid: FieldGrid,
    /// Field row of `writers`.
    row: u32,
    /// (field column, its writer) of the current field row.
    writers: Vec<(u32, StripWriter)>,
    /// Finished fields.
    pub done: Vec<FieldEntry>,
}

impl FieldSink {
    /// Starts (or resumes, from `state`) writing fields; `next_row` is the first plate row to come.
    pub fn new(grid: FieldGrid, next_row: u32, state: Option<FieldsState>) -> Result<FieldSink> {
        let state = state.unwrap_or_default();
        let mut row = next_row / grid.field[1];
        let mut writers = Vec::new();
        let mut done = state.done;
        let mut complete_row = false;
        if !state.writers.is_empty() {
            row = state.row;
            let rows = (row * grid.field[1]..((row + 1) * grid.field[1]).min(grid.plate.height))
                .len() as u32;
            // Writers of a row are either still filling (next_row inside the row) or complete
            // (next_row at the row's end); anything else is a journal from another layout.
            if !(row * grid.field[1] < next_row && next_row <= row * grid.field[1] + rows) {
                return Err(Error::input(
                    grid.manifest_path(),
                    format!(
                        "resume journal: field row {row} does not hold plate row {next_row}; rerun with --restart"
                    ),
                ));
            }
            let complete = next_row == row * grid.field[1] + rows;
            complete_row = complete;
            for (col, ws) in state.writers.into_iter().enumerate() {
                let col = col as u32;
                let path = grid.path(row, col);
                // A complete row's field may have been finished (renamed from its partial) after
                // the last checkpoint, before a kill: the finished file is then the field.
                if complete && !crate::output::tiff::partial_path(&path).exists() && path.is_file()
                {
                    let (bytes, sha) = crate::output::tiff::hash_path(&path)?;
                    done.push(grid.entry(row, col, bytes, sha, &path));
                    continue;
                }
                writers.push((col, StripWriter::resume(&path, grid.layout(row, col), ws)?));
            }
        }
        let mut sink = FieldSink {
            grid,
            row,
            writers,
            done,
        };
        if complete_row {
            // Every row of it is written: finish its fields now, so the sink holds whole field
            // rows only and no writer list with gaps reaches a later journal.
            sink.finish_row()?;
        }
        Ok(sink)
    }

    /// Whether [`Self::write_band`] at plate row `row0` finishes (publishes) the current row's
    /// fields first. The caller checkpoints before such a band: a journal taken inside the row
    /// cannot resume once the row's partial files are renamed.
    pub fn closes_row(&self, row0: u32) -> bool {
        !self.writers.is_empty() && row0 / self.grid.field[1] != self.row
    }

    /// Appends the band starting at plate row `row0`: one block of encoded rows per field column.
    /// Bands never straddle field rows (band heights divide the field height).
    pub fn write_band(&mut self, row0: u32, blocks: &[Vec<u8>]) -> Result<()> {
        let fr = row0 / self.grid.field[1];
        if self.writers.is_empty() || fr != self.row {
            self.finish_row()?;
            self.row = fr;
            for col in 0..self.grid.counts()[0] {
                self.writers.push((
                    col,
                    StripWriter::create(&self.grid.path(fr, col), self.grid.layout(fr, col))?,
                ));
            }
        }
        for (w, b) in self.writers.iter_mut().zip(blocks) {
            w.1.write_rows(b)?;
        }
        Ok(())
    }

    /// Finishes the writers of the current field row (all rows written).
    pub fn finish_row(&mut self) -> Result<()> {
        let row = self.row;
        for (col, w) in std::mem::take(&mut self.writers) {
            let f = w.finish()?;
            let e = self.grid.entry(row, col, f.bytes, f.sha256, &f.path);
            self.done.push(e);
        }
        self.done.sort_by_key(|e| (e.row, e.col));
        Ok(())
    }

    /// Syncs the writers and returns the resume state.
    pub fn checkpoint(&mut self) -> Result<FieldsState> {
        let mut ws = Vec::new();
        for (_, w) in &mut self.writers {
            ws.push(w.checkpoint()?);
        }
        Ok(FieldsState {
            done: self.done.clone(),
            writers: ws,
            row: self.row,
        })
    }

    /// Removes the partial files of the current row (failure before any checkpoint).
    pub fn abandon(self) {
        for (_, w) in self.writers {
            let _ = w.abandon();
        }
    }

    /// The grid.
    pub fn grid(&self) -> &FieldGrid {
        &self.grid
    }
}

/// The manifest of a finished field set.
pub fn manifest(
    grid: &FieldGrid,
    entries: &[FieldEntry],
    job_sha256: &str,
) -> crate::output::manifest::FieldsManifest {
    let n = grid.counts();
    crate::output::manifest::FieldsManifest {
        format: crate::output::manifest::FORMAT.into(),
        format_version: 1,
        job_sha256: job_sha256.into(),
        plate_px: [grid.plate.width, grid.plate.height],
        pitch_um: [grid.plate.pitch[0] * 1e6, grid.plate.pitch[1] * 1e6],
        field_px: grid.field,
        fields_x: n[0],
        fields_y: n[1],
        origin_convention: "origin_mm is the field's top-left corner in plate coordinates (x right, y up, plate centre at 0)".into(),
        fields: entries.to_vec(),
    }
}

/// Checks a field size against the plate: each side at least 1.
pub fn validate(field: [i64; 2], path: &Path) -> Result<[u32; 2]> {
    if field.iter().any(|&v| v < 1 || v > u32::MAX as i64) {
        return Err(Error::job(
            path,
            format!("[output] field_px = {field:?}: each side must be at least 1 pixel"),
        ));
    }
    Ok([field[0] as u32, field[1] as u32])
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::output::tiff::Compression;

    fn grid(dir: &Path) -> FieldGrid {
        FieldGrid {
            field: [4, 3],
            plate: Plate {
                width: 8,
                height: 6,
                pitch: [2e-6, 2e-6],
                wavelength: 633e-9,
            },
            output: dir.join("p.tif"),
            layout: TiffLayout {
                width: 8,
                height: 6,
                bits_per_sample: 8,
                compression: Compression::None,
                rows_per_strip: 1,
                pixel_pitch_m: (2e-6, 2e-6),
                software: "test".into(),
                description: None,
                bigtiff: None,
            },
        }
    }

    /// Band of one row at plate row r: one 4-byte block per field column.
    fn band(r: u32) -> Vec<Vec<u8>> {
        (0..2u8).map(|c| vec![r as u8 * 16 + c; 4]).collect()
    }

    fn files(dir: &Path) -> Vec<(String, Vec<u8>)> {
        let mut v: Vec<_> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().path())
            .map(|p| {
                (
                    p.file_name().unwrap().to_string_lossy().into_owned(),
                    std::fs::read(&p).unwrap(),
                )
            })
            .collect();
        v.sort();
        v
    }

    /// A checkpoint right after a field row's last band (writers of row 0 still open, next plate
    /// row 3 = first row of field row 1) must resume row 0's writers, then go on to row 1.
    #[test]
    fn checkpoint_at_field_row_boundary_resumes() {
        let whole = tempfile::tempdir().unwrap();
        let mut s = FieldSink::new(grid(whole.path()), 0, None).unwrap();
        for r in 0..6 {
            s.write_band(r, &band(r)).unwrap();
        }
        s.finish_row().unwrap();

        let cut = tempfile::tempdir().unwrap();
        let mut s = FieldSink::new(grid(cut.path()), 0, None).unwrap();
        for r in 0..3 {
            s.write_band(r, &band(r)).unwrap();
        }
        let state = s.checkpoint().unwrap();
        assert_eq!(state.row, 0);
        drop(s); // killed here: the writers of row 0 never finish
        let state: FieldsState =
            serde_json::from_str(&serde_json::to_string(&state).unwrap()).unwrap();
        let mut s = FieldSink::new(grid(cut.path()), 3, Some(state)).unwrap();
        for r in 3..6 {
            s.write_band(r, &band(r)).unwrap();
        }
        s.finish_row().unwrap();
        assert_eq!(s.done.len(), 4);
        assert_eq!(files(cut.path()), files(whole.path()));
    }

    /// The stream's rule: checkpoint whenever `closes_row` says the next band publishes a row.
    /// A kill after any band, with the journal of the last checkpoint taken by that rule (one
    /// inside row 0 as well), resumes to the same files. Without the rule a journal taken inside
    /// row 0 would point at partials that the start of row 1 renamed away.
    #[test]
    fn checkpoint_before_a_row_closes_makes_every_kill_resumable() {
        let whole = tempfile::tempdir().unwrap();
        let mut s = FieldSink::new(grid(whole.path()), 0, None).unwrap();
        for r in 0..6 {
            assert_eq!(s.closes_row(r), r == 3, "row {r}");
            s.write_band(r, &band(r)).unwrap();
        }
        s.finish_row().unwrap();
        for kill_after in 1..6u32 {
            let cut = tempfile::tempdir().unwrap();
            let mut s = FieldSink::new(grid(cut.path()), 0, None).unwrap();
            // A timed checkpoint inside row 0, then the rule's checkpoints.
            let mut journal = None;
            for r in 0..kill_after {
                if r == 2 || s.closes_row(r) {
                    journal = Some((r, s.checkpoint().unwrap()));
                }
                s.write_band(r, &band(r)).unwrap();
            }
            drop(s); // killed
            let (next, state) = journal.unwrap_or((0, FieldsState::default()));
            let state = (next > 0).then_some(state);
            let mut s = FieldSink::new(grid(cut.path()), next, state)
                .unwrap_or_else(|e| panic!("kill after {kill_after}: {e}"));
            for r in next..6 {
                s.write_band(r, &band(r)).unwrap();
            }
            s.finish_row().unwrap();
            let left: Vec<_> = files(cut.path())
                .into_iter()
                .filter(|(n, _)| !n.ends_with(".partial"))
                .collect();
            assert_eq!(left, files(whole.path()), "kill after {kill_after}");
        }
    }

    /// A kill after a complete field row's fields were finished (renamed from their partials)
    /// but before the next checkpoint: the journal still lists the row's writers. Resuming adopts
    /// the finished files (all of them, or only some when the kill fell between two fields)
    /// and goes on, with the same files and entries as an uninterrupted run.
    #[test]
    fn fields_finished_after_the_last_checkpoint_are_adopted() {
        let whole = tempfile::tempdir().unwrap();
        let mut s = FieldSink::new(grid(whole.path()), 0, None).unwrap();
        for r in 0..6 {
            s.write_band(r, &band(r)).unwrap();
        }
        s.finish_row().unwrap();
        let want = s.done.clone();
        for finished_before_kill in [1usize, 2] {
            let cut = tempfile::tempdir().unwrap();
            let mut s = FieldSink::new(grid(cut.path()), 0, None).unwrap();
            for r in 0..3 {
                s.write_band(r, &band(r)).unwrap();
            }
            let state = s.checkpoint().unwrap();
            // Finish the first fields of row 0 only, as a kill inside finish_row leaves them.
            let rest = s.writers.split_off(finished_before_kill);
            for (_, w) in std::mem::take(&mut s.writers) {
                w.finish().unwrap();
            }
            drop(rest);
            drop(s);
            let mut s = FieldSink::new(grid(cut.path()), 3, Some(state)).unwrap();
            for r in 3..6 {
                s.write_band(r, &band(r)).unwrap();
            }
            s.finish_row().unwrap();
            assert_eq!(s.done, want, "{finished_before_kill} finished");
            assert_eq!(files(cut.path()), files(whole.path()));
        }
    }

    /// A journal whose writers' row cannot hold the next plate row is refused, not misapplied.
    #[test]
    fn journal_of_another_row_is_refused() {
        let d = tempfile::tempdir().unwrap();
        let mut s = FieldSink::new(grid(d.path()), 0, None).unwrap();
        s.write_band(0, &band(0)).unwrap();
        let state = s.checkpoint().unwrap();
        drop(s);
        let e = FieldSink::new(grid(d.path()), 5, Some(state))
            .err()
            .expect("must refuse");
        assert!(e.to_string().contains("--restart"), "{e}");
    }
}
