//! The scene cut into depth slices: every place where a triangle crosses a slab of depth, found by
//! casting the lattice's rays parallel to z through the mesh (an orthographic rasterisation of
//! each triangle on the plate's own pixel lattice).
//!
//! * A **hit** is a lattice point whose z-ray meets a triangle inside the slab: the point's depth,
//!   the triangle, its barycentric weights.
//! * Coverage is exact and watertight: corners are snapped to 1/256 of a pixel and the inside test
//!   is done in integers with a tie rule on edges (a centre on an edge belongs to the triangle
//!   whose edge runs upwards, or rightwards when horizontal), so a ray through an edge shared by
//!   two triangles meets exactly one of them (common practice in rasterisers).
//! * A mesh is **closed** when every edge (by position) is shared by exactly two triangles. Along
//!   any ray it is then crossed an even number of times, and a point lies inside it when the
//!   crossings behind it are odd: that is how the silhouette masks fill the solid.

use std::collections::HashMap;

use rayon::prelude::*;

use crate::optics::Plate;
use crate::scene::mesh::Mesh;

/// Sub-pixel units per pixel of the snapped corners.
const SUB: f64 = 256.0;

/// Depth slabs: `count` slabs of `spacing` from `z0` (plate side) backwards; slab k holds depths
/// [z0 + k spacing, z0 + (k + 1) spacing) and its plane sits at the slab's middle.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Slicing {
    /// Nearest depth, metres.
    pub z0: f64,
    /// Slab thickness, metres.
    pub spacing: f64,
    /// Number of slabs.
    pub count: usize,
}

impl Slicing {
    /// Depth of slab k's plane.
    pub fn plane(&self, k: usize) -> f64 {
        self.z0 + (k as f64 + 0.5) * self.spacing
    }
    /// Slab of depth z (clamped to the slabs).
    pub fn slab_of(&self, z: f64) -> usize {
        let k = ((z - self.z0) / self.spacing).floor();
        if k <= 0.0 {
            0
        } else {
            (k as usize).min(self.count - 1)
        }
    }
}

/// A rectangle of lattice points: sample (j, i) is plate column `origin[0] + j`, row
/// `origin[1] + i` (rows downwards).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LatticeRect {
    /// Lattice column and row of sample (0, 0).
    pub origin: [i64; 2],
    /// Samples [columns, rows].
    pub size: [usize; 2],
}

impl LatticeRect {
    /// Samples.
    pub fn len(&self) -> usize {
        self.size[0] * self.size[1]
    }
    /// Whether empty.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// One ray-triangle crossing in a slab.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Hit {
    /// Sample index in the rectangle (row-major).
    pub sample: usize,
    /// Depth, metres.
    pub z: f64,
    /// Object (mesh) index.
    pub object: u32,
    /// Triangle of that mesh.
    pub triangle: u32,
    /// Barycentric weights (u, v) of the triangle's second and third corners, file order.
    pub uv: [f64; 2],
}

struct Tri {
    object: u32,
    triangle: u32,
    /// Snapped corners (sub-pixel units), ordered to a positive area.
    p: [[i64; 2]; 3],
    /// Which file corner each ordered corner is.
    order: [usize; 3],
    z: [f64; 3],
    area2: i64,
    /// Sample bounds [j0, j1) x [i0, i1).
    bounds: [usize; 4],
}

/// Edge function of p against edge a -> b (twice the signed area of a, b, p; y down).
#[inline]
fn edge(a: [i64; 2], b: [i64; 2], p: [i64; 2]) -> i64 {
    (b[0] - a[0]) * (p[1] - a[1]) - (b[1] - a[1]) * (p[0] - a[0])
}

/// Whether a point on the line of edge a -> b belongs to this side (see the module doc).
#[inline]
fn owns_tie(a: [i64; 2], b: [i64; 2]) -> bool {
    let (dx, dy) = (b[0] - a[0], b[1] - a[1]);
    dy < 0 || (dy == 0 && dx > 0)
}

/// Every triangle of the scene projected on a lattice rectangle, bucketed by slab.
pub struct Slices {
    tris: Vec<Tri>,
    by_slab: Vec<Vec<u32>>,
    rect: LatticeRect,
    slicing: Slicing,
}

impl Slices {
    /// Projects the triangles of `meshes` (placed, plate coordinates) onto `rect` of `plate`'s
    /// lattice. Triangles with no projected area (seen edge-on) meet no ray and are left out.
    pub fn new(meshes: &[&Mesh], plate: &Plate, rect: LatticeRect, slicing: Slicing) -> Slices {
        let x0 = plate.x_of_col(rect.origin[0] as f64);
        let y0 = plate.y_of_row(rect.origin[1] as f64);
        let mut tris = Vec::new();
        for (o, mesh) in meshes.iter().enumerate() {
            for (t, tri) in mesh.triangles.iter().enumerate() {
                let c = mesh.corners(tri);
                let snap = |v: [f64; 3]| -> [i64; 2] {
                    [
                        ((v[0] - x0) / plate.pitch[0] * SUB).round() as i64,
                        ((y0 - v[1]) / plate.pitch[1] * SUB).round() as i64,
                    ]
                };
                let mut p = [snap(c[0]), snap(c[1]), snap(c[2])];
                let mut order = [0, 1, 2];
                let mut area2 = edge(p[0], p[1], p[2]);
                if area2 == 0 {
                    continue;
                }
                if area2 < 0 {
                    p.swap(1, 2);
                    order.swap(1, 2);
                    area2 = -area2;
                }
                let lo = |k: usize| p.iter().map(|q| q[k]).min().expect("3 corners");
                let hi = |k: usize| p.iter().map(|q| q[k]).max().expect("3 corners");
                let first =
                    |v: i64, n: usize| (v.div_euclid(SUB as i64)).clamp(0, n as i64) as usize;
                let last =
                    |v: i64, n: usize| (v.div_euclid(SUB as i64) + 1).clamp(0, n as i64) as usize;
                let bounds = [
                    first(lo(0), rect.size[0]),
                    last(hi(0), rect.size[0]),
                    first(lo(1), rect.size[1]),
                    last(hi(1), rect.size[1]),
                ];
                if bounds[0] >= bounds[1] || bounds[2] >= bounds[3] {
                    continue;
                }
                tris.push(Tri {
                    object: o as u32,
                    triangle: t as u32,
                    p,
                    order,
                    z: [c[order[0]][2], c[order[1]][2], c[order[2]][2]],
                    area2,
                    bounds,
                });
            }
        }
        let mut by_slab = vec![Vec::new(); slicing.count];
        for (i, t) in tris.iter().enumerate() {
            let zl = t.z.iter().copied().fold(f64::INFINITY, f64::min);
            let zh = t.z.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            for list in &mut by_slab[slicing.slab_of(zl)..=slicing.slab_of(zh)] {
                list.push(i as u32);
            }
        }
        Slices {
            tris,
            by_slab,
            rect,
            slicing,
        }
    }

    /// Triangles projected (those with area on the rectangle).
    pub fn triangles(&self) -> usize {
        self.tris.len()
    }

    /// Lattice points the triangles' bounding boxes cover, summed over the slabs each spans (the
    /// rasterisation's work).
    pub fn work(&self) -> f64 {
        self.by_slab
            .iter()
            .flatten()
            .map(|&i| {
                let b = self.tris[i as usize].bounds;
                ((b[1] - b[0]) * (b[3] - b[2])) as f64
            })
            .sum()
    }

    /// Every crossing in slab `k`, in triangle order then row-major sample order (deterministic).
    /// Holds them all at once: for tests and small scenes; [`Self::visit`] bounds the memory.
    pub fn hits(&self, k: usize) -> Vec<Hit> {
        let mut all = Vec::new();
        self.visit(k, &mut |h| all.extend_from_slice(h));
        all
    }

    /// Calls `f` with the crossings in slab `k`, in the order of [`Self::hits`], a bounded piece at
    /// a time: each triangle's rows are cut into pieces of at most [`PIECE_POINTS`] lattice points
    /// of its box, and a few pieces per thread are rasterised together, so a large face (a flat
    /// backdrop lands in one slab whole) never holds more than a few megabytes of hits.
    pub fn visit(&self, k: usize, f: &mut dyn FnMut(&[Hit])) {
        let mut pieces = Vec::new();
        for &ti in &self.by_slab[k] {
            let b = self.tris[ti as usize].bounds;
            let cols = (b[1] - b[0]).max(1);
            let rows = (PIECE_POINTS / cols).max(1);
            let mut r = b[2];
            while r < b[3] {
                pieces.push((ti, r, (r + rows).min(b[3])));
                r += rows;
            }
        }
        let group = 4 * rayon::current_num_threads().max(1);
        for chunk in pieces.chunks(group) {
            let done: Vec<Vec<Hit>> = chunk
                .par_iter()
                .map(|&(ti, r0, r1)| self.piece(k, ti as usize, r0, r1))
                .collect();
            for h in &done {
                f(h);
            }
        }
    }

    /// The crossings of triangle `ti` in slab `k` on rows [r0, r1).
    fn piece(&self, k: usize, ti: usize, r0: usize, r1: usize) -> Vec<Hit> {
        let w = self.rect.size[0];
        let t = &self.tris[ti];
        let mut out = Vec::new();
        let [a, b, c] = t.p;
        let ties = [owns_tie(b, c), owns_tie(c, a), owns_tie(a, b)];
        let inv = 1.0 / t.area2 as f64;
        for i in r0..r1 {
            let py = i as i64 * SUB as i64;
            for j in t.bounds[0]..t.bounds[1] {
                let q = [j as i64 * SUB as i64, py];
                let e = [edge(b, c, q), edge(c, a, q), edge(a, b, q)];
                if !(0..3).all(|m| e[m] > 0 || (e[m] == 0 && ties[m])) {
                    continue;
                }
                let wts = e.map(|v| v as f64 * inv);
                let z = wts[0] * t.z[0] + wts[1] * t.z[1] + wts[2] * t.z[2];
                if self.slicing.slab_of(z) != k {
                    continue;
                }
                // Weights back in file corner order.
                let mut file = [0.0; 3];
                for m in 0..3 {
                    file[t.order[m]] = wts[m];
                }
                out.push(Hit {
                    sample: i * w + j,
                    z,
                    object: t.object,
                    triangle: t.triangle,
                    uv: [file[1], file[2]],
                });
            }
        }
        out
    }
}

/// Lattice points of a triangle's box rasterised as one piece by [`Slices::visit`].
pub const PIECE_POINTS: usize = 1 << 16;

/// Whether every edge of the mesh, by corner positions, is shared by exactly two triangles.
pub fn is_closed(mesh: &Mesh) -> bool {
    let key = |v: [f64; 3]| v.map(|x| (x * 1e9).round() as i64);
    let mut count: HashMap<([i64; 3], [i64; 3]), u32> = HashMap::new();
    for t in &mesh.triangles {
        let c = mesh.corners(t).map(key);
        for (a, b) in [(c[0], c[1]), (c[1], c[2]), (c[2], c[0])] {
            if a == b {
                continue;
            }
            let e = if a < b { (a, b) } else { (b, a) };
            *count.entry(e).or_insert(0) += 1;
        }
    }
    !count.is_empty() && count.values().all(|&n| n == 2)
}

#[cfg(test)]
mod unit_tests {
    use super::*;
    use crate::scene::mesh::Mesh;

    fn plate() -> Plate {
        Plate {
            width: 64,
            height: 64,
            pitch: [1e-6, 1e-6],
            wavelength: 0.5e-6,
        }
    }

    /// A closed axis-aligned box from its corners (12 triangles, outward winding).
    pub(crate) fn cuboid(lo: [f64; 3], hi: [f64; 3]) -> Mesh {
        let v = |i: usize| {
            [
                if i & 1 == 0 { lo[0] } else { hi[0] },
                if i & 2 == 0 { lo[1] } else { hi[1] },
                if i & 4 == 0 { lo[2] } else { hi[2] },
            ]
        };
        let positions: Vec<[f64; 3]> = (0..8).map(v).collect();
        let quads: [[u32; 4]; 6] = [
            [0, 2, 3, 1],
            [4, 5, 7, 6],
            [0, 1, 5, 4],
            [2, 6, 7, 3],
            [0, 4, 6, 2],
            [1, 3, 7, 5],
        ];
        let mut tris = Vec::new();
        for q in quads {
            tris.push([q[0], q[1], q[2]]);
            tris.push([q[0], q[2], q[3]]);
        }
        Mesh::from_triangles(positions, tris, std::path::Path::new("box"))
    }

    #[test]
    fn rays_meet_a_closed_box_twice_and_a_fan_once() {
        let p = plate();
        // A box over columns 10.3..30.7 and rows; every ray through it meets it exactly twice
        // (front and back), whatever the diagonals inside its faces.
        let b = cuboid([-21.7e-6, -5.2e-6, 1e-3], [-1.3e-6, 9.9e-6, 1.02e-3]);
        assert!(is_closed(&b));
        let rect = LatticeRect {
            origin: [0, 0],
            size: [64, 64],
        };
        let s = Slicing {
            z0: 0.9e-3,
            spacing: 0.2e-3,
            count: 1,
        };
        let sl = Slices::new(&[&b], &p, rect, s);
        let hits = sl.hits(0);
        let mut per = vec![0u32; 64 * 64];
        for h in &hits {
            per[h.sample] += 1;
        }
        let mut inside = 0;
        for i in 0..64 {
            for j in 0..64 {
                let (x, y) = (p.x_of_col(j as f64), p.y_of_row(i as f64));
                let within = x > -21.7e-6 && x < -1.3e-6 && y > -5.2e-6 && y < 9.9e-6;
                let n = per[i * 64 + j];
                if within {
                    inside += 1;
                    assert_eq!(n, 2, "sample ({j}, {i})");
                } else {
                    assert_eq!(n, 0, "sample ({j}, {i})");
                }
            }
        }
        assert!(inside > 200);
        // A fan of eight triangles around a corner sitting exactly on a lattice point: the point
        // and every edge point belongs to exactly one of them.
        let c = [p.x_of_col(32.0), p.y_of_row(32.0), 1e-3];
        let mut pos = vec![c];
        for k in 0..8 {
            let a = k as f64 * std::f64::consts::TAU / 8.0;
            pos.push([c[0] + 20e-6 * a.cos(), c[1] + 20e-6 * a.sin(), 1e-3]);
        }
        let tris: Vec<[u32; 3]> = (0..8).map(|k| [0, 1 + k, 1 + (k + 1) % 8]).collect();
        let fan = Mesh::from_triangles(pos, tris, std::path::Path::new("fan"));
        assert!(!is_closed(&fan));
        let sl = Slices::new(&[&fan], &p, rect, s);
        let mut per = vec![0u32; 64 * 64];
        for h in sl.hits(0) {
            per[h.sample] += 1;
        }
        assert_eq!(per[32 * 64 + 32], 1);
        for i in 26..39 {
            for j in 26..39 {
                assert_eq!(per[i * 64 + j], 1, "sample ({j}, {i})");
            }
        }
    }

    /// A triangle whose box spans several pieces gives the same crossings, in row-major order,
    /// as a brute-force point-in-triangle test on every lattice point.
    #[test]
    fn pieces_cover_a_large_triangle_in_order() {
        let p = Plate {
            width: 640,
            height: 320,
            pitch: [1e-6, 1e-6],
            wavelength: 0.5e-6,
        };
        let c = [
            [-300.3e-6, -150.2e-6],
            [310.1e-6, -140.7e-6],
            [-20.5e-6, 155.9e-6],
        ];
        let m = Mesh::from_triangles(
            c.iter().map(|v| [v[0], v[1], 1e-3]).collect(),
            vec![[0, 1, 2]],
            std::path::Path::new("big"),
        );
        let rect = LatticeRect {
            origin: [0, 0],
            size: [640, 320],
        };
        let s = Slicing {
            z0: 0.9e-3,
            spacing: 0.2e-3,
            count: 1,
        };
        let sl = Slices::new(&[&m], &p, rect, s);
        let mut pieces = 0;
        let mut got = Vec::new();
        sl.visit(0, &mut |h| {
            pieces += 1;
            got.extend(h.iter().map(|x| x.sample));
        });
        assert!(pieces >= 3, "{pieces} pieces");
        let side = |a: [f64; 2], b: [f64; 2], q: [f64; 2]| {
            (b[0] - a[0]) * (q[1] - a[1]) - (b[1] - a[1]) * (q[0] - a[0])
        };
        let mut want = Vec::new();
        for i in 0..320 {
            for j in 0..640 {
                let q = [p.x_of_col(j as f64), p.y_of_row(i as f64)];
                let e = [
                    side(c[0], c[1], q),
                    side(c[1], c[2], q),
                    side(c[2], c[0], q),
                ];
                if e.iter().all(|v| *v > 0.0) || e.iter().all(|v| *v < 0.0) {
                    want.push(i * 640 + j);
                }
            }
        }
        assert_eq!(got, want);
    }

    #[test]
    fn depth_and_slabs() {
        let s = Slicing {
            z0: 1.0,
            spacing: 0.5,
            count: 4,
        };
        assert_eq!(s.slab_of(0.5), 0);
        assert_eq!(s.slab_of(1.49), 0);
        assert_eq!(s.slab_of(1.5), 1);
        assert_eq!(s.slab_of(9.0), 3);
        assert!((s.plane(1) - 1.75).abs() < 1e-12);
        // A sloped square: each hit's depth is the plane's at that point.
        let p = plate();
        let z = |x: f64, y: f64| 1e-3 + 2.0 * x + 3.0 * y;
        let c = [
            [-20e-6, -20e-6],
            [20e-6, -20e-6],
            [20e-6, 20e-6],
            [-20e-6, 20e-6],
        ]
        .map(|[x, y]| [x, y, z(x, y)]);
        let m = Mesh::from_triangles(
            c.to_vec(),
            vec![[0, 1, 2], [0, 2, 3]],
            std::path::Path::new("slope"),
        );
        let sl = Slicing {
            z0: 0.8e-3,
            spacing: 0.05e-3,
            count: 8,
        };
        let rect = LatticeRect {
            origin: [0, 0],
            size: [64, 64],
        };
        let slices = Slices::new(&[&m], &p, rect, sl);
        let mut n = 0;
        for k in 0..8 {
            for h in slices.hits(k) {
                let (j, i) = (h.sample % 64, h.sample / 64);
                let (x, y) = (p.x_of_col(j as f64), p.y_of_row(i as f64));
                assert!((h.z - z(x, y)).abs() < 1e-12);
                assert_eq!(sl.slab_of(h.z), k);
                n += 1;
            }
        }
        // 40 x 40 um at 1 um: 1600 centres, each in exactly one slab.
        assert_eq!(n, 1600);
    }
}
