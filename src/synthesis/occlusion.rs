//! Occlusion per tile of a grid fixed in plate pixels: an emitter contributes to a tile only if
//! it is visible from the tile's centre on the plate (parallax-correct to the tile's size).
//!
//! The grid is [`TILE_COLS`] x [`TILE_ROWS`] pixels from the plate's top-left corner, whatever the
//! bands, strips, threads or shards the plate is computed in: a pixel's set of contributing
//! emitters, and so its bits, depend on the plate and the scene alone. Each row of tiles is
//! decided once (every emitter that may reach its rows, against every tile in it) and kept while
//! bands use it, in a small cache that drops the top-most rows first (bands run top to bottom):
//! memory is the emitters x tiles-per-row bits of a few tile rows, not the plate.

use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex, OnceLock};

use super::point_sum::Visibility;
use crate::optics::Plate;

/// Columns of an occlusion tile.
pub const TILE_COLS: usize = 256;
/// Rows of an occlusion tile.
pub const TILE_ROWS: usize = 64;

/// Visibility bits of one row of tiles: bit `j * tiles_per_row + t` is emitter j seen from
/// tile t's centre.
pub struct TileRow {
    bits: Vec<u64>,
    tiles: usize,
}

impl TileRow {
    /// Whether emitter `j` is seen from tile `t` of this row.
    #[inline]
    pub fn visible(&self, j: usize, t: usize) -> bool {
        let b = j * self.tiles + t;
        (self.bits[b / 64] >> (b % 64)) & 1 == 1
    }
}

type Slot = Arc<OnceLock<Arc<TileRow>>>;

/// The occlusion grid of one plate and scene.
pub struct OcclusionGrid {
    vis: Arc<dyn Visibility>,
    plate: Plate,
    tile: [usize; 2],
    cache: Mutex<BTreeMap<usize, Slot>>,
    cap: usize,
    tests: AtomicU64,
}

impl OcclusionGrid {
    /// A grid of `tile` = [columns, rows] pixels (at least 1 each) over `plate`.
    pub fn new(vis: Arc<dyn Visibility>, plate: Plate, tile: [usize; 2]) -> Self {
        OcclusionGrid {
            vis,
            plate,
            tile: [tile[0].max(1), tile[1].max(1)],
            cache: Mutex::new(BTreeMap::new()),
            // Bands in flight span a few tile rows each; two per worker and some slack.
            cap: 2 * rayon::current_num_threads() + 4,
            tests: AtomicU64::new(0),
        }
    }

    /// Tile size [columns, rows].
    pub fn tile(&self) -> [usize; 2] {
        self.tile
    }

    /// Tiles per row of tiles.
    pub fn tiles_per_row(&self) -> usize {
        (self.plate.width as usize).div_ceil(self.tile[0])
    }

    /// Visibility tests done so far (each emitter against each tile of each tile row it may
    /// reach, once per tile row, unless a dropped row is needed again).
    pub fn tests_done(&self) -> u64 {
        self.tests.load(Ordering::Relaxed)
    }

    /// Visibility tests a whole plate takes: for every emitter, the tile rows its row range
    /// `rows[j]` meets, times the tiles per row.
    pub fn tests_needed(&self, rows: &[Option<(usize, usize)>]) -> u64 {
        let th = self.tile[1];
        let per_row = self.tiles_per_row() as u64;
        rows.iter()
            .flatten()
            .map(|&(a, b)| ((b - 1) / th - a / th + 1) as u64 * per_row)
            .sum()
    }

    /// The share of (emitter, tile) pairs in reach that are visible, from `samples` pairs drawn
    /// with a fixed seed (for `plan`'s estimate of the updates occlusion leaves; each pair
    /// weighs alike, whatever the size of the emitter's support in the tile).
    pub fn sampled_visible_share(&self, rows: &[Option<(usize, usize)>], samples: usize) -> f64 {
        let reach: Vec<(usize, (usize, usize))> = rows
            .iter()
            .enumerate()
            .filter_map(|(j, r)| r.map(|r| (j, r)))
            .collect();
        if reach.is_empty() || samples == 0 {
            return 1.0;
        }
        let (tw, th) = (self.tile[0], self.tile[1]);
        let (w, h) = (self.plate.width as usize, self.plate.height as usize);
        let tiles = self.tiles_per_row();
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        let mut next = |n: usize| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state % n as u64) as usize
        };
        let mut seen = 0usize;
        for _ in 0..samples {
            let (j, (a, b)) = reach[next(reach.len())];
            let rt = a / th + next((b - 1) / th - a / th + 1);
            let t = next(tiles);
            let (r0, c0) = (rt * th, t * tw);
            let (r1, c1) = ((r0 + th).min(h), (c0 + tw).min(w));
            let eye = [
                self.plate.x_of_col((c0 + c1 - 1) as f64 / 2.0),
                self.plate.y_of_row((r0 + r1 - 1) as f64 / 2.0),
                0.0,
            ];
            seen += self.vis.visible(j, eye) as usize;
        }
        seen as f64 / samples as f64
    }

    /// The visibility of tile row `rt` (rows `rt * TILE_ROWS ..`); `rows[j]` are the emitters'
    /// conservative row ranges.
    pub fn row(&self, rt: usize, rows: &[Option<(usize, usize)>]) -> Arc<TileRow> {
        let slot = {
            let mut c = self.cache.lock().unwrap_or_else(|p| p.into_inner());
            let s = c.entry(rt).or_default().clone();
            while c.len() > self.cap {
                let first = *c.keys().next().expect("non-empty");
                if first == rt {
                    break;
                }
                c.remove(&first);
            }
            s
        };
        slot.get_or_init(|| Arc::new(self.compute(rt, rows)))
            .clone()
    }

    fn compute(&self, rt: usize, rows: &[Option<(usize, usize)>]) -> TileRow {
        let (tw, th) = (self.tile[0], self.tile[1]);
        let (w, h) = (self.plate.width as usize, self.plate.height as usize);
        let r0 = rt * th;
        let r1 = (r0 + th).min(h);
        let tiles = self.tiles_per_row();
        let yc = self.plate.y_of_row((r0 + r1 - 1) as f64 / 2.0);
        let xc: Vec<f64> = (0..tiles)
            .map(|t| {
                let c0 = t * tw;
                let c1 = (c0 + tw).min(w);
                self.plate.x_of_col((c0 + c1 - 1) as f64 / 2.0)
            })
            .collect();
        let mut bits = vec![0u64; (rows.len() * tiles).div_ceil(64)];
        let mut n = 0u64;
        for (j, r) in rows.iter().enumerate() {
            let Some((a, b)) = *r else { continue };
            if a >= r1 || b <= r0 {
                continue;
            }
            for (t, &x) in xc.iter().enumerate() {
                n += 1;
                if self.vis.visible(j, [x, yc, 0.0]) {
                    let k = j * tiles + t;
                    bits[k / 64] |= 1 << (k % 64);
                }
            }
        }
        self.tests.fetch_add(n, Ordering::Relaxed);
        TileRow { bits, tiles }
    }
}
