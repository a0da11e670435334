//! Triangle meshes: reading them from glTF 2.0 (`.glb`, `.gltf`), Wavefront OBJ, STL and PLY
//! files, and placing them in front of the plate.
//!
//! A [`Mesh`] as read holds the file's own coordinates in the file's own unit, with every
//! polygon already split into triangles and every vertex attribute indexed like the positions.
//! [`Mesh::placed`] turns, rotates, scales and moves it into plate coordinates (metres, plate at
//! z = 0, y up); [`crate::scene::sampling`] then turns its surface into emitters.
//!
//! Units (physics.md, "Mesh units"): glTF 2.0 distances are metres (glTF 2.0 specification,
//! sec. 3.4); OBJ, STL and PLY carry no unit and are read as millimetres (common practice for
//! STL). [`MeshFormat::default_unit_mm`] gives the default, [`Placement::unit_mm`] the one used.
//!
//! Facing (physics.md, "Viewing side"): the plate's viewer stands at z < 0 looking towards +z.
//! [`Front`] names the model axis that is its front (+Z in glTF, the axis a 3-D tool's front view
//! looks along) and [`Front::matrix`] turns that axis to plate -z, the model's up to plate +y, so
//! the model faces the viewer right-reading (for +Z: a half turn about y, model +X to plate -x).
//!
//! Conventions shared by all readers:
//! * **Winding**: a triangle `[a, b, c]` faces the side from which `a, b, c` run anticlockwise;
//!   its geometric normal is `(b - a) x (c - a)` normalised.
//! * **Colours** are linear RGB in `[0, 1]` (sRGB-encoded file values are decoded on reading).
//! * **Texture coordinates** follow glTF: `(0, 0)` is the top-left corner of the image, `v`
//!   grows downwards. OBJ `vt` (origin bottom-left) are flipped on reading.
//! * Every mesh has at least one triangle and one material; `tri_material` names one material
//!   per triangle. Vertex attributes, when present, have one entry per position.
//!
//! Every malformed file gives an [`Error::Input`] naming the file and the place inside it (line,
//! byte offset, JSON element); valid files that use something not handled here give
//! [`Error::Unsupported`]. No reader allocates more than a small multiple of the input's size
//! on the word of a count read from a header.

use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::error::{Error, Result};
use crate::scene::text::{input_error, shown, unsupported_error};

pub mod gltf;
pub mod obj;
pub mod ply;
pub mod stl;
mod texture;

pub use texture::{srgb_to_linear, srgb_unit_to_linear, Texture, TextureFilter, TextureWrap};

/// A triangle mesh with optional per-vertex attributes and per-triangle materials.
#[derive(Clone, Debug)]
pub struct Mesh {
    /// Vertex positions: the file's own unit as read, metres in plate coordinates after
    /// [`Mesh::placed`].
    pub positions: Vec<[f64; 3]>,
    /// Triangles as indices into `positions` (anticlockwise seen from the front).
    pub triangles: Vec<[u32; 3]>,
    /// Unit vertex normals, one per position, when the file gives them.
    pub normals: Option<Vec<[f64; 3]>>,
    /// Linear RGB vertex colours, one per position, when the file gives them.
    pub colors: Option<Vec<[f32; 3]>>,
    /// Texture coordinates (glTF convention: origin at the image's top-left), one per position.
    pub uvs: Option<Vec<[f32; 2]>>,
    /// Index into `materials` of each triangle.
    pub tri_material: Vec<u32>,
    /// Materials; never empty.
    pub materials: Vec<Material>,
    /// The file the mesh was read from; names it in error messages.
    pub source: PathBuf,
}

/// Surface colour of a group of triangles.
#[derive(Clone, Debug, PartialEq)]
pub struct Material {
    /// Linear RGBA base colour factor (glTF `baseColorFactor`); multiplies the texture and the
    /// vertex colours.
    pub base_color: [f32; 4],
    /// Base colour texture, sampled at the vertex texture coordinates.
    pub texture: Option<Arc<Texture>>,
    /// Whether both faces of the triangles are surfaces (glTF `doubleSided`). Sampling turns the
    /// normals of double-sided triangles towards the plate.
    pub double_sided: bool,
}

impl Default for Material {
    /// White, untextured, single-sided.
    fn default() -> Self {
        Material {
            base_color: [1.0; 4],
            texture: None,
            double_sided: false,
        }
    }
}

/// Where and how large a mesh is put in front of the plate.
///
/// A file position `p` becomes `(R O p) s u 1e-3 + offset_mm 1e-3` metres: `O` the
/// [`orientation`](Self::orientation) (model axes to plate axes), `R` the
/// [`rotation_deg`](Self::rotation_deg) rotations, `u` the [`unit_mm`](Self::unit_mm) and `s` the
/// [`size`](Self::size) factor.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Placement {
    /// Translation added last, millimetres in plate coordinates.
    pub offset_mm: [f64; 3],
    /// Millimetres per file unit (1000 for glTF's metres, 1 for millimetres).
    pub unit_mm: f64,
    /// Proper rotation from the model's axes to the plate's, applied first (row-major, on
    /// column vectors); [`Front::matrix`] gives the viewer-facing one, the identity keeps the
    /// file's axes as plate axes.
    pub orientation: [[f64; 3]; 3],
    /// Rotations in degrees about the x, y and z axes through the file's origin, applied in
    /// that order (x first), each anticlockwise seen from the positive end of its axis.
    pub rotation_deg: [f64; 3],
    /// Scale of the rotated mesh.
    pub size: PlacementSize,
}

/// The model axis that is a mesh's front: it is turned to face the plate's viewer (plate -z),
/// with the model's up (+Y, or +Z when the front is along Y) turned to plate +y.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Front {
    /// +X
    PlusX,
    /// -X
    MinusX,
    /// +Y (up is +Z)
    PlusY,
    /// -Y (up is +Z; the front of Z-up models)
    MinusY,
    /// +Z (glTF's front, and the default for every format)
    PlusZ,
    /// -Z
    MinusZ,
}

impl Front {
    /// Parses `"+x"`, `"-x"`, `"+y"`, `"-y"`, `"+z"` or `"-z"` (case-insensitive).
    pub fn parse(s: &str) -> Option<Front> {
        Some(match s.trim().to_ascii_lowercase().as_str() {
            "+x" | "x" => Front::PlusX,
            "-x" => Front::MinusX,
            "+y" | "y" => Front::PlusY,
            "-y" => Front::MinusY,
            "+z" | "z" => Front::PlusZ,
            "-z" => Front::MinusZ,
            _ => return None,
        })
    }

    /// The name `parse` reads.
    pub fn name(self) -> &'static str {
        match self {
            Front::PlusX => "+x",
            Front::MinusX => "-x",
            Front::PlusY => "+y",
            Front::MinusY => "-y",
            Front::PlusZ => "+z",
            Front::MinusZ => "-z",
        }
    }

    /// The model's front and up directions, in model axes.
    pub fn front_and_up(self) -> ([f64; 3], [f64; 3]) {
        let (y, z) = ([0.0, 1.0, 0.0], [0.0, 0.0, 1.0]);
        match self {
            Front::PlusX => ([1.0, 0.0, 0.0], y),
            Front::MinusX => ([-1.0, 0.0, 0.0], y),
            Front::PlusY => ([0.0, 1.0, 0.0], z),
            Front::MinusY => ([0.0, -1.0, 0.0], z),
            Front::PlusZ => (z, y),
            Front::MinusZ => ([0.0, 0.0, -1.0], y),
        }
    }

    /// The rotation taking the model's front to plate -z and its up to plate +y. The model's
    /// right as seen from the front, `up x front`, goes to plate -x, which is the viewer's right
    /// (physics.md, "Viewing side"). For `PlusZ`: `diag(-1, 1, -1)`, a half turn about y.
    pub fn matrix(self) -> [[f64; 3]; 3] {
        let (f, u) = self.front_and_up();
        let r = cross(u, f);
        // Rows: plate x = -(r . p), plate y = u . p, plate z = -(f . p).
        [r.map(|v| -v), u, f.map(|v| -v)]
    }
}

/// The identity rotation.
pub const IDENTITY3: [[f64; 3]; 3] = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]];

/// Millimetres per unit for a `units` key: `"m"`, `"mm"`, `"um"` or `"in"`.
pub fn unit_mm(name: &str) -> Option<f64> {
    Some(match name.trim() {
        "m" => 1000.0,
        "mm" => 1.0,
        "um" => 1e-3,
        "in" => 25.4,
        _ => return None,
    })
}

/// How the size of a placed mesh is chosen.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum PlacementSize {
    /// Millimetres per file unit ([`Placement::unit_mm`]) times this factor.
    Scale(f64),
    /// The largest bounding-box extent of the rotated mesh becomes this many millimetres.
    FitMm(f64),
}

impl Default for Placement {
    /// No offset, file axes as plate axes, no rotation, millimetres, scale 1.
    fn default() -> Self {
        Placement {
            offset_mm: [0.0; 3],
            unit_mm: 1.0,
            orientation: IDENTITY3,
            rotation_deg: [0.0; 3],
            size: PlacementSize::Scale(1.0),
        }
    }
}

impl Placement {
    /// Checks that every number is finite and the scale or fitted size is positive; the
    /// message names the offending field.
    pub fn validate(&self) -> std::result::Result<(), String> {
        if self.offset_mm.iter().any(|v| !v.is_finite()) {
            return Err(format!("offset_mm {:?} is not finite", self.offset_mm));
        }
        if !(self.unit_mm.is_finite() && self.unit_mm > 0.0) {
            return Err(format!(
                "unit {} mm must be a positive number",
                self.unit_mm
            ));
        }
        if self.rotation_deg.iter().any(|v| !v.is_finite()) {
            return Err(format!(
                "rotation_deg {:?} is not finite",
                self.rotation_deg
            ));
        }
        match self.size {
            PlacementSize::Scale(s) if !(s.is_finite() && s > 0.0) => {
                Err(format!("scale {s} must be a positive number"))
            }
            PlacementSize::FitMm(s) if !(s.is_finite() && s > 0.0) => {
                Err(format!("fit size {s} mm must be a positive number"))
            }
            _ => Ok(()),
        }
    }

    /// The whole turn `Rz Ry Rx O`: the orientation, then the rotations.
    pub fn turn_matrix(&self) -> [[f64; 3]; 3] {
        mat3_mul(&self.rotation_matrix(), &self.orientation)
    }

    /// The rotation matrix `Rz Ry Rx` (row-major), applied to column vectors.
    pub fn rotation_matrix(&self) -> [[f64; 3]; 3] {
        let [ax, ay, az] = self.rotation_deg.map(f64::to_radians);
        let (sx, cx) = ax.sin_cos();
        let (sy, cy) = ay.sin_cos();
        let (sz, cz) = az.sin_cos();
        let rx = [[1.0, 0.0, 0.0], [0.0, cx, -sx], [0.0, sx, cx]];
        let ry = [[cy, 0.0, sy], [0.0, 1.0, 0.0], [-sy, 0.0, cy]];
        let rz = [[cz, -sz, 0.0], [sz, cz, 0.0], [0.0, 0.0, 1.0]];
        mat3_mul(&rz, &mat3_mul(&ry, &rx))
    }
}

fn mat3_mul(a: &[[f64; 3]; 3], b: &[[f64; 3]; 3]) -> [[f64; 3]; 3] {
    let mut c = [[0.0; 3]; 3];
    for (i, row) in c.iter_mut().enumerate() {
        for (j, v) in row.iter_mut().enumerate() {
            *v = (0..3).map(|k| a[i][k] * b[k][j]).sum();
        }
    }
    c
}

fn mat3_apply(m: &[[f64; 3]; 3], p: [f64; 3]) -> [f64; 3] {
    [0, 1, 2].map(|i| m[i][0] * p[0] + m[i][1] * p[1] + m[i][2] * p[2])
}

impl Mesh {
    /// A mesh of bare triangles with one white single-sided material and no vertex attributes.
    /// `source` names it in error messages.
    pub fn from_triangles(
        positions: Vec<[f64; 3]>,
        triangles: Vec<[u32; 3]>,
        source: impl Into<PathBuf>,
    ) -> Mesh {
        let n = triangles.len();
        Mesh {
            positions,
            triangles,
            normals: None,
            colors: None,
            uvs: None,
            tri_material: vec![0; n],
            materials: vec![Material::default()],
            source: source.into(),
        }
    }

    /// The mesh in plate coordinates, in metres: every position p becomes
    /// `(R O p) s 1e-3 + offset_mm 1e-3`, where `R O` is [`Placement::turn_matrix`] and `s` the
    /// scale: the given factor times [`Placement::unit_mm`] for [`PlacementSize::Scale`], or for
    /// [`PlacementSize::FitMm`] the factor that makes the largest extent of the turned mesh's
    /// bounding box the given size (1 when that extent is zero). Normals are turned.
    /// The placement is not checked: call [`Placement::validate`] first.
    pub fn placed(&self, p: &Placement) -> Mesh {
        let r = p.turn_matrix();
        let rotated: Vec<[f64; 3]> = self.positions.iter().map(|&q| mat3_apply(&r, q)).collect();
        let s = match p.size {
            PlacementSize::Scale(s) => s * p.unit_mm,
            PlacementSize::FitMm(size) => {
                let (lo, hi) = bounds_of(&rotated);
                let extent = (0..3).map(|i| hi[i] - lo[i]).fold(0.0, f64::max);
                if extent > 0.0 && extent.is_finite() {
                    size / extent
                } else {
                    1.0
                }
            }
        };
        let positions = rotated
            .into_iter()
            .map(|q| [0, 1, 2].map(|i| q[i] * s * 1e-3 + p.offset_mm[i] * 1e-3))
            .collect();
        let normals = self
            .normals
            .as_ref()
            .map(|ns| ns.iter().map(|&n| mat3_apply(&r, n)).collect());
        Mesh {
            positions,
            normals,
            ..self.clone()
        }
    }

    /// Axis-aligned bounding box `(min, max)` of the positions; `([inf; 3], [-inf; 3])` when
    /// there are none.
    pub fn bounds(&self) -> ([f64; 3], [f64; 3]) {
        bounds_of(&self.positions)
    }

    /// Total area of the triangles, in the square of the position unit.
    pub fn area(&self) -> f64 {
        self.triangles
            .iter()
            .map(|t| triangle_area(self.corners(t)))
            .sum()
    }

    /// The three corner positions of triangle `t`.
    pub fn corners(&self, t: &[u32; 3]) -> [[f64; 3]; 3] {
        t.map(|i| self.positions[i as usize])
    }

    /// Area-weighted vertex normals computed from the triangles (unit length; zero for a vertex
    /// used only by degenerate triangles or by none).
    pub fn computed_vertex_normals(&self) -> Vec<[f64; 3]> {
        vertex_normals(&self.positions, &self.triangles)
    }

    /// Checks the invariants every reader guarantees (see the module documentation); the
    /// message says which one fails.
    pub fn check(&self) -> std::result::Result<(), String> {
        let n = self.positions.len();
        if self.triangles.is_empty() {
            return Err("the mesh has no triangles".into());
        }
        if n > u32::MAX as usize {
            return Err(format!("{n} vertices, more than 2^32 - 1"));
        }
        if let Some(i) = self.positions.iter().position(|p| !finite3(*p)) {
            return Err(format!("vertex {i} has a non-finite position"));
        }
        if let Some((k, t)) = self
            .triangles
            .iter()
            .enumerate()
            .find(|(_, t)| t.iter().any(|&i| i as usize >= n))
        {
            return Err(format!(
                "triangle {k} uses vertex {} but there are only {n} vertices",
                t.iter().max().copied().unwrap_or(0)
            ));
        }
        let len_ok = |what: &str, len: Option<usize>| match len {
            Some(l) if l != n => Err(format!("{l} {what} for {n} vertices")),
            _ => Ok(()),
        };
        len_ok("normals", self.normals.as_ref().map(Vec::len))?;
        len_ok("colours", self.colors.as_ref().map(Vec::len))?;
        len_ok("texture coordinates", self.uvs.as_ref().map(Vec::len))?;
        if let Some(i) = self.normals.iter().flatten().position(|p| !finite3(*p)) {
            return Err(format!("vertex {i} has a non-finite normal"));
        }
        if let Some(i) = self
            .colors
            .iter()
            .flatten()
            .position(|c| !c.iter().all(|v| v.is_finite()))
        {
            return Err(format!("vertex {i} has a non-finite colour"));
        }
        if self.materials.is_empty() {
            return Err("the mesh has no material".into());
        }
        if self.tri_material.len() != self.triangles.len() {
            return Err(format!(
                "{} material indices for {} triangles",
                self.tri_material.len(),
                self.triangles.len()
            ));
        }
        if let Some(k) = self
            .tri_material
            .iter()
            .position(|&m| m as usize >= self.materials.len())
        {
            return Err(format!("triangle {k} uses a material that does not exist"));
        }
        for (i, m) in self.materials.iter().enumerate() {
            if !m.base_color.iter().all(|v| v.is_finite()) {
                return Err(format!("material {i} has a non-finite base colour"));
            }
            if let Some(t) = &m.texture {
                let expected = t.width as u64 * t.height as u64 * 4;
                if t.width == 0 || t.height == 0 || t.rgba.len() as u64 != expected {
                    return Err(format!(
                        "material {i}: texture size does not match its data"
                    ));
                }
            }
        }
        Ok(())
    }
}

/// File formats [`load_mesh`] reads.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum MeshFormat {
    /// glTF 2.0, binary (`.glb`) or JSON (`.gltf`); told apart by the `glTF` magic.
    Gltf,
    /// Wavefront OBJ.
    Obj,
    /// STL, ASCII or binary.
    Stl,
    /// PLY with a face element.
    Ply,
}

impl MeshFormat {
    /// Millimetres per file unit when the job gives no `units`: 1000 for glTF (metres, glTF 2.0
    /// specification sec. 3.4), 1 for OBJ, STL and PLY (no unit in the format; millimetres,
    /// common practice for STL).
    pub fn default_unit_mm(self) -> f64 {
        match self {
            MeshFormat::Gltf => 1000.0,
            MeshFormat::Obj | MeshFormat::Stl | MeshFormat::Ply => 1.0,
        }
    }

    /// The format belonging to a file extension (case-insensitive, without the dot).
    pub fn from_extension(ext: &str) -> Option<MeshFormat> {
        Some(match ext.to_ascii_lowercase().as_str() {
            "glb" | "gltf" => MeshFormat::Gltf,
            "obj" => MeshFormat::Obj,
            "stl" => MeshFormat::Stl,
            "ply" => MeshFormat::Ply,
            _ => return None,
        })
    }
}

/// Reads a mesh, choosing the format by the extension: `.glb`, `.gltf`, `.obj`, `.stl` or
/// `.ply` (case-insensitive). Positions are in the file's own unit
/// ([`MeshFormat::default_unit_mm`]).
pub fn load_mesh(path: &Path) -> Result<Mesh> {
    use crate::scene::text::{read_checked, Expect};
    let format = mesh_format(path)?;
    let expect = match format {
        MeshFormat::Gltf => Expect::Gltf,
        MeshFormat::Ply => Expect::Ply,
        MeshFormat::Obj => Expect::Text,
        MeshFormat::Stl => Expect::Any,
    };
    let data = read_checked(path, expect)?;
    parse_mesh(&data, format, path)
}

/// Parses a mesh held in memory. `path` names it in error messages, and for glTF its folder
/// is where external buffers and images are looked up.
pub fn parse_mesh(data: &[u8], format: MeshFormat, path: &Path) -> Result<Mesh> {
    let mesh = match format {
        MeshFormat::Gltf => gltf::parse(data, path)?,
        MeshFormat::Obj => obj::parse(data, path)?,
        MeshFormat::Stl => stl::parse(data, path)?,
        MeshFormat::Ply => ply::parse(data, path)?,
    };
    mesh.check().map_err(|m| input_error(path, m))?;
    Ok(mesh)
}

fn mesh_format(path: &Path) -> Result<MeshFormat> {
    let ext = path.extension().map(|e| e.to_string_lossy().into_owned());
    match ext {
        Some(e) => MeshFormat::from_extension(&e).ok_or_else(|| {
            unsupported_error(
                path,
                format!(
                    "mesh extension '.{}' (expected .glb, .gltf, .obj, .stl or .ply)",
                    shown(&e)
                ),
            )
        }),
        None => Err(Error::unsupported(
            path,
            "mesh file has no extension (expected .glb, .gltf, .obj, .stl or .ply)",
        )),
    }
}

// ---------------------------------------------------------------------------------------------
// Helpers shared by the readers and the sampler
// ---------------------------------------------------------------------------------------------

pub(crate) fn bounds_of(points: &[[f64; 3]]) -> ([f64; 3], [f64; 3]) {
    let mut lo = [f64::INFINITY; 3];
    let mut hi = [f64::NEG_INFINITY; 3];
    for p in points {
        for i in 0..3 {
            lo[i] = lo[i].min(p[i]);
            hi[i] = hi[i].max(p[i]);
        }
    }
    (lo, hi)
}

pub(crate) fn finite3(p: [f64; 3]) -> bool {
    p.iter().all(|v| v.is_finite())
}

pub(crate) fn sub(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

pub(crate) fn cross(a: [f64; 3], b: [f64; 3]) -> [f64; 3] {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

pub(crate) fn dot(a: [f64; 3], b: [f64; 3]) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

pub(crate) fn norm(a: [f64; 3]) -> f64 {
    dot(a, a).sqrt()
}

/// `a / |a|`, or `None` when `a` is zero or not finite.
pub(crate) fn normalized(a: [f64; 3]) -> Option<[f64; 3]> {
    let n = norm(a);
    (n > 0.0 && n.is_finite()).then(|| a.map(|v| v / n))
}

/// Area of a triangle given by its corners.
pub fn triangle_area(c: [[f64; 3]; 3]) -> f64 {
    0.5 * norm(cross(sub(c[1], c[0]), sub(c[2], c[0])))
}

pub(crate) fn vertex_normals(positions: &[[f64; 3]], triangles: &[[u32; 3]]) -> Vec<[f64; 3]> {
    let mut acc = vec![[0.0f64; 3]; positions.len()];
    for t in triangles {
        let [a, b, c] = t.map(|i| positions[i as usize]);
        // The unnormalised cross product weighs each face by twice its area.
        let n = cross(sub(b, a), sub(c, a));
        for &i in t {
            for k in 0..3 {
                acc[i as usize][k] += n[k];
            }
        }
    }
    acc.into_iter()
        .map(|n| normalized(n).unwrap_or([0.0; 3]))
        .collect()
}

/// Per-vertex normals where only some vertices have one: `None` when none has, otherwise the
/// given ones (normalised; zero stays zero) with computed normals for the rest.
pub(crate) fn complete_normals(
    positions: &[[f64; 3]],
    triangles: &[[u32; 3]],
    partial: Vec<Option<[f64; 3]>>,
) -> Option<Vec<[f64; 3]>> {
    if partial.iter().all(Option::is_none) {
        return None;
    }
    let computed = if partial.iter().any(Option::is_none) {
        vertex_normals(positions, triangles)
    } else {
        Vec::new()
    };
    Some(
        partial
            .into_iter()
            .enumerate()
            .map(|(i, n)| match n {
                Some(n) => normalized(n).unwrap_or([0.0; 3]),
                None => computed[i],
            })
            .collect(),
    )
}

/// Triangles of a polygon given by its corner indices, as a fan around the first corner.
pub(crate) fn fan(corners: &[u32], out: &mut Vec<[u32; 3]>) {
    for k in 1..corners.len().saturating_sub(1) {
        out.push([corners[0], corners[k], corners[k + 1]]);
    }
}
