//! The production point-source engine: F = O conj(R) over a band of rows.
//!
//! Per band it keeps only the emitters whose support reaches the band (conservative y-extent),
//! per row and emitter it walks only the columns of the support span
//! ([`super::support::row_columns`]) and applies the exact per-pixel test inside, so the result is the
//! same pixel set as the reference, at a cost that follows the real support rather than the plate.
//!
//! Summation order is fixed: for every pixel, emitters are added in input order, whatever the band
//! size or thread count, so results are bit-identical across runs and machines with the same build.
//! The inner loops and their phase accuracy are in [`super::kernels`].
//! The inner loop allocates nothing; the band buffers are the caller's.

use num_complex::Complex64;

use super::kernels::{self, EmitterRow, KernelIsa, Row32, RowInputs, PAD};
use super::occlusion::{self, OcclusionGrid, TileRow};
use super::support::{direction_window, plate_rows, row_columns, row_hole_columns};
use super::{Approximation, Emitter, PointSumOptions, Precision};

mod separable;

/// The f32 exact kernel sums this many consecutive emitters (by index, so the grouping is the
/// same for every band and thread count) in f32, then adds the group into the f64 row sums.
const F32_GROUP: usize = 256;
use crate::optics::{Plate, Reference};

/// phi / (2 pi) reduced to [0, 1).
fn reduced_cycles(phase: f64) -> f64 {
    let t = phase / (2.0 * std::f64::consts::PI);
    t - t.floor()
}

/// Adds the f32 sums of an emitter group over the columns it touched into the f64 row sums and
/// clears them.
fn flush_group(
    touched: &mut (usize, usize),
    re32: &mut [f32],
    im32: &mut [f32],
    re: &mut [f64],
    im: &mut [f64],
) {
    let (lo, hi) = *touched;
    if lo < hi {
        for c in lo..hi {
            re[c] += re32[c] as f64;
            im[c] += im32[c] as f64;
        }
        re32[lo..hi].fill(0.0);
        im32[lo..hi].fill(0.0);
    }
    *touched = (re.len(), 0);
}

/// Decides whether an emitter is seen from a point of the plate (occlusion by the scene).
/// Implemented outside this module (ray casting against the scene's triangles).
pub trait Visibility: Send + Sync {
    /// True when emitter `j` (index in summation order) is visible from `eye` (plate coordinates, m).
    fn visible(&self, j: usize, eye: [f64; 3]) -> bool;
}

/// One scene recorded with its own reference (angle multiplexing): its emitters are the index range.
#[derive(Clone, Copy, Debug)]
struct Channel {
    reference: Reference,
    start: usize,
    end: usize,
}

/// A prepared point-source summation over a plate.
pub struct PointSum {
    plate: Plate,
    channels: Vec<Channel>,
    emitters: Vec<Emitter>,
    opts: PointSumOptions,
    /// Rows [start, end) each emitter may reach (conservative), or None.
    rows: Vec<Option<(usize, usize)>>,
    half_band: [f64; 2],
    /// x of every column centre.
    xs: Vec<f64>,
    isa: KernelIsa,
    /// Occlusion tested from the centre of each tile of a grid fixed in plate pixels, if any.
    occlusion: Option<OcclusionGrid>,
    /// Use the separable Fresnel path where it applies (plane reference, one channel, no occlusion).
    separable: bool,
    /// f32 exact kernel: distances from which the polynomial path's segment widths apply.
    poly_min_distance: [f64; 3],
    /// Soft support edge (exact approximation), see [`Self::with_edge_taper`].
    taper_start: f64,
    /// Emitters whose support misses the plate, counted once when first asked.
    unreachable: std::sync::OnceLock<usize>,
}

/// Scratch buffers a worker reuses from band to band.
#[derive(Default)]
pub struct BandScratch {
    candidates: Vec<u32>,
    ref_dir_x: Vec<f64>,
    ref_dir_y: Vec<f64>,
    re: Vec<f64>,
    im: Vec<f64>,
    ref_cycles: Vec<f64>,
    sum_row: Vec<Complex64>,
    band_re: Vec<f64>,
    band_im: Vec<f64>,
    col_re: Vec<f64>,
    col_im: Vec<f64>,
    re32: Vec<f32>,
    im32: Vec<f32>,
    group_re: Vec<f32>,
    group_im: Vec<f32>,
    /// Separable f32 path: the group's emitters (index, first column, end column, rows inside).
    block_members: Vec<(u32, usize, usize, u64)>,
    /// Separable f32 path: row coefficients, [member][row] (zero outside the y support).
    block_cre: Vec<f32>,
    block_cim: Vec<f32>,
    /// Separable f32 path: coefficients packed per tile, [tile][member][tile row].
    tile_coef: Vec<[f32; 2]>,
    /// Separable f32 path: members live on some row of a tile, [tile][member].
    tile_live: Vec<bool>,
    tile_ks: Vec<u32>,
    /// Separable paths: conj of the plane reference's column factor.
    col_phasor: Vec<Complex64>,
    rdx32: Vec<f32>,
    rdy32: Vec<f32>,
}

impl PointSum {
    /// Prepares the summation with one reference: computes each emitter's conservative row range.
    pub fn new(
        plate: Plate,
        reference: Reference,
        emitters: Vec<Emitter>,
        opts: PointSumOptions,
    ) -> Self {
        Self::with_channels(plate, vec![(reference, emitters)], opts)
    }

    /// Several scenes, each recorded with its own reference: F = sum over channels of O_c conj(R_c).
    /// Emitters are summed channel by channel, in order.
    pub fn with_channels(
        plate: Plate,
        channels: Vec<(Reference, Vec<Emitter>)>,
        opts: PointSumOptions,
    ) -> Self {
        let half_band = if opts.anti_alias {
            plate.nyquist_cosines()
        } else {
            [f64::INFINITY; 2]
        };
        let size = plate.size();
        let mut all = Vec::new();
        let mut rows = Vec::new();
        let mut chans = Vec::new();
        for (reference, emitters) in channels {
            let (sx, sy) = reference.direction_range(
                [-size[0] / 2.0, size[0] / 2.0],
                [-size[1] / 2.0, size[1] / 2.0],
            );
            let (wx, wy) = direction_window(sx, sy, half_band);
            let start = all.len();
            for e in emitters {
                rows.push(if opts.anti_alias {
                    plate_rows(&plate, &e, wx, wy, opts.approximation)
                } else {
                    Some((0, plate.height as usize))
                });
                all.push(e);
            }
            chans.push(Channel {
                reference,
                start,
                end: all.len(),
            });
        }
        let xs = (0..plate.width).map(|c| plate.x_of_col(c as f64)).collect();
        PointSum {
            plate,
            channels: chans,
            emitters: all,
            opts,
            rows,
            half_band,
            xs,
            isa: kernels::detect(),
            occlusion: None,
            separable: true,
            poly_min_distance: kernels::exact32::POLY_WIDTHS
                .map(|l| kernels::poly_min_distance(l, plate.pitch[0], plate.wavelength)),
            taper_start: 1.0,
            unreachable: std::sync::OnceLock::new(),
        }
    }

    /// Number of channels (references).
    pub fn channel_count(&self) -> usize {
        self.channels.len()
    }

    /// The options the sum runs with.
    pub fn options(&self) -> &PointSumOptions {
        &self.opts
    }

    /// The one channel's reference and emitters, when the sum has one channel and no occlusion
    /// (what the recording plane can take over).
    pub fn single_channel(&self) -> Option<(Reference, &[Emitter])> {
        match (&self.channels[..], &self.occlusion) {
            ([c], None) => Some((c.reference, &self.emitters[c.start..c.end])),
            _ => None,
        }
    }

    /// Forces one copy of the inner loops (tests compare them).
    pub fn with_isa(mut self, isa: KernelIsa) -> Self {
        self.isa = isa;
        self
    }

    /// Occlusion, tested per tile of [`occlusion::TILE_COLS`] x [`occlusion::TILE_ROWS`] plate
    /// pixels: an emitter contributes to a tile only if it is visible from the tile's centre on
    /// the plate (parallax-correct to the tile size). The grid is fixed in plate pixels, so the
    /// bits do not depend on how the plate is cut into bands.
    pub fn with_visibility(self, v: std::sync::Arc<dyn Visibility>) -> Self {
        self.with_occlusion_tiles(v, [occlusion::TILE_COLS, occlusion::TILE_ROWS])
    }

    /// As [`with_visibility`](Self::with_visibility) with tiles of `tile` = [columns, rows].
    pub fn with_occlusion_tiles(
        mut self,
        v: std::sync::Arc<dyn Visibility>,
        tile: [usize; 2],
    ) -> Self {
        self.occlusion = Some(OcclusionGrid::new(v, self.plate, tile));
        self
    }

    /// The occlusion grid, when the sum has one.
    pub fn occlusion(&self) -> Option<&OcclusionGrid> {
        self.occlusion.as_ref()
    }

    /// Emitters' conservative row ranges (None: no row of the plate).
    pub fn row_ranges(&self) -> &[Option<(usize, usize)>] {
        &self.rows
    }

    /// Soft support edges: each emitter's wave weighted by a smooth step of its support margin,
    /// 1 up to `start` (a share of lambda / 2p, on each axis), 0 at the Nyquist limit
    /// ([`kernels::edge_taper`]). Exact approximation only (the options are set so), in f64 or
    /// f32 (the f32 kernels' per-pixel path); the recording-plane path uses it so its plane's
    /// window does not ring.
    pub fn with_edge_taper(mut self, start: f64) -> Self {
        self.taper_start = start;
        self.opts.approximation = Approximation::Exact;
        self.separable = false;
        self
    }

    /// Turns the separable Fresnel path off (tests compare it with the per-pixel path).
    pub fn with_separable(mut self, on: bool) -> Self {
        self.separable = on;
        self
    }

    /// The copy of the inner loops in use.
    pub fn isa(&self) -> KernelIsa {
        self.isa
    }

    /// The plate.
    pub fn plate(&self) -> &Plate {
        &self.plate
    }
    /// The emitters, in summation order.
    pub fn emitters(&self) -> &[Emitter] {
        &self.emitters
    }
    /// Emitters whose support misses the plate entirely (they contribute nothing).
    pub fn unreachable(&self) -> usize {
        *self.unreachable.get_or_init(|| {
            (0..self.emitters.len())
                .filter(|&j| !self.reaches_plate(j))
                .count()
        })
    }

    /// Whether emitter `j` has a support span on some row of the plate: its conservative row
    /// range, then the spans of its rows (every row when the range has at most 1024; else 1024
    /// rows evenly spread, both ends included, so a support that touches the plate on fewer rows
    /// than the stride may be counted as missing it: the count `plan` and the sidecar report;
    /// [`Self::reaches_plate_exactly`] checks every row).
    pub fn reaches_plate(&self, j: usize) -> bool {
        let Some((a, b)) = self.rows[j] else {
            return false;
        };
        if b <= a {
            return false;
        }
        let n = b - a;
        let samples = n.min(1024);
        (0..samples).any(|k| {
            let row = a + k * (n - 1) / (samples - 1).max(1);
            self.row_span(j, row).is_some()
        })
    }

    /// As [`Self::reaches_plate`], every row of the range checked.
    pub fn reaches_plate_exactly(&self, j: usize) -> bool {
        match self.rows[j] {
            Some((a, b)) => (a..b).any(|row| self.row_span(j, row).is_some()),
            None => false,
        }
    }

    fn channel_of(&self, j: usize) -> &Channel {
        self.channels
            .iter()
            .find(|c| j < c.end)
            .expect("emitter index in range")
    }

    /// Direction window (emitter directions that may pass the test) on the row at height y.
    fn row_window(&self, reference: &Reference, y: f64) -> ([f64; 2], [f64; 2]) {
        let half = self.plate.size()[0] / 2.0;
        let (sx, sy) = reference.direction_range([-half, half], [y, y]);
        direction_window(sx, sy, self.half_band)
    }

    /// Column span [start, end) of emitter `j` on row `row` (conservative), as the kernel walks it.
    pub fn row_span(&self, j: usize, row: usize) -> Option<(usize, usize)> {
        let e = &self.emitters[j];
        if !self.opts.anti_alias {
            return Some((0, self.plate.width as usize));
        }
        let y = self.plate.y_of_row(row as f64);
        let (wx, wy) = self.row_window(&self.channel_of(j).reference, y);
        row_columns(&self.plate, e, y, wx, wy, self.opts.approximation)
    }

    /// Columns [start, end) inside emitter `j`'s span on row `row` that surely fail the y half of
    /// the exact test (see [`super::support::row_offset_hole`]); the kernels skip them.
    pub fn row_hole(&self, j: usize, row: usize) -> Option<(usize, usize)> {
        if !self.opts.anti_alias {
            return None;
        }
        let y = self.plate.y_of_row(row as f64);
        let (_, wy) = self.row_window(&self.channel_of(j).reference, y);
        row_hole_columns(
            &self.plate,
            &self.emitters[j],
            y,
            wy,
            self.opts.approximation,
        )
    }

    /// Emitters (indices, in order) whose support may reach rows [row0, row0 + rows).
    pub fn candidates(&self, row0: usize, rows: usize, out: &mut Vec<u32>) {
        out.clear();
        for (j, r) in self.rows.iter().enumerate() {
            if let Some((a, b)) = *r {
                if a < row0 + rows && b > row0 {
                    out.push(j as u32);
                }
            }
        }
    }

    /// Computes F for rows [row0, row0 + rows) into `out` (row-major, `rows * width` values).
    /// Returns the number of point-pixel updates done (pixels that passed the support test).
    ///
    /// # Panics
    /// If `out` has the wrong length or the rows leave the plate (a bug in the caller).
    pub fn compute_band(
        &self,
        row0: usize,
        rows: usize,
        out: &mut [Complex64],
        scratch: &mut BandScratch,
    ) -> u64 {
        let w = self.plate.width as usize;
        assert!(
            out.len() == rows * w && row0 + rows <= self.plate.height as usize,
            "band buffer mismatch"
        );
        let inv_lambda = 1.0 / self.plate.wavelength;
        let mut cands = std::mem::take(&mut scratch.candidates);
        self.candidates(row0, rows, &mut cands);
        if self.separable
            && self.opts.anti_alias
            && self.opts.approximation == Approximation::Fresnel
            && self.occlusion.is_none()
            && self.channels.len() == 1
            && matches!(self.channels[0].reference, Reference::Plane { .. })
        {
            let n = if self.opts.precision == Precision::F32 {
                self.fresnel_band32(row0, rows, out, scratch, &cands)
            } else {
                self.fresnel_band(row0, rows, out, scratch, &cands)
            };
            scratch.candidates = cands;
            return n;
        }
        for v in [
            &mut scratch.ref_dir_x,
            &mut scratch.ref_dir_y,
            &mut scratch.re,
            &mut scratch.im,
            &mut scratch.ref_cycles,
        ] {
            v.resize(w, 0.0);
        }
        // Occlusion per tile of the plate's fixed grid, from the tile's centre; the tile row
        // of each band row is looked up (a band may straddle two).
        let tile_cols = self.occlusion.as_ref().map_or(w, |o| o.tile()[0]);
        let mut tile_row: Option<(usize, std::sync::Arc<TileRow>)> = None;
        let fast = self.opts.approximation == Approximation::Exact
            && self.opts.precision == Precision::F32;
        if fast {
            for v in [
                &mut scratch.re32,
                &mut scratch.im32,
                &mut scratch.rdx32,
                &mut scratch.rdy32,
            ] {
                v.clear();
                v.resize(w + PAD, 0.0);
            }
        }
        let single = self.channels.len() == 1;
        if !single {
            scratch.sum_row.resize(w, Complex64::new(0.0, 0.0));
        }
        let mut updates = 0u64;
        for (ri, orow) in out.chunks_exact_mut(w).enumerate() {
            let row = row0 + ri;
            let y = self.plate.y_of_row(row as f64);
            if !single {
                orow.fill(Complex64::new(0.0, 0.0));
            }
            if let Some(o) = &self.occlusion {
                let rt = row / o.tile()[1];
                if tile_row.as_ref().is_none_or(|t| t.0 != rt) {
                    tile_row = Some((rt, o.row(rt, &self.rows)));
                }
            }
            for ch in &self.channels {
                scratch.re.fill(0.0);
                scratch.im.fill(0.0);
                let ref_step = self.reference_directions(&ch.reference, y, fast, scratch);
                let r32 = Row32 {
                    rdx: &scratch.rdx32,
                    rdy: &scratch.rdy32,
                    pitch: self.plate.pitch[0],
                    ref_step,
                    poly_min_distance: self.poly_min_distance,
                };
                let inputs = RowInputs {
                    xs: &self.xs,
                    rdx: &scratch.ref_dir_x,
                    rdy: &scratch.ref_dir_y,
                    half_band: self.half_band,
                    inv_lambda,
                    taper_start: self.taper_start,
                };
                let tile = tile_row.as_ref().map(|(_, tr)| (&**tr, tile_cols));
                updates += self.channel_row(
                    ch,
                    row,
                    y,
                    &cands,
                    &inputs,
                    &r32,
                    tile,
                    fast,
                    [&mut scratch.re, &mut scratch.im],
                    [&mut scratch.re32, &mut scratch.im32],
                );
                self.reference_cycles(&ch.reference, y, inv_lambda, &mut scratch.ref_cycles);
                if single {
                    kernels::conj_reference(
                        self.isa,
                        &scratch.ref_cycles,
                        &scratch.re,
                        &scratch.im,
                        orow,
                    );
                } else {
                    kernels::conj_reference(
                        self.isa,
                        &scratch.ref_cycles,
                        &scratch.re,
                        &scratch.im,
                        &mut scratch.sum_row,
                    );
                    for (o, v) in orow.iter_mut().zip(&scratch.sum_row) {
                        *o += *v;
                    }
                }
            }
        }
        scratch.candidates = cands;
        updates
    }

    /// The reference's direction cosines along row height `y` into `s.ref_dir_x`, `s.ref_dir_y`
    /// (and their f32 copies for the f32 exact kernel); returns the largest step between
    /// neighbouring columns (spherical references, f32 kernel), which its phase split needs.
    fn reference_directions(
        &self,
        reference: &Reference,
        y: f64,
        fast: bool,
        s: &mut BandScratch,
    ) -> [f64; 2] {
        let w = self.plate.width as usize;
        match *reference {
            Reference::Plane { .. } => {
                let d = reference.direction(0.0, y);
                s.ref_dir_x.fill(d[0]);
                s.ref_dir_y.fill(d[1]);
            }
            Reference::Spherical { .. } => {
                for c in 0..w {
                    let d = reference.direction(self.xs[c], y);
                    s.ref_dir_x[c] = d[0];
                    s.ref_dir_y[c] = d[1];
                }
            }
        }
        if fast {
            for (d, v) in s.rdx32.iter_mut().zip(&s.ref_dir_x) {
                *d = *v as f32;
            }
            for (d, v) in s.rdy32.iter_mut().zip(&s.ref_dir_y) {
                *d = *v as f32;
            }
        }
        let mut ref_step = [0.0f64; 2];
        if fast && matches!(reference, Reference::Spherical { .. }) {
            for c in 1..w {
                ref_step[0] = ref_step[0].max((s.ref_dir_x[c] - s.ref_dir_x[c - 1]).abs());
                ref_step[1] = ref_step[1].max((s.ref_dir_y[c] - s.ref_dir_y[c - 1]).abs());
            }
        }
        ref_step
    }

    /// The reference's phase along row height `y`, in cycles (path length / lambda), into `out`.
    fn reference_cycles(&self, reference: &Reference, y: f64, inv_lambda: f64, out: &mut [f64]) {
        match *reference {
            Reference::Plane { tilt } => {
                let (ax, ty) = (tilt[0].sin() * inv_lambda, y * tilt[1].sin() * inv_lambda);
                for (t, &x) in out.iter_mut().zip(&self.xs) {
                    *t = x * ax + ty;
                }
            }
            Reference::Spherical { .. } => {
                for (t, &x) in out.iter_mut().zip(&self.xs) {
                    *t = reference.phase(x, y, 1.0) * inv_lambda;
                }
            }
        }
    }

    /// Adds the channel's candidate emitters on plate row `row` (height `y`) into the row sums
    /// (`re`, `im`; the f32 kernel sums groups of [`F32_GROUP`] in `re32`, `im32` first), each
    /// over its support spans, tile by tile where occlusion applies. Returns the updates.
    #[allow(clippy::too_many_arguments)]
    fn channel_row(
        &self,
        ch: &Channel,
        row: usize,
        y: f64,
        cands: &[u32],
        inputs: &RowInputs,
        r32: &Row32,
        occlusion: Option<(&TileRow, usize)>,
        fast: bool,
        [re, im]: [&mut Vec<f64>; 2],
        [re32, im32]: [&mut Vec<f32>; 2],
    ) -> u64 {
        let w = self.plate.width as usize;
        let (wx, wy) = self.row_window(&ch.reference, y);
        let mut updates = 0u64;
        // f32 path: sums of the current emitter group over the columns [lo, hi) it touched.
        let mut group = usize::MAX;
        let mut touched = (w, 0usize);
        let k0 = cands.partition_point(|&j| (j as usize) < ch.start);
        let k1 = cands.partition_point(|&j| (j as usize) < ch.end);
        for &j in cands.iter().take(k1).skip(k0) {
            let e = &self.emitters[j as usize];
            // Rows outside the emitter's row range hold none of its support (the range
            // is a tested superset); in a tall band most candidates miss most rows.
            if let Some((a, b)) = self.rows[j as usize] {
                if row < a || row >= b {
                    continue;
                }
            }
            let (c0, c1) = if self.opts.anti_alias {
                match row_columns(&self.plate, e, y, wx, wy, self.opts.approximation) {
                    Some(s) => s,
                    None => continue,
                }
            } else {
                (0, w)
            };
            // Off the foot row the y test may cut a hole out of the middle of the span:
            // walk the one or two intervals left.
            let hole = if self.opts.anti_alias {
                row_hole_columns(&self.plate, e, y, wy, self.opts.approximation)
            } else {
                None
            };
            let spans = match hole {
                Some((h0, h1)) if h0 < c1 && h1 > c0 => [(c0, h0.max(c0)), (h1.min(c1), c1)],
                _ => [(c0, c1), (c1, c1)],
            };
            let er = EmitterRow {
                xj: e.pos[0],
                dy: y - e.pos[1],
                z: e.pos[2],
                amplitude: e.amplitude,
                phase_cycles: reduced_cycles(e.phase),
                obliquity: self.opts.obliquity,
            };
            if fast {
                if j as usize / F32_GROUP != group {
                    flush_group(&mut touched, re32, im32, re, im);
                    group = j as usize / F32_GROUP;
                }
                touched = (touched.0.min(c0), touched.1.max(c1));
            }
            let mut add = |a: usize, b: usize| match (self.opts.approximation, fast) {
                (Approximation::Exact, true) => {
                    kernels::accumulate_exact32(self.isa, inputs, r32, &er, a, b, re32, im32)
                }
                (Approximation::Exact, false) => {
                    kernels::accumulate_exact(self.isa, inputs, &er, a, b, re, im)
                }
                (Approximation::Fresnel, _) => {
                    kernels::accumulate_fresnel(self.isa, inputs, &er, a, b, re, im)
                }
            };
            for (c0, c1) in spans {
                if c0 >= c1 {
                    continue;
                }
                if let Some((tr, tile_cols)) = occlusion {
                    for t in c0 / tile_cols..=(c1 - 1) / tile_cols {
                        if tr.visible(j as usize, t) {
                            updates += add(c0.max(t * tile_cols), c1.min((t + 1) * tile_cols));
                        }
                    }
                } else {
                    updates += add(c0, c1);
                }
            }
        }
        if fast {
            flush_group(&mut touched, re32, im32, re, im);
        }
        updates
    }

    /// Point-pixel updates the whole plate will take, estimated from the support spans of up to
    /// `max_rows` sampled rows per emitter (exact when the emitter's rows are fewer).
    pub fn estimate_updates(&self, max_rows: usize) -> f64 {
        let mut total = 0.0;
        for (j, r) in self.rows.iter().enumerate() {
            let Some((a, b)) = *r else { continue };
            let n = b - a;
            let step = (n as f64 / max_rows.max(1) as f64).max(1.0);
            let mut sum = 0.0;
            let mut samples = 0usize;
            let mut t = a as f64;
            while (t as usize) < b {
                if let Some((c0, c1)) = self.row_span(j, t as usize) {
                    sum += (c1 - c0) as f64;
                    if let Some((h0, h1)) = self.row_hole(j, t as usize) {
                        sum -= (h1.min(c1) as f64 - h0.max(c0) as f64).max(0.0);
                    }
                }
                samples += 1;
                t += step;
            }
            if samples > 0 {
                total += sum / samples as f64 * n as f64;
            }
        }
        total
    }
}
