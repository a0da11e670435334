//! PLY 1.0, the one reader and writer of the format that the point-cloud and mesh readers share.
//!
//! * [`Header::parse`] reads the header: `format ascii`, `binary_little_endian` or
//!   `binary_big_endian` version 1.0, `element` lines and their scalar and list `property`
//!   lines (every PLY scalar type and its sized alias); `comment` and `obj_info` lines are
//!   skipped without being decoded.
//! * [`Header::check_body_size`] rejects row counts that cannot fit in the bytes after the
//!   header, so that a caller may reserve room for the rows it keeps on the header's word.
//! * [`read_body`] reads the body element by element and hands every row, with its scalar
//!   values and list items, to the caller, which maps the properties it knows. A binary body
//!   must end exactly where the header says; an ASCII body must end with a line break (so that
//!   a file cut inside its last number is caught) and hold exactly the declared rows.
//! * [`write_doubles`] writes one element of `double` properties.
//!
//! Every error is an [`crate::Error::Input`] (or `Unsupported` for another PLY version) on one
//! line, naming the header line, or the body line or element index and byte offset of the row.

use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::Path;

use super::text::{input_error, shown, strip_cr, unsupported_error};
use crate::error::{Error, Result};

mod body;

pub(crate) use body::{read_body, AsciiRows, Row};

/// A PLY scalar type.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Scalar {
    I8,
    U8,
    I16,
    U16,
    I32,
    U32,
    F32,
    F64,
}

impl Scalar {
    /// The type a header names, by its name or its sized alias (`uchar` or `uint8`).
    fn from_name(name: &str) -> Option<Scalar> {
        Some(match name {
            "char" | "int8" => Scalar::I8,
            "uchar" | "uint8" => Scalar::U8,
            "short" | "int16" => Scalar::I16,
            "ushort" | "uint16" => Scalar::U16,
            "int" | "int32" => Scalar::I32,
            "uint" | "uint32" => Scalar::U32,
            "float" | "float32" => Scalar::F32,
            "double" | "float64" => Scalar::F64,
            _ => return None,
        })
    }

    /// The type's name in messages.
    fn name(self) -> &'static str {
        match self {
            Scalar::I8 => "char",
            Scalar::U8 => "uchar",
            Scalar::I16 => "short",
            Scalar::U16 => "ushort",
            Scalar::I32 => "int",
            Scalar::U32 => "uint",
            Scalar::F32 => "float",
            Scalar::F64 => "double",
        }
    }

    /// Bytes of one binary value.
    fn size(self) -> usize {
        match self {
            Scalar::I8 | Scalar::U8 => 1,
            Scalar::I16 | Scalar::U16 => 2,
            Scalar::I32 | Scalar::U32 | Scalar::F32 => 4,
            Scalar::F64 => 8,
        }
    }

    /// Inclusive value range of an integer type; `None` for floating-point types.
    pub(crate) fn int_range(self) -> Option<(i64, i64)> {
        match self {
            Scalar::I8 => Some((i8::MIN.into(), i8::MAX.into())),
            Scalar::U8 => Some((0, u8::MAX.into())),
            Scalar::I16 => Some((i16::MIN.into(), i16::MAX.into())),
            Scalar::U16 => Some((0, u16::MAX.into())),
            Scalar::I32 => Some((i32::MIN.into(), i32::MAX.into())),
            Scalar::U32 => Some((0, u32::MAX.into())),
            Scalar::F32 | Scalar::F64 => None,
        }
    }

    /// Decodes one value from exactly `self.size()` bytes.
    fn decode(self, b: &[u8], big_endian: bool) -> f64 {
        macro_rules! num {
            ($t:ty, $n:literal) => {{
                let a: [u8; $n] = b.try_into().expect("caller passes exactly size() bytes");
                if big_endian {
                    <$t>::from_be_bytes(a)
                } else {
                    <$t>::from_le_bytes(a)
                }
            }};
        }
        match self {
            Scalar::I8 => f64::from(b[0] as i8),
            Scalar::U8 => f64::from(b[0]),
            Scalar::I16 => f64::from(num!(i16, 2)),
            Scalar::U16 => f64::from(num!(u16, 2)),
            Scalar::I32 => f64::from(num!(i32, 4)),
            Scalar::U32 => f64::from(num!(u32, 4)),
            Scalar::F32 => f64::from(num!(f32, 4)),
            Scalar::F64 => num!(f64, 8),
        }
    }

    /// Parses one ASCII token: integer types take an integer within their range, floating
    /// types any decimal number (including `nan` and `inf`, rejected later where they matter).
    fn parse_text(self, token: &str) -> Option<f64> {
        match self.int_range() {
            Some((lo, hi)) => {
                let v: i64 = token.parse().ok()?;
                (lo..=hi).contains(&v).then_some(v as f64)
            }
            None => token.parse().ok(),
        }
    }
}

/// What a property holds in each row.
#[derive(Clone, Copy, Debug)]
pub(crate) enum PropKind {
    /// One value.
    Scalar(Scalar),
    /// A length of type `count`, then that many values of type `item`.
    List { count: Scalar, item: Scalar },
}

/// A `property` line of the header.
#[derive(Debug)]
pub(crate) struct Property {
    pub(crate) name: String,
    pub(crate) kind: PropKind,
    /// Header line declaring the property.
    pub(crate) line: usize,
}

/// An `element` line of the header with its properties.
#[derive(Debug)]
pub(crate) struct Element {
    pub(crate) name: String,
    /// Rows the header declares (checked against the body by [`Header::check_body_size`]).
    pub(crate) count: u64,
    pub(crate) props: Vec<Property>,
    /// Header line declaring the element.
    pub(crate) line: usize,
}

impl Element {
    /// Index and type of the scalar property `name`, `None` when the element has no such
    /// property; a list of that name is an error.
    pub(crate) fn scalar(&self, name: &str, path: &Path) -> Result<Option<(usize, Scalar)>> {
        let Some(i) = self.props.iter().position(|p| p.name == name) else {
            return Ok(None);
        };
        match self.props[i].kind {
            PropKind::Scalar(t) => Ok(Some((i, t))),
            PropKind::List { .. } => Err(input_error(
                path,
                format!(
                    "PLY header line {}: {} property '{name}' must be a scalar, not a list",
                    self.props[i].line, self.name
                ),
            )),
        }
    }
}

/// How the body is stored.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum Encoding {
    Ascii,
    LittleEndian,
    BigEndian,
}

impl Encoding {
    /// The name on the `format` line.
    fn name(self) -> &'static str {
        match self {
            Encoding::Ascii => "ascii",
            Encoding::LittleEndian => "binary_little_endian",
            Encoding::BigEndian => "binary_big_endian",
        }
    }
}

/// A parsed PLY header.
#[derive(Debug)]
pub(crate) struct Header {
    pub(crate) encoding: Encoding,
    /// The elements in file order; names are unique.
    pub(crate) elements: Vec<Element>,
    /// Byte offset of the first body byte.
    body_start: usize,
    /// Line number of the first body line (ASCII bodies).
    body_line: usize,
}

impl Header {
    /// Parses the header at the start of `data`; `path` names the file in messages.
    pub(crate) fn parse(data: &[u8], path: &Path) -> Result<Header> {
        let bad =
            |line: usize, msg: String| input_error(path, format!("PLY header line {line}: {msg}"));
        let mut encoding = None;
        let mut elements: Vec<Element> = Vec::new();
        let mut pos = 0usize;
        let mut line_no = 0usize;
        loop {
            if pos >= data.len() {
                return Err(input_error(
                    path,
                    format!("PLY header has no 'end_header' line (file ends after line {line_no})"),
                ));
            }
            let (raw, next, terminated) = match data[pos..].iter().position(|&b| b == b'\n') {
                Some(i) => (&data[pos..pos + i], pos + i + 1, true),
                None => (&data[pos..], data.len(), false),
            };
            pos = next;
            line_no += 1;
            let raw = strip_cr(raw).trim_ascii();
            if line_no == 1 {
                if raw != b"ply" {
                    return Err(bad(
                        1,
                        "not a PLY file (the first line must be 'ply')".into(),
                    ));
                }
                continue;
            }
            if !terminated && raw != b"end_header" {
                return Err(bad(
                    line_no,
                    "the file ends inside the header, before 'end_header' (truncated?)".into(),
                ));
            }
            let keyword = raw.split(|b| b.is_ascii_whitespace()).next().unwrap_or(b"");
            if raw.is_empty() || keyword == b"comment" || keyword == b"obj_info" {
                // Comments may hold any bytes; they are not decoded.
                continue;
            }
            let text = std::str::from_utf8(raw)
                .map_err(|_| bad(line_no, "line is not valid text".into()))?;
            let tokens: Vec<&str> = text.split_ascii_whitespace().collect();
            let expected = |form: &str| {
                bad(
                    line_no,
                    format!("expected '{form}', found '{}'", shown(text)),
                )
            };
            match tokens[0] {
                "format" => {
                    if encoding.is_some() {
                        return Err(bad(line_no, "second 'format' line".into()));
                    }
                    if tokens.len() != 3 {
                        return Err(expected("format <encoding> 1.0"));
                    }
                    encoding = Some(match tokens[1] {
                        "ascii" => Encoding::Ascii,
                        "binary_little_endian" => Encoding::LittleEndian,
                        "binary_big_endian" => Encoding::BigEndian,
                        other => {
                            return Err(bad(
                                line_no,
                                format!(
                                    "unknown encoding '{}' (expected ascii, \
                                     binary_little_endian or binary_big_endian)",
                                    shown(other)
                                ),
                            ))
                        }
                    });
                    if tokens[2] != "1.0" {
                        return Err(unsupported_error(
                            path,
                            format!(
                                "PLY header line {line_no}: PLY version '{}' (only 1.0 is read)",
                                shown(tokens[2])
                            ),
                        ));
                    }
                }
                "element" => {
                    if tokens.len() != 3 {
                        return Err(expected("element <name> <count>"));
                    }
                    let name = tokens[1];
                    let count: u64 = tokens[2].parse().map_err(|_| {
                        bad(
                            line_no,
                            format!(
                                "element '{name}': count '{}' is not a non-negative integer",
                                shown(tokens[2])
                            ),
                        )
                    })?;
                    if elements.iter().any(|e| e.name == name) {
                        return Err(bad(line_no, format!("element '{name}' is declared twice")));
                    }
                    elements.push(Element {
                        name: name.to_string(),
                        count,
                        props: Vec::new(),
                        line: line_no,
                    });
                }
                "property" => {
                    let Some(element) = elements.last_mut() else {
                        return Err(bad(line_no, "'property' before any 'element'".into()));
                    };
                    let scalar = |name: &str| {
                        Scalar::from_name(name).ok_or_else(|| {
                            bad(line_no, format!("unknown property type '{}'", shown(name)))
                        })
                    };
                    let (kind, name) = if tokens.get(1) == Some(&"list") {
                        if tokens.len() != 5 {
                            return Err(expected("property list <count type> <item type> <name>"));
                        }
                        let count = scalar(tokens[2])?;
                        if count.int_range().is_none() {
                            return Err(bad(
                                line_no,
                                format!(
                                    "list length type '{}' is not an integer type",
                                    shown(tokens[2])
                                ),
                            ));
                        }
                        let item = scalar(tokens[3])?;
                        (PropKind::List { count, item }, tokens[4])
                    } else {
                        if tokens.len() != 3 {
                            return Err(expected("property <type> <name>"));
                        }
                        (PropKind::Scalar(scalar(tokens[1])?), tokens[2])
                    };
                    if element.props.iter().any(|p| p.name == name) {
                        return Err(bad(
                            line_no,
                            format!(
                                "property '{name}' of element '{}' is declared twice",
                                element.name
                            ),
                        ));
                    }
                    element.props.push(Property {
                        name: name.to_string(),
                        kind,
                        line: line_no,
                    });
                }
                "end_header" => {
                    if tokens.len() != 1 {
                        return Err(bad(
                            line_no,
                            format!("unexpected text after 'end_header': '{}'", shown(text)),
                        ));
                    }
                    break;
                }
                other => return Err(bad(line_no, format!("unknown keyword '{}'", shown(other)))),
            }
        }
        let Some(encoding) = encoding else {
            return Err(input_error(path, "PLY header has no 'format' line"));
        };
        for e in &elements {
            if e.props.is_empty() && e.count > 0 {
                return Err(bad(
                    e.line,
                    format!(
                        "element '{}' has {} rows but no properties",
                        e.name, e.count
                    ),
                ));
            }
        }
        Ok(Header {
            encoding,
            elements,
            body_start: pos,
            body_line: line_no + 1,
        })
    }

    /// Index of the element called `name`.
    pub(crate) fn element(&self, name: &str) -> Option<usize> {
        self.elements.iter().position(|e| e.name == name)
    }

    /// Rejects a header whose row counts cannot fit in the bytes of `data` after it, before
    /// anything is allocated for the rows. Uses the smallest possible size of a row: binary rows
    /// with every list empty, ASCII rows of one-character values each followed by one separator
    /// or line break.
    pub(crate) fn check_body_size(&self, data: &[u8], path: &Path) -> Result<()> {
        let body_len = data.len() - self.body_start;
        let mut needed: u128 = 0;
        for e in &self.elements {
            let row_min: u128 = match self.encoding {
                Encoding::Ascii => 2 * e.props.len() as u128,
                Encoding::LittleEndian | Encoding::BigEndian => e
                    .props
                    .iter()
                    .map(|p| match p.kind {
                        PropKind::Scalar(t) => t.size() as u128,
                        PropKind::List { count, .. } => count.size() as u128,
                    })
                    .sum(),
            };
            needed += row_min * u128::from(e.count);
            // An ASCII row ends with a line break, but a missing final one is reported by the
            // row reader, which says so more clearly.
            let slack = u128::from(self.encoding == Encoding::Ascii);
            if needed > body_len as u128 + slack {
                return Err(input_error(
                    path,
                    format!(
                        "PLY header line {}: element '{}' declares {} rows, which need at least \
                         {needed} bytes (with the elements before it), but only {body_len} \
                         bytes follow the header",
                        e.line, e.name, e.count
                    ),
                ));
            }
        }
        Ok(())
    }
}

/// Writes a PLY file at `path` with one element `element` whose properties `names` are all
/// `double`, one row per item of `rows`, after a `comment` line. Values are written as given;
/// ASCII values as the shortest text that reads back to the same `f64` (with an exponent for
/// very large or small magnitudes), so every encoding reads back bit-exactly.
pub(crate) fn write_doubles<const N: usize>(
    path: &Path,
    encoding: Encoding,
    comment: &str,
    element: &str,
    names: [&str; N],
    rows: impl ExactSizeIterator<Item = [f64; N]>,
) -> Result<()> {
    let file = File::create(path).map_err(|e| Error::io(path, e))?;
    let mut w = BufWriter::new(file);
    write_doubles_to(&mut w, encoding, comment, element, names, rows)
        .and_then(|()| w.flush())
        .map_err(|e| Error::io(path, e))
}

fn write_doubles_to<W: Write, const N: usize>(
    w: &mut W,
    encoding: Encoding,
    comment: &str,
    element: &str,
    names: [&str; N],
    rows: impl ExactSizeIterator<Item = [f64; N]>,
) -> std::io::Result<()> {
    let format = encoding.name();
    write!(
        w,
        "ply\nformat {format} 1.0\ncomment {comment}\nelement {element} {}\n",
        rows.len()
    )?;
    for name in names {
        writeln!(w, "property double {name}")?;
    }
    w.write_all(b"end_header\n")?;
    for row in rows {
        for (i, v) in row.into_iter().enumerate() {
            match encoding {
                Encoding::Ascii => {
                    let sep = if i + 1 == N { "\n" } else { " " };
                    write!(w, "{v:?}{sep}")?;
                }
                Encoding::LittleEndian => w.write_all(&v.to_le_bytes())?,
                Encoding::BigEndian => w.write_all(&v.to_be_bytes())?,
            }
        }
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn writer_header_and_rows() {
        // PLY format (Turk, "The PLY polygon file format", 1994): header lines, then one row per
        // line (ASCII) or the values back to back in the declared byte order (binary).
        let rows = [[1.5, -0.25], [1e-300, 2.0]];
        let mut ascii = Vec::new();
        write_doubles_to(
            &mut ascii,
            Encoding::Ascii,
            "c",
            "v",
            ["a", "b"],
            rows.into_iter(),
        )
        .unwrap();
        let text = "ply\nformat ascii 1.0\ncomment c\nelement v 2\nproperty double a\n\
                    property double b\nend_header\n1.5 -0.25\n1e-300 2.0\n";
        assert_eq!(String::from_utf8(ascii).unwrap(), text);
        let mut big = Vec::new();
        write_doubles_to(
            &mut big,
            Encoding::BigEndian,
            "c",
            "v",
            ["a", "b"],
            rows.into_iter(),
        )
        .unwrap();
        let body = &big[big.len() - 32..];
        assert_eq!(&body[..8], &1.5f64.to_be_bytes());
        assert_eq!(&body[24..], &2.0f64.to_be_bytes());
        let header = Header::parse(&big, Path::new("t.ply")).unwrap();
        assert_eq!(header.encoding, Encoding::BigEndian);
        assert_eq!(header.body_start, big.len() - 32);
    }
}
