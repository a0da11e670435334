//! glTF 2.0 reader: binary `.glb` and JSON `.gltf` (told apart by the `glTF` magic).
//!
//! The whole default scene is read (the first scene when the file names none, every root node
//! when it has no scene), with each node's transform — `matrix`, or `translation`, `rotation`,
//! `scale` — composed down the hierarchy. Every primitive of mode `TRIANGLES`,
//! `TRIANGLE_STRIP` or `TRIANGLE_FAN` becomes triangles, indexed or not (points and lines are
//! skipped). A node whose transform mirrors (negative determinant) has its winding reversed,
//! so that front faces stay front faces, as the specification asks.
//!
//! Read attributes: `POSITION` (metres, glTF 2.0 sec. 3.4; kept in file units here, scaled when
//! placed), `NORMAL` (transformed by the inverse transpose),
//! `COLOR_0` (linear RGB, alpha dropped) and the `TEXCOORD_n` set used by the base colour
//! texture. Materials give `baseColorFactor`, `baseColorTexture` (PNG or JPEG, embedded in a
//! buffer view, a `data:` URI, or a file beside the glTF file) with its sampler's filter and
//! wrapping, and `doubleSided`. Sparse accessors and accessors without a buffer view are
//! supported; morph targets, skins and animations are not applied (the mesh is read in its
//! rest pose).
//!
//! The JSON is deserialized by the `gltf` crate's `json` module; everything after that —
//! buffers, accessors, bounds, node graph — is checked here, so a malformed file gives an
//! [`crate::Error::Input`] naming the JSON element (such as `accessors[3]`) and never a panic.
//! `extensionsRequired` may only list `KHR_mesh_quantization` (its quantized attribute types
//! are read); any other required extension, such as `KHR_draco_mesh_compression` or
//! `EXT_meshopt_compression`, is [`crate::Error::Unsupported`] naming it.
//!
//! Allocation stays bounded: accessor data is read only where it lies inside a buffer that
//! exists, accessors without a buffer view are limited relative to the input size, decoded
//! images are limited to 16384 x 16384 texels and 256 MiB, and the scene may instance meshes up
//! to [`MAX_VERTICES`] vertices and [`MAX_TRIANGLES`] triangles in total.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use ::gltf::json;
use json::accessor::{ComponentType, Type};
use json::mesh::{Mode, Semantic};
use json::texture::{MagFilter, WrappingMode};
use json::validation::Checked;

use super::{complete_normals, Material, Mesh, Texture, TextureFilter, TextureWrap};
use crate::error::{Error, Result};
use crate::scene::text::{input_error, one_line, shown, unsupported_error};

mod data;
mod materials;

/// Most vertices a scene may hold after instancing.
pub const MAX_VERTICES: usize = 1 << 25;
/// Most triangles a scene may hold after instancing.
pub const MAX_TRIANGLES: usize = 1 << 25;

/// Most bytes all decoded images of one file may take together (RGBA8).
pub const MAX_DECODED_IMAGE_BYTES: u64 = 1 << 30;
/// Largest external image file read.
const MAX_IMAGE_FILE_BYTES: u64 = 512 << 20;

/// Required extensions this reader handles.
const SUPPORTED_REQUIRED: &[&str] = &["KHR_mesh_quantization"];

/// Reads a `.glb` or `.gltf` file.
pub fn read(path: &Path) -> Result<Mesh> {
    let data = std::fs::read(path).map_err(|e| Error::io(path, e))?;
    parse(&data, path)
}

/// Parses glTF bytes; `path` names the source in messages, and its folder is where external
/// buffers and images are looked up.
pub fn parse(data: &[u8], path: &Path) -> Result<Mesh> {
    let (json_bytes, bin) = split_container(data, path)?;
    let json_bytes = json_bytes
        .strip_prefix(b"\xEF\xBB\xBF")
        .unwrap_or(json_bytes);
    let root: json::Root = json::deserialize::from_slice(json_bytes)
        .map_err(|e| input_error(path, format!("glTF JSON: {e}")))?;
    for ext in &root.extensions_required {
        if !SUPPORTED_REQUIRED.contains(&ext.as_str()) {
            return Err(unsupported_error(
                path,
                format!(
                    "glTF extension '{}' is required by the file but not supported{}",
                    shown(ext),
                    match ext.as_str() {
                        "KHR_draco_mesh_compression" | "EXT_meshopt_compression" =>
                            " (export the file without mesh compression)",
                        _ => "",
                    }
                ),
            ));
        }
    }
    let mut reader = Reader {
        root: &root,
        path,
        base: path.parent().map(Path::to_path_buf).unwrap_or_default(),
        bin,
        buffers: vec![None; root.buffers.len()],
        input_bytes: data.len(),
        textures: HashMap::new(),
        decoded_bytes: 0,
        materials: HashMap::new(),
        out: Output::default(),
    };
    reader.read_scene()?;
    reader.finish()
}

/// Splits a GLB container into its JSON chunk and optional BIN chunk; plain JSON passes
/// through.
fn split_container<'a>(data: &'a [u8], path: &Path) -> Result<(&'a [u8], Option<&'a [u8]>)> {
    if !data.starts_with(b"glTF") {
        return Ok((data, None));
    }
    let u32_at = |o: usize| -> Option<u32> {
        data.get(o..o + 4)
            .map(|b| u32::from_le_bytes(b.try_into().expect("4 bytes")))
    };
    let (Some(version), Some(length)) = (u32_at(4), u32_at(8)) else {
        return Err(input_error(
            path,
            format!(
                "GLB header: the file ends at byte {} inside the 12-byte header",
                data.len()
            ),
        ));
    };
    if version != 2 {
        return Err(unsupported_error(
            path,
            format!("GLB version {version} (only 2 is read)"),
        ));
    }
    if length as usize != data.len() {
        return Err(input_error(
            path,
            format!(
                "GLB header: the file should be {length} bytes long but is {} (truncated?)",
                data.len()
            ),
        ));
    }
    let mut pos = 12usize;
    let mut json = None;
    let mut bin = None;
    while pos < data.len() {
        let (Some(len), Some(kind)) = (u32_at(pos), data.get(pos + 4..pos + 8)) else {
            return Err(input_error(
                path,
                format!("GLB chunk at byte offset {pos}: the file ends inside its 8-byte header"),
            ));
        };
        let start = pos + 8;
        let end = start as u64 + u64::from(len);
        if end > data.len() as u64 {
            return Err(input_error(
                path,
                format!(
                    "GLB chunk at byte offset {pos}: its length {len} runs past the end of the \
                     file ({} bytes)",
                    data.len()
                ),
            ));
        }
        let chunk = &data[start..end as usize];
        match (kind, json.is_none()) {
            (b"JSON", true) => json = Some(chunk),
            (_, true) => {
                return Err(input_error(
                    path,
                    "GLB: the first chunk is not the JSON chunk",
                ))
            }
            (b"BIN\0", false) if bin.is_none() => bin = Some(chunk),
            // Unknown chunk types are skipped, as the specification asks.
            _ => {}
        }
        pos = end as usize;
    }
    let json = json.ok_or_else(|| input_error(path, "GLB file has no JSON chunk"))?;
    Ok((json, bin))
}

/// The mesh being assembled, in scene coordinates.
#[derive(Default)]
struct Output {
    positions: Vec<[f64; 3]>,
    normals: Vec<Option<[f64; 3]>>,
    colors: Vec<[f32; 3]>,
    any_color: bool,
    uvs: Vec<[f32; 2]>,
    any_uv: bool,
    triangles: Vec<[u32; 3]>,
    tri_material: Vec<u32>,
    materials: Vec<Material>,
}

struct Reader<'a> {
    root: &'a json::Root,
    path: &'a Path,
    base: PathBuf,
    bin: Option<&'a [u8]>,
    /// Loaded buffers, cut to their `byteLength`.
    buffers: Vec<Option<Vec<u8>>>,
    input_bytes: usize,
    /// Decoded textures by image index and sampling rule.
    textures: HashMap<(usize, TextureFilter, [TextureWrap; 2]), Arc<Texture>>,
    /// Bytes of decoded images so far, limited to [`MAX_DECODED_IMAGE_BYTES`].
    decoded_bytes: u64,
    /// Output material index by glTF material index (`None`: the default material).
    materials: HashMap<Option<usize>, u32>,
    out: Output,
}

type Mat4 = [[f64; 4]; 4];

const IDENTITY: Mat4 = [
    [1.0, 0.0, 0.0, 0.0],
    [0.0, 1.0, 0.0, 0.0],
    [0.0, 0.0, 1.0, 0.0],
    [0.0, 0.0, 0.0, 1.0],
];

fn mat4_mul(a: &Mat4, b: &Mat4) -> Mat4 {
    let mut c = [[0.0; 4]; 4];
    for (i, row) in c.iter_mut().enumerate() {
        for (j, v) in row.iter_mut().enumerate() {
            *v = (0..4).map(|k| a[i][k] * b[k][j]).sum();
        }
    }
    c
}

/// The local transform of a node (row-major, acting on column vectors).
fn node_matrix(node: &json::Node) -> Mat4 {
    if let Some(m) = node.matrix {
        // glTF stores matrices column by column.
        let mut out = [[0.0; 4]; 4];
        for (c, col) in m.chunks_exact(4).enumerate() {
            for (r, v) in col.iter().enumerate() {
                out[r][c] = f64::from(*v);
            }
        }
        return out;
    }
    let t = node.translation.unwrap_or([0.0; 3]).map(f64::from);
    let s = node.scale.unwrap_or([1.0; 3]).map(f64::from);
    let q = node
        .rotation
        .as_ref()
        .map(|q| q.0)
        .unwrap_or([0.0, 0.0, 0.0, 1.0]);
    let [x, y, z, w] = q.map(f64::from);
    let n = (x * x + y * y + z * z + w * w).sqrt();
    let (x, y, z, w) = if n > 0.0 {
        (x / n, y / n, z / n, w / n)
    } else {
        (0.0, 0.0, 0.0, 1.0)
    };
    let r = [
        [
            1.0 - 2.0 * (y * y + z * z),
            2.0 * (x * y - z * w),
            2.0 * (x * z + y * w),
        ],
        [
            2.0 * (x * y + z * w),
            1.0 - 2.0 * (x * x + z * z),
            2.0 * (y * z - x * w),
        ],
        [
            2.0 * (x * z - y * w),
            2.0 * (y * z + x * w),
            1.0 - 2.0 * (x * x + y * y),
        ],
    ];
    let mut out = IDENTITY;
    for i in 0..3 {
        for j in 0..3 {
            out[i][j] = r[i][j] * s[j];
        }
        out[i][3] = t[i];
    }
    out
}

fn det3(m: &Mat4) -> f64 {
    m[0][0] * (m[1][1] * m[2][2] - m[1][2] * m[2][1])
        - m[0][1] * (m[1][0] * m[2][2] - m[1][2] * m[2][0])
        + m[0][2] * (m[1][0] * m[2][1] - m[1][1] * m[2][0])
}

/// The inverse transpose of the upper 3 x 3 block (up to the factor 1/det, irrelevant for
/// normals that are normalised afterwards): the cofactor matrix.
fn normal_matrix(m: &Mat4) -> [[f64; 3]; 3] {
    let a = |i: usize, j: usize| m[i][j];
    let mut c = [[0.0; 3]; 3];
    for (i, row) in c.iter_mut().enumerate() {
        for (j, v) in row.iter_mut().enumerate() {
            let (i1, i2) = ((i + 1) % 3, (i + 2) % 3);
            let (j1, j2) = ((j + 1) % 3, (j + 2) % 3);
            *v = a(i1, j1) * a(i2, j2) - a(i1, j2) * a(i2, j1);
        }
    }
    c
}

impl<'a> Reader<'a> {
    fn err(&self, msg: impl AsRef<str>) -> Error {
        input_error(self.path, msg)
    }

    fn read_scene(&mut self) -> Result<()> {
        let root = self.root;
        let roots: Vec<usize> = match root.scene {
            Some(s) => {
                let scene = root.scenes.get(s.value()).ok_or_else(|| {
                    self.err(format!(
                        "'scene' {} does not exist ({} scenes)",
                        s.value(),
                        root.scenes.len()
                    ))
                })?;
                scene.nodes.iter().map(|n| n.value()).collect()
            }
            None if !root.scenes.is_empty() => {
                root.scenes[0].nodes.iter().map(|n| n.value()).collect()
            }
            None => {
                let mut is_child = vec![false; root.nodes.len()];
                for node in &root.nodes {
                    for c in node.children.iter().flatten() {
                        if let Some(flag) = is_child.get_mut(c.value()) {
                            *flag = true;
                        }
                    }
                }
                (0..root.nodes.len()).filter(|&i| !is_child[i]).collect()
            }
        };
        let mut visited = vec![false; root.nodes.len()];
        let mut stack: Vec<(usize, Mat4, String)> = roots
            .into_iter()
            .rev()
            .map(|n| (n, IDENTITY, "the scene".to_string()))
            .collect();
        while let Some((index, parent, from)) = stack.pop() {
            let node = root.nodes.get(index).ok_or_else(|| {
                self.err(format!(
                    "{from} refers to node {index}, which does not exist ({} nodes)",
                    root.nodes.len()
                ))
            })?;
            if std::mem::replace(&mut visited[index], true) {
                return Err(self.err(format!(
                    "node {index} is reached twice in the scene (from {from}): the node graph \
                     has a cycle or a shared child"
                )));
            }
            let local = node_matrix(node);
            if local.iter().flatten().any(|v| !v.is_finite()) {
                return Err(self.err(format!("nodes[{index}]: transform is not finite")));
            }
            let world = mat4_mul(&parent, &local);
            if let Some(mesh) = node.mesh {
                self.read_mesh(mesh.value(), &world, index)?;
            }
            for c in node.children.iter().flatten().rev() {
                stack.push((c.value(), world, format!("nodes[{index}]")));
            }
        }
        Ok(())
    }

    fn read_mesh(&mut self, mesh_index: usize, world: &Mat4, node: usize) -> Result<()> {
        let root = self.root;
        let mesh = root.meshes.get(mesh_index).ok_or_else(|| {
            self.err(format!(
                "nodes[{node}]: mesh {mesh_index} does not exist ({} meshes)",
                root.meshes.len()
            ))
        })?;
        for (pi, prim) in mesh.primitives.iter().enumerate() {
            let place = format!("meshes[{mesh_index}].primitives[{pi}]");
            let mode = match &prim.mode {
                Checked::Valid(m) => *m,
                Checked::Invalid => return Err(self.err(format!("{place}: invalid mode"))),
            };
            if !matches!(
                mode,
                Mode::Triangles | Mode::TriangleStrip | Mode::TriangleFan
            ) {
                continue;
            }
            self.read_primitive(prim, mode, world, &place)?;
        }
        Ok(())
    }

    fn read_primitive(
        &mut self,
        prim: &json::mesh::Primitive,
        mode: Mode,
        world: &Mat4,
        place: &str,
    ) -> Result<()> {
        let attr = |s: Semantic| prim.attributes.get(&Checked::Valid(s)).map(|i| i.value());
        let pos_acc = attr(Semantic::Positions)
            .ok_or_else(|| self.err(format!("{place}: no POSITION attribute")))?;
        let positions = self.read_accessor(pos_acc, &[Type::Vec3], false)?;
        let n = positions.len() / 3;
        let same_count = |this: &Self, what: &str, vals: &[f64], comps: usize| -> Result<()> {
            if vals.len() / comps != n {
                return Err(this.err(format!(
                    "{place}: {what} has {} elements but POSITION has {n}",
                    vals.len() / comps
                )));
            }
            Ok(())
        };
        let normals = match attr(Semantic::Normals) {
            Some(a) => {
                let v = self.read_accessor(a, &[Type::Vec3], false)?;
                same_count(self, "NORMAL", &v, 3)?;
                Some(v)
            }
            None => None,
        };
        let colors = match attr(Semantic::Colors(0)) {
            Some(a) => {
                let (v, comps) = self.read_accessor_any(a, &[Type::Vec3, Type::Vec4], true)?;
                same_count(self, "COLOR_0", &v, comps)?;
                Some((v, comps))
            }
            None => None,
        };

        // Material (and the texture coordinate set its texture uses).
        let mat_index = prim.material.map(|m| m.value());
        let (out_mat, uv_set) = self.material(mat_index, place)?;
        let uvs = match uv_set {
            Some(set) => {
                let a = attr(Semantic::TexCoords(set)).ok_or_else(|| {
                    self.err(format!(
                        "{place}: the material has a base colour texture but the primitive has \
                         no TEXCOORD_{set}"
                    ))
                })?;
                let v = self.read_accessor(a, &[Type::Vec2], false)?;
                same_count(self, &format!("TEXCOORD_{set}"), &v, 2)?;
                Some(v)
            }
            None => None,
        };

        let indices: Vec<u32> = match prim.indices {
            Some(a) => {
                let v = self.read_index_accessor(a.value())?;
                if let Some(bad) = v.iter().find(|&&i| i as usize >= n) {
                    return Err(self.err(format!(
                        "{place}: index {bad} is not one of the {n} vertices"
                    )));
                }
                v
            }
            None => (0..n as u64).map(|i| i as u32).collect(),
        };
        let m = indices.len();
        let mut local: Vec<[u32; 3]> = Vec::new();
        match mode {
            Mode::Triangles => {
                if !m.is_multiple_of(3) {
                    return Err(
                        self.err(format!("{place}: {m} indices do not make whole triangles"))
                    );
                }
                local.extend(indices.chunks_exact(3).map(|c| [c[0], c[1], c[2]]));
            }
            Mode::TriangleStrip => {
                for i in 0..m.saturating_sub(2) {
                    let (b, c) = if i % 2 == 0 {
                        (i + 1, i + 2)
                    } else {
                        (i + 2, i + 1)
                    };
                    local.push([indices[i], indices[b], indices[c]]);
                }
            }
            Mode::TriangleFan => {
                for i in 0..m.saturating_sub(2) {
                    local.push([indices[i + 1], indices[i + 2], indices[0]]);
                }
            }
            _ => unreachable!("filtered by the caller"),
        }

        let base = self.out.positions.len();
        if base + n > MAX_VERTICES || self.out.triangles.len() + local.len() > MAX_TRIANGLES {
            return Err(unsupported_error(
                self.path,
                format!(
                    "{place}: the scene holds more than {MAX_VERTICES} vertices or \
                     {MAX_TRIANGLES} triangles after instancing"
                ),
            ));
        }
        let mirrored = det3(world) < 0.0;
        let nm = normal_matrix(world);
        for k in 0..n {
            let p = [positions[3 * k], positions[3 * k + 1], positions[3 * k + 2]];
            let q = [0, 1, 2].map(|i| {
                world[i][0] * p[0] + world[i][1] * p[1] + world[i][2] * p[2] + world[i][3]
            });
            if !q.iter().all(|v| v.is_finite()) {
                return Err(self.err(format!("{place}: POSITION {k} is not finite")));
            }
            self.out.positions.push(q);
            self.out.normals.push(match &normals {
                Some(v) => {
                    let p = [v[3 * k], v[3 * k + 1], v[3 * k + 2]];
                    let q = [0, 1, 2].map(|i| nm[i][0] * p[0] + nm[i][1] * p[1] + nm[i][2] * p[2]);
                    if !q.iter().all(|v| v.is_finite()) {
                        return Err(self.err(format!("{place}: NORMAL {k} is not finite")));
                    }
                    Some(q)
                }
                None => None,
            });
            self.out.colors.push(match &colors {
                Some((v, comps)) => {
                    let c = [v[comps * k], v[comps * k + 1], v[comps * k + 2]].map(|x| x as f32);
                    if !c.iter().all(|x| x.is_finite()) {
                        return Err(self.err(format!("{place}: COLOR_0 {k} is not finite")));
                    }
                    c
                }
                None => [1.0; 3],
            });
            self.out.uvs.push(match &uvs {
                Some(v) => [v[2 * k] as f32, v[2 * k + 1] as f32],
                None => [0.0; 2],
            });
        }
        self.out.any_color |= colors.is_some();
        self.out.any_uv |= uvs.is_some();
        for t in local {
            let t = t.map(|i| (i as usize + base) as u32);
            self.out
                .triangles
                .push(if mirrored { [t[0], t[2], t[1]] } else { t });
            self.out.tri_material.push(out_mat);
        }
        Ok(())
    }

    fn finish(self) -> Result<Mesh> {
        let out = self.out;
        if out.triangles.is_empty() {
            return Err(input_error(
                self.path,
                "the glTF scene has no triangles (no mesh with a triangle primitive is reachable \
                 from its nodes)",
            ));
        }
        let normals = complete_normals(&out.positions, &out.triangles, out.normals);
        Ok(Mesh {
            positions: out.positions,
            triangles: out.triangles,
            normals,
            colors: out.any_color.then_some(out.colors),
            uvs: out.any_uv.then_some(out.uvs),
            tri_material: out.tri_material,
            materials: out.materials,
            source: self.path.to_path_buf(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::data::{decode_base64, percent_decode};
    use super::*;

    #[test]
    fn base64_round_values() {
        // RFC 4648, section 10 test vectors.
        for (plain, enc) in [
            ("", ""),
            ("f", "Zg=="),
            ("fo", "Zm8="),
            ("foo", "Zm9v"),
            ("foob", "Zm9vYg=="),
            ("fooba", "Zm9vYmE="),
            ("foobar", "Zm9vYmFy"),
        ] {
            assert_eq!(
                decode_base64(enc).as_deref(),
                Some(plain.as_bytes()),
                "{enc}"
            );
        }
        assert_eq!(decode_base64("Zm9v!"), None);
        assert_eq!(decode_base64("Z"), None);
    }

    #[test]
    fn percent_escapes() {
        assert_eq!(percent_decode("a%20b.bin").as_deref(), Some("a b.bin"));
        assert_eq!(percent_decode("a%2"), None);
        assert_eq!(percent_decode("a%zz"), None);
    }

    #[test]
    fn trs_matches_hand_composed_matrix() {
        // 90 degrees about z: quaternion (0, 0, sin 45, cos 45).
        let h = std::f32::consts::FRAC_1_SQRT_2;
        let json = format!(r#"{{"translation":[1,2,3],"rotation":[0,0,{h},{h}],"scale":[2,3,4]}}"#);
        let node: json::Node = json::deserialize::from_str(&json).unwrap();
        let m = node_matrix(&node);
        // x -> 2 * (0, 1, 0) + t; y -> 3 * (-1, 0, 0) + t.
        let apply = |p: [f64; 3]| {
            [0, 1, 2].map(|i| m[i][0] * p[0] + m[i][1] * p[1] + m[i][2] * p[2] + m[i][3])
        };
        let close = |a: [f64; 3], b: [f64; 3]| a.iter().zip(b).all(|(x, y)| (x - y).abs() < 1e-6);
        assert!(close(apply([1.0, 0.0, 0.0]), [1.0, 4.0, 3.0]));
        assert!(close(apply([0.0, 1.0, 0.0]), [-2.0, 2.0, 3.0]));
        assert!(close(apply([0.0, 0.0, 1.0]), [1.0, 2.0, 7.0]));
    }
}
