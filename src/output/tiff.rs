//! Streaming strip TIFF writer for plates that do not fit in memory.
//!
//! This module owns the on-disk TIFF format of the crate's output: a little-endian ("II")
//! classic or BigTIFF file holding one grey image (1, 8 or 16 bits per sample, one sample per
//! pixel) stored as strips, uncompressed or deflate-compressed. Rows are streamed in order; only
//! the strip being compressed is held in memory, plus 16 bytes per strip for the offset tables.
//! The image file directory (IFD) is written at the end of the file and the header is patched
//! to point to it.
//!
//! The file is written to `<name>.partial` and renamed to its final name only once it is
//! complete, synced to disk and hashed (SHA-256), so a file under the final name is always
//! whole. A writer can take checkpoints at strip boundaries ([`StripWriter::checkpoint`]) and be
//! rebuilt from one after a crash ([`StripWriter::resume`]); the resumed file is byte-identical
//! to an uninterrupted write.
//!
//! Lifetime of the `.partial` file: [`StripWriter::finish`] renames it; [`StripWriter::abandon`]
//! removes it. A writer dropped (or whose `finish` fails) without a checkpoint removes it too,
//! since nothing in it can be reused. Once a checkpoint has been taken (or the writer was
//! resumed), dropping it keeps the file so that `resume` can continue from the checkpoint; call
//! `abandon` to get rid of it.

use std::ffi::OsString;
use std::fs::{self, File, OpenOptions};
use std::io::{self, BufWriter, Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};

use flate2::write::ZlibEncoder;
use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use crate::error::{Error, Result};

/// Capacity of the buffered writer in front of the file.
const WRITE_BUFFER_BYTES: usize = 4 << 20;
/// Strip size aimed at by [`TiffLayout::default_rows_per_strip`] (uncompressed bytes).
const TARGET_STRIP_BYTES: u64 = 256 << 10;
/// zlib level used for [`Compression::Deflate`]. Fixed so that a resumed file is byte-identical.
const DEFLATE_LEVEL: u32 = 6;
/// Read buffer used when hashing the finished file.
const HASH_BUFFER_BYTES: usize = 1 << 20;
/// Largest file (and thus largest offset) a classic TIFF can address.
const CLASSIC_LIMIT: u64 = u32::MAX as u64;

// TIFF field types.
const TYPE_ASCII: u16 = 2;
const TYPE_SHORT: u16 = 3;
const TYPE_LONG: u16 = 4;
const TYPE_RATIONAL: u16 = 5;
const TYPE_LONG8: u16 = 16;

// Tags, in the ascending order in which they are written.
const TAG_IMAGE_WIDTH: u16 = 256;
const TAG_IMAGE_LENGTH: u16 = 257;
const TAG_BITS_PER_SAMPLE: u16 = 258;
const TAG_COMPRESSION: u16 = 259;
const TAG_PHOTOMETRIC: u16 = 262;
const TAG_IMAGE_DESCRIPTION: u16 = 270;
const TAG_STRIP_OFFSETS: u16 = 273;
const TAG_SAMPLES_PER_PIXEL: u16 = 277;
const TAG_ROWS_PER_STRIP: u16 = 278;
const TAG_STRIP_BYTE_COUNTS: u16 = 279;
const TAG_X_RESOLUTION: u16 = 282;
const TAG_Y_RESOLUTION: u16 = 283;
const TAG_PLANAR_CONFIGURATION: u16 = 284;
const TAG_RESOLUTION_UNIT: u16 = 296;
const TAG_SOFTWARE: u16 = 305;
const TAG_SAMPLE_FORMAT: u16 = 339;

/// How strips are compressed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub enum Compression {
    /// Raw strips (TIFF compression 1).
    None,
    /// Each strip is one zlib stream (TIFF compression 8, "Adobe deflate"), level 6.
    Deflate,
}

impl Compression {
    fn tag_value(self) -> u16 {
        match self {
            Compression::None => 1,
            Compression::Deflate => 8,
        }
    }
}

/// Everything that determines the bytes of the file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TiffLayout {
    /// Image width in pixels (at least 1).
    pub width: u32,
    /// Image height in pixels, i.e. number of rows (at least 1).
    pub height: u32,
    /// 1 (bilevel), 8 or 16. One grey sample per pixel, 0 = black.
    pub bits_per_sample: u8,
    /// Strip compression.
    pub compression: Compression,
    /// Rows per strip (at least 1). Values above `height` are written as `height`.
    pub rows_per_strip: u32,
    /// Pixel pitch in x and y, metres. Written as XResolution/YResolution in pixels per cm.
    pub pixel_pitch_m: (f64, f64),
    /// Software tag (305). ASCII without NUL.
    pub software: String,
    /// ImageDescription tag (270), if any. ASCII without NUL.
    pub description: Option<String>,
    /// `None` chooses BigTIFF only when the file may exceed 4 GiB ([`Self::needs_bigtiff`]);
    /// `Some(b)` forces the choice.
    pub bigtiff: Option<bool>,
}

impl TiffLayout {
    /// Rows per strip giving strips of about 256 KiB uncompressed (at least one row).
    pub fn default_rows_per_strip(width: u32, bits_per_sample: u8) -> u32 {
        let row = row_bytes(width, bits_per_sample).max(1);
        u32::try_from((TARGET_STRIP_BYTES / row).max(1)).unwrap_or(u32::MAX)
    }

    /// Bytes per row in the file: `(width * bits + 7) / 8`.
    pub fn row_bytes(&self) -> u64 {
        row_bytes(self.width, self.bits_per_sample)
    }

    /// Rows per strip as written to the file: `rows_per_strip` clamped to `1..=height`.
    pub fn effective_rows_per_strip(&self) -> u32 {
        self.rows_per_strip.min(self.height).max(1)
    }

    /// Number of strips in the file.
    pub fn strip_count(&self) -> u32 {
        self.height.div_ceil(self.effective_rows_per_strip())
    }

    /// Upper bound on the size of the finished file in the given format. Exact for
    /// uncompressed files; for deflate it assumes every strip expands by 1/256 plus 64 bytes,
    /// well above what zlib can produce on incompressible data.
    pub fn max_file_len(&self, bigtiff: bool) -> u64 {
        let row = self.row_bytes();
        let rps = u64::from(self.effective_rows_per_strip());
        let strips = u64::from(self.strip_count());
        let raw = u64::from(self.height).saturating_mul(row);
        let data = match self.compression {
            Compression::None => raw,
            Compression::Deflate => {
                // Per-strip bounds, summed: full strips plus the last, shorter one.
                let full_strip = rps.saturating_mul(row);
                let full_strips = strips.saturating_sub(1);
                let last_rows = u64::from(self.height).saturating_sub(full_strips * rps);
                let last_strip = last_rows.saturating_mul(row);
                let bound = |n: u64| n.saturating_add(n / 256).saturating_add(64);
                bound(full_strip)
                    .saturating_mul(full_strips)
                    .saturating_add(bound(last_strip))
            }
        };
        let fields = self.fields(bigtiff, strips, &[], &[], (1, 1), (1, 1));
        // The tail may start with one padding byte; count it whenever it could be needed.
        let end = header_len(bigtiff).saturating_add(data);
        let pad = match self.compression {
            Compression::None => end % 2,
            Compression::Deflate => 1,
        };
        end.saturating_add(pad)
            .saturating_add(tail_len_after_pad(&fields, bigtiff))
    }

    /// [`Self::max_file_len`] for the format that will be written ([`Self::uses_bigtiff`]):
    /// the exact size of an uncompressed file, an upper bound for a deflated one.
    pub fn estimated_file_bytes(&self) -> u64 {
        self.max_file_len(self.uses_bigtiff())
    }

    /// Whether a classic TIFF might not hold this image (the file may pass 4 GiB), i.e. the
    /// automatic BigTIFF decision. Pure: looks at the layout only.
    pub fn needs_bigtiff(&self) -> bool {
        self.max_file_len(false) > CLASSIC_LIMIT
    }

    /// The format that will be written: the forced choice if any, else [`Self::needs_bigtiff`].
    pub fn uses_bigtiff(&self) -> bool {
        self.bigtiff.unwrap_or_else(|| self.needs_bigtiff())
    }

    /// A pixel pitch in metres as a resolution in pixels per centimetre, as the TIFF RATIONAL
    /// `(numerator, denominator)` closest to it among continued-fraction convergents that fit in
    /// 32 bits. Exact for pitches such as 1 µm (10000/1) or 0.8 µm (12500/1); otherwise within a
    /// relative error of 1e-9. `None` if the pitch is not positive and finite or the resolution
    /// cannot be expressed that precisely.
    pub fn resolution_px_per_cm(pitch_m: f64) -> Option<(u32, u32)> {
        if !(pitch_m.is_finite() && pitch_m > 0.0) {
            return None;
        }
        best_rational(0.01 / pitch_m)
    }

    /// Checks the layout and derives what the writer needs. `path` is the final file name.
    fn validate(&self, path: &Path) -> Result<Geometry> {
        if path.file_name().is_none() {
            return Err(Error::job(path, "the output path has no file name"));
        }
        if self.width == 0 || self.height == 0 {
            return Err(Error::job(
                path,
                format!(
                    "cannot write an image of {} x {} pixels",
                    self.width, self.height
                ),
            ));
        }
        if !matches!(self.bits_per_sample, 1 | 8 | 16) {
            return Err(Error::unsupported(
                path,
                format!(
                    "{} bits per sample (TIFF output supports 1, 8 and 16)",
                    self.bits_per_sample
                ),
            ));
        }
        if self.rows_per_strip == 0 {
            return Err(Error::job(path, "rows per strip must be at least 1"));
        }
        let resolution = |pitch: f64, axis: &str| {
            Self::resolution_px_per_cm(pitch).ok_or_else(|| {
                Error::job(
                    path,
                    format!(
                        "pixel pitch {pitch} m in {axis} cannot be written as a TIFF resolution \
                         (must be positive, between about 2.3e-12 m and 4e7 m)"
                    ),
                )
            })
        };
        let x_resolution = resolution(self.pixel_pitch_m.0, "x")?;
        let y_resolution = resolution(self.pixel_pitch_m.1, "y")?;
        check_ascii(path, "Software", &self.software)?;
        if let Some(description) = &self.description {
            check_ascii(path, "ImageDescription", description)?;
        }
        let bigtiff = self.uses_bigtiff();
        if !bigtiff && self.compression == Compression::None && self.needs_bigtiff() {
            return Err(Error::unsupported(
                path,
                format!(
                    "a {} x {} image at {} bits needs {} bytes, more than a classic TIFF can hold; \
                     allow BigTIFF",
                    self.width,
                    self.height,
                    self.bits_per_sample,
                    self.max_file_len(false)
                ),
            ));
        }
        Ok(Geometry {
            row_bytes: self.row_bytes(),
            rows_per_strip: self.effective_rows_per_strip(),
            strips: self.strip_count(),
            bigtiff,
            x_resolution,
            y_resolution,
        })
    }

    /// The IFD fields, sorted by tag. `strips` is the count of the offset tables; the slices may
    /// be empty when only sizes are wanted.
    fn fields<'a>(
        &'a self,
        bigtiff: bool,
        strips: u64,
        offsets: &'a [u64],
        counts: &'a [u64],
        x_resolution: (u32, u32),
        y_resolution: (u32, u32),
    ) -> Vec<Field<'a>> {
        let mut fields = vec![
            Field::new(TAG_IMAGE_WIDTH, Value::Long(self.width)),
            Field::new(TAG_IMAGE_LENGTH, Value::Long(self.height)),
            Field::new(
                TAG_BITS_PER_SAMPLE,
                Value::Short(u16::from(self.bits_per_sample)),
            ),
            Field::new(TAG_COMPRESSION, Value::Short(self.compression.tag_value())),
            Field::new(TAG_PHOTOMETRIC, Value::Short(1)),
        ];
        if let Some(description) = &self.description {
            fields.push(Field::new(TAG_IMAGE_DESCRIPTION, Value::Ascii(description)));
        }
        fields.extend([
            Field::new(
                TAG_STRIP_OFFSETS,
                Value::Offsets {
                    bigtiff,
                    count: strips,
                    values: offsets,
                },
            ),
            Field::new(TAG_SAMPLES_PER_PIXEL, Value::Short(1)),
            Field::new(
                TAG_ROWS_PER_STRIP,
                Value::Long(self.effective_rows_per_strip()),
            ),
            Field::new(
                TAG_STRIP_BYTE_COUNTS,
                Value::Offsets {
                    bigtiff,
                    count: strips,
                    values: counts,
                },
            ),
            Field::new(TAG_X_RESOLUTION, Value::Rational(x_resolution)),
            Field::new(TAG_Y_RESOLUTION, Value::Rational(y_resolution)),
            Field::new(TAG_PLANAR_CONFIGURATION, Value::Short(1)),
            Field::new(TAG_RESOLUTION_UNIT, Value::Short(3)),
            Field::new(TAG_SOFTWARE, Value::Ascii(&self.software)),
            Field::new(TAG_SAMPLE_FORMAT, Value::Short(1)),
        ]);
        debug_assert!(fields.windows(2).all(|w| w[0].tag < w[1].tag));
        fields
    }
}

fn row_bytes(width: u32, bits_per_sample: u8) -> u64 {
    (u64::from(width) * u64::from(bits_per_sample)).div_ceil(8)
}

fn header_len(bigtiff: bool) -> u64 {
    if bigtiff {
        16
    } else {
        8
    }
}

/// Position of the first-IFD pointer in the header.
fn header_pointer_pos(bigtiff: bool) -> u64 {
    if bigtiff {
        8
    } else {
        4
    }
}

/// Header with a zero IFD pointer (patched by `finish`).
fn header_bytes(bigtiff: bool) -> Vec<u8> {
    let mut header = Vec::with_capacity(16);
    header.extend_from_slice(b"II");
    if bigtiff {
        header.extend_from_slice(&43u16.to_le_bytes());
        header.extend_from_slice(&8u16.to_le_bytes());
        header.extend_from_slice(&0u16.to_le_bytes());
        header.extend_from_slice(&0u64.to_le_bytes());
    } else {
        header.extend_from_slice(&42u16.to_le_bytes());
        header.extend_from_slice(&0u32.to_le_bytes());
    }
    header
}

fn check_ascii(path: &Path, tag: &str, text: &str) -> Result<()> {
    if text.bytes().all(|b| b.is_ascii() && b != 0) {
        Ok(())
    } else {
        Err(Error::job(
            path,
            format!("the TIFF {tag} text must be ASCII without NUL characters: {text:?}"),
        ))
    }
}

/// Closest continued-fraction convergent of `v` with numerator and denominator in `1..2^32`,
/// stopping at the first one that equals `v` to within rounding. `None` if even the best one
/// is off by 1e-9 or more (relative).
fn best_rational(v: f64) -> Option<(u32, u32)> {
    if !(v.is_finite() && v > 0.0) {
        return None;
    }
    let max = u64::from(u32::MAX);
    // Convergents h/k: (h_{n-2}, k_{n-2}) = (0, 1), (h_{n-1}, k_{n-1}) = (1, 0).
    let (mut h0, mut k0, mut h1, mut k1) = (0u64, 1u64, 1u64, 0u64);
    let mut x = v;
    let mut best: Option<(u64, u64)> = None;
    for _ in 0..64 {
        let a = x.floor();
        if a > max as f64 {
            break;
        }
        let a = a as u64;
        let h = a.saturating_mul(h1).saturating_add(h0);
        let k = a.saturating_mul(k1).saturating_add(k0);
        if h > max || k > max {
            break;
        }
        if h > 0 {
            best = Some((h, k));
            if ((h as f64 / k as f64) - v).abs() <= v * 1e-14 {
                break;
            }
        }
        let fraction = x - a as f64;
        if fraction <= 0.0 {
            break;
        }
        x = 1.0 / fraction;
        (h0, k0, h1, k1) = (h1, k1, h, k);
    }
    let (h, k) = best?;
    if ((h as f64 / k as f64) - v).abs() < v * 1e-9 {
        Some((h as u32, k as u32))
    } else {
        None
    }
}

/// One IFD entry.
struct Field<'a> {
    tag: u16,
    value: Value<'a>,
}

enum Value<'a> {
    Short(u16),
    Long(u32),
    Rational((u32, u32)),
    Ascii(&'a str),
    /// StripOffsets / StripByteCounts: LONG in classic TIFF, LONG8 in BigTIFF. `values` is
    /// either empty (size computation only) or holds `count` entries.
    Offsets {
        bigtiff: bool,
        count: u64,
        values: &'a [u64],
    },
}

impl<'a> Field<'a> {
    fn new(tag: u16, value: Value<'a>) -> Self {
        Field { tag, value }
    }

    fn field_type(&self) -> u16 {
        match self.value {
            Value::Short(_) => TYPE_SHORT,
            Value::Long(_) => TYPE_LONG,
            Value::Rational(_) => TYPE_RATIONAL,
            Value::Ascii(_) => TYPE_ASCII,
            Value::Offsets { bigtiff: true, .. } => TYPE_LONG8,
            Value::Offsets { bigtiff: false, .. } => TYPE_LONG,
        }
    }

    /// Number of values (for ASCII: bytes including the terminating NUL).
    fn count(&self) -> u64 {
        match self.value {
            Value::Short(_) | Value::Long(_) | Value::Rational(_) => 1,
            Value::Ascii(text) => text.len() as u64 + 1,
            Value::Offsets { count, .. } => count,
        }
    }

    fn byte_len(&self) -> u64 {
        let size = match self.field_type() {
            TYPE_ASCII => 1,
            TYPE_SHORT => 2,
            TYPE_LONG => 4,
            _ => 8, // RATIONAL, LONG8
        };
        self.count().saturating_mul(size)
    }

    /// Appends the value bytes (little-endian). Classic offsets must fit in 32 bits (checked by
    /// the caller).
    fn encode(&self, out: &mut Vec<u8>) {
        match self.value {
            Value::Short(v) => out.extend_from_slice(&v.to_le_bytes()),
            Value::Long(v) => out.extend_from_slice(&v.to_le_bytes()),
            Value::Rational((n, d)) => {
                out.extend_from_slice(&n.to_le_bytes());
                out.extend_from_slice(&d.to_le_bytes());
            }
            Value::Ascii(text) => {
                out.extend_from_slice(text.as_bytes());
                out.push(0);
            }
            Value::Offsets {
                bigtiff,
                count,
                values,
            } => {
                debug_assert_eq!(values.len() as u64, count);
                for &v in values {
                    if bigtiff {
                        out.extend_from_slice(&v.to_le_bytes());
                    } else {
                        out.extend_from_slice(&(v as u32).to_le_bytes());
                    }
                }
            }
        }
    }
}

fn ifd_len(field_count: usize, bigtiff: bool) -> u64 {
    let n = field_count as u64;
    if bigtiff {
        8 + 20 * n + 8
    } else {
        2 + 12 * n + 4
    }
}

fn inline_capacity(bigtiff: bool) -> u64 {
    if bigtiff {
        8
    } else {
        4
    }
}

/// Length of the IFD plus its out-of-line values (each starting on an even offset), from an
/// even start offset.
fn tail_len_after_pad(fields: &[Field], bigtiff: bool) -> u64 {
    let mut len = ifd_len(fields.len(), bigtiff);
    for field in fields {
        let bytes = field.byte_len();
        if bytes > inline_capacity(bigtiff) {
            len = len.saturating_add(bytes.saturating_add(bytes % 2));
        }
    }
    len
}

/// Serialises the tail of the file starting at `data_end`: an optional padding byte, the IFD,
/// then the out-of-line values. Returns the IFD offset and the bytes.
fn build_tail(fields: &[Field], bigtiff: bool, data_end: u64) -> (u64, Vec<u8>) {
    let pad = data_end % 2;
    let ifd_offset = data_end + pad;
    let capacity = pad + tail_len_after_pad(fields, bigtiff);
    let mut out = Vec::with_capacity(usize::try_from(capacity).unwrap_or(0));
    out.resize(pad as usize, 0);
    let mut extra = Vec::new();
    let mut extra_offset = ifd_offset + ifd_len(fields.len(), bigtiff);
    if bigtiff {
        out.extend_from_slice(&(fields.len() as u64).to_le_bytes());
    } else {
        out.extend_from_slice(&(fields.len() as u16).to_le_bytes());
    }
    for field in fields {
        out.extend_from_slice(&field.tag.to_le_bytes());
        out.extend_from_slice(&field.field_type().to_le_bytes());
        if bigtiff {
            out.extend_from_slice(&field.count().to_le_bytes());
        } else {
            out.extend_from_slice(&(field.count() as u32).to_le_bytes());
        }
        let bytes = field.byte_len();
        let capacity = inline_capacity(bigtiff);
        if bytes <= capacity {
            let start = out.len();
            field.encode(&mut out);
            out.resize(start + capacity as usize, 0);
        } else {
            if bigtiff {
                out.extend_from_slice(&extra_offset.to_le_bytes());
            } else {
                out.extend_from_slice(&(extra_offset as u32).to_le_bytes());
            }
            let start = extra.len();
            field.encode(&mut extra);
            if bytes % 2 == 1 {
                extra.push(0);
            }
            extra_offset += (extra.len() - start) as u64;
        }
    }
    // No further IFD.
    if bigtiff {
        out.extend_from_slice(&0u64.to_le_bytes());
    } else {
        out.extend_from_slice(&0u32.to_le_bytes());
    }
    out.extend_from_slice(&extra);
    debug_assert_eq!(out.len() as u64, capacity);
    (ifd_offset, out)
}

/// `final_path` with ".partial" appended to its file name (`plate.tif` -> `plate.tif.partial`).
pub fn partial_path(final_path: &Path) -> PathBuf {
    let mut name = OsString::from(final_path.as_os_str());
    name.push(".partial");
    PathBuf::from(name)
}

/// Derived, validated values of a layout.
#[derive(Clone, Copy, Debug)]
struct Geometry {
    row_bytes: u64,
    rows_per_strip: u32,
    strips: u32,
    bigtiff: bool,
    x_resolution: (u32, u32),
    y_resolution: (u32, u32),
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
        })
    }

    /// Writes the IFD at the end of the file, points the header to it, syncs, hashes the file
    /// as read back from disk and renames it to its final name.
    ///
    /// Fails if fewer than `height` rows were written. On failure the writer is dropped: the
    /// `.partial` file is removed unless a checkpoint was taken (see the module documentation).
    pub fn finish(mut self) -> Result<FinishedTiff> {
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

        fs::rename(&self.partial, &self.final_path).map_err(|e| Error::io(&self.final_path, e))?;
        self.closed = true;
        sync_parent_dir(&self.final_path)?;
        Ok(FinishedTiff {
            path: self.final_path.clone(),
            bytes,
            sha256,
            bigtiff,
            strips: strips as u32,
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
fn sync_parent_dir(path: &Path) -> Result<()> {
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
