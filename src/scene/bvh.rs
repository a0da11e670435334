//! Bounding volume hierarchy over a mesh's triangles, for ray casts: the nearest hit along a
//! ray and whether a segment is blocked. Used to drop emitters hidden from a viewpoint.
//!
//! Built top-down with the surface area heuristic over 16 centroid bins per node (the cost
//! model of Goldsmith and Salmon, IEEE CG&A 7(5), 1987; binning after Wald, IEEE Symposium on
//! Interactive Ray Tracing 2007), leaves of at most 4 triangles where the heuristic allows, and
//! depth limited to 60. Triangles are tested with the Möller–Trumbore algorithm (Möller and
//! Trumbore, Journal of Graphics Tools 2(1), 1997), both faces counted.

use rayon::prelude::*;

use super::mesh::{bounds_of, cross, dot, sub, Mesh};
use super::sampling::SurfaceSample;

/// Maximum depth of the tree; traversal stacks are sized by it.
const MAX_DEPTH: usize = 60;
const BINS: usize = 16;
const LEAF_SIZE: usize = 4;

#[derive(Clone, Copy, Debug)]
struct Node {
    lo: [f64; 3],
    hi: [f64; 3],
    /// Leaf: first triangle slot. Interior: index of the left child (the right one follows).
    start: u32,
    /// Leaf: number of triangles (> 0). Interior: 0.
    count: u32,
}

/// A bounding volume hierarchy over the triangles of one mesh.
#[derive(Clone, Debug)]
pub struct Bvh {
    nodes: Vec<Node>,
    /// Triangle corners in leaf order.
    tris: Vec<[[f64; 3]; 3]>,
    /// Mesh triangle index of each slot of `tris`.
    ids: Vec<u32>,
    /// Distance below which a segment end is not considered blocked: 1e-7 of the bounding-box
    /// diagonal.
    eps: f64,
}

/// Möller–Trumbore ray-triangle intersection: the ray parameter `t` and barycentric `(u, v)`
/// of the hit of `origin + t dir` with triangle `(v0, v1, v2)`, either face; `None` when the
/// ray is parallel to the plane or passes outside (edges count as inside). `t` may be negative.
pub fn ray_triangle(
    origin: [f64; 3],
    dir: [f64; 3],
    v0: [f64; 3],
    v1: [f64; 3],
    v2: [f64; 3],
) -> Option<(f64, f64, f64)> {
    let e1 = sub(v1, v0);
    let e2 = sub(v2, v0);
    let p = cross(dir, e2);
    let det = dot(e1, p);
    if det == 0.0 || !det.is_finite() {
        return None;
    }
    let inv = 1.0 / det;
    let s = sub(origin, v0);
    let u = dot(s, p) * inv;
    if !(0.0..=1.0).contains(&u) {
        return None;
    }
    let q = cross(s, e1);
    let v = dot(dir, q) * inv;
    if v < 0.0 || u + v > 1.0 {
        return None;
    }
    let t = dot(e2, q) * inv;
    t.is_finite().then_some((t, u, v))
}

struct Ray {
    o: [f64; 3],
    d: [f64; 3],
    inv: [f64; 3],
}

impl Ray {
    fn new(o: [f64; 3], d: [f64; 3]) -> Ray {
        Ray {
            o,
            d,
            inv: d.map(|x| 1.0 / x),
        }
    }

    /// Entry parameter of the ray into the box within `[0, t_max]`, if it meets it.
    #[inline]
    fn hits_box(&self, lo: &[f64; 3], hi: &[f64; 3], t_max: f64) -> Option<f64> {
        let (mut t0, mut t1) = (0.0f64, t_max);
        for k in 0..3 {
            if self.d[k] == 0.0 {
                if self.o[k] < lo[k] || self.o[k] > hi[k] {
                    return None;
                }
                continue;
            }
            let a = (lo[k] - self.o[k]) * self.inv[k];
            let b = (hi[k] - self.o[k]) * self.inv[k];
            let (near, far) = if a <= b { (a, b) } else { (b, a) };
            t0 = t0.max(near);
            // Widened by a few ulps so that rounding never drops a hit on the box surface
            // (Ize, "Robust BVH ray traversal", JCGT 2(2), 2013).
            t1 = t1.min(far * (1.0 + 4.0 * f64::EPSILON));
            if t0 > t1 {
                return None;
            }
        }
        Some(t0)
    }
}

impl Bvh {
    /// Builds the hierarchy over all triangles of `mesh` (indices refer to
    /// `mesh.triangles`).
    pub fn build(mesh: &Mesh) -> Bvh {
        let tris: Vec<[[f64; 3]; 3]> = mesh.triangles.iter().map(|t| mesh.corners(t)).collect();
        let (lo, hi) = bounds_of(&mesh.positions);
        let diag = (0..3).map(|k| (hi[k] - lo[k]).powi(2)).sum::<f64>().sqrt();
        let eps = if diag.is_finite() && diag > 0.0 {
            1e-7 * diag
        } else {
            0.0
        };
        let mut order: Vec<u32> = (0..tris.len() as u32).collect();
        let centroid: Vec<[f64; 3]> = tris
            .iter()
            .map(|t| [0, 1, 2].map(|k| (t[0][k] + t[1][k] + t[2][k]) / 3.0))
            .collect();
        let boxes: Vec<([f64; 3], [f64; 3])> = tris.iter().map(|t| bounds_of(t)).collect();

        let mut nodes = Vec::with_capacity(2 * tris.len().max(1));
        if !tris.is_empty() {
            nodes.push(Node {
                lo: [0.0; 3],
                hi: [0.0; 3],
                start: 0,
                count: 0,
            });
            // (node, first, end, depth)
            let mut work = vec![(0usize, 0usize, tris.len(), 0usize)];
            while let Some((ni, first, end, depth)) = work.pop() {
                let ids = &mut order[first..end];
                let (blo, bhi) = union(ids.iter().map(|&i| boxes[i as usize]));
                nodes[ni].lo = blo;
                nodes[ni].hi = bhi;
                let n = ids.len();
                let split = if n <= LEAF_SIZE / 2 || depth >= MAX_DEPTH {
                    None
                } else {
                    choose_split(ids, &centroid, &boxes, n > LEAF_SIZE)
                };
                match split {
                    None => {
                        nodes[ni].start = first as u32;
                        nodes[ni].count = n as u32;
                    }
                    Some(mid) => {
                        let left = nodes.len();
                        nodes.push(Node {
                            lo: [0.0; 3],
                            hi: [0.0; 3],
                            start: 0,
                            count: 0,
                        });
                        nodes.push(Node {
                            lo: [0.0; 3],
                            hi: [0.0; 3],
                            start: 0,
                            count: 0,
                        });
                        nodes[ni].start = left as u32;
                        nodes[ni].count = 0;
                        work.push((left, first, first + mid, depth + 1));
                        work.push((left + 1, first + mid, end, depth + 1));
                    }
                }
            }
        }
        let leaf_tris = order.iter().map(|&i| tris[i as usize]).collect();
        Bvh {
            nodes,
            tris: leaf_tris,
            ids: order,
            eps,
        }
    }

    /// Number of triangles.
    pub fn len(&self) -> usize {
        self.ids.len()
    }

    /// Whether there are no triangles.
    pub fn is_empty(&self) -> bool {
        self.ids.is_empty()
    }

    /// The nearest hit of the ray `origin + t dir` with `0 < t < t_max` (`t` in units of
    /// `dir`, which need not be normalised): `(t, triangle index)`. Both faces count.
    pub fn first_hit(&self, origin: [f64; 3], dir: [f64; 3], t_max: f64) -> Option<(f64, u32)> {
        if self.nodes.is_empty() || t_max.is_nan() || t_max <= 0.0 {
            return None;
        }
        let ray = Ray::new(origin, dir);
        let mut best: Option<(f64, u32)> = None;
        let mut limit = t_max;
        let mut stack = [0u32; MAX_DEPTH + 2];
        let mut sp = 0usize;
        let root = &self.nodes[0];
        ray.hits_box(&root.lo, &root.hi, limit)?;
        stack[sp] = 0;
        sp += 1;
        while sp > 0 {
            sp -= 1;
            let node = &self.nodes[stack[sp] as usize];
            if ray.hits_box(&node.lo, &node.hi, limit).is_none() {
                continue;
            }
            if node.count > 0 {
                let s = node.start as usize;
                for k in s..s + node.count as usize {
                    let [a, b, c] = self.tris[k];
                    if let Some((t, _, _)) = ray_triangle(origin, dir, a, b, c) {
                        if t > 0.0 && t < limit {
                            limit = t;
                            best = Some((t, self.ids[k]));
                        }
                    }
                }
            } else {
                let l = node.start as usize;
                let (nl, nr) = (&self.nodes[l], &self.nodes[l + 1]);
                let tl = ray.hits_box(&nl.lo, &nl.hi, limit);
                let tr = ray.hits_box(&nr.lo, &nr.hi, limit);
                // Push the farther child first so the nearer one is searched first.
                match (tl, tr) {
                    (Some(a), Some(b)) => {
                        let (near, far) = if a <= b { (l, l + 1) } else { (l + 1, l) };
                        stack[sp] = far as u32;
                        stack[sp + 1] = near as u32;
                        sp += 2;
                    }
                    (Some(_), None) => {
                        stack[sp] = l as u32;
                        sp += 1;
                    }
                    (None, Some(_)) => {
                        stack[sp] = (l + 1) as u32;
                        sp += 1;
                    }
                    (None, None) => {}
                }
            }
        }
        best
    }

    /// Whether the segment from `from` to `to` crosses a triangle other than
    /// `ignore_triangle`. Hits within a small distance of either end (1e-7 of the mesh's
    /// bounding-box diagonal) do not count, so that a point on the surface is not blocked by
    /// the triangles it touches.
    pub fn occluded(&self, from: [f64; 3], to: [f64; 3], ignore_triangle: Option<u32>) -> bool {
        if self.nodes.is_empty() {
            return false;
        }
        let dir = sub(to, from);
        let len = dot(dir, dir).sqrt();
        if len == 0.0 || !len.is_finite() {
            return false;
        }
        let e = self.eps / len;
        let (t_lo, t_hi) = (e, 1.0 - e);
        if t_lo >= t_hi {
            return false;
        }
        let ray = Ray::new(from, dir);
        let mut stack = [0u32; MAX_DEPTH + 2];
        let mut sp = 1usize;
        while sp > 0 {
            sp -= 1;
            let node = &self.nodes[stack[sp] as usize];
            if ray.hits_box(&node.lo, &node.hi, t_hi).is_none() {
                continue;
            }
            if node.count > 0 {
                let s = node.start as usize;
                for k in s..s + node.count as usize {
                    if Some(self.ids[k]) == ignore_triangle {
                        continue;
                    }
                    let [a, b, c] = self.tris[k];
                    if let Some((t, _, _)) = ray_triangle(from, dir, a, b, c) {
                        if t > t_lo && t < t_hi {
                            return true;
                        }
                    }
                }
            } else {
                stack[sp] = node.start;
                stack[sp + 1] = node.start + 1;
                sp += 2;
            }
        }
        false
    }
}

/// For each sample, whether the segment from it to `eye` is free of the mesh's other
/// triangles (see [`Bvh::occluded`]); computed in parallel. `bvh` must be built from the mesh
/// the samples were taken on. A sample facing away from the eye on an open surface counts as
/// visible: only blocking is tested.
pub fn visible_from(samples: &[SurfaceSample], bvh: &Bvh, eye: [f64; 3]) -> Vec<bool> {
    samples
        .par_iter()
        .map(|s| !bvh.occluded(s.pos, eye, Some(s.triangle)))
        .collect()
}

fn union(boxes: impl Iterator<Item = ([f64; 3], [f64; 3])>) -> ([f64; 3], [f64; 3]) {
    let mut lo = [f64::INFINITY; 3];
    let mut hi = [f64::NEG_INFINITY; 3];
    for (a, b) in boxes {
        for k in 0..3 {
            lo[k] = lo[k].min(a[k]);
            hi[k] = hi[k].max(b[k]);
        }
    }
    (lo, hi)
}

fn half_area(lo: &[f64; 3], hi: &[f64; 3]) -> f64 {
    let d = [0, 1, 2].map(|k| (hi[k] - lo[k]).max(0.0));
    d[0] * d[1] + d[1] * d[2] + d[2] * d[0]
}

/// Reorders `ids` and returns the size of the left part (strictly between 0 and the length),
/// or `None` when a leaf is cheaper. `must` forces a split (too many triangles for a leaf).
fn choose_split(
    ids: &mut [u32],
    centroid: &[[f64; 3]],
    boxes: &[([f64; 3], [f64; 3])],
    must: bool,
) -> Option<usize> {
    let n = ids.len();
    let (clo, chi) = bounds_of(
        &ids.iter()
            .map(|&i| centroid[i as usize])
            .collect::<Vec<_>>(),
    );
    let axis = (0..3)
        .max_by(|&a, &b| (chi[a] - clo[a]).total_cmp(&(chi[b] - clo[b])))
        .expect("three axes");
    let extent = chi[axis] - clo[axis];
    if extent <= 0.0 || !extent.is_finite() {
        // All centroids coincide (or are not finite): split by position in the list.
        return must.then_some(n / 2);
    }
    let bin_of = |i: u32| -> usize {
        let x = (centroid[i as usize][axis] - clo[axis]) / extent * BINS as f64;
        (x as usize).min(BINS - 1)
    };
    let mut counts = [0usize; BINS];
    let mut bin_boxes = [([f64::INFINITY; 3], [f64::NEG_INFINITY; 3]); BINS];
    for &i in ids.iter() {
        let b = bin_of(i);
        counts[b] += 1;
        let (lo, hi) = boxes[i as usize];
        for k in 0..3 {
            bin_boxes[b].0[k] = bin_boxes[b].0[k].min(lo[k]);
            bin_boxes[b].1[k] = bin_boxes[b].1[k].max(hi[k]);
        }
    }
    // Sweep: cost of splitting after bin s = A_left n_left + A_right n_right.
    let mut right_area = [0.0f64; BINS];
    let mut acc = ([f64::INFINITY; 3], [f64::NEG_INFINITY; 3]);
    for s in (1..BINS).rev() {
        acc = union([acc, bin_boxes[s]].into_iter());
        right_area[s] = half_area(&acc.0, &acc.1);
    }
    let mut best: Option<(f64, usize)> = None;
    let mut left = ([f64::INFINITY; 3], [f64::NEG_INFINITY; 3]);
    let mut n_left = 0usize;
    for s in 0..BINS - 1 {
        left = union([left, bin_boxes[s]].into_iter());
        n_left += counts[s];
        if n_left == 0 || n_left == n {
            continue;
        }
        let cost =
            half_area(&left.0, &left.1) * n_left as f64 + right_area[s + 1] * (n - n_left) as f64;
        if best.is_none_or(|(c, _)| cost < c) {
            best = Some((cost, s));
        }
    }
    let (all_lo, all_hi) = union(ids.iter().map(|&i| boxes[i as usize]));
    let leaf_cost = half_area(&all_lo, &all_hi) * n as f64;
    match best {
        // Traversal costs about one triangle test per node visited.
        Some((cost, s)) if must || cost + half_area(&all_lo, &all_hi) < leaf_cost => {
            let mut mid = 0;
            for k in 0..n {
                if bin_of(ids[k]) <= s {
                    ids.swap(k, mid);
                    mid += 1;
                }
            }
            Some(mid)
        }
        None if must => Some(n / 2),
        _ => None,
    }
}
