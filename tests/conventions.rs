//! Placement conventions of meshes, end to end: units, facing and right-reading replay.
//!
//! * glTF node hierarchies land where the transforms composed here independently put them, in
//!   metres read as millimetres x 1000, turned to face the viewer and offset
//!   (`gltf_nested_nodes_land_in_millimetres`);
//! * the `units` key overrides the format's default unit and refuses unknown names
//!   (`mesh_units_key_overrides_the_format_default`);
//! * a letter-like glyph replays right-reading for the plate's viewer
//!   (`glyph_mesh_replays_right_reading`);
//! * the half turn is visible in the emitters `fringemill sample` writes
//!   (`sample_shows_the_half_turn`).
//!
//! Sources: physics.md "Viewing side" and "Mesh units"; glTF 2.0 specification (sec. 3.4 units,
//! sec. 3.5.2 and 5.25 node transforms); README "Mesh objects" (rotation order).

use std::path::{Path, PathBuf};
use std::process::Command;

use fringemill::job::{build_emitters, JobSpec};
use serde_json::json;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

type V3 = [f64; 3];
type M3 = [[f64; 3]; 3];

// ---------------------------------------------------------------------------------------------
// Small linear algebra, written here independently of the library
// ---------------------------------------------------------------------------------------------

fn sub(a: V3, b: V3) -> V3 {
    [a[0] - b[0], a[1] - b[1], a[2] - b[2]]
}

fn dot(a: V3, b: V3) -> f64 {
    a[0] * b[0] + a[1] * b[1] + a[2] * b[2]
}

fn cross(a: V3, b: V3) -> V3 {
    [
        a[1] * b[2] - a[2] * b[1],
        a[2] * b[0] - a[0] * b[2],
        a[0] * b[1] - a[1] * b[0],
    ]
}

fn m3_apply(m: &M3, p: V3) -> V3 {
    [0, 1, 2].map(|i| dot(m[i], p))
}

/// An affine map x -> m x + t.
#[derive(Clone, Copy)]
struct Affine {
    m: M3,
    t: V3,
}

impl Affine {
    fn apply(&self, p: V3) -> V3 {
        let q = m3_apply(&self.m, p);
        [q[0] + self.t[0], q[1] + self.t[1], q[2] + self.t[2]]
    }

    /// `self` after `other`: x -> self(other(x)), i.e. the 4x4 product self * other.
    fn after(&self, other: &Affine) -> Affine {
        let mut m = [[0.0; 3]; 3];
        for (i, row) in m.iter_mut().enumerate() {
            for (j, v) in row.iter_mut().enumerate() {
                *v = (0..3).map(|k| self.m[i][k] * other.m[k][j]).sum();
            }
        }
        Affine {
            m,
            t: self.apply(other.t),
        }
    }

    fn linear(m: M3) -> Affine {
        Affine { m, t: [0.0; 3] }
    }

    fn translation(t: V3) -> Affine {
        Affine {
            m: [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]],
            t,
        }
    }

    fn scale(s: V3) -> Affine {
        Affine::linear([[s[0], 0.0, 0.0], [0.0, s[1], 0.0], [0.0, 0.0, s[2]]])
    }
}

/// Rotation by `angle` about the unit `axis`, anticlockwise seen from the axis' tip
/// (Rodrigues' formula, common practice): R = I + sin(a) K + (1 - cos(a)) K^2.
fn axis_angle(axis: V3, angle: f64) -> M3 {
    let k = [
        [0.0, -axis[2], axis[1]],
        [axis[2], 0.0, -axis[0]],
        [-axis[1], axis[0], 0.0],
    ];
    let (s, c) = angle.sin_cos();
    let mut r = [[0.0; 3]; 3];
    for i in 0..3 {
        for j in 0..3 {
            let k2: f64 = (0..3).map(|m| k[i][m] * k[m][j]).sum();
            r[i][j] = f64::from(u8::from(i == j)) + s * k[i][j] + (1.0 - c) * k2;
        }
    }
    r
}

/// The glTF quaternion (x, y, z, w) of a rotation by `deg` about `axis`, as the f32 values the
/// file holds (glTF 2.0 specification, sec. 5.25: node.rotation is a unit quaternion, w last).
fn quaternion(axis: V3, deg: f64) -> [f32; 4] {
    let n = dot(axis, axis).sqrt();
    let h = deg.to_radians() / 2.0;
    let s = h.sin() / n;
    [
        (axis[0] * s) as f32,
        (axis[1] * s) as f32,
        (axis[2] * s) as f32,
        h.cos() as f32,
    ]
}

/// The rotation matrix of a stored quaternion, through its axis and angle (not through the
/// usual quadratic-form formula, so that this check does not repeat the reader's arithmetic).
fn quaternion_matrix(q: [f32; 4]) -> M3 {
    let [x, y, z, w] = q.map(f64::from);
    let v = (x * x + y * y + z * z).sqrt();
    let angle = 2.0 * v.atan2(w);
    axis_angle([x / v, y / v, z / v], angle)
}

/// A glTF node's local transform T * R * S (glTF 2.0 specification, sec. 3.5.2 and 5.25), from
/// the f32 values the file holds.
fn trs(t: [f32; 3], q: [f32; 4], s: [f32; 3]) -> Affine {
    Affine::translation(t.map(f64::from))
        .after(&Affine::linear(quaternion_matrix(q)))
        .after(&Affine::scale(s.map(f64::from)))
}

/// The half turn about y that faces a +Z-front model to the viewer (physics.md, "Viewing side"):
/// model (x, y, z) -> plate (-x, y, -z).
const HALF_TURN: M3 = [[-1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, -1.0]];

/// Rotation about plate z, anticlockwise seen from +z (README, "Mesh objects": rotation_deg).
fn rot_z(deg: f64) -> M3 {
    axis_angle([0.0, 0.0, 1.0], deg.to_radians())
}

/// Whether `p` lies on triangle `t`: distance to its plane below `tol` (same unit as the
/// positions) and every barycentric coordinate >= -1e-9.
fn on_triangle(p: V3, t: &[V3; 3], tol: f64) -> bool {
    let (e1, e2, d) = (sub(t[1], t[0]), sub(t[2], t[0]), sub(p, t[0]));
    let n = cross(e1, e2);
    let nn = dot(n, n).sqrt();
    if (dot(d, n) / nn).abs() > tol {
        return false;
    }
    // Barycentric coordinates of the projection of p (common practice).
    let (d11, d12, d22) = (dot(e1, e1), dot(e1, e2), dot(e2, e2));
    let (d1, d2) = (dot(d, e1), dot(d, e2));
    let den = d11 * d22 - d12 * d12;
    let v = (d22 * d1 - d12 * d2) / den;
    let w = (d11 * d2 - d12 * d1) / den;
    let u = 1.0 - v - w;
    u >= -1e-9 && v >= -1e-9 && w >= -1e-9
}

/// Index of the first triangle holding `p`, if any.
fn holder(p: V3, tris: &[[V3; 3]], tol: f64) -> Option<usize> {
    tris.iter().position(|t| on_triangle(p, t, tol))
}

// ---------------------------------------------------------------------------------------------
// Files
// ---------------------------------------------------------------------------------------------

fn b64(data: &[u8]) -> String {
    // RFC 4648 base64, as glTF `data:` URIs carry buffers (glTF 2.0 specification, sec. 3.6.1.1).
    const A: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut s = String::new();
    for c in data.chunks(3) {
        let n = (u32::from(c[0]) << 16)
            | (u32::from(*c.get(1).unwrap_or(&0)) << 8)
            | u32::from(*c.get(2).unwrap_or(&0));
        for k in 0..4 {
            s.push(if k <= c.len() {
                A[(n >> (18 - 6 * k)) as usize & 63] as char
            } else {
                '='
            });
        }
    }
    s
}

/// A `.gltf` (JSON with the buffer embedded as a `data:` URI) holding one mesh of plain
/// triangles (`corners`, three per triangle, f32) used by the node with index `mesh_node` of
/// `nodes`; the scene's roots are `roots`.
fn write_gltf(
    path: &Path,
    corners: &[[f32; 3]],
    mut nodes: serde_json::Value,
    mesh_node: usize,
    roots: &[usize],
) {
    let bin: Vec<u8> = corners
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let lo: Vec<f32> = (0..3)
        .map(|i| corners.iter().map(|c| c[i]).fold(f32::INFINITY, f32::min))
        .collect();
    let hi: Vec<f32> = (0..3)
        .map(|i| {
            corners
                .iter()
                .map(|c| c[i])
                .fold(f32::NEG_INFINITY, f32::max)
        })
        .collect();
    nodes[mesh_node]["mesh"] = json!(0);
    let doc = json!({
        "asset": {"version": "2.0", "generator": "fringemill conventions test"},
        "scene": 0,
        "scenes": [{"nodes": roots}],
        "nodes": nodes,
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0}}]}],
        "buffers": [{"byteLength": bin.len(),
                     "uri": format!("data:application/octet-stream;base64,{}", b64(&bin))}],
        "bufferViews": [{"buffer": 0, "byteLength": bin.len()}],
        "accessors": [{"bufferView": 0, "componentType": 5126, "count": corners.len(),
                       "type": "VEC3", "min": lo, "max": hi}]
    });
    std::fs::write(path, serde_json::to_vec_pretty(&doc).unwrap()).unwrap();
}

/// An OBJ of plain triangles (three corners each).
fn write_obj(path: &Path, corners: &[V3]) {
    let mut t = String::from("# invented test shape\n");
    for c in corners {
        t += &format!("v {} {} {}\n", c[0], c[1], c[2]);
    }
    for k in 0..corners.len() / 3 {
        t += &format!("f {} {} {}\n", 3 * k + 1, 3 * k + 2, 3 * k + 3);
    }
    std::fs::write(path, t).unwrap();
}

/// A small point-sum job over one mesh object with the extra object keys `object`.
fn write_job(dir: &Path, name: &str, mesh: &str, object: &str) -> PathBuf {
    let text = format!(
        "[hologram]\nwidth_px = 64\nheight_px = 64\npitch_um = 2.0\nwavelength_nm = 633\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [0, 0]\n\
         [[object]]\nmesh = \"{mesh}\"\nocclusion = \"none\"\nseed = 3\n{object}\n\
         [synthesis]\nmethod = \"point-sum\"\n\
         [encoding]\nkind = \"binary-phase\"\n[output]\npath = \"{name}.tif\"\n"
    );
    let p = dir.join(format!("{name}.toml"));
    std::fs::write(&p, text).unwrap();
    p
}

fn emitters_of(job: &Path) -> Vec<V3> {
    let spec = JobSpec::load(job).unwrap();
    build_emitters(&spec)
        .unwrap()
        .iter()
        .map(|e| e.pos)
        .collect()
}

fn f32s(v: &[V3]) -> Vec<[f32; 3]> {
    v.iter().map(|p| p.map(|x| x as f32)).collect()
}

fn f64s(v: &[[f32; 3]]) -> Vec<V3> {
    v.iter().map(|p| p.map(f64::from)).collect()
}

/// Triangles (in metres, plate coordinates) of `corners` (file units) under `world`, read at
/// `unit_mm` millimetres per unit, turned by `turn`, then offset by `offset_mm`.
fn placed(corners: &[V3], world: &Affine, unit_mm: f64, turn: &M3, offset_mm: V3) -> Vec<[V3; 3]> {
    let pts: Vec<V3> = corners
        .iter()
        .map(|&c| {
            let mm = world.apply(c).map(|v| v * unit_mm);
            let q = m3_apply(turn, mm);
            [0, 1, 2].map(|i| (q[i] + offset_mm[i]) * 1e-3)
        })
        .collect();
    pts.chunks_exact(3).map(|c| [c[0], c[1], c[2]]).collect()
}

fn all_on(em: &[V3], tris: &[[V3; 3]], tol: f64) -> bool {
    em.iter().all(|&p| holder(p, tris, tol).is_some())
}

fn extent(em: &[V3]) -> f64 {
    (0..3)
        .map(|i| {
            let lo = em.iter().map(|p| p[i]).fold(f64::INFINITY, f64::min);
            let hi = em.iter().map(|p| p[i]).fold(f64::NEG_INFINITY, f64::max);
            hi - lo
        })
        .fold(0.0, f64::max)
}

// ---------------------------------------------------------------------------------------------
// Tests
// ---------------------------------------------------------------------------------------------

#[test]
fn gltf_nested_nodes_land_in_millimetres() {
    // Two triangles a few millimetres across, written in metres (glTF 2.0 specification,
    // sec. 3.4: "The units for all linear distances are meters").
    let model: Vec<V3> = vec![
        [0.002, 0.001, 0.0],
        [0.004, 0.0015, 0.0005],
        [0.0025, 0.0035, -0.001],
        [0.002, 0.001, 0.0],
        [0.0025, 0.0035, -0.001],
        [0.0005, 0.003, 0.0015],
    ];
    let corners = f32s(&model);
    // Parent: translated, 90 degrees about x, non-uniform scale; child: its own TRS.
    let (pt, pq, ps) = (
        [0.003f32, -0.002, 0.004],
        quaternion([1.0, 0.0, 0.0], 90.0),
        [1.5f32, 0.5, 2.0],
    );
    let (ct, cq, cs) = (
        [-0.001f32, 0.002, 0.0005],
        quaternion([0.0, 0.6, 0.8], 40.0),
        [0.8f32, 1.25, 1.0],
    );
    let nodes = json!([
        {"name": "holder", "translation": pt, "rotation": pq, "scale": ps, "children": [1]},
        {"name": "part", "translation": ct, "rotation": cq, "scale": cs}
    ]);
    let dir = tempfile::tempdir().unwrap();
    write_gltf(&dir.path().join("nested.gltf"), &corners, nodes, 1, &[0]);
    let offset = [0.0, 0.0, 20.0];
    let job = write_job(
        dir.path(),
        "nested",
        "nested.gltf",
        "offset_mm = [0, 0, 20]\nrotation_deg = [0, 0, 30]\nemitters = 600",
    );
    let em = emitters_of(&job);
    assert_eq!(em.len(), 600);

    // glTF 2.0 specification, sec. 3.5.2: local = T * R * S, world = parent world * local.
    let (parent, child) = (trs(pt, pq, ps), trs(ct, cq, cs));
    let world = parent.after(&child);
    let file = f64s(&corners);
    // physics.md "Viewing side": half turn first, then the job's rotation (README, "Mesh
    // objects"), then x1000 (metres to mm, glTF 2.0 specification, sec. 3.4) and the offset.
    let turn = |first: &M3| {
        let r = rot_z(30.0);
        let mut m = [[0.0; 3]; 3];
        for i in 0..3 {
            for j in 0..3 {
                m[i][j] = (0..3).map(|k| r[i][k] * first[k][j]).sum();
            }
        }
        m
    };
    let want = placed(&file, &world, 1000.0, &turn(&HALF_TURN), offset);
    assert!(
        want.iter().flatten().all(|p| p[2] > 1e-3),
        "the composed triangles must sit in front of the plate: {want:?}"
    );
    let mut per_tri = [0usize; 2];
    for (k, &p) in em.iter().enumerate() {
        match holder(p, &want, 1e-9) {
            Some(t) => per_tri[t] += 1,
            None => panic!("emitter {k} at {p:?} m is on neither composed triangle {want:?}"),
        }
    }
    // Both triangles are sampled (areas are comparable, so neither gets a tiny share).
    assert!(per_tri.iter().all(|&n| n > 60), "{per_tri:?}");

    // The check can fail: each plausible mistake would put the emitters elsewhere.
    let identity = [[1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]];
    let rotate_then_turn = {
        // Half turn applied after rotation_deg instead of before.
        let r = rot_z(30.0);
        let mut m = [[0.0; 3]; 3];
        for i in 0..3 {
            for j in 0..3 {
                m[i][j] = (0..3).map(|k| HALF_TURN[i][k] * r[k][j]).sum();
            }
        }
        m
    };
    let t_s_r = |t: [f32; 3], q: [f32; 4], s: [f32; 3]| {
        Affine::translation(t.map(f64::from))
            .after(&Affine::scale(s.map(f64::from)))
            .after(&Affine::linear(quaternion_matrix(q)))
    };
    let wrong = [
        (
            "no half turn",
            placed(&file, &world, 1000.0, &turn(&identity), offset),
        ),
        (
            "turn after rotation_deg",
            placed(&file, &world, 1000.0, &rotate_then_turn, offset),
        ),
        (
            "child * parent",
            placed(
                &file,
                &child.after(&parent),
                1000.0,
                &turn(&HALF_TURN),
                offset,
            ),
        ),
        (
            "T * S * R",
            placed(
                &file,
                &t_s_r(pt, pq, ps).after(&t_s_r(ct, cq, cs)),
                1000.0,
                &turn(&HALF_TURN),
                offset,
            ),
        ),
        (
            "millimetres",
            placed(&file, &world, 1.0, &turn(&HALF_TURN), offset),
        ),
    ];
    for (what, tris) in &wrong {
        assert!(
            !all_on(&em, tris, 1e-9),
            "{what} would pass this test as well"
        );
    }
}

#[test]
fn mesh_units_key_overrides_the_format_default() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let tri: Vec<V3> = vec![
        [0.004, 0.001, 0.0],
        [0.006, 0.0015, 0.001],
        [0.0045, 0.003, 0.0005],
    ];
    let corners = f32s(&tri);
    let file = f64s(&corners);
    write_gltf(&d.join("tri.gltf"), &corners, json!([{}]), 0, &[0]);
    write_obj(&d.join("tri.obj"), &tri);
    let offset = [0.0, 0.0, 20.0];
    let object = |units: &str| format!("offset_mm = [0, 0, 20]\nemitters = 300\n{units}");
    let id = Affine::translation([0.0; 3]);
    // (job, mesh, units key, mm per unit expected, source of the expectation)
    let cases = [
        // glTF 2.0 specification, sec. 3.4: metres.
        ("gltf_default", "tri.gltf", "", 1000.0),
        // physics.md "Mesh units": overridable per object.
        ("gltf_mm", "tri.gltf", "units = \"mm\"", 1.0),
        // physics.md "Mesh units": OBJ has no unit, millimetres by default (common practice).
        ("obj_default", "tri.obj", "", 1.0),
        // 1 in = 25.4 mm exactly (international yard and pound agreement, 1959).
        ("obj_in", "tri.obj", "units = \"in\"", 25.4),
    ];
    let mut extents = Vec::new();
    for (name, mesh, units, unit_mm) in cases {
        let em = emitters_of(&write_job(d, name, mesh, &object(units)));
        let src = if mesh.ends_with(".obj") {
            tri.clone()
        } else {
            file.clone()
        };
        let want = placed(&src, &id, unit_mm, &HALF_TURN, offset);
        // Tolerance relative to the triangle's size (it ranges from microns to millimetres).
        let tol = 1e-7 * unit_mm * 1e-3 * 0.002;
        assert!(
            all_on(&em, &want, tol),
            "{name}: emitters off the triangle {want:?}"
        );
        extents.push(extent(&em));
    }
    // The default glTF triangle is 1000 x the same numbers read as millimetres, and the
    // stratified samples span nearly the whole triangle in each case.
    let ratio = |a: usize, b: usize| extents[a] / extents[b];
    assert!(
        (ratio(0, 1) / 1000.0 - 1.0).abs() < 0.1,
        "gltf default / mm: {}",
        ratio(0, 1)
    );
    assert!(
        (ratio(3, 2) / 25.4 - 1.0).abs() < 0.1,
        "obj in / default: {}",
        ratio(3, 2)
    );
    assert!(
        (ratio(1, 2) - 1.0).abs() < 0.1,
        "gltf mm / obj default: {}",
        ratio(1, 2)
    );

    // An unknown unit is refused, by the library and the CLI, on one line naming the key.
    let job = write_job(d, "furlong", "tri.gltf", &object("units = \"furlong\""));
    let e = JobSpec::load(&job)
        .expect_err("units = \"furlong\" must be refused")
        .to_string();
    assert!(
        e.contains("units") && e.contains("furlong") && !e.contains('\n'),
        "{e}"
    );
    let o = Command::new(BIN)
        .args(["plan", job.to_str().unwrap()])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "plan accepted units = \"furlong\"");
    assert_eq!(err.trim().lines().count(), 1, "{err}");
    assert!(err.contains("units") && err.contains("furlong"), "{err}");
}

/// The glyph: a letter "F" in the model's XY plane within [0, 1] x [0, 1] (centred on the
/// origin), front +Z (rectangles wound anticlockwise seen from +Z), the stem on the model's -X
/// side and both bars pointing to +X.
fn glyph() -> Vec<V3> {
    let rects = [
        [0.0, 0.0, 0.2, 1.0],  // stem
        [0.2, 0.8, 1.0, 1.0],  // top bar, to the right edge
        [0.2, 0.45, 0.7, 0.6], // middle bar
    ];
    let mut out = Vec::new();
    for [x0, y0, x1, y1] in rects {
        let c = |x: f64, y: f64| [x - 0.5, y - 0.5, 0.0];
        out.extend([c(x0, y0), c(x1, y0), c(x1, y1)]);
        out.extend([c(x0, y0), c(x1, y1), c(x0, y1)]);
    }
    out
}

#[test]
fn glyph_mesh_replays_right_reading() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let g = glyph();
    // Anticlockwise seen from +Z: every face normal is +Z (module doc of scene::mesh).
    for t in g.chunks_exact(3) {
        assert!(cross(sub(t[1], t[0]), sub(t[2], t[0]))[2] > 0.0);
    }
    write_gltf(&d.join("glyph.gltf"), &f32s(&g), json!([{}]), 0, &[0]);
    let job = d.join("glyph.toml");
    std::fs::write(
        &job,
        "[hologram]\nwidth_px = 512\nheight_px = 512\npitch_um = 2.0\nwavelength_nm = 633\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [0, 0]\n\
         [[object]]\nmesh = \"glyph.gltf\"\nfit_mm = 0.7\noffset_mm = [0, 0, 10]\nemitters = 4000\n\
         seed = 11\nphase = \"random\"\nocclusion = \"none\"\nlight_dir = [0, 0, -1]\n\
         [synthesis]\nmethod = \"point-sum\"\napproximation = \"exact\"\nprecision = \"f32\"\n\
         [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"glyph.tif\"\n",
    )
    .unwrap();
    let run = Command::new(BIN)
        .args(["run", "--quiet", job.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(
        run.status.success(),
        "{}",
        String::from_utf8_lossy(&run.stderr)
    );
    let png = d.join("replay.png");
    let rec = Command::new(BIN)
        .args([
            "reconstruct",
            "--quiet",
            d.join("glyph.tif").to_str().unwrap(),
        ])
        .args(["--distance-mm", "10", "--scale", "linear", "--bits", "16"])
        .args(["--out", png.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(
        rec.status.success(),
        "{}",
        String::from_utf8_lossy(&rec.stderr)
    );
    let (w, h, img) = read_png16(&png);
    let at = |c: usize, r: usize| img[r * w + c];

    // The glyph's bounding box from the row and column sums above the background (median).
    let span = |sums: Vec<f64>| {
        let mut s = sums.clone();
        s.sort_by(f64::total_cmp);
        let bg = s[s.len() / 2];
        let top = s[s.len() - 1] - bg;
        let on: Vec<usize> = (0..sums.len())
            .filter(|&i| sums[i] - bg > 0.1 * top)
            .collect();
        (on[0], on[on.len() - 1])
    };
    let (c0, c1) = span((0..w).map(|c| (0..h).map(|r| at(c, r)).sum()).collect());
    let (r0, r1) = span((0..h).map(|r| (0..w).map(|c| at(c, r)).sum()).collect());
    // The glyph is 0.7 mm at a replay pitch lambda z / (N p) = 6.2 um: about 113 px.
    let (bw, bh) = ((c1 - c0) as f64, (r1 - r0) as f64);
    assert!(
        (90.0..140.0).contains(&bw) && (90.0..140.0).contains(&bh),
        "bbox {c0}..{c1} x {r0}..{r1}"
    );
    // Sum over the part of the box with u (0 left .. 1 right) and v (0 top .. 1 bottom) in range.
    let part = |u: (f64, f64), v: (f64, f64)| -> f64 {
        let mut s = 0.0;
        for r in r0..=r1 {
            let vr = (r - r0) as f64 / bh;
            for c in c0..=c1 {
                let uc = (c - c0) as f64 / bw;
                if uc >= u.0 && uc < u.1 && vr >= v.0 && vr < v.1 {
                    s += at(c, r);
                }
            }
        }
        s
    };
    let total: f64 = img.iter().sum();
    let inside = part((0.0, 1.01), (0.0, 1.01));
    assert!(
        inside > 0.5 * total,
        "only {:.2} of the light in the glyph's box",
        inside / total
    );

    // physics.md "Viewing side": the image is drawn as the viewer sees it, and the mesh faces
    // the viewer right-reading, so the F appears as drawn in the model's front view: stem on the
    // left, bars to the right, top bar at the top.
    // (1) Below the middle bar only the stem is lit: left half bright, right half dark. A
    // mirrored convention anywhere (mesh not turned, so model +X lands at plate +x; or the
    // replay drawing plate +x to the right) puts the stem on the right and the bars on the left,
    // and this ratio becomes < 1/8 instead of > 8; a 180-degree turn also fails it (the top bar
    // then fills the lower-left).
    let (left, right) = (
        part((0.0, 0.5), (0.7, 1.01)),
        part((0.5, 1.01), (0.7, 1.01)),
    );
    assert!(
        left > 8.0 * right,
        "stem band: left {left:.3e}, right {right:.3e}: not right-reading"
    );
    // (2) The rightmost quarter holds only the end of the top bar: lit at the top, dark below
    // (an upside-down image fails this).
    let (top, below) = (
        part((0.8, 1.01), (0.0, 0.3)),
        part((0.8, 1.01), (0.35, 1.01)),
    );
    eprintln!("glyph box {c0}..{c1} x {r0}..{r1}, {:.2} of the light inside; stem band left/right {:.1}, right quarter top/below {:.1}", inside / total, left / right, top / below);
    assert!(
        top > 8.0 * below,
        "right quarter: top {top:.3e}, below {below:.3e}: bars not at the top right"
    );
}

/// A 16-bit grey PNG as (width, height, values in [0, 1]).
fn read_png16(path: &Path) -> (usize, usize, Vec<f64>) {
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(path).unwrap()));
    let mut r = dec.read_info().unwrap();
    let mut buf = vec![0u8; r.output_buffer_size().unwrap()];
    let info = r.next_frame(&mut buf).unwrap();
    assert_eq!(
        (info.color_type, info.bit_depth),
        (png::ColorType::Grayscale, png::BitDepth::Sixteen)
    );
    let (w, h) = (info.width as usize, info.height as usize);
    // PNG samples are big-endian (PNG specification, sec. 7.1).
    let v = buf[..2 * w * h]
        .chunks_exact(2)
        .map(|b| f64::from(u16::from_be_bytes([b[0], b[1]])) / 65535.0)
        .collect();
    (w, h, v)
}

#[test]
fn sample_shows_the_half_turn() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Every vertex at model x in [1, 3] mm, y either side of 0, z in [0, 0.5] mm.
    let mesh: Vec<V3> = vec![
        [1.0, -1.0, 0.0],
        [3.0, -0.5, 0.5],
        [2.0, 1.0, 0.2],
        [1.0, -1.0, 0.0],
        [2.0, 1.0, 0.2],
        [1.2, 0.8, 0.4],
    ];
    write_obj(&d.join("side.obj"), &mesh);
    for (front, x_sign, z_range) in [
        // physics.md "Viewing side": +Z front -> plate (-x, y, -z), then the offset.
        ("", -1.0, (19.5, 20.0)),
        ("front = \"+z\"", -1.0, (19.5, 20.0)),
        // A -Z front already faces the viewer (plate -z): the file's axes are kept.
        ("front = \"-z\"", 1.0, (20.0, 20.5)),
    ] {
        let job = write_job(
            d,
            "side",
            "side.obj",
            &format!("offset_mm = [0, 0, 20]\nemitters = 200\n{front}"),
        );
        let ply = d.join("side.ply");
        let o = Command::new(BIN)
            .args([
                "sample",
                "--quiet",
                job.to_str().unwrap(),
                "--out",
                ply.to_str().unwrap(),
            ])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let text = std::fs::read_to_string(&ply).unwrap();
        let body = text.split("end_header\n").nth(1).expect("PLY header");
        let pts: Vec<V3> = body
            .lines()
            .map(|l| {
                let v: Vec<f64> = l
                    .split_whitespace()
                    .take(3)
                    .map(|t| t.parse().unwrap())
                    .collect();
                [v[0], v[1], v[2]]
            })
            .collect();
        assert_eq!(pts.len(), 200, "{front}");
        for p in &pts {
            // Millimetres (README, `sample`): model x in [1, 3] mm stays 1..3 mm from the axis.
            assert!(
                p[0] * x_sign >= 1.0 - 1e-9 && p[0] * x_sign <= 3.0 + 1e-9,
                "{front}: {p:?}"
            );
            assert!(p[1].abs() <= 1.0 + 1e-9, "{front}: {p:?}");
            assert!(
                p[2] >= z_range.0 - 1e-9 && p[2] <= z_range.1 + 1e-9,
                "{front}: {p:?}"
            );
        }
    }
}
