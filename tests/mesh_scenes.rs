//! Mesh -> emitters: readers (glTF, OBJ, STL, PLY), placement, surface sampling, BVH and
//! visibility. Each check names its source or says "common practice".

#![allow(clippy::needless_range_loop)] // index arithmetic over x, y, z reads best as loops

use std::path::{Path, PathBuf};

use fringemill::scene::bvh::{ray_triangle, visible_from, Bvh};
use fringemill::scene::mesh::{
    load_mesh, parse_mesh, Mesh, MeshFormat, Placement, PlacementSize, TextureFilter,
};
use fringemill::scene::sampling::{
    sample_surface, Density, Pattern, PhaseMode, SamplingOptions, Shading, SplitMix64,
    SurfaceSample,
};
use fringemill::Error;
use serde_json::json;

// ---------------------------------------------------------------------------------------------
// Geometry and file builders
// ---------------------------------------------------------------------------------------------

fn opts(n: usize, pattern: Pattern, seed: u64) -> SamplingOptions {
    SamplingOptions {
        density: Density::Count(n),
        pattern,
        seed,
        shading: Shading {
            light_dir: [0.0, 0.0, -1.0],
            ambient: 1.0,
            smooth_normals: false,
        },
        phase: PhaseMode::Random,
        max_emitters: 10_000_000,
    }
}

fn unit_cube() -> Mesh {
    let p: Vec<[f64; 3]> = (0..8)
        .map(|i| [(i & 1) as f64, ((i >> 1) & 1) as f64, ((i >> 2) & 1) as f64])
        .collect();
    // Outward-facing (anticlockwise seen from outside) quads split in two.
    let quads = [
        [0, 2, 3, 1], // z = 0, normal -z
        [4, 5, 7, 6], // z = 1, normal +z
        [0, 1, 5, 4], // y = 0, normal -y
        [2, 6, 7, 3], // y = 1, normal +y
        [0, 4, 6, 2], // x = 0, normal -x
        [1, 3, 7, 5], // x = 1, normal +x
    ];
    let mut t = Vec::new();
    for q in quads {
        t.push([q[0], q[1], q[2]]);
        t.push([q[0], q[2], q[3]]);
    }
    Mesh::from_triangles(p, t, "unit-cube")
}

/// Regular icosahedron with vertices (0, ±1, ±phi) and cyclic permutations: edge 2.
#[rustfmt::skip]
fn icosahedron() -> Mesh {
    let f = (1.0 + 5f64.sqrt()) / 2.0;
    let p = vec![
        [-1.0, f, 0.0], [1.0, f, 0.0], [-1.0, -f, 0.0], [1.0, -f, 0.0],
        [0.0, -1.0, f], [0.0, 1.0, f], [0.0, -1.0, -f], [0.0, 1.0, -f],
        [f, 0.0, -1.0], [f, 0.0, 1.0], [-f, 0.0, -1.0], [-f, 0.0, 1.0],
    ];
    let t = vec![
        [0, 11, 5], [0, 5, 1], [0, 1, 7], [0, 7, 10], [0, 10, 11],
        [1, 5, 9], [5, 11, 4], [11, 10, 2], [10, 7, 6], [7, 1, 8],
        [3, 9, 4], [3, 4, 2], [3, 2, 6], [3, 6, 8], [3, 8, 9],
        [4, 9, 5], [2, 4, 11], [6, 2, 10], [8, 6, 7], [9, 8, 1],
    ];
    Mesh::from_triangles(p, t, "icosahedron")
}

/// Icosahedron subdivided `levels` times, projected on the unit sphere.
fn icosphere(levels: usize) -> Mesh {
    let ico = icosahedron();
    let mut p: Vec<[f64; 3]> = ico.positions.iter().map(|&v| unit(v)).collect();
    let mut t = ico.triangles;
    for _ in 0..levels {
        let mut mid = std::collections::HashMap::new();
        let mut next = Vec::new();
        for tri in &t {
            let mut m = [0u32; 3];
            for k in 0..3 {
                let (a, b) = (tri[k], tri[(k + 1) % 3]);
                let key = (a.min(b), a.max(b));
                m[k] = *mid.entry(key).or_insert_with(|| {
                    let (pa, pb) = (p[a as usize], p[b as usize]);
                    p.push(unit([0, 1, 2].map(|i| pa[i] + pb[i])));
                    (p.len() - 1) as u32
                });
            }
            next.push([tri[0], m[0], m[2]]);
            next.push([tri[1], m[1], m[0]]);
            next.push([tri[2], m[2], m[1]]);
            next.push(m);
        }
        t = next;
    }
    Mesh::from_triangles(p, t, "icosphere")
}

fn unit(v: [f64; 3]) -> [f64; 3] {
    let n = (v[0] * v[0] + v[1] * v[1] + v[2] * v[2]).sqrt();
    v.map(|x| x / n)
}

fn face_normal(m: &Mesh, t: usize) -> [f64; 3] {
    let [a, b, c] = m.corners(&m.triangles[t]);
    let e1 = [0, 1, 2].map(|i| b[i] - a[i]);
    let e2 = [0, 1, 2].map(|i| c[i] - a[i]);
    unit([
        e1[1] * e2[2] - e1[2] * e2[1],
        e1[2] * e2[0] - e1[0] * e2[2],
        e1[0] * e2[1] - e1[1] * e2[0],
    ])
}

fn b64(data: &[u8]) -> String {
    const A: &[u8; 64] = b"ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789+/";
    let mut s = String::new();
    for c in data.chunks(3) {
        let n = (u32::from(c[0]) << 16)
            | (u32::from(*c.get(1).unwrap_or(&0)) << 8)
            | u32::from(*c.get(2).unwrap_or(&0));
        for k in 0..4 {
            if k <= c.len() {
                s.push(A[(n >> (18 - 6 * k)) as usize & 63] as char);
            } else {
                s.push('=');
            }
        }
    }
    s
}

fn f32_bytes(v: &[[f64; 3]]) -> Vec<u8> {
    v.iter()
        .flatten()
        .flat_map(|&x| (x as f32).to_le_bytes())
        .collect()
}

fn bounds_json(v: &[[f64; 3]]) -> (serde_json::Value, serde_json::Value) {
    let lo: Vec<f64> = (0..3)
        .map(|i| v.iter().map(|p| p[i]).fold(f64::INFINITY, f64::min))
        .collect();
    let hi: Vec<f64> = (0..3)
        .map(|i| v.iter().map(|p| p[i]).fold(f64::NEG_INFINITY, f64::max))
        .collect();
    (json!(lo), json!(hi))
}

/// A GLB container around `doc` and `bin` (chunks padded as the specification asks).
fn glb_bytes(doc: &serde_json::Value, bin: &[u8]) -> Vec<u8> {
    let mut js = serde_json::to_vec(doc).unwrap();
    while !js.len().is_multiple_of(4) {
        js.push(b' ');
    }
    let mut bd = bin.to_vec();
    while !bd.len().is_multiple_of(4) {
        bd.push(0);
    }
    let total = 12 + 8 + js.len() + if bd.is_empty() { 0 } else { 8 + bd.len() };
    let mut out = b"glTF".to_vec();
    out.extend(2u32.to_le_bytes());
    out.extend((total as u32).to_le_bytes());
    out.extend((js.len() as u32).to_le_bytes());
    out.extend(b"JSON");
    out.extend(js);
    if !bd.is_empty() {
        out.extend((bd.len() as u32).to_le_bytes());
        out.extend(b"BIN\0");
        out.extend(bd);
    }
    out
}

/// A GLB of `mesh` (positions f32, u32 indices, one node, default material).
fn mesh_glb(mesh: &Mesh) -> Vec<u8> {
    let mut bin = f32_bytes(&mesh.positions);
    let pos_len = bin.len();
    bin.extend(
        mesh.triangles
            .iter()
            .flatten()
            .flat_map(|i| i.to_le_bytes()),
    );
    let (lo, hi) = bounds_json(&mesh.positions);
    let doc = json!({
        "asset": {"version": "2.0"},
        "scene": 0,
        "scenes": [{"nodes": [0]}],
        "nodes": [{"mesh": 0}],
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0}, "indices": 1}]}],
        "buffers": [{"byteLength": bin.len()}],
        "bufferViews": [
            {"buffer": 0, "byteOffset": 0, "byteLength": pos_len},
            {"buffer": 0, "byteOffset": pos_len, "byteLength": bin.len() - pos_len}
        ],
        "accessors": [
            {"bufferView": 0, "componentType": 5126, "count": mesh.positions.len(), "type": "VEC3", "min": lo, "max": hi},
            {"bufferView": 1, "componentType": 5125, "count": 3 * mesh.triangles.len(), "type": "SCALAR"}
        ]
    });
    glb_bytes(&doc, &bin)
}

fn mesh_obj(mesh: &Mesh) -> Vec<u8> {
    let mut s = String::from("# test geometry\no thing\n");
    for p in &mesh.positions {
        s += &format!("v {:?} {:?} {:?}\n", p[0], p[1], p[2]);
    }
    s += "usemtl none\n";
    // Mix absolute and relative (negative) indices, and a quad where two triangles share an
    // edge in fan order would be ambiguous: keep triangles.
    let n = mesh.positions.len() as i64;
    for (k, t) in mesh.triangles.iter().enumerate() {
        if k % 2 == 0 {
            s += &format!("f {} {} {}\n", t[0] + 1, t[1] + 1, t[2] + 1);
        } else {
            let r = |i: u32| i as i64 - n;
            s += &format!("f {} {} {}\n", r(t[0]), r(t[1]), r(t[2]));
        }
    }
    s.into_bytes()
}

fn mesh_stl_ascii(mesh: &Mesh) -> Vec<u8> {
    let mut s = String::from("solid test\n");
    for t in &mesh.triangles {
        s += "  facet normal 0 0 0\n    outer loop\n";
        for &i in t {
            let p = mesh.positions[i as usize];
            s += &format!("      vertex {:?} {:?} {:?}\n", p[0], p[1], p[2]);
        }
        s += "    endloop\n  endfacet\n";
    }
    s += "endsolid test\n";
    s.into_bytes()
}

fn mesh_stl_binary(mesh: &Mesh, header: &[u8]) -> Vec<u8> {
    let mut out = vec![0u8; 80];
    out[..header.len()].copy_from_slice(header);
    out.extend((mesh.triangles.len() as u32).to_le_bytes());
    for t in &mesh.triangles {
        out.extend([0u8; 12]);
        for &i in t {
            out.extend(f32_bytes(&[mesh.positions[i as usize]]));
        }
        out.extend([0u8; 2]);
    }
    out
}

fn mesh_ply(mesh: &Mesh, binary: bool) -> Vec<u8> {
    let mut out =
        format!(
        "ply\nformat {} 1.0\ncomment test\nelement vertex {}\nproperty float x\nproperty float y\n\
         property float z\nelement face {}\nproperty list uchar int vertex_indices\nend_header\n",
        if binary { "binary_little_endian" } else { "ascii" },
        mesh.positions.len(),
        mesh.triangles.len()
    )
        .into_bytes();
    for p in &mesh.positions {
        if binary {
            out.extend(f32_bytes(&[*p]));
        } else {
            out.extend(format!("{:?} {:?} {:?}\n", p[0] as f32, p[1] as f32, p[2] as f32).bytes());
        }
    }
    for t in &mesh.triangles {
        if binary {
            out.push(3);
            for &i in t {
                out.extend((i as i32).to_le_bytes());
            }
        } else {
            out.extend(format!("3 {} {} {}\n", t[0], t[1], t[2]).bytes());
        }
    }
    out
}

/// Renumbers vertices in order of first use by the triangles (the order STL and OBJ readers
/// produce).
fn first_use_order(mesh: &Mesh) -> Mesh {
    let mut map = vec![u32::MAX; mesh.positions.len()];
    let mut positions = Vec::new();
    let triangles = mesh
        .triangles
        .iter()
        .map(|t| {
            t.map(|i| {
                if map[i as usize] == u32::MAX {
                    map[i as usize] = positions.len() as u32;
                    positions.push(mesh.positions[i as usize]);
                }
                map[i as usize]
            })
        })
        .collect();
    Mesh::from_triangles(positions, triangles, &mesh.source)
}

fn png_rgb(w: u32, h: u32, rgb: &[u8]) -> Vec<u8> {
    let mut buf = Vec::new();
    let mut enc = png::Encoder::new(&mut buf, w, h);
    enc.set_color(png::ColorType::Rgb);
    enc.set_depth(png::BitDepth::Eight);
    enc.write_header().unwrap().write_image_data(rgb).unwrap();
    buf
}

/// A small textured, coloured, indexed square as GLB (texture as given, nearest filter,
/// clamped; u = x and v = 1 - y); base colour factor 0.5; COLOR_0 grey 0.5; normals -z.
fn textured_square_glb(image: &[u8], mime: &str) -> Vec<u8> {
    let pos: Vec<[f64; 3]> = vec![
        [0.0, 0.0, 1.0],
        [0.0, 1.0, 1.0],
        [1.0, 1.0, 1.0],
        [1.0, 0.0, 1.0],
    ];
    let mut bin = f32_bytes(&pos);
    let normals = f32_bytes(&[[0.0, 0.0, -1.0]; 4]);
    let colors = f32_bytes(&[[0.5, 0.5, 0.5]; 4]);
    // u follows x, v = 1 - y (glTF: v grows downwards).
    let uv: Vec<u8> = [[0.0f32, 1.0], [0.0, 0.0], [1.0, 0.0], [1.0, 1.0]]
        .iter()
        .flatten()
        .flat_map(|x| x.to_le_bytes())
        .collect();
    let idx: Vec<u8> = [0u16, 1, 2, 0, 2, 3]
        .iter()
        .flat_map(|i| i.to_le_bytes())
        .collect();
    let mut views = Vec::new();
    for part in [&normals, &colors, &uv, &idx] {
        views.push(json!({"buffer": 0, "byteOffset": bin.len(), "byteLength": part.len()}));
        bin.extend(part.iter());
        while !bin.len().is_multiple_of(4) {
            bin.push(0);
        }
    }
    views.insert(0, json!({"buffer": 0, "byteOffset": 0, "byteLength": 48}));
    let img_off = bin.len();
    bin.extend(image);
    views.push(json!({"buffer": 0, "byteOffset": img_off, "byteLength": image.len()}));
    let doc = json!({
        "asset": {"version": "2.0"},
        "scenes": [{"nodes": [0]}],
        "nodes": [{"mesh": 0}],
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0, "NORMAL": 1, "COLOR_0": 2, "TEXCOORD_0": 3}, "indices": 4, "material": 0}]}],
        "materials": [{"pbrMetallicRoughness": {"baseColorFactor": [0.5, 0.5, 0.5, 1.0], "baseColorTexture": {"index": 0}}}],
        "textures": [{"source": 0, "sampler": 0}],
        "samplers": [{"magFilter": 9728, "wrapS": 33071, "wrapT": 33071}],
        "images": [{"bufferView": 5, "mimeType": mime}],
        "buffers": [{"byteLength": bin.len()}],
        "bufferViews": views,
        "accessors": [
            {"bufferView": 0, "componentType": 5126, "count": 4, "type": "VEC3", "min": [0, 0, 1], "max": [1, 1, 1]},
            {"bufferView": 1, "componentType": 5126, "count": 4, "type": "VEC3"},
            {"bufferView": 2, "componentType": 5126, "count": 4, "type": "VEC3"},
            {"bufferView": 3, "componentType": 5126, "count": 4, "type": "VEC2"},
            {"bufferView": 4, "componentType": 5123, "count": 6, "type": "SCALAR"}
        ]
    });
    glb_bytes(&doc, &bin)
}

fn tmp_dir() -> tempfile::TempDir {
    tempfile::tempdir().unwrap()
}

fn p(name: &str) -> PathBuf {
    PathBuf::from(name)
}

// ---------------------------------------------------------------------------------------------
// Sampling statistics
// ---------------------------------------------------------------------------------------------

/// Twenty disjoint right triangles with areas 1..20 (legs 1 and 2k).
fn unequal_triangles() -> Mesh {
    let mut p = Vec::new();
    let mut t = Vec::new();
    for k in 1..=20u32 {
        let x0 = 10.0 * k as f64;
        let b = p.len() as u32;
        p.push([x0, 0.0, 1.0]);
        p.push([x0 + 1.0, 0.0, 1.0]);
        p.push([x0, 2.0 * k as f64, 1.0]);
        t.push([b, b + 1, b + 2]);
    }
    Mesh::from_triangles(p, t, "unequal")
}

fn pearson(observed: &[usize], expected: &[f64]) -> f64 {
    observed
        .iter()
        .zip(expected)
        .map(|(&o, &e)| (o as f64 - e).powi(2) / e)
        .sum()
}

#[test]
fn counts_per_triangle_follow_area_chi_square() {
    // Pearson's chi-square goodness-of-fit test (Pearson, Philosophical Magazine 50, 1900).
    // 20 cells -> df = 19; the 0.999 quantile of chi-square(19) is 43.82 (standard tables,
    // e.g. Abramowitz and Stegun Table 26.8; from memory).
    const CRIT_DF19: f64 = 43.82;
    let mesh = unequal_triangles();
    let total = mesh.area();
    assert_eq!(total, 210.0);
    let n = 40_000;
    let expected: Vec<f64> = (1..=20).map(|k| n as f64 * k as f64 / total).collect();
    for seed in [1u64, 2, 3] {
        let s = sample_surface(&mesh, &opts(n, Pattern::Random, seed)).unwrap();
        assert_eq!(s.len(), n);
        let mut counts = vec![0usize; 20];
        for x in &s {
            counts[x.triangle as usize] += 1;
        }
        let chi2 = pearson(&counts, &expected);
        assert!(
            chi2 < CRIT_DF19,
            "random pattern, seed {seed}: chi2 {chi2} >= {CRIT_DF19}"
        );
    }
    // Stratified: deterministic rounding with carried remainder keeps every count within one
    // of its expectation, and the total exact.
    let s = sample_surface(&mesh, &opts(n + 7, Pattern::Stratified, 1)).unwrap();
    assert_eq!(s.len(), n + 7);
    let mut counts = [0usize; 20];
    for x in &s {
        counts[x.triangle as usize] += 1;
    }
    for (k, &c) in counts.iter().enumerate() {
        let e = (n + 7) as f64 * (k + 1) as f64 / total;
        assert!((c as f64 - e).abs() < 1.0, "triangle {k}: {c} vs {e}");
    }
}

/// Cell of the 4 x 4 barycentric grid (16 congruent sub-triangles) holding (u, v).
fn grid4_cell(u: f64, v: f64) -> usize {
    let (i, j) = ((4.0 * u).floor().min(3.0), (4.0 * v).floor().min(3.0));
    let inverted = (4.0 * u - i) + (4.0 * v - j) > 1.0;
    // Cells: 10 upright (i + j <= 3) and 6 inverted (i + j <= 2), numbered densely.
    let id = (i as usize) * 4 + j as usize;
    let id = if inverted { 16 + id } else { id };
    let dense = [0usize, 1, 2, 3, 4, 5, 6, 8, 9, 12, 16, 17, 18, 20, 21, 24];
    dense
        .iter()
        .position(|&d| d == id)
        .expect("inside the triangle")
}

#[test]
fn points_are_uniform_inside_a_triangle_chi_square() {
    // Pearson chi-square over the 16 congruent cells of a 4 x 4 barycentric grid: df = 15,
    // 0.999 quantile 37.70; over a 5 x 5 grid of the (u, v) square folded into the triangle
    // (25 equal-area cells, see below): df = 24, 0.999 quantile 51.18 (standard tables; from
    // memory).
    const CRIT_DF15: f64 = 37.70;
    const CRIT_DF24: f64 = 51.18;
    let mesh = Mesh::from_triangles(
        vec![[0.0, 0.0, 1.0], [3.0, 0.5, 1.0], [1.0, 2.0, 1.0]],
        vec![[0, 1, 2]],
        "one",
    );
    // Barycentric (u, v) of a sample from its x, y coordinates.
    let uv = |x: &SurfaceSample| {
        let (px, py) = (x.pos[0], x.pos[1]);
        let det = 3.0 * 2.0 - 1.0 * 0.5;
        let u = (px * 2.0 - py * 1.0) / det;
        let v = (3.0 * py - 0.5 * px) / det;
        assert!(
            u >= -1e-12 && v >= -1e-12 && u + v <= 1.0 + 1e-12,
            "{u} {v}"
        );
        (u.max(0.0), v.max(0.0))
    };
    let n = 16_000;
    for pattern in [Pattern::Random, Pattern::Stratified] {
        let s = sample_surface(&mesh, &opts(n, pattern, 11)).unwrap();
        let mut counts = vec![0usize; 16];
        for x in &s {
            let (u, v) = uv(x);
            counts[grid4_cell(u, v)] += 1;
        }
        let chi2 = pearson(&counts, &[n as f64 / 16.0; 16]);
        assert!(chi2 < CRIT_DF15, "{pattern:?}: chi2 {chi2}");
    }
    // Small counts, many seeds: 16 emitters per run, so stratification works on 16 coarse
    // cells and the fine distribution inside them shows. The 5 x 5 cells are those of the unit
    // (u, v) square, with points beyond the diagonal reflected (u, v) -> (1 - v, 1 - u) — an
    // area-preserving map, so uniform points give equal expected counts.
    for pattern in [Pattern::Random, Pattern::Stratified] {
        let mut counts = vec![0usize; 25];
        let runs = 1000;
        for seed in 0..runs {
            let s = sample_surface(&mesh, &opts(16, pattern, seed)).unwrap();
            let mut per_cell = [0usize; 16];
            for x in &s {
                let (u, v) = uv(x);
                per_cell[grid4_cell(u, v)] += 1;
                // Reflect half of the square onto the other so that the triangle's points
                // cover the whole square uniformly: use the seed's parity.
                let (a, b) = if seed % 2 == 0 {
                    (u, v)
                } else {
                    (1.0 - v, 1.0 - u)
                };
                let (i, j) = (((5.0 * a) as usize).min(4), ((5.0 * b) as usize).min(4));
                counts[i * 5 + j] += 1;
            }
            if pattern == Pattern::Stratified {
                // Documented stratification: 16 emitters fill the 16 sub-triangles once each.
                assert_eq!(per_cell, [1; 16], "seed {seed}");
            }
        }
        // Cells crossing the diagonal get points from both halves; all 25 have area 1/25 of
        // the square, and the two halves are equally likely.
        let chi2 = pearson(&counts, &[(16 * runs) as f64 / 25.0; 25]);
        assert!(chi2 < CRIT_DF24, "{pattern:?} small counts: chi2 {chi2}");
    }
}

#[test]
fn cube_and_icosahedron_area_and_centroid() {
    // Closed-form areas: unit cube 6; icosahedron of edge 2: 20 (sqrt 3 / 4) 2^2 = 20 sqrt 3.
    // The area-weighted mean of the surface of a centrally symmetric solid is its centre
    // (common practice).
    let cube = unit_cube();
    assert_eq!(cube.area(), 6.0);
    let ico = icosahedron();
    let a = ico.area();
    assert!((a - 20.0 * 3f64.sqrt()).abs() < 1e-12 * a, "{a}");
    let shift = [1.0, 2.0, 3.0];
    let mut moved = ico.clone();
    for q in &mut moved.positions {
        for k in 0..3 {
            q[k] += shift[k];
        }
    }
    for (mesh, centre) in [(&cube, [0.5, 0.5, 0.5]), (&moved, shift)] {
        for pattern in [Pattern::Random, Pattern::Stratified] {
            let s = sample_surface(mesh, &opts(20_000, pattern, 5)).unwrap();
            let mut c = [0.0; 3];
            for x in &s {
                for k in 0..3 {
                    c[k] += x.pos[k] / s.len() as f64;
                }
            }
            let err = (0..3)
                .map(|k| (c[k] - centre[k]).powi(2))
                .sum::<f64>()
                .sqrt();
            let norm = centre.iter().map(|v| v * v).sum::<f64>().sqrt();
            assert!(
                err < 0.01 * norm,
                "{} {pattern:?}: centroid {c:?}",
                mesh.source.display()
            );
        }
    }
}

#[test]
fn lambert_intensity_follows_cosine() {
    // Lambert's cosine law (Lambert, Photometria, 1760): the documented model makes the
    // intensity |a|^2 = albedo (ambient + (1 - ambient) max(0, cos)).
    let square = Mesh::from_triangles(
        vec![
            [0.0, 0.0, 0.0],
            [0.0, 1.0, 0.0],
            [1.0, 1.0, 0.0],
            [1.0, 0.0, 0.0],
        ],
        vec![[0, 1, 2], [0, 2, 3]], // normal -z, towards the plate
        "square",
    );
    assert!((face_normal(&square, 0)[2] + 1.0).abs() < 1e-15);
    let ambient = 0.1;
    for deg in [0.0, 15.0, 30.0, 45.0, 60.0, 75.0, 90.0, 120.0, 180.0] {
        let placed = square.placed(&Placement {
            offset_mm: [0.0, 0.0, 10.0],
            rotation_deg: [deg, 0.0, 0.0],
            size: PlacementSize::Scale(1.0),
            ..Placement::default()
        });
        let mut o = opts(200, Pattern::Random, 3);
        o.shading = Shading {
            light_dir: [0.0, 0.0, -5.0],
            ambient,
            smooth_normals: true,
        };
        let s = sample_surface(&placed, &o).unwrap();
        let cos = f64::cos(f64::to_radians(deg));
        let want = ambient + (1.0 - ambient) * cos.max(0.0);
        for x in &s {
            assert!(
                (x.amplitude.powi(2) - want).abs() < 1e-12,
                "{deg} deg: {} vs {want}",
                x.amplitude
            );
        }
    }

    // A sphere with interpolated normals, compared with the exact radial direction at each
    // sample (independent of the reported normal): mean intensity per cosine bin.
    let sphere = icosphere(3);
    let mut o = opts(40_000, Pattern::Stratified, 9);
    let light = unit([0.3, -0.5, -0.8]);
    o.shading = Shading {
        light_dir: light.map(|x| 2.0 * x),
        ambient: 0.0,
        smooth_normals: true,
    };
    let s = sample_surface(&sphere, &o).unwrap();
    let mut sum = [0.0f64; 10];
    let mut cos_sum = [0.0f64; 10];
    let mut cnt = [0usize; 10];
    for x in &s {
        let r = unit(x.pos);
        let c = r[0] * light[0] + r[1] * light[1] + r[2] * light[2];
        if c <= 0.0 {
            continue;
        }
        let b = ((c * 10.0) as usize).min(9);
        sum[b] += x.amplitude.powi(2);
        cos_sum[b] += c;
        cnt[b] += 1;
    }
    for b in 0..10 {
        assert!(cnt[b] > 100, "bin {b}");
        let (mean_i, mean_c) = (sum[b] / cnt[b] as f64, cos_sum[b] / cnt[b] as f64);
        assert!(
            (mean_i - mean_c).abs() < 0.02,
            "bin {b}: intensity {mean_i} vs cos {mean_c}"
        );
    }
}

#[test]
fn same_seed_same_samples_whatever_the_thread_count() {
    // Determinism across schedules (common practice for reproducible runs).
    let mesh = icosphere(2);
    for pattern in [Pattern::Random, Pattern::Stratified] {
        let o = SamplingOptions {
            shading: Shading::default(),
            ..opts(30_000, pattern, 77)
        };
        let run = |threads: usize| {
            rayon::ThreadPoolBuilder::new()
                .num_threads(threads)
                .build()
                .unwrap()
                .install(|| sample_surface(&mesh, &o).unwrap())
        };
        let one = run(1);
        assert_eq!(one, run(3));
        let other_seed = sample_surface(&mesh, &SamplingOptions { seed: 78, ..o }).unwrap();
        assert_ne!(one, other_seed);
    }
}

#[test]
fn too_many_emitters_is_refused_with_a_spacing_hint() {
    let mesh = unit_cube().placed(&Placement::default()); // 1 mm cube: 6e-6 m^2
    let mut o = opts(1, Pattern::Stratified, 0);
    o.density = Density::SpacingM(1e-7);
    o.max_emitters = 1000;
    let e = sample_surface(&mesh, &o).unwrap_err();
    assert!(matches!(e, Error::Job { .. }), "{e}");
    let e = e.to_string();
    assert!(e.contains("spacing") && e.contains("1000"), "{e}");
    // The suggested spacing, sqrt(area / max) = 77.46 um, is accepted.
    o.density = Density::SpacingM(77.5e-6);
    assert!(sample_surface(&mesh, &o).unwrap().len() <= 1000);
    o.shading.ambient = 1.5;
    assert!(sample_surface(&mesh, &o).is_err());
}

// ---------------------------------------------------------------------------------------------
// Placement
// ---------------------------------------------------------------------------------------------

#[test]
fn placement_rotates_x_then_y_then_z_scales_and_offsets() {
    // Rotation order as documented: x first. (0, 1, 0) -Rx(90)-> (0, 0, 1) -Ry(90)-> (1, 0, 0);
    // the other order would give (0, 0, 1). Right-hand rule (common practice).
    let mut m = Mesh::from_triangles(
        vec![[0.0, 1.0, 0.0], [0.0, 0.0, 0.0], [0.0, 0.0, 2.0]],
        vec![[0, 1, 2]],
        "t",
    );
    m.normals = Some(vec![[0.0, 1.0, 0.0]; 3]);
    let placed = m.placed(&Placement {
        offset_mm: [1.0, 2.0, 30.0],
        rotation_deg: [90.0, 90.0, 0.0],
        size: PlacementSize::Scale(2.0),
        ..Placement::default()
    });
    let want = [1e-3 + 2e-3, 2e-3, 30e-3];
    for k in 0..3 {
        assert!(
            (placed.positions[0][k] - want[k]).abs() < 1e-15,
            "{:?}",
            placed.positions[0]
        );
    }
    let n = placed.normals.as_ref().unwrap()[0];
    assert!(
        (n[0] - 1.0).abs() < 1e-12 && n[1].abs() < 1e-12 && n[2].abs() < 1e-12,
        "{n:?}"
    );
    assert!((placed.area() - m.area() * 4e-6).abs() < 1e-18);

    // Fit: the largest extent of the rotated box becomes the size (here z after rotation).
    let fit = m.placed(&Placement {
        offset_mm: [0.0, 0.0, 50.0],
        rotation_deg: [0.0, 0.0, 45.0],
        size: PlacementSize::FitMm(5.0),
        ..Placement::default()
    });
    let (lo, hi) = fit.bounds();
    let ext = (0..3).map(|k| hi[k] - lo[k]).fold(0.0, f64::max);
    assert!((ext - 5e-3).abs() < 1e-15, "{ext}");
    assert!(Placement {
        size: PlacementSize::Scale(0.0),
        ..Placement::default()
    }
    .validate()
    .is_err());
    assert!(Placement {
        offset_mm: [f64::NAN, 0.0, 0.0],
        ..Placement::default()
    }
    .validate()
    .is_err());
}

// ---------------------------------------------------------------------------------------------
// Readers
// ---------------------------------------------------------------------------------------------

/// A tent-like shape with unequal triangles; coordinates exact in f32 and in decimal.
#[rustfmt::skip]
fn tent() -> Mesh {
    let p = vec![
        [0.0, 0.0, 0.0], [4.0, 0.0, 0.0], [4.0, 0.0, 3.0], [0.0, 0.0, 3.0],
        [1.25, 2.5, 1.5], [2.75, 2.5, 1.5], [2.0, -0.5, 1.5],
    ];
    let t = vec![
        [0, 4, 1], [1, 4, 5], [1, 5, 2], [2, 5, 4], [2, 4, 3], [3, 4, 0],
        [0, 1, 6], [1, 2, 6], [2, 3, 6], [3, 0, 6],
    ];
    first_use_order(&Mesh::from_triangles(p, t, "tent"))
}

#[test]
fn same_geometry_in_every_format_gives_identical_samples() {
    // Cross-format round trip: same triangles from five encodings (common practice).
    let mesh = tent();
    let files: Vec<(&str, MeshFormat, Vec<u8>)> = vec![
        ("tent.glb", MeshFormat::Gltf, mesh_glb(&mesh)),
        ("tent.obj", MeshFormat::Obj, mesh_obj(&mesh)),
        ("tent_ascii.stl", MeshFormat::Stl, mesh_stl_ascii(&mesh)),
        (
            "tent_bin.stl",
            MeshFormat::Stl,
            mesh_stl_binary(&mesh, b"solid but binary"),
        ),
        ("tent_ascii.ply", MeshFormat::Ply, mesh_ply(&mesh, false)),
        ("tent_bin.ply", MeshFormat::Ply, mesh_ply(&mesh, true)),
    ];
    let dir = tmp_dir();
    let placement = Placement {
        offset_mm: [0.0, 0.0, 20.0],
        rotation_deg: [10.0, 20.0, 30.0],
        size: PlacementSize::FitMm(8.0),
        ..Placement::default()
    };
    let mut reference: Option<(Vec<SurfaceSample>, Vec<SurfaceSample>)> = None;
    for (name, _format, bytes) in &files {
        let path = dir.path().join(name);
        std::fs::write(&path, bytes).unwrap();
        let m = load_mesh(&path).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(m.positions, mesh.positions, "{name}");
        assert_eq!(m.triangles, mesh.triangles, "{name}");
        let placed = m.placed(&placement);
        let mut o = opts(3000, Pattern::Stratified, 42);
        o.shading = Shading::default();
        let strat = sample_surface(&placed, &o).unwrap();
        o.pattern = Pattern::Random;
        let random = sample_surface(&placed, &o).unwrap();
        match &reference {
            None => reference = Some((strat, random)),
            Some((a, b)) => {
                assert_eq!(&strat, a, "{name}");
                assert_eq!(&random, b, "{name}");
            }
        }
    }
}

#[test]
fn gltf_nested_node_transforms() {
    // glTF 2.0 specification, section 3.5.2-3.5.3 (node hierarchy; TRS composed as T R S,
    // matrices column-major): a triangle under translated, rotated+scaled and matrix nodes.
    let tri: Vec<[f64; 3]> = vec![[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0]];
    let bin = f32_bytes(&tri);
    let h = std::f64::consts::FRAC_1_SQRT_2;
    let doc = |uri: &str| {
        json!({
            "asset": {"version": "2.0"},
            "scene": 1,
            "scenes": [{"nodes": [4]}, {"nodes": [0, 3]}],
            "nodes": [
                {"translation": [10, 0, 0], "children": [1]},
                {"rotation": [0, 0, h, h], "scale": [2, 2, 2], "children": [2]},
                {"matrix": [1,0,0,0, 0,1,0,0, 0,0,1,0, 0,0,5,1], "mesh": 0},
                {"scale": [-1, 1, 1], "translation": [0, 0, 50], "mesh": 0},
                {"translation": [0, 0, 99], "mesh": 0}
            ],
            "meshes": [{"primitives": [{"attributes": {"POSITION": 0}}]}],
            "buffers": [{"byteLength": 36, "uri": uri}],
            "bufferViews": [{"buffer": 0, "byteLength": 36}],
            "accessors": [{"bufferView": 0, "componentType": 5126, "count": 3, "type": "VEC3", "min": [0,0,0], "max": [1,1,0]}]
        })
    };
    let dir = tmp_dir();
    let embedded = dir.path().join("nested.gltf");
    std::fs::write(
        &embedded,
        serde_json::to_vec(&doc(&format!(
            "data:application/octet-stream;base64,{}",
            b64(&bin)
        )))
        .unwrap(),
    )
    .unwrap();
    // The same with the buffer in a file beside it (a space in the name, %-escaped in the URI).
    std::fs::create_dir(dir.path().join("sub")).unwrap();
    let external = dir.path().join("sub").join("nested.gltf");
    std::fs::write(dir.path().join("sub").join("tri data.bin"), &bin).unwrap();
    std::fs::write(
        &external,
        serde_json::to_vec(&doc("tri%20data.bin")).unwrap(),
    )
    .unwrap();
    for path in [&embedded, &external] {
        let m = load_mesh(path).unwrap();
        // Scene 1 holds nodes 0 and 3 only: node 4 (scene 0) is not read.
        assert_eq!(m.triangles.len(), 2, "{}", path.display());
        // Hand-composed: T(10,0,0) Rz(90) S(2) T(0,0,5) applied to the corners.
        let want = [[10.0, 0.0, 10.0], [10.0, 2.0, 10.0], [8.0, 0.0, 10.0]];
        for (k, w) in want.iter().enumerate() {
            let got = m.positions[m.triangles[0][k] as usize];
            for i in 0..3 {
                assert!((got[i] - w[i]).abs() < 1e-6, "corner {k}: {got:?} vs {w:?}");
            }
        }
        // The mirrored instance keeps its front face: winding reversed, normal still +z.
        let n0 = face_normal(&m, 0);
        let n1 = face_normal(&m, 1);
        assert!(
            (n0[2] - 1.0).abs() < 1e-9 && (n1[2] - 1.0).abs() < 1e-9,
            "{n0:?} {n1:?}"
        );
        let mirrored: Vec<[f64; 3]> = m.triangles[1]
            .iter()
            .map(|&i| m.positions[i as usize])
            .collect();
        assert!(mirrored.contains(&[-1.0, 0.0, 50.0]), "{mirrored:?}");
    }
    // A missing external buffer names the file it looked for.
    std::fs::remove_file(dir.path().join("sub").join("tri data.bin")).unwrap();
    let e = load_mesh(&external).unwrap_err().to_string();
    assert!(
        e.contains("tri data.bin") && e.contains("nested.gltf"),
        "{e}"
    );
}

fn square_primitive_glb(mode: u32, order: &[[f64; 3]], indices: Option<&[u16]>) -> Vec<u8> {
    let mut bin = f32_bytes(order);
    let pos_len = bin.len();
    let mut doc = json!({
        "asset": {"version": "2.0"},
        "scenes": [{"nodes": [0]}],
        "nodes": [{"mesh": 0}],
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0}, "mode": mode}]}],
        "bufferViews": [{"buffer": 0, "byteLength": pos_len}],
        "accessors": [{"bufferView": 0, "componentType": 5126, "count": order.len(), "type": "VEC3", "min": [0,0,0], "max": [1,1,0]}]
    });
    if let Some(ix) = indices {
        bin.extend(ix.iter().flat_map(|i| i.to_le_bytes()));
        doc["bufferViews"]
            .as_array_mut()
            .unwrap()
            .push(json!({"buffer": 0, "byteOffset": pos_len, "byteLength": 2 * ix.len()}));
        doc["accessors"].as_array_mut().unwrap().push(
            json!({"bufferView": 1, "componentType": 5123, "count": ix.len(), "type": "SCALAR"}),
        );
        doc["meshes"][0]["primitives"][0]["indices"] = json!(1);
    }
    doc["buffers"] = json!([{"byteLength": bin.len()}]);
    glb_bytes(&doc, &bin)
}

#[test]
fn gltf_strips_fans_and_plain_triangles() {
    // glTF 2.0 specification, section 3.7.2.1 (primitive topologies): strips and fans of the
    // unit square, indexed or not, all give area 1 with the normal +z.
    let (a, b, c, d) = (
        [0.0, 0.0, 0.0],
        [1.0, 0.0, 0.0],
        [0.0, 1.0, 0.0],
        [1.0, 1.0, 0.0],
    );
    let cases: Vec<(&str, Vec<u8>)> = vec![
        ("strip", square_primitive_glb(5, &[a, b, c, d], None)),
        ("fan", square_primitive_glb(6, &[a, b, d, c], None)),
        (
            "triangles",
            square_primitive_glb(4, &[a, b, d, a, d, c], None),
        ),
        (
            "indexed strip",
            square_primitive_glb(5, &[d, c, b, a], Some(&[3, 2, 1, 0])),
        ),
        (
            "indexed triangles",
            square_primitive_glb(4, &[a, b, c, d], Some(&[0, 1, 3, 0, 3, 2])),
        ),
    ];
    for (name, bytes) in cases {
        let m = parse_mesh(&bytes, MeshFormat::Gltf, &p("sq.glb"))
            .unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(m.triangles.len(), 2, "{name}");
        assert!((m.area() - 1.0).abs() < 1e-12, "{name}: area {}", m.area());
        for t in 0..2 {
            assert!(
                (face_normal(&m, t)[2] - 1.0).abs() < 1e-12,
                "{name} triangle {t}"
            );
        }
    }
    // Lines and points are skipped; a scene with nothing else has no triangles.
    let lines = square_primitive_glb(1, &[a, b, c, d], None);
    assert!(parse_mesh(&lines, MeshFormat::Gltf, &p("l.glb")).is_err());
}

#[test]
fn gltf_required_extensions() {
    // glTF 2.0 specification, section 3.12: a loader must refuse files whose
    // extensionsRequired it does not implement.
    let base = mesh_glb(&tent());
    let json_len = u32::from_le_bytes(base[12..16].try_into().unwrap()) as usize;
    let mut doc: serde_json::Value = serde_json::from_slice(&base[20..20 + json_len]).unwrap();
    let bin = &base[20 + json_len + 8..];
    for ext in ["KHR_draco_mesh_compression", "EXT_meshopt_compression"] {
        doc["extensionsUsed"] = json!([ext]);
        doc["extensionsRequired"] = json!([ext]);
        let e = parse_mesh(&glb_bytes(&doc, bin), MeshFormat::Gltf, &p("c.glb")).unwrap_err();
        assert!(matches!(e, Error::Unsupported { .. }), "{e}");
        assert!(e.to_string().contains(ext), "{e}");
    }
    // Only used (not required): read normally.
    doc["extensionsRequired"] = json!([]);
    assert!(parse_mesh(&glb_bytes(&doc, bin), MeshFormat::Gltf, &p("c.glb")).is_ok());

    // KHR_mesh_quantization (required) with normalized i16 positions: read, dequantized.
    let q: Vec<u8> = [[0i16, 0, 0, 0], [32767, 0, 0, 0], [0, 32767, 0, 0]]
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let qdoc = json!({
        "asset": {"version": "2.0"},
        "extensionsUsed": ["KHR_mesh_quantization"],
        "extensionsRequired": ["KHR_mesh_quantization"],
        "scenes": [{"nodes": [0]}],
        "nodes": [{"mesh": 0, "scale": [4, 4, 4]}],
        "meshes": [{"primitives": [{"attributes": {"POSITION": 0}}]}],
        "buffers": [{"byteLength": 24}],
        "bufferViews": [{"buffer": 0, "byteLength": 24, "byteStride": 8}],
        "accessors": [{"bufferView": 0, "componentType": 5122, "normalized": true, "count": 3, "type": "VEC3", "min": [0,0,0], "max": [1,1,0]}]
    });
    let m = parse_mesh(&glb_bytes(&qdoc, &q), MeshFormat::Gltf, &p("q.glb")).unwrap();
    assert_eq!(
        m.positions,
        vec![[0.0, 0.0, 0.0], [4.0, 0.0, 0.0], [0.0, 4.0, 0.0]]
    );
}

#[test]
fn gltf_texture_factor_and_vertex_colours_set_the_albedo() {
    // glTF 2.0 specification, section 3.9.2: base colour = factor x texture (sRGB decoded) x
    // COLOR_0; section 3.8.4.4: texture coordinate (0, 0) is the first pixel of the image (its
    // top-left). Texture 2 x 2: top row black, white; bottom row white, black. Factor 0.5,
    // vertex colour 0.5; with ambient 1 the intensity is the albedo, 0 or 0.25.
    let png = png_rgb(2, 2, &[0, 0, 0, 255, 255, 255, 255, 255, 255, 0, 0, 0]);
    let m = parse_mesh(
        &textured_square_glb(&png, "image/png"),
        MeshFormat::Gltf,
        &p("t.glb"),
    )
    .unwrap();
    let tex = m.materials[0].texture.as_ref().expect("texture");
    assert_eq!(
        (tex.width, tex.height, tex.filter),
        (2, 2, TextureFilter::Nearest)
    );
    let s = sample_surface(&m, &opts(4000, Pattern::Stratified, 1)).unwrap();
    let (mut dark, mut bright) = (0, 0);
    for x in &s {
        let (px, py) = (x.pos[0], x.pos[1]);
        if (px - 0.5).abs() < 0.01 || (py - 0.5).abs() < 0.01 {
            continue;
        }
        // y > 0.5 is v < 0.5: the image's top row.
        if (px < 0.5) == (py > 0.5) {
            assert_eq!(x.amplitude, 0.0, "{:?}", x.pos);
            dark += 1;
        } else {
            assert!(
                (x.amplitude - 0.5).abs() < 1e-6,
                "{:?} {}",
                x.pos,
                x.amplitude
            );
            bright += 1;
        }
        // The file's normals face the plate (-z).
        assert!((x.normal[2] + 1.0).abs() < 1e-12);
    }
    assert!(dark > 1800 && bright > 1800, "{dark} {bright}");

    // A uniform mid-grey JPEG (sRGB 188 -> linear 0.5029): intensity 0.25 x 0.5029 within
    // JPEG rounding.
    let mut jpeg = Vec::new();
    image::codecs::jpeg::JpegEncoder::new_with_quality(&mut jpeg, 95)
        .encode(&[188u8; 8 * 8 * 3], 8, 8, image::ExtendedColorType::Rgb8)
        .unwrap();
    let m = parse_mesh(
        &textured_square_glb(&jpeg, "image/jpeg"),
        MeshFormat::Gltf,
        &p("j.glb"),
    )
    .unwrap();
    let s = sample_surface(&m, &opts(200, Pattern::Random, 1)).unwrap();
    for x in &s {
        let i = x.amplitude.powi(2);
        assert!((i - 0.25 * 0.5029).abs() < 0.01, "{i}");
    }
}

#[test]
fn gltf_external_buffer_and_image_files() {
    // glTF 2.0 specification, section 3.6.1.1 and 3.8.4.4: relative URIs resolve against the
    // glTF file's location. The square of the texture test, with its buffer and its image as
    // files beside a .gltf; a URI naming a folder is an error, not a hang.
    let png = png_rgb(2, 2, &[0, 0, 0, 255, 255, 255, 255, 255, 255, 0, 0, 0]);
    let glb = textured_square_glb(&png, "image/png");
    let json_len = u32::from_le_bytes(glb[12..16].try_into().unwrap()) as usize;
    let mut doc: serde_json::Value = serde_json::from_slice(&glb[20..20 + json_len]).unwrap();
    let bin = glb[20 + json_len + 8..].to_vec();
    let dir = tmp_dir();
    std::fs::write(dir.path().join("square.bin"), &bin).unwrap();
    std::fs::write(dir.path().join("paper.png"), &png).unwrap();
    doc["buffers"][0]["uri"] = json!("square.bin");
    doc["images"][0] = json!({"uri": "paper.png"});
    let path = dir.path().join("square.gltf");
    std::fs::write(&path, serde_json::to_vec(&doc).unwrap()).unwrap();
    let from_files = load_mesh(&path).unwrap();
    let from_glb = parse_mesh(&glb, MeshFormat::Gltf, &p("t.glb")).unwrap();
    assert_eq!(from_files.materials, from_glb.materials);
    assert_eq!(from_files.positions, from_glb.positions);
    assert_eq!(from_files.uvs, from_glb.uvs);

    doc["images"][0] = json!({"uri": "."});
    std::fs::write(&path, serde_json::to_vec(&doc).unwrap()).unwrap();
    let e = load_mesh(&path).unwrap_err().to_string();
    assert!(
        e.contains("images[0]") && e.contains("not a regular file"),
        "{e}"
    );
    doc["images"][0] = json!({"uri": "https://example.invalid/paper.png"});
    std::fs::write(&path, serde_json::to_vec(&doc).unwrap()).unwrap();
    assert!(matches!(load_mesh(&path), Err(Error::Unsupported { .. })));
}

#[test]
fn obj_polygons_negative_indices_and_attributes() {
    // Wavefront OBJ format (Wavefront Technologies, Advanced Visualizer manual, appendix B):
    // 1-based indices, negative ones relative to the latest vertex; polygons fan-triangulated.
    let text = "v 0 0 0\nv 2 0 0\nv 2 2 0\nv 0 2 0 # a square\nvt 0 0\nvt 1 1\nvn 0 0 -1\n\
                f 1/1/1 2/2/1 3/2/1 -1/1/1\ng other\nv 0 0 5 1 0 0\nf -1 1 2\n";
    let m = parse_mesh(text.as_bytes(), MeshFormat::Obj, &p("q.obj")).unwrap();
    assert_eq!(m.triangles.len(), 3);
    assert!((m.area() - (4.0 + 5.0)).abs() < 1e-12);
    let uvs = m.uvs.as_ref().unwrap();
    assert_eq!(uvs[0], [0.0, 1.0]); // vt 0 0 flipped to the glTF convention
    let normals = m.normals.as_ref().unwrap();
    assert_eq!(normals[0], [0.0, 0.0, -1.0]);
    let colors = m.colors.as_ref().unwrap();
    assert_eq!(colors[4], [1.0, 0.0, 0.0]); // the 'v 0 0 5 1 0 0' vertex
    assert_eq!(colors[5], [1.0, 1.0, 1.0]);
    for bad in [
        "v 0 0 0\nf 1 2 3\n",
        "v 0 0 0\nv 1 0 0\nf 1 2\n",
        "v 0 0\n",
        "f 0 1 2\n",
        "v 0 0 nan\n",
    ] {
        let e = parse_mesh(bad.as_bytes(), MeshFormat::Obj, &p("bad.obj"))
            .unwrap_err()
            .to_string();
        assert!(e.starts_with("bad.obj: ") && !e.contains('\n'), "{e}");
    }
}

#[test]
fn stl_binary_is_detected_by_size_not_by_prefix() {
    // STL format (3D Systems, StereoLithography Interface Specification, 1988): binary files
    // are 84 + 50 n bytes; many exporters start their 80-byte header with "solid" anyway.
    let mesh = tent();
    let bin = mesh_stl_binary(&mesh, b"solid exported by a program");
    let m = parse_mesh(&bin, MeshFormat::Stl, &p("b.stl")).unwrap();
    assert_eq!(m.triangles, mesh.triangles);
    let ascii = mesh_stl_ascii(&mesh);
    let m = parse_mesh(&ascii, MeshFormat::Stl, &p("a.stl")).unwrap();
    assert_eq!(m.positions, mesh.positions);
    // A binary file one byte short is neither.
    let e = parse_mesh(&bin[..bin.len() - 1], MeshFormat::Stl, &p("b.stl"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("b.stl"), "{e}");
}

#[test]
fn ply_mesh_with_normals_colours_and_polygons() {
    // PLY format (Turk, "The PLY polygon file format", 1994).
    let text = "ply\nformat ascii 1.0\nelement vertex 4\nproperty float x\nproperty float y\n\
                property float z\nproperty float nx\nproperty float ny\nproperty float nz\n\
                property uchar red\nproperty uchar green\nproperty uchar blue\n\
                element face 1\nproperty list uchar uint vertex_indices\nend_header\n\
                0 0 0 0 0 -1 255 255 255\n1 0 0 0 0 -1 255 0 0\n1 1 0 0 0 -1 0 0 0\n0 1 0 0 0 -2 0 0 255\n\
                4 0 1 2 3\n";
    let m = parse_mesh(text.as_bytes(), MeshFormat::Ply, &p("q.ply")).unwrap();
    assert_eq!(m.triangles, vec![[0, 1, 2], [0, 2, 3]]);
    assert_eq!(m.normals.as_ref().unwrap()[3], [0.0, 0.0, -1.0]);
    assert_eq!(m.colors.as_ref().unwrap()[1], [1.0, 0.0, 0.0]);
    let bad_index = text.replace("4 0 1 2 3", "4 0 1 2 4");
    let e = parse_mesh(bad_index.as_bytes(), MeshFormat::Ply, &p("q.ply"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("vertex index 4"), "{e}");
}

#[test]
fn header_counts_cannot_force_large_allocations() {
    // Robustness against lying headers (common practice).
    let ply = b"ply\nformat binary_little_endian 1.0\nelement vertex 4000000000\nproperty float x\n\
                property float y\nproperty float z\nelement face 1\nproperty list uchar int vertex_indices\nend_header\n\0\0\0\0";
    let e = parse_mesh(ply, MeshFormat::Ply, &p("big.ply"))
        .unwrap_err()
        .to_string();
    assert!(e.contains("4000000000"), "{e}");
    let mut stl = vec![0u8; 84 + 50];
    stl[80..84].copy_from_slice(&u32::MAX.to_le_bytes());
    assert!(parse_mesh(&stl, MeshFormat::Stl, &p("big.stl")).is_err());
    // glTF accessors: huge count over a small view, and huge count without a view.
    for acc in [
        json!({"bufferView": 0, "componentType": 5126, "count": 4_000_000_000u64, "type": "VEC3", "min": [0,0,0], "max": [1,1,1]}),
        json!({"componentType": 5126, "count": 4_000_000_000u64, "type": "VEC3", "min": [0,0,0], "max": [1,1,1]}),
    ] {
        let doc = json!({
            "asset": {"version": "2.0"},
            "scenes": [{"nodes": [0]}], "nodes": [{"mesh": 0}],
            "meshes": [{"primitives": [{"attributes": {"POSITION": 0}}]}],
            "buffers": [{"byteLength": 36}],
            "bufferViews": [{"buffer": 0, "byteLength": 36}],
            "accessors": [acc]
        });
        let e = parse_mesh(
            &glb_bytes(&doc, &[0u8; 36]),
            MeshFormat::Gltf,
            &p("big.glb"),
        )
        .unwrap_err();
        assert!(e.to_string().contains("accessors[0]"), "{e}");
    }
}

// ---------------------------------------------------------------------------------------------
// Corrupted files: errors, never panics or hangs
// ---------------------------------------------------------------------------------------------

fn assert_error_names_file(r: Result<Mesh, Error>, name: &str, what: &str) {
    match r {
        Ok(_) => panic!("{what}: accepted"),
        Err(e) => {
            let s = e.to_string();
            assert!(s.contains(name) && !s.contains('\n'), "{what}: {s}");
        }
    }
}

/// Every strict prefix must fail; `patch_glb_length` rewrites the GLB header's length so that
/// parsing goes past the first check.
fn cuts_must_fail(
    bytes: &[u8],
    format: MeshFormat,
    name: &str,
    step: usize,
    patch_glb_length: bool,
) {
    for cut in (0..bytes.len()).step_by(step) {
        let mut b = bytes[..cut].to_vec();
        if patch_glb_length && b.len() >= 12 {
            let n = b.len() as u32;
            b[8..12].copy_from_slice(&n.to_le_bytes());
        }
        assert_error_names_file(
            parse_mesh(&b, format, &p(name)),
            name,
            &format!("cut at {cut}"),
        );
    }
}

/// Flipped bytes may give a valid file or an error, never a panic; valid results keep the
/// mesh invariants (checked by `parse_mesh`).
fn flips_must_not_panic(bytes: &[u8], format: MeshFormat, name: &str, step: usize, seed: u64) {
    let mut b = bytes.to_vec();
    for k in (0..bytes.len()).step_by(step) {
        for mask in [0xFF, 0x01, 0x80] {
            b[k] ^= mask;
            if let Err(e) = parse_mesh(&b, format, &p(name)) {
                let s = e.to_string();
                assert!(s.contains(name) && !s.contains('\n'), "flip at {k}: {s}");
            }
            b[k] ^= mask;
        }
    }
    // Random multi-byte damage.
    let mut rng = SplitMix64::new(seed);
    for _ in 0..300 {
        let mut d = bytes.to_vec();
        for _ in 0..4 {
            let k = (rng.next_u64() % d.len() as u64) as usize;
            d[k] = rng.next_u64() as u8;
        }
        let _ = parse_mesh(&d, format, &p(name));
    }
}

#[test]
fn corrupted_glb_gives_errors_never_panics() {
    let png = png_rgb(2, 2, &[0, 0, 0, 255, 255, 255, 255, 255, 255, 0, 0, 0]);
    let small = textured_square_glb(&png, "image/png");
    assert!(parse_mesh(&small, MeshFormat::Gltf, &p("s.glb")).is_ok());
    cuts_must_fail(&small, MeshFormat::Gltf, "s.glb", 1, false);
    cuts_must_fail(&small, MeshFormat::Gltf, "s.glb", 1, true);
    flips_must_not_panic(&small, MeshFormat::Gltf, "s.glb", 1, 1);

    let lantern =
        std::fs::read(Path::new(env!("CARGO_MANIFEST_DIR")).join("samples/lantern.glb")).unwrap();
    cuts_must_fail(&lantern, MeshFormat::Gltf, "lantern.glb", 61, true);
    flips_must_not_panic(&lantern, MeshFormat::Gltf, "lantern.glb", 397, 2);

    // The same document as .gltf text with an embedded buffer.
    let json_len = u32::from_le_bytes(small[12..16].try_into().unwrap()) as usize;
    let mut doc: serde_json::Value = serde_json::from_slice(&small[20..20 + json_len]).unwrap();
    let bin = &small[20 + json_len + 8..];
    doc["buffers"][0]["uri"] = json!(format!("data:application/octet-stream;base64,{}", b64(bin)));
    let text = serde_json::to_vec(&doc).unwrap();
    assert!(parse_mesh(&text, MeshFormat::Gltf, &p("s.gltf")).is_ok());
    cuts_must_fail(&text, MeshFormat::Gltf, "s.gltf", 3, false);
    flips_must_not_panic(&text, MeshFormat::Gltf, "s.gltf", 7, 3);
}

#[test]
fn corrupted_stl_obj_ply_give_errors_never_panics() {
    let mesh = tent();
    let stl_bin = mesh_stl_binary(&mesh, b"test");
    cuts_must_fail(&stl_bin, MeshFormat::Stl, "t.stl", 1, false);
    flips_must_not_panic(&stl_bin, MeshFormat::Stl, "t.stl", 1, 4);
    let stl_ascii = mesh_stl_ascii(&mesh);
    // Cuts before the end of the final 'endsolid' keyword fail (a cut inside the solid's
    // trailing name cannot be noticed).
    let end = stl_ascii
        .windows(8)
        .rposition(|w| w == b"endsolid")
        .unwrap()
        + 8;
    cuts_must_fail(&stl_ascii[..end], MeshFormat::Stl, "t.stl", 1, false);
    flips_must_not_panic(&stl_ascii, MeshFormat::Stl, "t.stl", 1, 5);

    for binary in [false, true] {
        let ply = mesh_ply(&mesh, binary);
        cuts_must_fail(&ply, MeshFormat::Ply, "t.ply", 1, false);
        flips_must_not_panic(&ply, MeshFormat::Ply, "t.ply", 1, 6);
    }

    // OBJ has no terminator: a cut at a line end is a valid smaller file. Cuts must never
    // panic, and accepted prefixes are valid meshes; a cut inside a face line fails.
    let obj = mesh_obj(&mesh);
    for cut in 0..obj.len() {
        let _ = parse_mesh(&obj[..cut], MeshFormat::Obj, &p("t.obj"));
    }
    let last_f = obj.windows(2).rposition(|w| w == b"f ").unwrap();
    assert_error_names_file(
        parse_mesh(&obj[..last_f + 4], MeshFormat::Obj, &p("t.obj")),
        "t.obj",
        "cut face",
    );
    flips_must_not_panic(&obj, MeshFormat::Obj, "t.obj", 1, 7);
}

// ---------------------------------------------------------------------------------------------
// BVH and visibility
// ---------------------------------------------------------------------------------------------

fn brute_first_hit(m: &Mesh, o: [f64; 3], d: [f64; 3], t_max: f64) -> Option<(f64, u32)> {
    let mut best: Option<(f64, u32)> = None;
    for (k, t) in m.triangles.iter().enumerate() {
        let [a, b, c] = m.corners(t);
        if let Some((t, _, _)) = ray_triangle(o, d, a, b, c) {
            if t > 0.0 && t < t_max && best.is_none_or(|(bt, _)| t < bt) {
                best = Some((t, k as u32));
            }
        }
    }
    best
}

#[test]
fn bvh_agrees_with_brute_force_moller_trumbore() {
    // The BVH only prunes; its answers must equal testing every triangle with Möller–Trumbore
    // (Möller and Trumbore, Journal of Graphics Tools 2(1), 1997) — common practice for
    // acceleration structures.
    let mut rng = SplitMix64::new(2024);
    let mut r = move || rng.next_f64();
    let mut positions = Vec::new();
    let mut triangles = Vec::new();
    for k in 0..3000u32 {
        let c = [r(), r(), r()];
        let size = 0.02 + 0.2 * r() * r();
        for _ in 0..3 {
            positions.push([0, 1, 2].map(|i| c[i] + size * (r() - 0.5)));
        }
        triangles.push([3 * k, 3 * k + 1, 3 * k + 2]);
    }
    let soup = Mesh::from_triangles(positions, triangles, "soup");
    let bvh = Bvh::build(&soup);
    assert_eq!(bvh.len(), 3000);
    let (mut hits, mut blocked) = (0, 0);
    for i in 0..6000 {
        let o = [r() * 1.4 - 0.2, r() * 1.4 - 0.2, r() * 1.4 - 0.2];
        let d = [r() - 0.5, r() - 0.5, r() - 0.5];
        let t_max = if i % 3 == 0 {
            f64::INFINITY
        } else {
            0.5 + 2.0 * r()
        };
        let fast = bvh.first_hit(o, d, t_max);
        let slow = brute_first_hit(&soup, o, d, t_max);
        match (fast, slow) {
            (None, None) => {}
            (Some((tf, kf)), Some((ts, ks))) => {
                hits += 1;
                assert_eq!(tf, ts, "ray {i}");
                if kf != ks {
                    // A tie: the other triangle must give the same t.
                    let [a, b, c] = soup.corners(&soup.triangles[kf as usize]);
                    assert_eq!(
                        ray_triangle(o, d, a, b, c).map(|h| h.0),
                        Some(ts),
                        "ray {i}"
                    );
                }
            }
            other => panic!("ray {i}: {other:?}"),
        }
        // Segments, ignoring one triangle.
        let to = [r(), r(), r()];
        let ignore = (i % 2 == 0).then(|| (r() * 3000.0) as u32);
        let fast = bvh.occluded(o, to, ignore);
        let dir = [0, 1, 2].map(|k| to[k] - o[k]);
        let slow = soup.triangles.iter().enumerate().any(|(k, t)| {
            let [a, b, c] = soup.corners(t);
            Some(k as u32) != ignore
                && ray_triangle(o, dir, a, b, c).is_some_and(|(t, _, _)| t > 1e-6 && t < 1.0 - 1e-6)
        });
        // The BVH uses a much smaller end tolerance; disagreements could only come from hits
        // within 1e-6 of an end, which random segments do not produce.
        assert_eq!(fast, slow, "segment {i}");
        blocked += usize::from(fast);
    }
    assert!(
        hits > 1000 && blocked > 1000,
        "{hits} hits, {blocked} blocked"
    );
}

fn square_at(z: f64, half: f64) -> (Vec<[f64; 3]>, Vec<[u32; 3]>) {
    (
        vec![
            [-half, -half, z],
            [-half, half, z],
            [half, half, z],
            [half, -half, z],
        ],
        vec![[0, 1, 2], [0, 2, 3]],
    )
}

#[test]
fn small_square_behind_a_larger_one_is_hidden_from_the_centre() {
    // Line-of-sight occlusion (common practice): a 2 mm square 20 mm from the plate behind a
    // 10 mm square at 10 mm is invisible from the plate centre, visible from 50 mm aside.
    let (mut p, mut t) = square_at(0.010, 0.005);
    let (p2, t2) = square_at(0.020, 0.001);
    t.extend(t2.iter().map(|tri| tri.map(|i| i + 4)));
    p.extend(p2);
    let mesh = Mesh::from_triangles(p, t, "squares");
    let bvh = Bvh::build(&mesh);
    let s = sample_surface(&mesh, &opts(4000, Pattern::Stratified, 3)).unwrap();
    let small = |x: &SurfaceSample| x.triangle >= 2;
    assert!(s.iter().filter(|x| small(x)).count() > 50);
    let vis = visible_from(&s, &bvh, [0.0, 0.0, 0.0]);
    for (x, v) in s.iter().zip(&vis) {
        assert_eq!(*v, !small(x), "{:?}", x.pos);
    }
    let vis = visible_from(&s, &bvh, [0.05, 0.0, 0.0]);
    assert!(vis.iter().all(|&v| v));

    // A closed cube seen along its axis: only the face towards the eye is visible.
    let cube = unit_cube().placed(&Placement {
        offset_mm: [-1.0, -1.0, 9.0],
        rotation_deg: [0.0; 3],
        size: PlacementSize::Scale(2.0),
        ..Placement::default()
    });
    let bvh = Bvh::build(&cube);
    let s = sample_surface(&cube, &opts(6000, Pattern::Stratified, 8)).unwrap();
    let vis = visible_from(&s, &bvh, [0.0, 0.0, 0.0]);
    for (x, v) in s.iter().zip(&vis) {
        let front = (x.pos[2] - 0.009).abs() < 1e-12;
        assert_eq!(*v, front, "{:?}", x.pos);
    }
}

#[test]
fn points_on_shared_edges_and_vertices_are_not_blocked_by_their_neighbours() {
    // Self-intersection tolerance (common practice in ray casting): an emitter on an edge or
    // vertex touches the neighbouring triangles; those must not count as blockers, while the
    // far side of the closed surface still blocks.
    let sphere = icosphere(2).placed(&Placement {
        offset_mm: [1.0, -2.0, 30.0],
        rotation_deg: [10.0, 20.0, 30.0],
        size: PlacementSize::Scale(5.0),
        ..Placement::default()
    });
    let bvh = Bvh::build(&sphere);
    let eye = [0.0, 0.0, 0.0];
    let mut edges: std::collections::HashMap<(u32, u32), Vec<usize>> = Default::default();
    for (k, t) in sphere.triangles.iter().enumerate() {
        for e in 0..3 {
            let (a, b) = (t[e], t[(e + 1) % 3]);
            edges.entry((a.min(b), a.max(b))).or_default().push(k);
        }
    }
    let facing = |k: usize, p: [f64; 3]| {
        let n = face_normal(&sphere, k);
        let d = unit([0, 1, 2].map(|i| eye[i] - p[i]));
        n[0] * d[0] + n[1] * d[1] + n[2] * d[2]
    };
    let mut at_vertex: Vec<Vec<usize>> = vec![Vec::new(); sphere.positions.len()];
    for (k, t) in sphere.triangles.iter().enumerate() {
        for &v in t {
            at_vertex[v as usize].push(k);
        }
    }
    // Edge midpoints (touching two triangles) and vertices (touching five or six): visible when
    // every touching triangle faces the eye, blocked when every one faces away.
    let mut points: Vec<([f64; 3], Vec<usize>)> = Vec::new();
    for (&(a, b), tris) in &edges {
        assert_eq!(tris.len(), 2);
        let (pa, pb) = (sphere.positions[a as usize], sphere.positions[b as usize]);
        points.push(([0, 1, 2].map(|i| 0.5 * (pa[i] + pb[i])), tris.clone()));
    }
    for (v, tris) in at_vertex.into_iter().enumerate() {
        points.push((sphere.positions[v], tris));
    }
    let mut samples = Vec::new();
    let mut expect = Vec::new();
    for (pos, tris) in points {
        let want = if tris.iter().all(|&t| facing(t, pos) > 0.1) {
            true
        } else if tris.iter().all(|&t| facing(t, pos) < -0.1) {
            false
        } else {
            continue;
        };
        for t in tris {
            samples.push(SurfaceSample {
                pos,
                normal: face_normal(&sphere, t),
                amplitude: 1.0,
                phase: 0.0,
                triangle: t as u32,
            });
            expect.push(want);
        }
    }
    let front = expect.iter().filter(|&&w| w).count();
    assert!(
        front > 100 && expect.len() - front > 100,
        "{front} of {}",
        expect.len()
    );
    let vis = visible_from(&samples, &bvh, eye);
    let wrong: Vec<_> = samples
        .iter()
        .zip(&vis)
        .zip(&expect)
        .filter(|((_, v), w)| v != w)
        .collect();
    assert!(
        wrong.is_empty(),
        "{} wrong, first {:?}",
        wrong.len(),
        wrong.first()
    );
}

// ---------------------------------------------------------------------------------------------
// The sample object
// ---------------------------------------------------------------------------------------------

#[test]
fn sample_lantern_loads_samples_and_partly_hides_itself() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("samples/lantern.glb");
    let m = load_mesh(&path).unwrap();
    assert!(
        (500..=3000).contains(&m.triangles.len()),
        "{}",
        m.triangles.len()
    );
    assert_eq!(m.materials.len(), 2);
    assert!(m.materials.iter().any(|mat| mat.texture.is_some()));
    assert!(m.colors.is_some() && m.uvs.is_some() && m.normals.is_some());
    let (lo, hi) = m.bounds();
    for k in 0..3 {
        assert!(
            (hi[k] - lo[k]) > 7.0 && (hi[k] - lo[k]) < 12.5,
            "axis {k}: {lo:?} {hi:?}"
        );
        assert!(
            (hi[k] + lo[k]).abs() < 0.5,
            "axis {k} not centred: {lo:?} {hi:?}"
        );
    }
    let placed = m.placed(&Placement {
        offset_mm: [0.0, 0.0, 40.0],
        ..Placement::default()
    });
    let mut o = opts(20_000, Pattern::Stratified, 1);
    o.shading = Shading::default();
    let s = sample_surface(&placed, &o).unwrap();
    assert!(s.iter().all(|x| x.pos[2] > 0.0 && x.amplitude.is_finite()));
    // The texture's red band and ribs darken part of the paper: amplitudes spread.
    let (amin, amax) = s.iter().fold((f64::MAX, 0.0f64), |(a, b), x| {
        (a.min(x.amplitude), b.max(x.amplitude))
    });
    assert!(amax > 2.0 * amin.max(1e-3), "{amin} {amax}");
    let bvh = Bvh::build(&placed);
    let vis = visible_from(&s, &bvh, [0.0, 0.0, 0.0]);
    let frac = vis.iter().filter(|&&v| v).count() as f64 / vis.len() as f64;
    assert!(frac > 0.2 && frac < 0.7, "visible fraction {frac}");
}
