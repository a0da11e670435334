//! The streaming strip writer: rows in, strips out (deflated when asked), checkpoints, resume,
//! and the atomic finish (sync, hash, rename).

use std::ffi::OsString;
use std::fs::{self, File, OpenOptions};
use std::io::{self, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use flate2::write::ZlibEncoder;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::error::{Error, Result};

use super::ifd::*;
use super::*;

/// `final_path` with ".partial" appended to its file name (`plate.tif` -> `plate.tif.partial`).
pub fn partial_path(final_path: &Path) -> PathBuf {
    let mut name = OsString::from(final_path.as_os_str());
    name.push(".partial");
    PathBuf::from(name)
}

/// What a checkpoint records: enough to reopen the `.partial` file and continue writing.
/// Serialise it next to the output (JSON, TOML...) and give it back to [`StripWriter::resume`]
/// together with the same [`TiffLayout`].
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct WriterState {
    /// Geometry the file was started with; `resume` refuses a layout that differs.
    pub width: u32,
    pub height: u32,
    pub bits_per_sample: u8,
    pub compression: Compression,
    /// Effective rows per strip (clamped to the height).
    pub rows_per_strip: u32,
    pub bigtiff: bool,
    /// Rows safely on disk.
    pub rows_written: u32,
    /// Length of the `.partial` file that holds them (header and complete strips).
    pub file_len: u64,
    /// Offset and byte count of each complete strip.
    pub strip_offsets: Vec<u64>,
    pub strip_byte_counts: Vec<u64>,
    /// SHA-256 of the strips' bytes written between checkpoints (checked on resume).
    #[serde(default)]
    pub chunks: Vec<crate::output::chunks::Chunk>,
}

/// A completed file under its final name.
#[derive(Clone, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct FinishedTiff {
    pub path: PathBuf,
    /// File size.
    pub bytes: u64,
    /// SHA-256 of the whole file as read back from disk, lowercase hex.
    pub sha256: String,
    pub bigtiff: bool,
    pub strips: u32,
}

/// A complete TIFF still under its `.partial` name (see [`StripWriter::finish_unpublished`]).
#[derive(Debug)]
pub struct UnpublishedTiff {
    partial: PathBuf,
    /// What the file will be once published (its final path, size and hash).
    pub tiff: FinishedTiff,
}

impl UnpublishedTiff {
    /// Renames the file to its final name and syncs the folder.
    pub fn publish(self) -> Result<FinishedTiff> {
        fs::rename(&self.partial, &self.tiff.path).map_err(|e| Error::io(&self.tiff.path, e))?;
        sync_parent_dir(&self.tiff.path)?;
        Ok(self.tiff)
    }

    /// Removes the file (the previous plate of the final name, if any, stays).
    pub fn discard(self) {
        let _ = fs::remove_file(&self.partial);
    }
}

/// Streams rows into a strip TIFF. See the module documentation for the file's lifetime.
pub struct StripWriter {
    final_path: PathBuf,
    partial: PathBuf,
    layout: TiffLayout,
    geometry: Geometry,
    /// `None` once the file has been closed (finish, abandon).
    out: Option<BufWriter<File>>,
    /// Bytes handed to `out` so far: the logical file length.
    pos: u64,
    rows_written: u32,
    /// Rows of the current strip already written (0 at a strip boundary).
    rows_in_strip: u32,
    /// Offset at which the current strip starts.
    strip_start: u64,
    /// Deflate stream of the current strip (compressed bytes accumulate in its Vec).
    encoder: Option<ZlibEncoder<Vec<u8>>>,
    /// Recycled output buffer for the next strip's zlib stream.
    spare: Vec<u8>,
    strip_offsets: Vec<u64>,
    strip_byte_counts: Vec<u64>,
    /// A checkpoint exists on disk: dropping keeps the `.partial` file.
    resumable: bool,
    /// Set after a failed write: the file content is unknown, every further call fails.
    failed: bool,
    /// The `.partial` file has been renamed or removed: Drop does nothing.
    closed: bool,
    /// Checksums of the bytes written between checkpoints.
    hasher: crate::output::chunks::ChunkHasher,
}

impl std::fmt::Debug for StripWriter {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("StripWriter")
            .field("partial", &self.partial)
            .field("rows_written", &self.rows_written)
            .field("height", &self.layout.height)
            .field("bigtiff", &self.geometry.bigtiff)
            .finish_non_exhaustive()
    }
}

impl StripWriter {
    /// Creates `final_path.partial` (replacing any file of that name) and writes the header.
    /// The final file itself is only touched by [`Self::finish`], which replaces it.
    pub fn create(final_path: &Path, layout: TiffLayout) -> Result<Self> {
        let geometry = layout.validate(final_path)?;
        let partial = partial_path(final_path);
        let file = OpenOptions::new()
            .read(true)
            .write(true)
            .create(true)
            .truncate(true)
            .open(&partial)
            .map_err(|e| Error::io(&partial, e))?;
        let mut writer = Self::with_file(final_path, partial, layout, geometry, file);
        let header = header_bytes(geometry.bigtiff);
        writer.put(&header)?;
        writer.strip_start = writer.pos;
        // Checksums cover the strips (the header's IFD pointer is rewritten on resume).
        writer.hasher = crate::output::chunks::ChunkHasher::starting_at(writer.pos, Vec::new());
        Ok(writer)
    }

    /// Reopens the `.partial` file of an interrupted write, cuts it back to the checkpoint
    /// `state` and continues after its last complete strip. `layout` must be the one the file
    /// was created with (the geometry is checked against `state`; the tags written at the end
    /// come from `layout`). Finishing then gives the same bytes as an uninterrupted write.
    pub fn resume(final_path: &Path, layout: TiffLayout, state: WriterState) -> Result<Self> {
        let geometry = layout.validate(final_path)?;
        let partial = partial_path(final_path);
        check_state(&partial, &layout, &geometry, &state)?;
        let mut file = OpenOptions::new()
            .read(true)
            .write(true)
            .open(&partial)
            .map_err(|e| Error::io(&partial, e))?;
        let len = file.metadata().map_err(|e| Error::io(&partial, e))?.len();
        if len < state.file_len {
            return Err(Error::input(
                &partial,
                format!(
                    "the file holds {len} bytes but the checkpoint needs {}; it cannot be resumed",
                    state.file_len
                ),
            ));
        }
        // The header up to the IFD pointer must match; the pointer itself may have been
        // patched by a finish that failed later, so it is rewritten.
        let header = header_bytes(geometry.bigtiff);
        let magic_len = header_pointer_pos(geometry.bigtiff) as usize;
        let mut found = vec![0u8; magic_len];
        file.read_exact(&mut found)
            .map_err(|e| Error::io(&partial, e))?;
        if found != header[..magic_len] {
            return Err(Error::input(
                &partial,
                format!(
                    "not the {} TIFF header this checkpoint expects; it cannot be resumed",
                    if geometry.bigtiff {
                        "BigTIFF"
                    } else {
                        "classic"
                    }
                ),
            ));
        }
        crate::output::chunks::verify(&partial, &mut file, &state.chunks)?;
        let io = |e| Error::io(&partial, e);
        file.set_len(state.file_len).map_err(io)?;
        file.seek(SeekFrom::Start(0)).map_err(io)?;
        file.write_all(&header).map_err(io)?;
        file.seek(SeekFrom::Start(state.file_len)).map_err(io)?;

        let mut writer = Self::with_file(final_path, partial, layout, geometry, file);
        writer.pos = state.file_len;
        writer.strip_start = state.file_len;
        writer.rows_written = state.rows_written;
        writer.strip_offsets = state.strip_offsets;
        writer.strip_byte_counts = state.strip_byte_counts;
        writer.hasher =
            crate::output::chunks::ChunkHasher::starting_at(state.file_len, state.chunks);
        writer.resumable = true;
        Ok(writer)
    }

    fn with_file(
        final_path: &Path,
        partial: PathBuf,
        layout: TiffLayout,
        geometry: Geometry,
        file: File,
    ) -> Self {
        let encoder = match layout.compression {
            Compression::None => None,
            Compression::Deflate => Some(ZlibEncoder::new(
                Vec::new(),
                flate2::Compression::new(DEFLATE_LEVEL),
            )),
        };
        StripWriter {
            final_path: final_path.to_path_buf(),
            partial,
            layout,
            geometry,
            out: Some(BufWriter::with_capacity(WRITE_BUFFER_BYTES, file)),
            pos: 0,
            rows_written: 0,
            rows_in_strip: 0,
            strip_start: 0,
            encoder,
            spare: Vec::new(),
            strip_offsets: Vec::with_capacity(geometry.strips as usize),
            strip_byte_counts: Vec::with_capacity(geometry.strips as usize),
            resumable: false,
            failed: false,
            closed: false,
            hasher: Default::default(),
        }
    }

    /// Appends whole rows, in order, in file layout: 1-bit rows packed MSB-first (bit 7 of
    /// the first byte is the leftmost pixel, 1 = white), each row padded to a whole byte
    /// (`(width + 7) / 8` bytes; padding bits should be 0); 8-bit one byte per pixel; 16-bit
    /// little-endian `u16`. `rows` may hold any whole number of rows, independent of the strip
    /// size.
    ///
    /// # Panics
    /// If `rows.len()` is not a multiple of the row size or more than `height` rows would have
    /// been written: both are bugs of the caller.
    pub fn write_rows(&mut self, rows: &[u8]) -> Result<()> {
        let row_bytes = self.geometry.row_bytes as usize;
        if !rows.len().is_multiple_of(row_bytes) {
            not_whole_rows(rows.len(), row_bytes);
        }
        let count = (rows.len() / row_bytes) as u64;
        if u64::from(self.rows_written) + count > u64::from(self.layout.height) {
            too_many_rows(self.rows_written, count, self.layout.height);
        }
        self.check_usable()?;
        let mut rest = rows;
        while !rest.is_empty() {
            let room = (self.geometry.rows_per_strip - self.rows_in_strip) as usize;
            let take = room.min(rest.len() / row_bytes);
            let (chunk, tail) = rest.split_at(take * row_bytes);
            match self.encoder.as_mut() {
                None => self.put(chunk)?,
                Some(encoder) => {
                    let result = encoder.write_all(chunk);
                    self.check(result)?;
                }
            }
            self.rows_in_strip += take as u32;
            self.rows_written += take as u32;
            if self.rows_in_strip == self.geometry.rows_per_strip
                || self.rows_written == self.layout.height
            {
                self.end_strip()?;
            }
            rest = tail;
        }
        Ok(())
    }

    /// Rows written so far (including those restored by `resume`).
    pub fn rows_written(&self) -> u32 {
        self.rows_written
    }

    /// Whether the rows written so far end exactly at a strip boundary, i.e. whether
    /// [`Self::checkpoint`] may be called now.
    pub fn at_strip_boundary(&self) -> bool {
        self.rows_in_strip == 0
    }

    /// Rows per strip actually used (the layout's value clamped to the height).
    pub fn rows_per_strip(&self) -> u32 {
        self.geometry.rows_per_strip
    }

    /// Whether the file is a BigTIFF.
    pub fn bigtiff(&self) -> bool {
        self.geometry.bigtiff
    }

    /// The `.partial` file being written.
    pub fn partial_path(&self) -> &Path {
        &self.partial
    }

    /// Makes every complete strip durable (flush and fsync) and returns what
    /// [`Self::resume`] needs to continue from here. From now on, dropping the writer keeps
    /// the `.partial` file.
    ///
    /// # Panics
    /// If called in the middle of a strip ([`Self::at_strip_boundary`] is false): the caller
    /// must checkpoint only after a multiple of [`Self::rows_per_strip`] rows (or all rows).
    pub fn checkpoint(&mut self) -> Result<WriterState> {
        if !self.at_strip_boundary() {
            not_at_strip_boundary(
                self.rows_written,
                self.rows_in_strip,
                self.geometry.rows_per_strip,
            );
        }
        self.check_usable()?;
        let result = match self.out.as_mut() {
            Some(out) => out.flush().and_then(|()| out.get_ref().sync_data()),
            None => Err(closed_error()),
        };
        self.check(result)?;
        self.resumable = true;
        Ok(WriterState {
            width: self.layout.width,
            height: self.layout.height,
            bits_per_sample: self.layout.bits_per_sample,
            compression: self.layout.compression,
            rows_per_strip: self.geometry.rows_per_strip,
            bigtiff: self.geometry.bigtiff,
            rows_written: self.rows_written,
            file_len: self.pos,
            strip_offsets: self.strip_offsets.clone(),
            strip_byte_counts: self.strip_byte_counts.clone(),
            chunks: self.hasher.checkpoint(self.pos),
        })
    }

    /// Writes the IFD at the end of the file, points the header to it, syncs, hashes the file
    /// as read back from disk and renames it to its final name.
    ///
    /// Fails if fewer than `height` rows were written. On failure the writer is dropped: the
    /// `.partial` file is removed unless a checkpoint was taken (see the module documentation).
    pub fn finish(self) -> Result<FinishedTiff> {
        self.finish_unpublished()?.publish()
    }

    /// As [`Self::finish`], but the complete, synced and hashed file stays under its
    /// `.partial` name until [`UnpublishedTiff::publish`]: a caller that writes a companion file
    /// (the sidecar) first can publish both together, so a failure in between never removes the
    /// previous plate of that name.
    pub fn finish_unpublished(mut self) -> Result<UnpublishedTiff> {
        if self.rows_written != self.layout.height {
            return Err(Error::job(
                &self.final_path,
                format!(
                    "TIFF output incomplete: {} of {} rows were written",
                    self.rows_written, self.layout.height
                ),
            ));
        }
        self.check_usable()?;
        let bigtiff = self.geometry.bigtiff;
        let strips = self.strip_offsets.len() as u64;
        debug_assert_eq!(strips, u64::from(self.geometry.strips));
        let fields = self.layout.fields(
            bigtiff,
            strips,
            &self.strip_offsets,
            &self.strip_byte_counts,
            self.geometry.x_resolution,
            self.geometry.y_resolution,
        );
        let tail_end = self.pos + self.pos % 2 + tail_len_after_pad(&fields, bigtiff);
        if !bigtiff && tail_end > CLASSIC_LIMIT {
            return Err(self.too_big_for_classic());
        }
        let (ifd_offset, tail) = build_tail(&fields, bigtiff, self.pos);
        drop(fields);
        self.put(&tail)?;

        let out = self.out.take().ok_or_else(|| self.closed())?;
        let file = out.into_inner().map_err(|e| e.into_error());
        let mut file = self.check(file)?;
        let pointer = if bigtiff {
            ifd_offset.to_le_bytes().to_vec()
        } else {
            (ifd_offset as u32).to_le_bytes().to_vec()
        };
        let result = file
            .seek(SeekFrom::Start(header_pointer_pos(bigtiff)))
            .and_then(|_| file.write_all(&pointer))
            .and_then(|()| file.sync_all());
        self.check(result)?;
        let hashed = hash_file(&mut file);
        let (bytes, sha256) = self.check(hashed)?;
        if bytes != self.pos {
            let message = format!(
                "read back {bytes} bytes after writing {}; the file is damaged",
                self.pos
            );
            return Err(Error::io(&self.partial, io::Error::other(message)));
        }
        drop(file);
        // The file is whole: from here on it is the caller's (publish or discard), not the
        // writer's to remove on drop.
        self.closed = true;
        Ok(UnpublishedTiff {
            partial: self.partial.clone(),
            tiff: FinishedTiff {
                path: self.final_path.clone(),
                bytes,
                sha256,
                bigtiff,
                strips: strips as u32,
            },
        })
    }

    /// Closes and removes the `.partial` file, checkpoint or not. Call it on any failure so
    /// that nothing half-written remains. A file already gone is not an error.
    pub fn abandon(mut self) -> Result<()> {
        self.discard_output();
        self.closed = true;
        match fs::remove_file(&self.partial) {
            Ok(()) => Ok(()),
            Err(e) if e.kind() == io::ErrorKind::NotFound => Ok(()),
            Err(e) => Err(Error::io(&self.partial, e)),
        }
    }

    /// Closes the file without writing what is still buffered.
    fn discard_output(&mut self) {
        if let Some(out) = self.out.take() {
            let (file, _unwritten) = out.into_parts();
            drop(file);
        }
    }

    /// Ends the current strip: records its offset and size (compressing it first if needed).
    fn end_strip(&mut self) -> Result<()> {
        let (offset, count) = match self.encoder.as_mut() {
            None => (self.strip_start, self.pos - self.strip_start),
            Some(encoder) => {
                let next = std::mem::take(&mut self.spare);
                let result = encoder.reset(next);
                let mut stream = self.check(result)?;
                let offset = self.pos;
                let written = self.put(&stream);
                stream.clear();
                self.spare = stream;
                written?;
                (offset, self.pos - offset)
            }
        };
        if !self.geometry.bigtiff && offset + count > CLASSIC_LIMIT {
            self.failed = true;
            return Err(self.too_big_for_classic());
        }
        self.strip_offsets.push(offset);
        self.strip_byte_counts.push(count);
        self.rows_in_strip = 0;
        self.strip_start = self.pos;
        Ok(())
    }

    /// Writes bytes at the end of the file.
    fn put(&mut self, bytes: &[u8]) -> Result<()> {
        let result = match self.out.as_mut() {
            Some(out) => out.write_all(bytes),
            None => Err(closed_error()),
        };
        self.check(result)?;
        self.hasher.update(bytes);
        self.pos += bytes.len() as u64;
        Ok(())
    }

    /// Turns an I/O error into `Error::Io` on the `.partial` file and marks the writer failed.
    fn check<T>(&mut self, result: io::Result<T>) -> Result<T> {
        result.map_err(|e| {
            self.failed = true;
            Error::io(&self.partial, e)
        })
    }

    fn check_usable(&self) -> Result<()> {
        if self.failed {
            Err(Error::io(
                &self.partial,
                io::Error::other("an earlier write to this file failed; its content is unknown"),
            ))
        } else {
            Ok(())
        }
    }

    fn closed(&self) -> Error {
        Error::io(&self.partial, closed_error())
    }

    fn too_big_for_classic(&self) -> Error {
        Error::unsupported(
            &self.final_path,
            "the compressed image grew past the 4 GiB a classic TIFF can address; \
             write it as BigTIFF",
        )
    }
}

impl Drop for StripWriter {
    /// Removes the `.partial` file unless the writer finished, was abandoned, or holds a
    /// checkpoint (then the file stays for [`StripWriter::resume`]). Errors are ignored.
    fn drop(&mut self) {
        self.discard_output();
        if !self.closed && !self.resumable {
            let _ = fs::remove_file(&self.partial);
        }
    }
}

fn check_state(
    partial: &Path,
    layout: &TiffLayout,
    geometry: &Geometry,
    state: &WriterState,
) -> Result<()> {
    let expected = (
        layout.width,
        layout.height,
        layout.bits_per_sample,
        layout.compression,
        geometry.rows_per_strip,
        geometry.bigtiff,
    );
    let found = (
        state.width,
        state.height,
        state.bits_per_sample,
        state.compression,
        state.rows_per_strip,
        state.bigtiff,
    );
    if expected != found {
        return Err(Error::input(
            partial,
            format!(
                "checkpoint (width, height, bits, compression, rows per strip, BigTIFF) = \
                 {found:?} does not match the layout {expected:?}"
            ),
        ));
    }
    let bad = |message: String| Err(Error::input(partial, format!("bad checkpoint: {message}")));
    let rows = state.rows_written;
    let rps = geometry.rows_per_strip;
    if rows > layout.height || (!rows.is_multiple_of(rps) && rows != layout.height) {
        return bad(format!(
            "{rows} rows written is not a strip boundary of a {}-row image with {rps} rows per strip",
            layout.height
        ));
    }
    let strips = rows.div_ceil(rps) as usize;
    if state.strip_offsets.len() != strips || state.strip_byte_counts.len() != strips {
        return bad(format!(
            "{rows} rows need {strips} strips, the checkpoint lists {} offsets and {} sizes",
            state.strip_offsets.len(),
            state.strip_byte_counts.len()
        ));
    }
    let mut end = header_len(geometry.bigtiff);
    for (i, (&offset, &count)) in state
        .strip_offsets
        .iter()
        .zip(&state.strip_byte_counts)
        .enumerate()
    {
        if offset != end || count == 0 {
            return bad(format!(
                "strip {i} at offset {offset} with {count} bytes does not follow the previous one \
                 (expected offset {end})"
            ));
        }
        if layout.compression == Compression::None {
            let strip_rows = (rows - i as u32 * rps).min(rps);
            if count != u64::from(strip_rows) * geometry.row_bytes {
                return bad(format!("strip {i} has {count} bytes, not whole rows"));
            }
        }
        end = offset.saturating_add(count);
    }
    if state.file_len != end {
        return bad(format!(
            "file length {} does not match the end of the last strip ({end})",
            state.file_len
        ));
    }
    Ok(())
}

/// Size and lowercase hex SHA-256 of a whole file on disk.
pub fn hash_path(path: &Path) -> Result<(u64, String)> {
    let mut f = File::open(path).map_err(|e| Error::io(path, e))?;
    hash_file(&mut f).map_err(|e| Error::io(path, e))
}

/// Hashes the whole file from its start; returns (bytes read, lowercase hex SHA-256).
fn hash_file(file: &mut File) -> io::Result<(u64, String)> {
    file.seek(SeekFrom::Start(0))?;
    let mut hasher = Sha256::new();
    let mut buffer = vec![0u8; HASH_BUFFER_BYTES];
    let mut total = 0u64;
    loop {
        let n = match file.read(&mut buffer) {
            Ok(0) => break,
            Ok(n) => n,
            Err(e) if e.kind() == io::ErrorKind::Interrupted => continue,
            Err(e) => return Err(e),
        };
        hasher.update(&buffer[..n]);
        total += n as u64;
    }
    let digest = hasher.finalize();
    let hex = digest.iter().map(|b| format!("{b:02x}")).collect();
    Ok((total, hex))
}

/// Makes the rename durable by syncing the directory that holds the file.
pub fn sync_parent_dir(path: &Path) -> Result<()> {
    #[cfg(unix)]
    {
        let dir = match path.parent() {
            Some(p) if !p.as_os_str().is_empty() => p,
            _ => Path::new("."),
        };
        File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(|e| Error::io(dir, e))?;
    }
    #[cfg(not(unix))]
    let _ = path;
    Ok(())
}

fn closed_error() -> io::Error {
    io::Error::other("the TIFF writer was already closed")
}

#[cold]
#[inline(never)]
#[track_caller]
fn not_whole_rows(len: usize, row_bytes: usize) -> ! {
    panic!("StripWriter::write_rows: {len} bytes is not a whole number of {row_bytes}-byte rows")
}

#[cold]
#[inline(never)]
#[track_caller]
fn too_many_rows(written: u32, more: u64, height: u32) -> ! {
    panic!(
        "StripWriter::write_rows: {written} rows written, {more} more exceed the height {height}"
    )
}

#[cold]
#[inline(never)]
#[track_caller]
fn not_at_strip_boundary(written: u32, in_strip: u32, rows_per_strip: u32) -> ! {
    panic!(
        "StripWriter::checkpoint: {written} rows written, {in_strip} of them into an unfinished \
         strip of {rows_per_strip} rows; checkpoints must fall on strip boundaries"
    )
}
