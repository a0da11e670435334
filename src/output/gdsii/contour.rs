//! Whole regions as polygons (`merge = "contour"`): the set pixels of a strip are grouped into
//! 4-connected regions, and each region's outline is traced along the pixel edges into one
//! rectilinear polygon with no repeated vertex.
//!
//! A polygon without a hole cannot describe a region with one, and a region whose outline
//! touches itself at a corner (two set pixels meeting only diagonally at a lattice point whose
//! other two pixels are clear, a "saddle") would give a self-touching polygon that mask tools
//! reject. Such a region is cut along vertical pixel edges, without changing any pixel: at the
//! leftmost column of each hole and at the column of each saddle. A cut at a hole's leftmost
//! column opens that hole to the outside of the right-hand piece, a cut through a saddle
//! separates its two pixels, and cutting removes pixels from a piece's neighbourhood, so it can
//! make no new hole or saddle: after one round of cuts every piece traces to one simple loop.
//! A loop with more vertices than the limit is cut at its middle column, and the halves traced
//! again (a one-column piece is a rectangle, so this ends). Cutting holes open along pixel edges
//! instead of joining them to the outline by zero-width "keyhole" slits keeps every polygon
//! simple (common practice for mask data).
//!
//! Order is deterministic: regions by their first run in raster order, pieces left to right.

/// A run of set pixels: `row`, columns `c0 .. c1` (end exclusive).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Run {
    /// Plate row.
    pub row: u32,
    /// First column.
    pub c0: u32,
    /// One past the last column.
    pub c1: u32,
}

/// Groups runs (sorted by row, then column) into 4-connected regions: runs of adjacent rows
/// that share a column are joined. Regions come in the order of their first run, each with its
/// runs in the input's order.
pub fn regions(runs: &[Run]) -> Vec<Vec<Run>> {
    components(runs, 0)
}

/// Calls `f(i, k)` for every run `i` of a row and run `k` of the next row that share a column
/// (`touch` 0) or also meet at a corner (`touch` 1); runs sorted by row, then column. Also
/// `row(a0, a1, b1)` once per row: its runs are `a0 .. a1`, the next row's `a1 .. b1` (empty
/// when that row holds none).
fn adjacent_pairs(
    runs: &[Run],
    touch: u32,
    mut row: impl FnMut(usize, usize, usize),
    mut f: impl FnMut(usize, usize),
) {
    let mut a0 = 0;
    while a0 < runs.len() {
        let r = runs[a0].row;
        let a1 = a0 + runs[a0..].iter().take_while(|q| q.row == r).count();
        let b1 = a1 + runs[a1..].iter().take_while(|q| q.row == r + 1).count();
        row(a0, a1, b1);
        let (mut i, mut k) = (a0, a1);
        while i < a1 && k < b1 {
            let (p, q) = (runs[i], runs[k]);
            if p.c0.max(q.c0) < p.c1.min(q.c1) + touch {
                f(i, k);
            }
            if p.c1 <= q.c1 {
                i += 1;
            } else {
                k += 1;
            }
        }
        a0 = a1;
    }
}

/// Groups runs of adjacent rows that share a column (`touch` 0: 4-connected) or also meet at a
/// corner (`touch` 1: 8-connected).
fn components(runs: &[Run], touch: u32) -> Vec<Vec<Run>> {
    let n = runs.len();
    let mut parent: Vec<u32> = (0..n as u32).collect();
    fn find(p: &mut [u32], mut i: u32) -> u32 {
        while p[i as usize] != i {
            let g = p[p[i as usize] as usize];
            p[i as usize] = g;
            i = g;
        }
        i
    }
    adjacent_pairs(
        runs,
        touch,
        |_, _, _| {},
        |i, k| {
            let (x, y) = (find(&mut parent, i as u32), find(&mut parent, k as u32));
            // The smaller index as root keeps the first run's region first.
            let (lo, hi) = if x < y { (x, y) } else { (y, x) };
            parent[hi as usize] = lo;
        },
    );
    let mut slot: Vec<u32> = vec![u32::MAX; n];
    let mut out: Vec<Vec<Run>> = Vec::new();
    for (i, &run) in runs.iter().enumerate() {
        let root = find(&mut parent, i as u32) as usize;
        if slot[root] == u32::MAX {
            slot[root] = out.len() as u32;
            out.push(Vec::new());
        }
        out[slot[root] as usize].push(run);
    }
    out
}

/// The pixels of one region in its bounding box, with a border of one clear pixel.
struct Bitmap {
    c0: u32,
    r0: u32,
    /// Columns of the box.
    w: usize,
    /// (h + 2) x (w + 2): 1 set, 0 clear.
    px: Vec<u8>,
}

impl Bitmap {
    fn new(runs: &[Run]) -> Bitmap {
        let c0 = runs.iter().map(|r| r.c0).min().expect("a region has runs");
        let c1 = runs.iter().map(|r| r.c1).max().expect("a region has runs");
        let r0 = runs[0].row;
        let r1 = runs[runs.len() - 1].row + 1;
        let (w, h) = ((c1 - c0) as usize, (r1 - r0) as usize);
        let mut px = vec![0u8; (w + 2) * (h + 2)];
        for r in runs {
            let row = (r.row - r0) as usize + 1;
            let a = row * (w + 2) + (r.c0 - c0) as usize + 1;
            px[a..a + (r.c1 - r.c0) as usize].fill(1);
        }
        Bitmap { c0, r0, w, px }
    }

    /// Set? at local column `x`, row `y` (both may be -1 or the box size: the border).
    fn set(&self, x: i64, y: i64) -> bool {
        self.px[(y + 1) as usize * (self.w + 2) + (x + 1) as usize] == 1
    }

    /// The outline of a region with no hole and no saddle, as lattice points (plate column,
    /// plate row of the pixel edges), counter-clockwise with y up (clockwise on the screen,
    /// rows down), starting at the top-left corner of the first run; no point repeats.
    fn trace(&self) -> Vec<(u32, u32)> {
        // Headings on the screen (x right, y down): east, south, west, north.
        const D: [(i64, i64); 4] = [(1, 0), (0, 1), (-1, 0), (0, -1)];
        // Pixel offsets (dx, dy) from a lattice point to the pixel ahead-left and ahead-right,
        // per heading; pixel (x, y) has its top-left corner at lattice point (x, y).
        const AL: [(i64, i64); 4] = [(0, -1), (0, 0), (-1, 0), (-1, -1)];
        const AR: [(i64, i64); 4] = [(0, 0), (-1, 0), (-1, -1), (0, -1)];
        let first = {
            let row = &self.px[self.w + 2..2 * (self.w + 2)];
            row.iter()
                .position(|&v| v == 1)
                .expect("first row has a run") as i64
                - 1
        };
        let start = (first, 0i64);
        let (mut x, mut y, mut d) = (first + 1, 0i64, 0usize);
        let mut pts = vec![start];
        // Walking with the region on the right; vertices where the heading turns.
        loop {
            let al = self.set(x + AL[d].0, y + AL[d].1);
            let ar = self.set(x + AR[d].0, y + AR[d].1);
            let nd = if !ar {
                (d + 1) % 4
            } else if al {
                (d + 3) % 4
            } else {
                d
            };
            if nd != d {
                if (x, y) == start {
                    break;
                }
                pts.push((x, y));
                d = nd;
            }
            x += D[d].0;
            y += D[d].1;
        }
        // Clockwise on the screen is counter-clockwise with y up: reverse, keep the start.
        pts[1..].reverse();
        pts.iter()
            .map(|&(x, y)| (self.c0 + x as u32, self.r0 + y as u32))
            .collect()
    }
}

/// The leftmost column of each hole of a region: the clear runs of its bounding box (padded by
/// one clear pixel all round) grouped 8-connected (the dual of 4-connected regions); every group
/// but the one holding the border is a hole.
fn hole_cuts(runs: &[Run]) -> Vec<u32> {
    // Columns shifted by one so that the padding column left of column 0 is column 0.
    let c0 = runs.iter().map(|r| r.c0).min().expect("a region has runs");
    let c1 = runs.iter().map(|r| r.c1).max().expect("a region has runs") + 2;
    let (r0, r1) = (runs[0].row, runs[runs.len() - 1].row);
    let mut clear = Vec::with_capacity(runs.len() + 2 * (r1 - r0 + 3) as usize);
    // The padding rows above and below are one run each; rows are numbered from 0 above.
    clear.push(Run { row: 0, c0, c1 });
    let mut i = 0;
    for row in r0..=r1 {
        let mut at = c0;
        while i < runs.len() && runs[i].row == row {
            clear.push(Run {
                row: row - r0 + 1,
                c0: at,
                c1: runs[i].c0 + 1,
            });
            at = runs[i].c1 + 1;
            i += 1;
        }
        clear.push(Run {
            row: row - r0 + 1,
            c0: at,
            c1,
        });
    }
    clear.push(Run {
        row: r1 - r0 + 2,
        c0,
        c1,
    });
    let mut cuts: Vec<u32> = components(&clear, 1)
        .into_iter()
        .skip(1) // the outside: it holds the first run (the top padding row)
        .map(|hole| hole.iter().map(|r| r.c0).min().expect("runs") - 1)
        .collect();
    cuts.sort_unstable();
    cuts
}

/// The number of pairs of runs in adjacent rows that share a column, and the columns where a
/// run of one row ends at the column where a run of the next row starts (sorted, distinct).
fn joins_and_saddles(runs: &[Run]) -> (usize, Vec<u32>) {
    let (mut joins, mut saddles) = (0, Vec::new());
    adjacent_pairs(
        runs,
        0,
        |a0, a1, b1| {
            // Corner contacts: a run of the next row starting where this run ends, or ending
            // where it starts.
            let next = &runs[a1..b1];
            for p in &runs[a0..a1] {
                let k = next.partition_point(|q| q.c0 < p.c1);
                if k < next.len() && next[k].c0 == p.c1 {
                    saddles.push(p.c1);
                }
                let k = next.partition_point(|q| q.c1 < p.c0);
                if k < next.len() && next[k].c1 == p.c0 {
                    saddles.push(p.c0);
                }
            }
        },
        |_, _| joins += 1,
    );
    saddles.sort_unstable();
    saddles.dedup();
    (joins, saddles)
}

/// Where [`polygons`] sends each polygon's lattice points.
pub type Emit<'a> = dyn FnMut(&[(u32, u32)]) -> crate::error::Result<()> + 'a;

/// Splits runs at the given plate columns (sorted); the pieces stay sorted by row and column.
fn split(runs: &[Run], cuts: &[u32]) -> Vec<Run> {
    let mut out = Vec::with_capacity(runs.len() * 2);
    for r in runs {
        let mut a = r.c0;
        let first = cuts.partition_point(|&c| c <= a);
        for &c in &cuts[first..] {
            if c >= r.c1 {
                break;
            }
            out.push(Run {
                row: r.row,
                c0: a,
                c1: c,
            });
            a = c;
        }
        out.push(Run {
            row: r.row,
            c0: a,
            c1: r.c1,
        });
    }
    out
}

/// Emits the polygons of one region (runs sorted by row and column): each a list of lattice
/// points (plate column, plate row), counter-clockwise with y up, at most `max_vertices` points
/// (the closing point not counted), none repeated.
pub fn polygons(
    runs: &[Run],
    max_vertices: usize,
    emit: &mut Emit<'_>,
) -> crate::error::Result<()> {
    debug_assert!(max_vertices >= 4);
    if runs.len() == 1 {
        let r = runs[0];
        return emit(&[
            (r.c0, r.row),
            (r.c0, r.row + 1),
            (r.c1, r.row + 1),
            (r.c1, r.row),
        ]);
    }
    // Holes and saddles from the runs alone: a region's holes are the independent cycles of its
    // graph of runs joined by shared columns (Euler number of a 4-connected region: runs minus
    // joins = 1 - holes), and a saddle is a run of the next row starting where a run ends (or
    // ending where it starts). Only a region with holes needs its clear runs grouped.
    let (joins, mut cuts) = joins_and_saddles(runs);
    if joins + 1 > runs.len() {
        cuts.extend(hole_cuts(runs));
        cuts.sort_unstable();
        cuts.dedup();
    }
    if !cuts.is_empty() {
        for part in regions(&split(runs, &cuts)) {
            polygons(&part, max_vertices, emit)?;
        }
        return Ok(());
    }
    let bm = Bitmap::new(runs);
    let pts = bm.trace();
    if pts.len() <= max_vertices {
        return emit(&pts);
    }
    let mid = bm.c0 + (bm.w / 2) as u32;
    for part in regions(&split(runs, &[mid])) {
        polygons(&part, max_vertices, emit)?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Runs of a picture ('#' set), rows top to bottom.
    fn runs_of(pic: &[&str]) -> Vec<Run> {
        let mut out = Vec::new();
        for (row, line) in pic.iter().enumerate() {
            let b = line.as_bytes();
            let mut c = 0;
            while c < b.len() {
                if b[c] == b'#' {
                    let s = c;
                    while c < b.len() && b[c] == b'#' {
                        c += 1;
                    }
                    out.push(Run {
                        row: row as u32,
                        c0: s as u32,
                        c1: c as u32,
                    });
                } else {
                    c += 1;
                }
            }
        }
        out
    }

    /// Pixels inside a rectilinear polygon by the winding number at each pixel centre,
    /// computed from its vertical edges alone (a ray to the left): the slow, obvious reference.
    fn winding(pts: &[(u32, u32)], w: usize, h: usize) -> Vec<i32> {
        let mut acc = vec![0i32; w * h];
        let n = pts.len();
        for i in 0..n {
            let (a, b) = (pts[i], pts[(i + 1) % n]);
            assert!(a.0 == b.0 || a.1 == b.1, "edge not rectilinear");
            if a.0 == b.0 {
                // Going down the screen (rows increasing) is going down in y: for a ray to the
                // left, a downward edge counts +1 (counter-clockwise inside is +1).
                let (lo, hi, s) = if a.1 < b.1 {
                    (a.1, b.1, 1)
                } else {
                    (b.1, a.1, -1)
                };
                for r in lo..hi {
                    for c in a.0 as usize..w {
                        acc[r as usize * w + c] += s;
                    }
                }
            }
        }
        acc
    }

    fn check(pic: &[&str], max_vertices: usize) -> usize {
        let (h, w) = (pic.len(), pic[0].len());
        let runs = runs_of(pic);
        let mut cover = vec![0i32; w * h];
        let mut count = 0;
        for reg in regions(&runs) {
            polygons(&reg, max_vertices, &mut |pts| {
                assert!(pts.len() >= 4 && pts.len() <= max_vertices, "{pts:?}");
                let mut seen = pts.to_vec();
                seen.sort_unstable();
                seen.dedup();
                assert_eq!(seen.len(), pts.len(), "repeated vertex in {pts:?}");
                // Consecutive edges turn (no collinear points).
                let n = pts.len();
                for i in 0..n {
                    let (a, b, c) = (pts[i], pts[(i + 1) % n], pts[(i + 2) % n]);
                    assert!(!((a.0 == b.0 && b.0 == c.0) || (a.1 == b.1 && b.1 == c.1)));
                }
                for (k, v) in winding(pts, w, h).into_iter().enumerate() {
                    assert!(v == 0 || v == 1, "winding {v}: not counter-clockwise");
                    cover[k] += v;
                }
                count += 1;
                Ok(())
            })
            .unwrap();
        }
        for r in 0..h {
            for c in 0..w {
                let want = i32::from(pic[r].as_bytes()[c] == b'#');
                assert_eq!(cover[r * w + c], want, "pixel ({r}, {c})");
            }
        }
        count
    }

    #[test]
    fn regions_join_runs_that_share_columns_only() {
        let r = regions(&runs_of(&["##..##", ".#..#.", "..##..", "#....#"]));
        // Diagonal contact does not join (4-connectivity).
        assert_eq!(r.len(), 5);
        assert_eq!(r[0].len(), 2);
    }

    #[test]
    fn a_plain_region_is_one_polygon() {
        assert_eq!(check(&["###.", "####", ".##."], 8190), 1);
        assert_eq!(check(&["#"], 8190), 1);
        // An L, a U opening upwards, a staircase.
        assert_eq!(check(&["#..", "#..", "###"], 8190), 1);
        assert_eq!(check(&["#.#", "#.#", "###"], 8190), 1);
        assert_eq!(check(&["#...", "##..", ".##.", "..##"], 8190), 1);
    }

    #[test]
    fn holes_are_cut_open_along_pixel_edges() {
        // A ring: one hole, cut at its left column into two pieces.
        assert_eq!(check(&["####", "#..#", "####"], 8190), 2);
        // Nested rings and a hole next to the edge.
        check(
            &[
                "#########",
                "#.......#",
                "#.#####.#",
                "#.#...#.#",
                "#.#.#.#.#",
                "#.#...#.#",
                "#.#####.#",
                "#.......#",
                "#########",
            ],
            8190,
        );
        // A hole touched only diagonally by the outside is no hole (8-connected background).
        check(&["###.", "#.#.", "##..", "...."], 8190);
    }

    #[test]
    fn saddles_are_separated() {
        // Two squares meeting at a corner are two regions; a region pinched at a corner is cut.
        check(&["##..", "##..", "..##", "..##"], 8190);
        check(&["###.", "#.##", "##.#", ".###"], 8190);
        check(&["#.#.#", ".#.#.", "#.#.#", ".#.#."], 8190);
    }

    #[test]
    fn large_outlines_are_split_under_the_vertex_limit() {
        // A comb with 40 teeth has 160 vertices.
        let top: String = "#.".repeat(40);
        let bottom: String = "#".repeat(80);
        let pic = [top.as_str(), top.as_str(), bottom.as_str()];
        assert_eq!(check(&pic, 8190), 1);
        assert!(check(&pic, 12) > 1);
        assert!(check(&pic, 4) > 1);
    }

    /// A w x h picture, each pixel set with probability `density` (xorshift state `s`).
    fn random_picture(s: &mut u64, w: usize, h: usize, density: f64) -> Vec<String> {
        (0..h)
            .map(|_| {
                (0..w)
                    .map(|_| {
                        *s ^= *s << 13;
                        *s ^= *s >> 7;
                        *s ^= *s << 17;
                        if (*s >> 11) as f64 / (1u64 << 53) as f64 <= density {
                            '#'
                        } else {
                            '.'
                        }
                    })
                    .collect()
            })
            .collect()
    }

    /// Holes counted the slow, obvious way: clear pixels of the padded box flood-filled
    /// 8-connected from the border; each group left over is one hole (with its leftmost column).
    fn holes_by_flood_fill(runs: &[Run]) -> Vec<u32> {
        let c0 = runs.iter().map(|r| r.c0).min().unwrap() as i64;
        let c1 = runs.iter().map(|r| r.c1).max().unwrap() as i64;
        let (r0, r1) = (runs[0].row as i64, runs[runs.len() - 1].row as i64);
        let (w, h) = (c1 - c0 + 2, r1 - r0 + 3);
        let mut px = vec![0u8; (w * h) as usize];
        for r in runs {
            for c in r.c0..r.c1 {
                px[((r.row as i64 - r0 + 1) * w + c as i64 - c0 + 1) as usize] = 1;
            }
        }
        let fill = |start: usize, mark: u8, px: &mut Vec<u8>| -> i64 {
            let mut left = i64::MAX;
            let mut stack = vec![start];
            px[start] = mark;
            while let Some(i) = stack.pop() {
                let (y, x) = (i as i64 / w, i as i64 % w);
                left = left.min(x);
                for dy in -1..=1 {
                    for dx in -1..=1 {
                        let (yy, xx) = (y + dy, x + dx);
                        if (0..h).contains(&yy) && (0..w).contains(&xx) {
                            let j = (yy * w + xx) as usize;
                            if px[j] == 0 {
                                px[j] = mark;
                                stack.push(j);
                            }
                        }
                    }
                }
            }
            left
        };
        fill(0, 2, &mut px);
        let mut out = Vec::new();
        for i in 0..px.len() {
            if px[i] == 0 {
                out.push((c0 + fill(i, 3, &mut px) - 1) as u32);
            }
        }
        out.sort_unstable();
        out
    }

    #[test]
    fn holes_from_runs_match_a_flood_fill() {
        let mut s = 0x9e37_79b9_7f4a_7c15u64;
        let mut with_holes = 0;
        for density in [0.5, 0.65, 0.8] {
            for _ in 0..200 {
                let pic = random_picture(&mut s, 19, 13, density);
                let refs: Vec<&str> = pic.iter().map(|s| s.as_str()).collect();
                for reg in regions(&runs_of(&refs)) {
                    let want = holes_by_flood_fill(&reg);
                    let (joins, _) = joins_and_saddles(&reg);
                    // Euler number of a 4-connected region: 1 - holes = runs - joins.
                    assert_eq!(joins + 1 - reg.len(), want.len(), "{refs:?}");
                    assert_eq!(hole_cuts(&reg), want, "{refs:?}");
                    with_holes += usize::from(!want.is_empty());
                }
            }
        }
        assert!(with_holes > 50, "{with_holes}");
    }

    #[test]
    fn random_pictures_are_covered_exactly() {
        let mut s = 0x2545_f491_4f6c_dd1du64;
        for density in [0.2, 0.5, 0.7, 0.9] {
            for _ in 0..40 {
                let pic = random_picture(&mut s, 17, 11, density);
                let refs: Vec<&str> = pic.iter().map(|s| s.as_str()).collect();
                check(&refs, 8190);
                check(&refs, 6);
            }
        }
    }
}
