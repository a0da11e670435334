//! Point-cloud input: reading the points a plate records from PLY or CSV files.
//!
//! This module owns the crate's point-cloud file formats and turns a file into a list of
//! [`PointRecord`]s in the file's own units (millimetres), before any placement in front of the
//! plate:
//!
//! * **PLY 1.0** in `ascii`, `binary_little_endian` and `binary_big_endian` encodings. The
//!   element `vertex` must have scalar properties `x`, `y` and `z`, and may have `amplitude` and
//!   `phase` (radians). Every PLY scalar type and its sized alias is accepted. Other properties
//!   and other elements (including list properties such as face indices, before or after the
//!   vertices) are read past and ignored.
//! * **CSV** with a header line naming the columns `x_mm`, `y_mm`, `z_mm` (required) and
//!   `amplitude`, `phase_rad` (optional), in any order. Blank lines and lines starting with `#`
//!   are ignored.
//!
//! Missing amplitudes default to 1 and missing phases to 0. Coordinates, amplitudes and phases
//! must be finite and amplitudes must not be negative; an empty cloud is an error. Whether a
//! point lies in front of the plate is not checked here: that depends on the placement chosen
//! by the job.
//!
//! Every malformed file gives an [`Error::Input`] naming the file and the place inside it: the
//! line for text (PLY header, ASCII PLY body, CSV), the element index and byte offset for a
//! binary PLY body. Reading never allocates more than a small multiple of the file's size: the
//! row counts of a PLY header are checked against the bytes that actually follow it before
//! anything is reserved.
//!
//! An ASCII PLY body must end with a line break so that a file cut inside its last number is
//! detected; a binary body must end exactly where the header says it does.

use std::fs::File;
use std::io::{BufWriter, Read, Write};
use std::path::Path;

use crate::error::{Error, Result};

/// One point of a point cloud as read from a file, in the file's units (millimetres), before
/// placement.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PointRecord {
    /// Horizontal position, mm.
    pub x_mm: f64,
    /// Vertical position, mm.
    pub y_mm: f64,
    /// Depth, mm, relative to the object's own origin (the job adds its offset later).
    pub z_mm: f64,
    /// Amplitude of the point's spherical wave; 1 when the file does not give one. Never negative.
    pub amplitude: f64,
    /// Phase of the point's spherical wave at its origin, radians; 0 when the file does not give
    /// one.
    pub phase_rad: f64,
}

impl PointRecord {
    /// A point at (x, y, z) mm with the default amplitude 1 and phase 0.
    pub fn new(x_mm: f64, y_mm: f64, z_mm: f64) -> Self {
        PointRecord {
            x_mm,
            y_mm,
            z_mm,
            amplitude: 1.0,
            phase_rad: 0.0,
        }
    }
}

/// Reads a point cloud, choosing the format from the extension (case-insensitive): `.ply` or
/// `.csv`. Any other extension is [`Error::Unsupported`].
pub fn read_points(path: &Path) -> Result<Vec<PointRecord>> {
    let ext = path
        .extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase());
    match ext.as_deref() {
        Some("ply") => read_ply(path),
        Some("csv") => read_csv(path),
        Some(other) => Err(unsupported_error(
            path,
            format!(
                "point cloud extension '.{}' (expected .ply or .csv)",
                shown(other)
            ),
        )),
        None => Err(unsupported_error(
            path,
            "point cloud file has no extension (expected .ply or .csv)",
        )),
    }
}

/// Reads a PLY point cloud from a file.
pub fn read_ply(path: &Path) -> Result<Vec<PointRecord>> {
    let data = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse_ply(&data, path)
}

/// Reads a PLY point cloud from `reader`; `path` only names the source in error messages.
pub fn read_ply_from<R: Read>(mut reader: R, path: &Path) -> Result<Vec<PointRecord>> {
    let mut data = Vec::new();
    reader
        .read_to_end(&mut data)
        .map_err(|e| Error::io(path, e))?;
    parse_ply(&data, path)
}

/// Reads a CSV point cloud from a file.
pub fn read_csv(path: &Path) -> Result<Vec<PointRecord>> {
    let data = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse_csv(&data, path)
}

/// Reads a CSV point cloud from `reader`; `path` only names the source in error messages.
pub fn read_csv_from<R: Read>(mut reader: R, path: &Path) -> Result<Vec<PointRecord>> {
    let mut data = Vec::new();
    reader
        .read_to_end(&mut data)
        .map_err(|e| Error::io(path, e))?;
    parse_csv(&data, path)
}

/// Writes `points` as a PLY file with `double` properties `x y z amplitude phase`, in ASCII or
/// (when `binary`) little-endian binary. Both encodings read back bit-exactly. Values are
/// written as given: a non-finite value or an empty list produces a file that [`read_ply`]
/// rejects.
pub fn write_ply(path: &Path, points: &[PointRecord], binary: bool) -> Result<()> {
    let file = File::create(path).map_err(|e| Error::io(path, e))?;
    let mut w = BufWriter::new(file);
    write_ply_to(&mut w, points, binary)
        .and_then(|()| w.flush())
        .map_err(|e| Error::io(path, e))
}

fn write_ply_to<W: Write>(w: &mut W, points: &[PointRecord], binary: bool) -> std::io::Result<()> {
    let format = if binary {
        "binary_little_endian"
    } else {
        "ascii"
    };
    write!(
        w,
        "ply\nformat {format} 1.0\ncomment point cloud, lengths in millimetres, phase in radians\n\
         element vertex {}\nproperty double x\nproperty double y\nproperty double z\n\
         property double amplitude\nproperty double phase\nend_header\n",
        points.len()
    )?;
    for p in points {
        let values = [p.x_mm, p.y_mm, p.z_mm, p.amplitude, p.phase_rad];
        if binary {
            for v in values {
                w.write_all(&v.to_le_bytes())?;
            }
        } else {
            // `{:?}` prints the shortest text that parses back to the same f64, using an
            // exponent for very large or small magnitudes.
            writeln!(
                w,
                "{:?} {:?} {:?} {:?} {:?}",
                values[0], values[1], values[2], values[3], values[4]
            )?;
        }
    }
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Checks shared by both formats
// ---------------------------------------------------------------------------------------------

/// Field names used in messages: how the file itself calls x, y, z, amplitude and phase.
struct FieldNames {
    x: &'static str,
    y: &'static str,
    z: &'static str,
    amplitude: &'static str,
    phase: &'static str,
}

const PLY_NAMES: FieldNames = FieldNames {
    x: "x",
    y: "y",
    z: "z",
    amplitude: "amplitude",
    phase: "phase",
};
const CSV_NAMES: FieldNames = FieldNames {
    x: "x_mm",
    y: "y_mm",
    z: "z_mm",
    amplitude: "amplitude",
    phase: "phase_rad",
};

/// Builds a point from raw values, checking that every value is finite and the amplitude is not
/// negative. `place` describes where the values came from ("line 12", "vertex index 3 ...").
fn checked_point(
    path: &Path,
    place: &dyn Fn() -> String,
    names: &FieldNames,
    xyz: [f64; 3],
    amplitude: Option<f64>,
    phase: Option<f64>,
) -> Result<PointRecord> {
    let finite = |name: &str, v: f64| -> Result<f64> {
        if v.is_finite() {
            Ok(v)
        } else {
            let what = if v.is_nan() { "NaN" } else { "infinite" };
            Err(input_error(path, format!("{}: {name} is {what}", place())))
        }
    };
    let x_mm = finite(names.x, xyz[0])?;
    let y_mm = finite(names.y, xyz[1])?;
    let z_mm = finite(names.z, xyz[2])?;
    let amplitude = match amplitude {
        Some(a) => {
            let a = finite(names.amplitude, a)?;
            if a < 0.0 {
                return Err(input_error(
                    path,
                    format!(
                        "{}: {} is negative ({a}); amplitudes must be >= 0",
                        place(),
                        names.amplitude
                    ),
                ));
            }
            a
        }
        None => 1.0,
    };
    let phase_rad = match phase {
        Some(p) => finite(names.phase, p)?,
        None => 0.0,
    };
    Ok(PointRecord {
        x_mm,
        y_mm,
        z_mm,
        amplitude,
        phase_rad,
    })
}

/// An [`Error::Input`] whose message is kept on one line: control characters copied from the
/// file are escaped.
fn input_error(path: &Path, message: impl AsRef<str>) -> Error {
    Error::input(path, one_line(message.as_ref()))
}

/// An [`Error::Unsupported`] with the same escaping as [`input_error`].
fn unsupported_error(path: &Path, message: impl AsRef<str>) -> Error {
    Error::unsupported(path, one_line(message.as_ref()))
}

fn one_line(message: &str) -> String {
    let mut out = String::with_capacity(message.len());
    for c in message.chars() {
        if c.is_control() {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    out
}

/// Text copied from a file into a message, shortened when long.
fn shown(text: &str) -> String {
    const MAX_CHARS: usize = 40;
    match text.char_indices().nth(MAX_CHARS) {
        Some((cut, _)) => format!("{}...", &text[..cut]),
        None => text.to_string(),
    }
}

fn no_points(path: &Path, detail: &str) -> Error {
    input_error(path, format!("no points ({detail})"))
}

/// Splits `data` into lines at `\n`, dropping a `\r` before it. Yields each line and whether it
/// was terminated by `\n`.
fn lines_with_ends(data: &[u8]) -> impl Iterator<Item = (&[u8], bool)> {
    let mut rest = Some(data);
    std::iter::from_fn(move || {
        let d = rest?;
        match d.iter().position(|&b| b == b'\n') {
            Some(i) => {
                rest = Some(&d[i + 1..]);
                Some((strip_cr(&d[..i]), true))
            }
            None => {
                rest = None;
                if d.is_empty() {
                    None
                } else {
                    Some((strip_cr(d), false))
                }
            }
        }
    })
}

fn strip_cr(line: &[u8]) -> &[u8] {
    line.strip_suffix(b"\r").unwrap_or(line)
}

// ---------------------------------------------------------------------------------------------
// PLY
// ---------------------------------------------------------------------------------------------

/// A PLY scalar type.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Scalar {
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

    fn size(self) -> usize {
        match self {
            Scalar::I8 | Scalar::U8 => 1,
            Scalar::I16 | Scalar::U16 => 2,
            Scalar::I32 | Scalar::U32 | Scalar::F32 => 4,
            Scalar::F64 => 8,
        }
    }

    /// Inclusive value range of an integer type; `None` for floating-point types.
    fn int_range(self) -> Option<(i64, i64)> {
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

#[derive(Clone, Copy, Debug)]
enum PropKind {
    Scalar(Scalar),
    List { count: Scalar, item: Scalar },
}

#[derive(Debug)]
struct Property {
    name: String,
    kind: PropKind,
    /// Header line declaring the property.
    line: usize,
}

#[derive(Debug)]
struct Element {
    name: String,
    count: u64,
    props: Vec<Property>,
    /// Header line declaring the element.
    line: usize,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Encoding {
    Ascii,
    LittleEndian,
    BigEndian,
}

#[derive(Debug)]
struct Header {
    encoding: Encoding,
    elements: Vec<Element>,
    /// Byte offset of the first body byte.
    body_start: usize,
    /// Line number of the first body line (ASCII bodies).
    body_line: usize,
}

/// Where x, y, z, amplitude and phase sit among the vertex element's properties.
struct VertexFields {
    x: usize,
    y: usize,
    z: usize,
    amplitude: Option<usize>,
    phase: Option<usize>,
}

impl VertexFields {
    fn point(&self, vals: &[f64], path: &Path, place: &dyn Fn() -> String) -> Result<PointRecord> {
        checked_point(
            path,
            place,
            &PLY_NAMES,
            [vals[self.x], vals[self.y], vals[self.z]],
            self.amplitude.map(|i| vals[i]),
            self.phase.map(|i| vals[i]),
        )
    }
}

fn parse_ply(data: &[u8], path: &Path) -> Result<Vec<PointRecord>> {
    let header = parse_ply_header(data, path)?;
    let Some(vertex_index) = header.elements.iter().position(|e| e.name == "vertex") else {
        return Err(input_error(path, "PLY header declares no 'vertex' element"));
    };
    let vertex = &header.elements[vertex_index];
    let fields = vertex_fields(vertex, path)?;
    if vertex.count == 0 {
        return Err(no_points(
            path,
            &format!("line {}: the vertex element has 0 rows", vertex.line),
        ));
    }
    check_body_size(&header, data.len() - header.body_start, path)?;
    match header.encoding {
        Encoding::Ascii => parse_ascii_body(data, &header, vertex_index, &fields, path),
        Encoding::LittleEndian => {
            parse_binary_body(data, &header, vertex_index, &fields, false, path)
        }
        Encoding::BigEndian => parse_binary_body(data, &header, vertex_index, &fields, true, path),
    }
}

fn parse_ply_header(data: &[u8], path: &Path) -> Result<Header> {
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
        let text =
            std::str::from_utf8(raw).map_err(|_| bad(line_no, "line is not valid text".into()))?;
        let tokens: Vec<&str> = text.split_ascii_whitespace().collect();
        match tokens[0] {
            "format" => {
                if encoding.is_some() {
                    return Err(bad(line_no, "second 'format' line".into()));
                }
                if tokens.len() != 3 {
                    return Err(bad(
                        line_no,
                        format!("expected 'format <encoding> 1.0', found '{}'", shown(text)),
                    ));
                }
                encoding = Some(match tokens[1] {
                    "ascii" => Encoding::Ascii,
                    "binary_little_endian" => Encoding::LittleEndian,
                    "binary_big_endian" => Encoding::BigEndian,
                    other => {
                        return Err(bad(
                            line_no,
                            format!(
                                "unknown encoding '{}' (expected ascii, binary_little_endian \
                                 or binary_big_endian)",
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
                    return Err(bad(
                        line_no,
                        format!("expected 'element <name> <count>', found '{}'", shown(text)),
                    ));
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
                        return Err(bad(
                            line_no,
                            format!(
                                "expected 'property list <count type> <item type> <name>', \
                                 found '{}'",
                                shown(text)
                            ),
                        ));
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
                    (
                        PropKind::List {
                            count,
                            item: scalar(tokens[3])?,
                        },
                        tokens[4],
                    )
                } else {
                    if tokens.len() != 3 {
                        return Err(bad(
                            line_no,
                            format!("expected 'property <type> <name>', found '{}'", shown(text)),
                        ));
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

fn vertex_fields(vertex: &Element, path: &Path) -> Result<VertexFields> {
    let find = |name: &str| -> Result<Option<usize>> {
        let Some(i) = vertex.props.iter().position(|p| p.name == name) else {
            return Ok(None);
        };
        match vertex.props[i].kind {
            PropKind::Scalar(_) => Ok(Some(i)),
            PropKind::List { .. } => Err(input_error(
                path,
                format!(
                    "PLY header line {}: vertex property '{name}' must be a scalar, not a list",
                    vertex.props[i].line
                ),
            )),
        }
    };
    let required = |name: &str| -> Result<usize> {
        find(name)?.ok_or_else(|| {
            input_error(
                path,
                format!(
                    "PLY header line {}: element 'vertex' has no property '{name}'",
                    vertex.line
                ),
            )
        })
    };
    Ok(VertexFields {
        x: required("x")?,
        y: required("y")?,
        z: required("z")?,
        amplitude: find("amplitude")?,
        phase: find("phase")?,
    })
}

/// Rejects a header whose row counts cannot fit in the bytes after it, before anything is
/// allocated for the rows. Uses the smallest possible size of a row: binary rows with every list
/// empty, ASCII rows of one-character values each followed by one separator or line break.
fn check_body_size(header: &Header, body_len: usize, path: &Path) -> Result<()> {
    let mut needed: u128 = 0;
    for e in &header.elements {
        let row_min: u128 = match header.encoding {
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
        // An ASCII row ends with a line break, but a missing final one is reported by the row
        // reader, which says so more clearly.
        let slack = u128::from(header.encoding == Encoding::Ascii);
        if needed > body_len as u128 + slack {
            return Err(input_error(
                path,
                format!(
                    "PLY header line {}: element '{}' declares {} rows, which need at least \
                     {needed} bytes (with the elements before it), but only {body_len} bytes \
                     follow the header",
                    e.line, e.name, e.count
                ),
            ));
        }
    }
    Ok(())
}

fn parse_binary_body(
    data: &[u8],
    header: &Header,
    vertex_index: usize,
    fields: &VertexFields,
    big_endian: bool,
    path: &Path,
) -> Result<Vec<PointRecord>> {
    let mut pos = header.body_start;
    let mut points = Vec::new();
    for (ei, element) in header.elements.iter().enumerate() {
        let is_vertex = ei == vertex_index;
        if is_vertex {
            // The count fits in the body (checked above), so this is bounded by the file size.
            points.reserve_exact(element.count as usize);
        }
        let mut vals = vec![0.0; element.props.len()];
        for row in 0..element.count {
            let row_start = pos;
            let place = || format!("{} index {row} at byte offset {row_start}", element.name);
            for (pi, prop) in element.props.iter().enumerate() {
                let truncated = || {
                    input_error(
                        path,
                        format!(
                            "{}: file ends at byte {} inside property '{}' (truncated?)",
                            place(),
                            data.len(),
                            prop.name
                        ),
                    )
                };
                match prop.kind {
                    PropKind::Scalar(t) => {
                        let bytes = data.get(pos..pos + t.size()).ok_or_else(truncated)?;
                        vals[pi] = t.decode(bytes, big_endian);
                        pos += t.size();
                    }
                    PropKind::List { count, item } => {
                        let bytes = data.get(pos..pos + count.size()).ok_or_else(truncated)?;
                        let n = count.decode(bytes, big_endian);
                        pos += count.size();
                        if n < 0.0 {
                            return Err(input_error(
                                path,
                                format!(
                                    "{}: list '{}' has negative length {n}",
                                    place(),
                                    prop.name
                                ),
                            ));
                        }
                        // n < 2^32 and item size <= 8, so this cannot overflow u64.
                        let len = n as u64 * item.size() as u64;
                        let end = (pos as u64).saturating_add(len);
                        if end > data.len() as u64 {
                            return Err(truncated());
                        }
                        pos = end as usize;
                    }
                }
            }
            if is_vertex {
                points.push(fields.point(&vals, path, &place)?);
            }
        }
    }
    if pos != data.len() {
        return Err(input_error(
            path,
            format!(
                "{} unexpected byte(s) after the last element, from byte offset {pos} (the \
                 header declares fewer rows or smaller types than the file holds)",
                data.len() - pos
            ),
        ));
    }
    Ok(points)
}

fn parse_ascii_body(
    data: &[u8],
    header: &Header,
    vertex_index: usize,
    fields: &VertexFields,
    path: &Path,
) -> Result<Vec<PointRecord>> {
    let mut lines = lines_with_ends(&data[header.body_start..])
        .zip(header.body_line..)
        .filter(|((line, _), _)| !line.trim_ascii().is_empty());
    let mut last_line = header.body_line - 1;
    let mut points = Vec::new();
    for (ei, element) in header.elements.iter().enumerate() {
        let is_vertex = ei == vertex_index;
        if is_vertex {
            // The count fits in the body (checked above), so this is bounded by the file size.
            points.reserve_exact(element.count as usize);
        }
        let mut vals = vec![0.0; element.props.len()];
        for row in 0..element.count {
            let Some(((raw, terminated), line_no)) = lines.next() else {
                return Err(input_error(
                    path,
                    format!(
                        "line {last_line}: file ends after {row} of {} '{}' rows (truncated?)",
                        element.count, element.name
                    ),
                ));
            };
            last_line = line_no;
            let place = || format!("line {line_no} ({} index {row})", element.name);
            let bad = |msg: String| input_error(path, format!("{}: {msg}", place()));
            if !terminated {
                return Err(bad(
                    "the file ends without a final line break (truncated?)".into()
                ));
            }
            let text =
                std::str::from_utf8(raw).map_err(|_| bad("line is not valid text".into()))?;
            let mut tokens = text.split_ascii_whitespace();
            let missing = |what: String| bad(format!("too few values: {what} is missing"));
            for (pi, prop) in element.props.iter().enumerate() {
                match prop.kind {
                    PropKind::Scalar(t) => {
                        let tok = tokens
                            .next()
                            .ok_or_else(|| missing(format!("property '{}'", prop.name)))?;
                        vals[pi] = t.parse_text(tok).ok_or_else(|| {
                            bad(format!(
                                "property '{}': '{}' is not a valid {}",
                                prop.name,
                                shown(tok),
                                t.name()
                            ))
                        })?;
                    }
                    PropKind::List { count, item } => {
                        let tok = tokens.next().ok_or_else(|| {
                            missing(format!("the length of list '{}'", prop.name))
                        })?;
                        let n = count.parse_text(tok).filter(|n| *n >= 0.0).ok_or_else(|| {
                            bad(format!(
                                "list '{}': length '{}' is not a non-negative {}",
                                prop.name,
                                shown(tok),
                                count.name()
                            ))
                        })?;
                        // Each item consumes a token of this line, so a huge length fails at
                        // the end of the line instead of looping.
                        for k in 0..n as u64 {
                            let tok = tokens.next().ok_or_else(|| {
                                missing(format!("item {k} of list '{}'", prop.name))
                            })?;
                            item.parse_text(tok).ok_or_else(|| {
                                bad(format!(
                                    "list '{}' item {k}: '{}' is not a valid {}",
                                    prop.name,
                                    shown(tok),
                                    item.name()
                                ))
                            })?;
                        }
                    }
                }
            }
            if tokens.next().is_some() {
                return Err(bad(format!(
                    "more values than the {} properties the header declares for '{}'",
                    element.props.len(),
                    element.name
                )));
            }
            if is_vertex {
                points.push(fields.point(&vals, path, &place)?);
            }
        }
    }
    if let Some((_, line_no)) = lines.next() {
        return Err(input_error(
            path,
            format!(
                "line {line_no}: unexpected data after the last element (the header declares \
                 fewer rows)"
            ),
        ));
    }
    Ok(points)
}

// ---------------------------------------------------------------------------------------------
// CSV
// ---------------------------------------------------------------------------------------------

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Column {
    X,
    Y,
    Z,
    Amplitude,
    Phase,
}

impl Column {
    const ALL: [Column; 5] = [
        Column::X,
        Column::Y,
        Column::Z,
        Column::Amplitude,
        Column::Phase,
    ];

    fn name(self) -> &'static str {
        match self {
            Column::X => CSV_NAMES.x,
            Column::Y => CSV_NAMES.y,
            Column::Z => CSV_NAMES.z,
            Column::Amplitude => CSV_NAMES.amplitude,
            Column::Phase => CSV_NAMES.phase,
        }
    }
}

fn parse_csv_header(text: &str, line_no: usize, path: &Path) -> Result<Vec<Column>> {
    let bad = |msg: String| input_error(path, format!("line {line_no}: {msg}"));
    let mut columns = Vec::new();
    for (i, name) in text.split(',').map(str::trim).enumerate() {
        if name.is_empty() {
            return Err(bad(format!("header column {} has no name", i + 1)));
        }
        let Some(column) = Column::ALL.into_iter().find(|c| c.name() == name) else {
            let hint = if name.parse::<f64>().is_ok() {
                "; the first line that is not blank or a '#' comment must be the header"
            } else {
                ""
            };
            return Err(bad(format!(
                "unknown column '{}' (expected x_mm, y_mm, z_mm and optionally amplitude, \
                 phase_rad){hint}",
                shown(name)
            )));
        };
        if columns.contains(&column) {
            return Err(bad(format!("column '{name}' appears twice in the header")));
        }
        columns.push(column);
    }
    for required in [Column::X, Column::Y, Column::Z] {
        if !columns.contains(&required) {
            return Err(bad(format!(
                "the header has no '{}' column",
                required.name()
            )));
        }
    }
    Ok(columns)
}

fn parse_csv(data: &[u8], path: &Path) -> Result<Vec<PointRecord>> {
    let data = data.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(data);
    let mut header: Option<(Vec<Column>, usize)> = None;
    let mut points = Vec::new();
    let mut fields: Vec<&str> = Vec::new();
    for ((raw, _), line_no) in lines_with_ends(data).zip(1usize..) {
        let bad = |msg: String| input_error(path, format!("line {line_no}: {msg}"));
        let text =
            std::str::from_utf8(raw).map_err(|_| bad("line is not valid UTF-8 text".into()))?;
        let trimmed = text.trim();
        if trimmed.is_empty() || trimmed.starts_with('#') {
            continue;
        }
        let Some((columns, header_line)) = &header else {
            header = Some((parse_csv_header(trimmed, line_no, path)?, line_no));
            continue;
        };
        fields.clear();
        fields.extend(trimmed.split(',').map(str::trim));
        if fields.len() != columns.len() {
            return Err(bad(format!(
                "{} fields, but the header (line {header_line}) names {} columns",
                fields.len(),
                columns.len()
            )));
        }
        let mut values = [None; 5];
        for (column, field) in columns.iter().zip(&fields) {
            if field.is_empty() {
                return Err(bad(format!("column '{}' is empty", column.name())));
            }
            let v: f64 = field.parse().map_err(|_| {
                bad(format!(
                    "column '{}': '{}' is not a number",
                    column.name(),
                    shown(field)
                ))
            })?;
            values[*column as usize] = Some(v);
        }
        let get = |c: Column| values[c as usize];
        let place = || format!("line {line_no}");
        points.push(checked_point(
            path,
            &place,
            &CSV_NAMES,
            [
                get(Column::X).expect("header has x_mm"),
                get(Column::Y).expect("header has y_mm"),
                get(Column::Z).expect("header has z_mm"),
            ],
            get(Column::Amplitude),
            get(Column::Phase),
        )?);
    }
    match header {
        None => Err(input_error(
            path,
            "no header line (expected a line naming the columns, such as x_mm,y_mm,z_mm)",
        )),
        Some(_) if points.is_empty() => {
            Err(no_points(path, "the file has a header but no data lines"))
        }
        Some(_) => Ok(points),
    }
}
