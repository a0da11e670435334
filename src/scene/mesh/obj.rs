//! Wavefront OBJ reader: the polygon statements `v`, `vn`, `vt` and `f`.
//!
//! * `v x y z [w]` gives a position (millimetres; `w` is ignored); `v x y z r g b` also gives a
//!   vertex colour in `[0, 1]`, read as sRGB-encoded like other display colours.
//! * `vn x y z` gives a normal, `vt u [v [w]]` texture coordinates (flipped to the glTF
//!   convention: `v` becomes `1 - v`).
//! * `f` lists three or more corners `v`, `v/vt`, `v//vn` or `v/vt/vn`; polygons are split as a
//!   fan around their first corner. Indices start at 1; a negative index counts back from the
//!   last element defined so far (-1 is the latest). A corner must refer to elements defined
//!   before it.
//!
//! Corners that share the same position, texture and normal indices become one vertex. When
//! only some corners have a normal, the others get the area-weighted normal of their
//! triangles; missing texture coordinates read as `(0, 0)` and missing colours as white.
//! Materials (`mtllib`, `usemtl`), groups, smoothing groups, lines, points and free-form
//! statements are ignored: the surface is white unless the vertices carry colours. Text after
//! `#` is a comment.

use std::collections::HashMap;
use std::path::Path;

use super::{complete_normals, srgb_unit_to_linear, Mesh};
use crate::error::Result;
use crate::scene::text::{input_error, lines_with_ends, parse_finite, shown};

/// Reads an OBJ file.
pub fn read(path: &Path) -> Result<Mesh> {
    let data = std::fs::read(path).map_err(|e| crate::error::Error::io(path, e))?;
    parse(&data, path)
}

const NONE: u32 = u32::MAX;

/// Parses OBJ text; `path` names the source in error messages.
pub fn parse(data: &[u8], path: &Path) -> Result<Mesh> {
    let mut file_positions: Vec<[f64; 3]> = Vec::new();
    let mut file_colors: Vec<Option<[f32; 3]>> = Vec::new();
    let mut file_normals: Vec<[f64; 3]> = Vec::new();
    let mut file_uvs: Vec<[f32; 2]> = Vec::new();

    let mut vertex_of: HashMap<[u32; 3], u32> = HashMap::new();
    let mut corners_of_vertex: Vec<[u32; 3]> = Vec::new();
    let mut triangles: Vec<[u32; 3]> = Vec::new();
    let mut polygon: Vec<u32> = Vec::new();

    for ((raw, _), line_no) in lines_with_ends(data).zip(1usize..) {
        let raw = match raw.iter().position(|&b| b == b'#') {
            Some(i) => &raw[..i],
            None => raw,
        };
        let keyword = raw
            .split(|b| b.is_ascii_whitespace())
            .find(|w| !w.is_empty())
            .unwrap_or(b"");
        if !matches!(keyword, b"v" | b"vn" | b"vt" | b"f") {
            continue;
        }
        let bad = |msg: String| input_error(path, format!("line {line_no}: {msg}"));
        let text = std::str::from_utf8(raw).map_err(|_| bad("line is not valid text".into()))?;
        let mut tokens = text.split_ascii_whitespace();
        let keyword = tokens.next().expect("the keyword was found above");
        let numbers = |tokens: std::str::SplitAsciiWhitespace| -> Result<Vec<f64>> {
            tokens
                .map(|t| {
                    parse_finite(t).ok_or_else(|| {
                        bad(format!(
                            "'{keyword}': '{}' is not a finite number",
                            shown(t)
                        ))
                    })
                })
                .collect()
        };
        match keyword {
            "v" => {
                let v = numbers(tokens)?;
                match v.len() {
                    3 | 4 => file_colors.push(None),
                    6 | 7 => {
                        file_colors.push(Some([3, 4, 5].map(|i| srgb_unit_to_linear(v[i]) as f32)))
                    }
                    n => {
                        return Err(bad(format!(
                            "'v' has {n} numbers (expected x y z, x y z w or x y z r g b)"
                        )))
                    }
                }
                file_positions.push([v[0], v[1], v[2]]);
            }
            "vn" => {
                let v = numbers(tokens)?;
                if v.len() != 3 {
                    return Err(bad(format!("'vn' has {} numbers (expected 3)", v.len())));
                }
                file_normals.push([v[0], v[1], v[2]]);
            }
            "vt" => {
                let v = numbers(tokens)?;
                if v.is_empty() || v.len() > 3 {
                    return Err(bad(format!(
                        "'vt' has {} numbers (expected 1 to 3)",
                        v.len()
                    )));
                }
                let u = v[0];
                let w = v.get(1).copied().unwrap_or(0.0);
                file_uvs.push([u as f32, (1.0 - w) as f32]);
            }
            "f" => {
                polygon.clear();
                for (k, corner) in tokens.enumerate() {
                    let mut parts = corner.split('/');
                    let mut index = |n: usize, what: &str, required: bool| -> Result<u32> {
                        let part = parts.next().unwrap_or("");
                        if part.is_empty() {
                            return if required {
                                Err(bad(format!(
                                    "corner {} '{}' has no {what} index",
                                    k + 1,
                                    shown(corner)
                                )))
                            } else {
                                Ok(NONE)
                            };
                        }
                        resolve(part, n).map_err(|why| {
                            bad(format!(
                                "corner {} '{}': {what} index {why}",
                                k + 1,
                                shown(corner)
                            ))
                        })
                    };
                    let p = index(file_positions.len(), "vertex", true)?;
                    let t = index(file_uvs.len(), "texture", false)?;
                    let n = index(file_normals.len(), "normal", false)?;
                    if parts.next().is_some() {
                        return Err(bad(format!(
                            "corner {} '{}' has more than three '/'-separated indices",
                            k + 1,
                            shown(corner)
                        )));
                    }
                    let key = [p, t, n];
                    let next = corners_of_vertex.len() as u32;
                    let v = *vertex_of.entry(key).or_insert_with(|| {
                        corners_of_vertex.push(key);
                        next
                    });
                    polygon.push(v);
                }
                if polygon.len() < 3 {
                    return Err(bad(format!(
                        "face has {} corners, fewer than 3",
                        polygon.len()
                    )));
                }
                super::fan(&polygon, &mut triangles);
            }
            _ => unreachable!("filtered above"),
        }
    }
    if triangles.is_empty() {
        return Err(input_error(path, "OBJ file has no faces ('f' lines)"));
    }

    let positions: Vec<[f64; 3]> = corners_of_vertex
        .iter()
        .map(|c| file_positions[c[0] as usize])
        .collect();
    let partial_normals = corners_of_vertex
        .iter()
        .map(|c| (c[2] != NONE).then(|| file_normals[c[2] as usize]))
        .collect();
    let normals = complete_normals(&positions, &triangles, partial_normals);
    let uvs = corners_of_vertex.iter().any(|c| c[1] != NONE).then(|| {
        corners_of_vertex
            .iter()
            .map(|c| {
                if c[1] == NONE {
                    [0.0, 0.0]
                } else {
                    file_uvs[c[1] as usize]
                }
            })
            .collect()
    });
    let colors = corners_of_vertex
        .iter()
        .any(|c| file_colors[c[0] as usize].is_some())
        .then(|| {
            corners_of_vertex
                .iter()
                .map(|c| file_colors[c[0] as usize].unwrap_or([1.0; 3]))
                .collect()
        });
    let mut mesh = Mesh::from_triangles(positions, triangles, path);
    mesh.normals = normals;
    mesh.uvs = uvs;
    mesh.colors = colors;
    Ok(mesh)
}

/// Resolves a 1-based or negative (relative) OBJ index against the `n` elements defined so
/// far, giving a 0-based index.
fn resolve(token: &str, n: usize) -> std::result::Result<u32, String> {
    let i: i64 = token
        .parse()
        .map_err(|_| format!("'{}' is not an integer", shown(token)))?;
    let n = n as i64;
    let resolved = if i > 0 {
        i - 1
    } else if i < 0 {
        n + i
    } else {
        return Err("0 is not valid (indices start at 1)".into());
    };
    if resolved < 0 || resolved >= n || resolved >= i64::from(NONE) {
        return Err(format!(
            "{i} refers to an element not defined before this line ({n} defined)"
        ));
    }
    Ok(resolved as u32)
}
