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

use std::io::Read;
use std::path::Path;

use super::ply::{self, AsciiRows, Encoding, Header, Row};
use super::text::{input_error, lines_with_ends, shown, unsupported_error};
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
    parse_ply(
        &crate::scene::text::read_checked(path, crate::scene::text::Expect::Ply)?,
        path,
    )
}

/// Reads a PLY point cloud from `reader`; `path` only names the source in error messages.
pub fn read_ply_from<R: Read>(reader: R, path: &Path) -> Result<Vec<PointRecord>> {
    parse_ply(&read_all(reader, path)?, path)
}

/// Reads a CSV point cloud from a file.
pub fn read_csv(path: &Path) -> Result<Vec<PointRecord>> {
    parse_csv(
        &crate::scene::text::read_checked(path, crate::scene::text::Expect::Text)?,
        path,
    )
}

/// Reads a CSV point cloud from `reader`; `path` only names the source in error messages.
pub fn read_csv_from<R: Read>(reader: R, path: &Path) -> Result<Vec<PointRecord>> {
    parse_csv(&read_all(reader, path)?, path)
}

fn read_all<R: Read>(mut reader: R, path: &Path) -> Result<Vec<u8>> {
    let mut data = Vec::new();
    reader
        .read_to_end(&mut data)
        .map_err(|e| Error::io(path, e))?;
    Ok(data)
}

/// Writes `points` as a PLY file with `double` properties `x y z amplitude phase`, in ASCII or
/// (when `binary`) little-endian binary. Both encodings read back bit-exactly. Values are
/// written as given: a non-finite value or an empty list produces a file that [`read_ply`]
/// rejects.
pub fn write_ply(path: &Path, points: &[PointRecord], binary: bool) -> Result<()> {
    let encoding = if binary {
        Encoding::LittleEndian
    } else {
        Encoding::Ascii
    };
    ply::write_doubles(
        path,
        encoding,
        "point cloud, lengths in millimetres, phase in radians",
        "vertex",
        ["x", "y", "z", "amplitude", "phase"],
        points
            .iter()
            .map(|p| [p.x_mm, p.y_mm, p.z_mm, p.amplitude, p.phase_rad]),
    )
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

fn no_points(path: &Path, detail: &str) -> Error {
    input_error(path, format!("no points ({detail})"))
}

// ---------------------------------------------------------------------------------------------
// PLY
// ---------------------------------------------------------------------------------------------

/// Where x, y, z, amplitude and phase sit among the vertex element's properties.
struct VertexFields {
    x: usize,
    y: usize,
    z: usize,
    amplitude: Option<usize>,
    phase: Option<usize>,
}

impl VertexFields {
    fn point(&self, row: &Row, path: &Path) -> Result<PointRecord> {
        let vals = row.values;
        checked_point(
            path,
            &|| row.place(),
            &PLY_NAMES,
            [vals[self.x], vals[self.y], vals[self.z]],
            self.amplitude.map(|i| vals[i]),
            self.phase.map(|i| vals[i]),
        )
    }
}

fn parse_ply(data: &[u8], path: &Path) -> Result<Vec<PointRecord>> {
    let header = Header::parse(data, path)?;
    let Some(vertex_index) = header.element("vertex") else {
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
    header.check_body_size(data, path)?;
    // The count fits in the body (checked above), so this is bounded by the file size.
    let mut points = Vec::with_capacity(vertex.count as usize);
    ply::read_body(data, &header, AsciiRows::OnePerLine, path, |row| {
        if row.element == vertex_index {
            points.push(fields.point(row, path)?);
        }
        Ok(())
    })?;
    Ok(points)
}

fn vertex_fields(vertex: &ply::Element, path: &Path) -> Result<VertexFields> {
    let find = |name: &str| Ok(vertex.scalar(name, path)?.map(|(i, _)| i));
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
