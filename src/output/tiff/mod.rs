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

use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::error::{Error, Result};

mod ifd;
mod writer;

use ifd::*;
pub use writer::{
    hash_path, partial_path, sync_parent_dir, FinishedTiff, StripWriter, UnpublishedTiff,
    WriterState,
};

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
