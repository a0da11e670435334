//! PLY mesh reader: a `vertex` element and a `face` element, in `ascii`,
//! `binary_little_endian` or `binary_big_endian` encoding (PLY 1.0).
//!
//! * `vertex` must have scalar properties `x y z` (millimetres) and may have `nx ny nz`
//!   (normals), `red green blue` (colours: integer types scaled by their largest value, floating
//!   types taken in `[0, 1]`; sRGB-encoded, decoded to linear) and texture coordinates as
//!   `s t`, `u v`, `texture_u texture_v` or `texture_s texture_t` (origin bottom-left, flipped to
//!   the glTF convention).
//! * `face` must have a list property `vertex_indices` (or `vertex_index`) of integer indices;
//!   polygons are split as a fan around their first corner.
//!
//! Other elements and properties are read past. Every PLY scalar type and sized alias is
//! accepted. Row counts in the header are checked against the bytes that follow it before
//! anything is reserved, so a lying header cannot make the reader allocate more than the file
//! holds. A binary body must end exactly where the header says; an ASCII body must end with a
//! line break (so a file cut inside its last number is caught) and hold exactly the declared
//! values (rows may span or share lines).

use std::path::Path;

use super::{fan, input_error, shown, srgb_unit_to_linear, unsupported_error, Mesh};
use crate::error::Result;

/// Reads a PLY mesh file.
pub fn read(path: &Path) -> Result<Mesh> {
    let data = std::fs::read(path).map_err(|e| crate::error::Error::io(path, e))?;
    parse(&data, path)
}

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

    fn size(self) -> usize {
        match self {
            Scalar::I8 | Scalar::U8 => 1,
            Scalar::I16 | Scalar::U16 => 2,
            Scalar::I32 | Scalar::U32 | Scalar::F32 => 4,
            Scalar::F64 => 8,
        }
    }

    /// Largest value of an integer type; `None` for floating types.
    fn int_max(self) -> Option<f64> {
        Some(match self {
            Scalar::I8 => 127.0,
            Scalar::U8 => 255.0,
            Scalar::I16 => 32767.0,
            Scalar::U16 => 65535.0,
            Scalar::I32 => 2147483647.0,
            Scalar::U32 => 4294967295.0,
            Scalar::F32 | Scalar::F64 => return None,
        })
    }

    fn int_min(self) -> f64 {
        match self {
            Scalar::I8 => -128.0,
            Scalar::I16 => -32768.0,
            Scalar::I32 => -2147483648.0,
            _ => 0.0,
        }
    }

    fn decode(self, b: &[u8], big: bool) -> f64 {
        macro_rules! num {
            ($t:ty, $n:literal) => {{
                let a: [u8; $n] = b[..$n].try_into().expect("caller passes size() bytes");
                if big {
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

    /// Parses an ASCII value: integers within the type's range, or any decimal number for
    /// floating types.
    fn parse_text(self, token: &str) -> Option<f64> {
        match self.int_max() {
            Some(max) => {
                let v: i64 = token.parse().ok()?;
                let v = v as f64;
                (v >= self.int_min() && v <= max).then_some(v)
            }
            None => token.parse().ok(),
        }
    }
}

#[derive(Clone, Copy, Debug)]
enum Kind {
    Scalar(Scalar),
    List { count: Scalar, item: Scalar },
}

#[derive(Debug)]
struct Property {
    name: String,
    kind: Kind,
}

#[derive(Debug)]
struct Element {
    name: String,
    count: u64,
    props: Vec<Property>,
    line: usize,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Encoding {
    Ascii,
    Little,
    Big,
}

/// Parses PLY bytes; `path` names the source in error messages.
pub fn parse(data: &[u8], path: &Path) -> Result<Mesh> {
    let (encoding, elements, body_start, body_line) = parse_header(data, path)?;
    let find_el = |name: &str| elements.iter().position(|e| e.name == name);
    let vi = find_el("vertex")
        .ok_or_else(|| input_error(path, "PLY header declares no 'vertex' element"))?;
    let fi = find_el("face").ok_or_else(|| {
        input_error(
            path,
            "PLY header declares no 'face' element (a mesh needs faces)",
        )
    })?;
    let layout = Layout::new(&elements[vi], &elements[fi], path)?;
    check_body_size(encoding, &elements, data.len() - body_start, path)?;

    let vcount = elements[vi].count as usize;
    let mut positions = Vec::with_capacity(vcount);
    let mut normals = layout.normal.map(|_| Vec::with_capacity(vcount));
    let mut colors = layout.color.map(|_| Vec::with_capacity(vcount));
    let mut uvs = layout.uv.map(|_| Vec::with_capacity(vcount));
    let mut triangles = Vec::new();
    let mut corners: Vec<u32> = Vec::new();

    let mut reader = match encoding {
        Encoding::Ascii => Reader::Ascii(AsciiBody::new(data, body_start, body_line, path)?),
        Encoding::Little => Reader::Binary {
            data,
            pos: body_start,
            big: false,
        },
        Encoding::Big => Reader::Binary {
            data,
            pos: body_start,
            big: true,
        },
    };
    let mut vals: Vec<f64> = Vec::new();
    let mut list: Vec<f64> = Vec::new();
    for (ei, el) in elements.iter().enumerate() {
        vals.clear();
        vals.resize(el.props.len(), 0.0);
        for row in 0..el.count {
            for (pi, prop) in el.props.iter().enumerate() {
                let keep_list = ei == fi && pi == layout.face_list;
                let at = (el.name.as_str(), row, prop.name.as_str());
                match prop.kind {
                    Kind::Scalar(t) => vals[pi] = reader.scalar(t, path, at)?,
                    Kind::List { count, item } => {
                        let n = reader.scalar(count, path, at)?;
                        if n < 0.0 {
                            return Err(input_error(
                                path,
                                format!(
                                    "{}: list has negative length {n}",
                                    reader.place(at.0, row, at.2)
                                ),
                            ));
                        }
                        list.clear();
                        for _ in 0..n as u64 {
                            let v = reader.scalar(item, path, at)?;
                            if keep_list {
                                list.push(v);
                            }
                        }
                    }
                }
            }
            let row_place = || reader.place(&el.name, row, "");
            if ei == vi {
                let g = |i: usize| vals[i];
                let p = [g(layout.xyz[0]), g(layout.xyz[1]), g(layout.xyz[2])];
                if !p.iter().all(|v| v.is_finite()) {
                    return Err(input_error(
                        path,
                        format!("{}: position is not finite", row_place()),
                    ));
                }
                positions.push(p);
                if let (Some(ns), Some(ix)) = (normals.as_mut(), layout.normal) {
                    let n = ix.map(g);
                    if !n.iter().all(|v| v.is_finite()) {
                        return Err(input_error(
                            path,
                            format!("{}: normal is not finite", row_place()),
                        ));
                    }
                    ns.push(n);
                }
                if let (Some(cs), Some((ix, scale))) = (colors.as_mut(), layout.color) {
                    cs.push(ix.map(|i| srgb_unit_to_linear(g(i) / scale) as f32));
                }
                if let (Some(us), Some(ix)) = (uvs.as_mut(), layout.uv) {
                    us.push([g(ix[0]) as f32, (1.0 - g(ix[1])) as f32]);
                }
            } else if ei == fi {
                if list.len() < 3 {
                    return Err(input_error(
                        path,
                        format!(
                            "{}: face has {} corners, fewer than 3",
                            row_place(),
                            list.len()
                        ),
                    ));
                }
                corners.clear();
                for &v in &list {
                    if v.fract() != 0.0 || v < 0.0 || v >= vcount as f64 {
                        return Err(input_error(
                            path,
                            format!(
                                "{}: vertex index {v} is not one of the {vcount} vertices",
                                row_place()
                            ),
                        ));
                    }
                    corners.push(v as u32);
                }
                fan(&corners, &mut triangles);
            }
        }
    }
    reader.finish(path)?;
    if triangles.is_empty() {
        return Err(input_error(path, "PLY file has no faces"));
    }
    let mut mesh = Mesh::from_triangles(positions, triangles, path);
    mesh.normals = normals.map(|ns| {
        ns.into_iter()
            .map(|n| super::normalized(n).unwrap_or([0.0; 3]))
            .collect()
    });
    mesh.colors = colors;
    mesh.uvs = uvs;
    Ok(mesh)
}

/// Where the wanted properties sit in the vertex and face rows.
struct Layout {
    xyz: [usize; 3],
    normal: Option<[usize; 3]>,
    /// Indices of red, green, blue and the value that means full intensity.
    color: Option<([usize; 3], f64)>,
    uv: Option<[usize; 2]>,
    face_list: usize,
}

impl Layout {
    fn new(vertex: &Element, face: &Element, path: &Path) -> Result<Layout> {
        let scalar = |name: &str| -> Result<Option<(usize, Scalar)>> {
            match vertex.props.iter().position(|p| p.name == name) {
                None => Ok(None),
                Some(i) => match vertex.props[i].kind {
                    Kind::Scalar(t) => Ok(Some((i, t))),
                    Kind::List { .. } => Err(input_error(
                        path,
                        format!(
                            "PLY header: vertex property '{name}' must be a scalar, not a list"
                        ),
                    )),
                },
            }
        };
        // All of `names`, or none of them.
        let group = |names: &[&str]| -> Result<Option<Vec<(usize, Scalar)>>> {
            let found: Vec<_> = names
                .iter()
                .map(|n| scalar(n))
                .collect::<Result<Vec<_>>>()?;
            if found.iter().all(Option::is_none) {
                return Ok(None);
            }
            if let Some(k) = found.iter().position(Option::is_none) {
                return Err(input_error(
                    path,
                    format!(
                        "PLY header line {}: vertex has '{}' but no '{}'",
                        vertex.line,
                        names[found.iter().position(Option::is_some).expect("one is some")],
                        names[k]
                    ),
                ));
            }
            Ok(Some(
                found.into_iter().map(|f| f.expect("all some")).collect(),
            ))
        };
        let xyz = group(&["x", "y", "z"])?.ok_or_else(|| {
            input_error(
                path,
                format!(
                    "PLY header line {}: element 'vertex' has no properties x, y, z",
                    vertex.line
                ),
            )
        })?;
        let normal = group(&["nx", "ny", "nz"])?.map(|g| [g[0].0, g[1].0, g[2].0]);
        let color = group(&["red", "green", "blue"])?.map(|g| {
            let scale = g[0].1.int_max().unwrap_or(1.0);
            ([g[0].0, g[1].0, g[2].0], scale)
        });
        let mut uv = None;
        for pair in [
            ["s", "t"],
            ["u", "v"],
            ["texture_u", "texture_v"],
            ["texture_s", "texture_t"],
        ] {
            if let Some(g) = group(&pair)? {
                uv = Some([g[0].0, g[1].0]);
                break;
            }
        }
        let face_list = face
            .props
            .iter()
            .position(|p| p.name == "vertex_indices" || p.name == "vertex_index")
            .ok_or_else(|| {
                input_error(
                    path,
                    format!(
                        "PLY header line {}: element 'face' has no list property \
                         'vertex_indices'",
                        face.line
                    ),
                )
            })?;
        let Kind::List { item, .. } = face.props[face_list].kind else {
            return Err(input_error(
                path,
                format!(
                    "PLY header line {}: face property '{}' must be a list",
                    face.line, face.props[face_list].name
                ),
            ));
        };
        if item.int_max().is_none() {
            return Err(unsupported_error(
                path,
                format!(
                    "PLY header line {}: face vertex indices of a floating-point type",
                    face.line
                ),
            ));
        }
        Ok(Layout {
            xyz: [xyz[0].0, xyz[1].0, xyz[2].0],
            normal,
            color,
            uv,
            face_list,
        })
    }
}

type Header = (Encoding, Vec<Element>, usize, usize);

fn parse_header(data: &[u8], path: &Path) -> Result<Header> {
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
        let raw = raw.strip_suffix(b"\r").unwrap_or(raw).trim_ascii();
        if line_no == 1 {
            if raw != b"ply" {
                return Err(bad(
                    1,
                    "not a PLY file (the first line must be 'ply')".into(),
                ));
            }
            continue;
        }
        if !terminated {
            return Err(bad(
                line_no,
                "the file ends inside the header (truncated?)".into(),
            ));
        }
        let keyword = raw.split(|b| b.is_ascii_whitespace()).next().unwrap_or(b"");
        if raw.is_empty() || keyword == b"comment" || keyword == b"obj_info" {
            continue;
        }
        let text =
            std::str::from_utf8(raw).map_err(|_| bad(line_no, "line is not valid text".into()))?;
        let tokens: Vec<&str> = text.split_ascii_whitespace().collect();
        match tokens[0] {
            "format" => {
                if encoding.is_some() || tokens.len() != 3 {
                    return Err(bad(line_no, format!("unexpected '{}'", shown(text))));
                }
                encoding = Some(match tokens[1] {
                    "ascii" => Encoding::Ascii,
                    "binary_little_endian" => Encoding::Little,
                    "binary_big_endian" => Encoding::Big,
                    other => {
                        return Err(bad(line_no, format!("unknown encoding '{}'", shown(other))))
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
                let count = (tokens.len() == 3)
                    .then(|| tokens[2].parse::<u64>().ok())
                    .flatten()
                    .ok_or_else(|| {
                        bad(
                            line_no,
                            format!("expected 'element <name> <count>', found '{}'", shown(text)),
                        )
                    })?;
                if elements.iter().any(|e| e.name == tokens[1]) {
                    return Err(bad(
                        line_no,
                        format!("element '{}' is declared twice", shown(tokens[1])),
                    ));
                }
                elements.push(Element {
                    name: tokens[1].to_string(),
                    count,
                    props: Vec::new(),
                    line: line_no,
                });
            }
            "property" => {
                let Some(el) = elements.last_mut() else {
                    return Err(bad(line_no, "'property' before any 'element'".into()));
                };
                let scalar = |name: &str| {
                    Scalar::from_name(name).ok_or_else(|| {
                        bad(line_no, format!("unknown property type '{}'", shown(name)))
                    })
                };
                let (kind, name) = if tokens.get(1) == Some(&"list") && tokens.len() == 5 {
                    let count = scalar(tokens[2])?;
                    if count.int_max().is_none() {
                        return Err(bad(
                            line_no,
                            "list length type must be an integer type".into(),
                        ));
                    }
                    (
                        Kind::List {
                            count,
                            item: scalar(tokens[3])?,
                        },
                        tokens[4],
                    )
                } else if tokens.len() == 3 && tokens[1] != "list" {
                    (Kind::Scalar(scalar(tokens[1])?), tokens[2])
                } else {
                    return Err(bad(
                        line_no,
                        format!("malformed property line '{}'", shown(text)),
                    ));
                };
                if el.props.iter().any(|p| p.name == name) {
                    return Err(bad(
                        line_no,
                        format!("property '{}' is declared twice", shown(name)),
                    ));
                }
                el.props.push(Property {
                    name: name.to_string(),
                    kind,
                });
            }
            "end_header" if tokens.len() == 1 => break,
            other => return Err(bad(line_no, format!("unknown keyword '{}'", shown(other)))),
        }
    }
    let encoding = encoding.ok_or_else(|| input_error(path, "PLY header has no 'format' line"))?;
    for e in &elements {
        if e.props.is_empty() && e.count > 0 {
            return Err(bad(
                e.line,
                format!("element '{}' has rows but no properties", e.name),
            ));
        }
    }
    Ok((encoding, elements, pos, line_no + 1))
}

/// Rejects a header whose row counts cannot fit in the bytes after it, before anything is
/// reserved for the rows (binary rows with empty lists; ASCII rows of one-character values each
/// followed by a separator).
fn check_body_size(
    enc: Encoding,
    elements: &[Element],
    body_len: usize,
    path: &Path,
) -> Result<()> {
    let mut needed: u128 = 0;
    for e in elements {
        let row_min: u128 = e
            .props
            .iter()
            .map(|p| match (enc, p.kind) {
                (Encoding::Ascii, _) => 2,
                (_, Kind::Scalar(t)) => t.size() as u128,
                (_, Kind::List { count, .. }) => count.size() as u128,
            })
            .sum();
        needed += row_min * u128::from(e.count);
        if needed > body_len as u128 {
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

/// The body being read: binary with a byte position, or ASCII tokens.
enum Reader<'a> {
    Binary {
        data: &'a [u8],
        pos: usize,
        big: bool,
    },
    Ascii(AsciiBody<'a>),
}

struct AsciiBody<'a> {
    tokens: Box<dyn Iterator<Item = (&'a str, usize)> + 'a>,
    line: usize,
}

impl<'a> AsciiBody<'a> {
    fn new(data: &'a [u8], start: usize, first_line: usize, path: &Path) -> Result<Self> {
        let body = &data[start..];
        if !body.is_empty() && !body.ends_with(b"\n") {
            return Err(input_error(
                path,
                "the file ends without a final line break (truncated?)",
            ));
        }
        let text = std::str::from_utf8(body).map_err(|e| {
            input_error(
                path,
                format!(
                    "byte offset {}: body is not valid text",
                    start + e.valid_up_to()
                ),
            )
        })?;
        let tokens = text
            .split('\n')
            .zip(first_line..)
            .flat_map(|(l, n)| l.split_ascii_whitespace().map(move |t| (t, n)));
        Ok(AsciiBody {
            tokens: Box::new(tokens),
            line: first_line,
        })
    }
}

impl Reader<'_> {
    fn place(&self, element: &str, row: u64, prop: &str) -> String {
        let prop = if prop.is_empty() {
            String::new()
        } else {
            format!(", property '{prop}'")
        };
        match self {
            Reader::Binary { pos, .. } => {
                format!("{element} index {row}{prop} (byte offset {pos})")
            }
            Reader::Ascii(a) => format!("line {} ({element} index {row}{prop})", a.line),
        }
    }

    /// Reads one value of type `t`; `at` (element, row, property) names it in errors.
    fn scalar(&mut self, t: Scalar, path: &Path, at: (&str, u64, &str)) -> Result<f64> {
        let place = |r: &Self| r.place(at.0, at.1, at.2);
        match self {
            Reader::Binary { data, pos, big } => {
                let (start, big) = (*pos, *big);
                let Some(bytes) = data.get(start..start + t.size()) else {
                    return Err(input_error(
                        path,
                        format!("{}: the file ends here (truncated?)", place(self)),
                    ));
                };
                *pos += t.size();
                Ok(t.decode(bytes, big))
            }
            Reader::Ascii(a) => {
                let Some((tok, line)) = a.tokens.next() else {
                    return Err(input_error(
                        path,
                        format!("{}: the file ends here (truncated?)", place(self)),
                    ));
                };
                a.line = line;
                match t.parse_text(tok) {
                    Some(v) => Ok(v),
                    None => Err(input_error(
                        path,
                        format!(
                            "{}: '{}' is not a valid value of its type",
                            place(self),
                            shown(tok)
                        ),
                    )),
                }
            }
        }
    }

    fn finish(&mut self, path: &Path) -> Result<()> {
        match self {
            Reader::Binary { data, pos, .. } if *pos != data.len() => Err(input_error(
                path,
                format!(
                    "{} unexpected byte(s) after the last element, from byte offset {pos}",
                    data.len() - *pos
                ),
            )),
            Reader::Ascii(a) => match a.tokens.next() {
                Some((_, line)) => Err(input_error(
                    path,
                    format!("line {line}: unexpected data after the last element"),
                )),
                None => Ok(()),
            },
            _ => Ok(()),
        }
    }
}
