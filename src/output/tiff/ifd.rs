//! The TIFF header and image file directory: field encoding, inline values, the tail
//! written after the last strip.

use std::path::Path;

use super::*;
use crate::error::{Error, Result};

pub(super) fn row_bytes(width: u32, bits_per_sample: u8) -> u64 {
    (u64::from(width) * u64::from(bits_per_sample)).div_ceil(8)
}

pub(super) fn header_len(bigtiff: bool) -> u64 {
    if bigtiff {
        16
    } else {
        8
    }
}

/// Position of the first-IFD pointer in the header.
pub(super) fn header_pointer_pos(bigtiff: bool) -> u64 {
    if bigtiff {
        8
    } else {
        4
    }
}

/// Header with a zero IFD pointer (patched by `finish`).
pub(super) fn header_bytes(bigtiff: bool) -> Vec<u8> {
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

pub(super) fn check_ascii(path: &Path, tag: &str, text: &str) -> Result<()> {
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
pub(super) fn best_rational(v: f64) -> Option<(u32, u32)> {
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
pub(super) struct Field<'a> {
    pub(super) tag: u16,
    value: Value<'a>,
}

pub(super) enum Value<'a> {
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
    pub(super) fn new(tag: u16, value: Value<'a>) -> Self {
        Field { tag, value }
    }

    pub(super) fn field_type(&self) -> u16 {
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
    pub(super) fn count(&self) -> u64 {
        match self.value {
            Value::Short(_) | Value::Long(_) | Value::Rational(_) => 1,
            Value::Ascii(text) => text.len() as u64 + 1,
            Value::Offsets { count, .. } => count,
        }
    }

    pub(super) fn byte_len(&self) -> u64 {
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
    pub(super) fn encode(&self, out: &mut Vec<u8>) {
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

pub(super) fn ifd_len(field_count: usize, bigtiff: bool) -> u64 {
    let n = field_count as u64;
    if bigtiff {
        8 + 20 * n + 8
    } else {
        2 + 12 * n + 4
    }
}

pub(super) fn inline_capacity(bigtiff: bool) -> u64 {
    if bigtiff {
        8
    } else {
        4
    }
}

/// Length of the IFD plus its out-of-line values (each starting on an even offset), from an
/// even start offset.
pub(super) fn tail_len_after_pad(fields: &[Field], bigtiff: bool) -> u64 {
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
pub(super) fn build_tail(fields: &[Field], bigtiff: bool, data_end: u64) -> (u64, Vec<u8>) {
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
