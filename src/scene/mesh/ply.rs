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
//! Other elements and properties are read past. The header and the body are read by the PLY
//! reader the point clouds use: every PLY scalar type and sized alias is accepted, and row
//! counts in the header are checked against the bytes that follow it before anything is
//! reserved, so a lying header cannot make the reader allocate more than the file holds. A
//! binary body must end exactly where the header says; an ASCII body must end with a line break
//! (so a file cut inside its last number is caught) and hold exactly the declared values (rows
//! may span or share lines).

use std::path::Path;

use super::{fan, srgb_unit_to_linear, Mesh};
use crate::error::{Error, Result};
use crate::scene::ply::{self, AsciiRows, Element, Header, PropKind, Scalar};
use crate::scene::text::{input_error, unsupported_error};

/// Reads a PLY mesh file.
pub fn read(path: &Path) -> Result<Mesh> {
    let data = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse(&data, path)
}

/// Parses PLY bytes; `path` names the source in error messages.
pub fn parse(data: &[u8], path: &Path) -> Result<Mesh> {
    let header = Header::parse(data, path)?;
    let vi = header
        .element("vertex")
        .ok_or_else(|| input_error(path, "PLY header declares no 'vertex' element"))?;
    let fi = header.element("face").ok_or_else(|| {
        input_error(
            path,
            "PLY header declares no 'face' element (a mesh needs faces)",
        )
    })?;
    let layout = Layout::new(&header.elements[vi], &header.elements[fi], path)?;
    header.check_body_size(data, path)?;

    // The count fits in the body (checked above), so this is bounded by the file size.
    let vcount = header.elements[vi].count as usize;
    let mut positions = Vec::with_capacity(vcount);
    let mut normals = layout.normal.map(|_| Vec::with_capacity(vcount));
    let mut colors = layout.color.map(|_| Vec::with_capacity(vcount));
    let mut uvs = layout.uv.map(|_| Vec::with_capacity(vcount));
    let mut triangles = Vec::new();
    let mut corners: Vec<u32> = Vec::new();
    ply::read_body(data, &header, AsciiRows::AnyLines, path, |row| {
        let bad = |what: String| input_error(path, format!("{}: {what}", row.place()));
        if row.element == vi {
            let g = |i: usize| row.values[i];
            let p = layout.xyz.map(g);
            if !p.iter().all(|v| v.is_finite()) {
                return Err(bad("position is not finite".into()));
            }
            positions.push(p);
            if let (Some(ns), Some(ix)) = (normals.as_mut(), layout.normal) {
                let n = ix.map(g);
                if !n.iter().all(|v| v.is_finite()) {
                    return Err(bad("normal is not finite".into()));
                }
                ns.push(n);
            }
            if let (Some(cs), Some((ix, scale))) = (colors.as_mut(), layout.color) {
                cs.push(ix.map(|i| srgb_unit_to_linear(g(i) / scale) as f32));
            }
            if let (Some(us), Some(ix)) = (uvs.as_mut(), layout.uv) {
                us.push([g(ix[0]) as f32, (1.0 - g(ix[1])) as f32]);
            }
        } else if row.element == fi {
            let list = row.list(layout.face_list);
            if list.len() < 3 {
                let n = list.len();
                return Err(bad(format!("face has {n} corners, fewer than 3")));
            }
            corners.clear();
            for &v in list {
                if v.fract() != 0.0 || v < 0.0 || v >= vcount as f64 {
                    return Err(bad(format!(
                        "vertex index {v} is not one of the {vcount} vertices"
                    )));
                }
                corners.push(v as u32);
            }
            fan(&corners, &mut triangles);
        }
        Ok(())
    })?;
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
        // All of `names`, or none of them.
        let group = |names: &[&str]| -> Result<Option<Vec<(usize, Scalar)>>> {
            let found: Vec<_> = names
                .iter()
                .map(|n| vertex.scalar(n, path))
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
            let scale = g[0].1.int_range().map_or(1.0, |(_, max)| max as f64);
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
        let PropKind::List { item, .. } = face.props[face_list].kind else {
            return Err(input_error(
                path,
                format!(
                    "PLY header line {}: face property '{}' must be a list",
                    face.line, face.props[face_list].name
                ),
            ));
        };
        if item.int_range().is_none() {
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
