//! Layers: the scene as continuous diffuse surfaces cut into depth slices, carried to the plate
//! by angular-spectrum steps, with silhouette occlusion in wave optics (the layer-based method of
//! Matsushima and Shimobaba, Optics Express 17, 19662, 2009; silhouettes slice by slice from
//! back to front: Matsushima, Applied Optics 44, 4607, 2005).
//!
//! # What is computed
//! 1. **Slices** ([`slices`]): the lattice of the plate's pixel centres, extended over the
//!    scene's front plane, casts rays parallel to z through every mesh. Each crossing of a
//!    surface facing the plate is one sample of a diffuse surface: the shaded amplitude a (the
//!    point sum's shading, [`crate::scene::sampling::SurfaceShader`]), a random phase per lattice
//!    point and triangle, in the slab of depth it falls in. A sample is the emitter a of the
//!    direct sum, spread over one pixel: its value is a e^(i phi) i lambda / (p_x p_y), so that
//!    the angular spectrum (Rayleigh-Sommerfeld of the first kind, which carries the obliquity
//!    factor z / r) gives a e^(i phi) (z / r) e^(i k r) / r on the plate (Goodman, Introduction to
//!    Fourier Optics, 3rd ed., eq. 3-41 with k r >> 1).
//! 2. **Back to front**: the field of the slabs behind is carried over one slab's thickness to
//!    the next plane ([`transfer`]), then masked: zero wherever that slab holds a surface of an
//!    occluding object, or the inside of a closed occluding mesh (crossings behind the plane
//!    odd); then the slab's own samples are added. Light that leaves a surface behind is stopped
//!    by what stands in front of it along its own direction, for every direction the plate
//!    records: parallax and occlusion are right from every viewing position, to within a slab.
//! 3. **To the plate** ([`frame`]): the front plane is carried to the plate by one periodic
//!    transform over a frame that holds both, streamed through scratch files beside the output.
//!
//! The steps run in place ([`step`]) on the front plane in memory, or, above
//! [`PLANE_MEMORY_BYTES`], in tiles with overlap margins through two scratch files ([`tiles`]).
//! The choice follows the scene alone, so every process makes the same one.
//!
//! All of it runs in the frame of the plane reference (fields demodulated by R), so the plate's
//! band is exactly the grid's and F = O conj(R) comes out directly (physics.md, Sampling limits;
//! the recording plane does the same).
//!
//! # Accuracy
//! Against the direct sum with the obliquity factor of the same samples, each placed on its
//! slab's plane, the plate agrees to the f32 transforms' rounding where every sample sees the
//! plate inside its band (`tests/layers.rs`). The layer model itself moves every surface point to
//! its slab's plane: depth is quantised to the slab thickness (a staircase of terraces on sloped
//! surfaces, seen only at apertures far wider than an eye's).
//!
//! # Applies to
//! Meshes (the surfaces are what is sliced; point clouds take the direct sum), one plane
//! reference, exact waves. Every encoding, band, shard and resume rule of the direct sum holds:
//! the slices and the frame are computed again, bit for bit, by every process that needs them.

pub mod frame;
pub mod slices;
pub mod step;
pub mod tiles;
pub mod transfer;

use std::path::PathBuf;
use std::sync::OnceLock;

use num_complex::{Complex32, Complex64};
use rayon::prelude::*;

use self::frame::{Frame, FrameLayout};
use self::slices::{is_closed, Hit, LatticeRect, Slices, Slicing};
use self::transfer::{band_tangents, smooth_size, SpectralGrid, Window};
use super::point_sum::BandScratch;
use super::Emitter;
use crate::error::Result;
use crate::optics::{Plate, Reference};
use crate::scene::mesh::{cross, sub, Mesh};
use crate::scene::sampling::{PhaseMode, Shading, SplitMix64, SurfaceShader};

/// One mesh of a layered scene.
#[derive(Clone, Debug)]
pub struct LayerObject {
    /// The mesh, placed (plate coordinates, metres).
    pub mesh: Mesh,
    /// Lighting.
    pub shading: Shading,
    /// Phases of the surface samples.
    pub phase: PhaseMode,
    /// Seed of the random phases.
    pub seed: u64,
    /// Amplitude factor.
    pub gain: f64,
    /// Whether the object stops light from behind it (silhouette masks).
    pub occludes: bool,
}

/// Share of the half band kept at full weight in every step (the outer fifth rolls off to zero at
/// the Nyquist limit, as on the recording plane; repeated at each slab's step, so the farther
/// slabs roll off more steeply there).
pub const BAND_FLAT: f64 = 0.8;

/// How many slab-step element-passes one element-pass of the frame costs (its rows and column
/// blocks go through scratch files, its columns are gathered with a stride): 4 on the 8192^2
/// production benchmark, where the frame took a tenth of the time for a fortieth of the passes.
pub const FRAME_PASS_WEIGHT: f64 = 4.0;

/// Largest default number of slices.
pub const MAX_DEFAULT_SLICES: usize = 64;
/// Default slab thickness when the scene is shallow enough, metres.
pub const DEFAULT_SLAB: f64 = 25e-6;

/// The layer synthesis of one scene on one plate.
pub struct LayerSynthesis {
    plate: Plate,
    tilt: [f64; 2],
    objects: Vec<LayerObject>,
    closed: Vec<bool>,
    slicing: Slicing,
    /// The front plane's lattice rectangle (the slices share it).
    rect: LatticeRect,
    hop_window: Window,
    final_window: Window,
    layout: FrameLayout,
    /// Largest |tangent| per axis a slab's step carries light along (its reach over one slab).
    step_tangent: [f64; 2],
    /// Tile core of the front plane on disk, or None to hold it in memory.
    tile_core: Option<usize>,
    scratch_dir: PathBuf,
    stem: String,
    frame: OnceLock<(Frame, f64)>,
}

/// Share of the RMS of F over the plate below which F is written as 0: where no sample's band
/// reaches, the transforms and the soft edges' tails leave a residue (about 5e-5 of the plate's
/// RMS) that phase and binary encodings would turn into full-strength noise. Real light under it
/// is an intensity of 1e-7 of the plate's mean at most (speckle minima, the soft edges' last
/// tails).
pub const RESIDUE_FLOOR: f64 = 3e-4;

/// Front planes above this many bytes (the plane and its transfer function, f32 complex each) are
/// carried in tiles through scratch files ([`tiles`]) instead of in memory.
pub const PLANE_MEMORY_BYTES: u64 = 2 << 30;
/// Tile core of a front plane on disk, samples per side.
pub const TILE_CORE: usize = 4096;

/// `lo..=hi` of a set of values.
fn span(v: impl Iterator<Item = f64>) -> [f64; 2] {
    v.fold([f64::INFINITY, f64::NEG_INFINITY], |[a, b], x| {
        [a.min(x), b.max(x)]
    })
}

impl LayerSynthesis {
    /// Prepares the synthesis (geometry only; [`Self::prepare`] computes). `slices`: number of
    /// depth slabs (default: slabs of [`DEFAULT_SLAB`], at most [`MAX_DEFAULT_SLICES`]).
    /// Scratch files go to `scratch_dir`, named after `stem`. Returns why the method does not
    /// apply, if it does not.
    pub fn new(
        plate: Plate,
        reference: Reference,
        objects: Vec<LayerObject>,
        slices: Option<usize>,
        scratch_dir: PathBuf,
        stem: &str,
    ) -> std::result::Result<Self, String> {
        let tilt = match reference {
            Reference::Plane { tilt } => tilt,
            Reference::Spherical { .. } => {
                return Err("the layers path needs a plane reference".into())
            }
        };
        if objects.is_empty() {
            return Err("the layers path slices meshes, and the job has none".into());
        }
        let x = span(
            objects
                .iter()
                .flat_map(|o| o.mesh.positions.iter().map(|p| p[0])),
        );
        let y = span(
            objects
                .iter()
                .flat_map(|o| o.mesh.positions.iter().map(|p| p[1])),
        );
        let z = span(
            objects
                .iter()
                .flat_map(|o| o.mesh.positions.iter().map(|p| p[2])),
        );
        if !(z[0] > 0.0
            && x[0].is_finite()
            && x[1].is_finite()
            && y[0].is_finite()
            && y[1].is_finite()
            && z[1].is_finite())
        {
            return Err(
                "every mesh must lie in front of the plate (z > 0) at finite positions".into(),
            );
        }
        let depth = z[1] - z[0];
        let count = match slices {
            // A flat scene is one slab, whatever was asked.
            _ if depth == 0.0 => 1,
            Some(n) => n,
            None => ((depth / DEFAULT_SLAB).ceil() as usize).clamp(1, MAX_DEFAULT_SLICES),
        };
        if count == 0 || count > 100_000 {
            return Err(format!("layers = {count} is outside 1..=100000"));
        }
        // Slabs cover [z0, z1] with the last depth inside the last slab.
        let spacing = (depth / count as f64).max(1e-9) * (1.0 + 1e-9);
        let slicing = Slicing {
            z0: z[0],
            spacing,
            count,
        };
        let p = plate;
        let half = [p.pitch[0] / 2.0, p.pitch[1] / 2.0];
        let plate_x = [
            p.x_of_col(0.0) - half[0],
            p.x_of_col(p.width as f64 - 1.0) + half[0],
        ];
        let plate_y = [
            p.y_of_row(p.height as f64 - 1.0) - half[1],
            p.y_of_row(0.0) + half[1],
        ];
        // Tangents of every ray from a scene point to a plate point.
        let tangents = |s: [f64; 2], q: [f64; 2], zs: [f64; 2]| -> [f64; 2] {
            let lo = zs
                .iter()
                .map(|&d| (q[0] - s[1]) / d)
                .fold(f64::INFINITY, f64::min);
            let hi = zs
                .iter()
                .map(|&d| (q[1] - s[0]) / d)
                .fold(f64::NEG_INFINITY, f64::max);
            [lo, hi]
        };
        let z_front = slicing.plane(0);
        let travel = slicing.plane(count - 1) - z_front;
        // The last step: full weight for every ray from the scene's box to the plate, then a soft
        // edge 8 Fresnel widths (at least 32 pixels) wide in position at the front plane's depth.
        let edge = (8.0 * (p.wavelength * z_front).sqrt()).max(32.0 * p.pitch[0].max(p.pitch[1]));
        // The flat part reaches half an edge width past the outermost rays: a smooth step that
        // starts on a ray still bends it by about 1e-3.
        let widen = |t: [f64; 2]| [t[0] - edge / 2.0 / z_front, t[1] + edge / 2.0 / z_front];
        let final_window = Window {
            x: widen(tangents(x, plate_x, z)),
            y: widen(tangents(y, plate_y, z)),
            soft: [edge / z_front; 2],
        };
        // The slabs' steps: flat a little beyond the last step's soft edge (what the slabs' steps
        // attenuate there, the last step drops anyway), then soft too. A sharp cut would give each
        // step's kernel tails that fall off only as 1 / distance and wrap around the front plane's
        // periodic grid (measured: 1 % of max |F| on the test scene).
        let sup = final_window.support();
        let extra = edge / z[1];
        let hop_window = Window {
            x: [sup[0][0] - extra, sup[0][1] + extra],
            y: [sup[1][0] - extra, sup[1][1] + extra],
            soft: [edge / z_front; 2],
        };
        // Sideways travel over the slabs: the steps' support, within the plate's band (about the
        // reference: an off-axis reference or a coarse pitch keeps light from spreading far).
        let band = band_tangents([tilt[0].sin(), tilt[1].sin()], p.nyquist_cosines(), 128);
        let hs = hop_window.support();
        let hop_sup = [0, 1].map(|a| [hs[a][0].max(band[a][0]), hs[a][1].min(band[a][1])]);
        let ring = |d: f64, pitch: f64| {
            (4.0 * (p.wavelength * d.max(0.0)).sqrt() / pitch).ceil() as i64 + 16
        };
        // The front plane: the scene's box widened by the farthest sideways travel from the back
        // plane, and a guard for the edges' ringing.
        let sx = [
            x[0] + hop_sup[0][0].min(0.0) * travel,
            x[1] + hop_sup[0][1].max(0.0) * travel,
        ];
        let sy = [
            y[0] + hop_sup[1][0].min(0.0) * travel,
            y[1] + hop_sup[1][1].max(0.0) * travel,
        ];
        let gx = ring(travel, p.pitch[0]);
        let gy = ring(travel, p.pitch[1]);
        let c0 = p.col_of_x(sx[0]).floor() as i64 - gx;
        let c1 = p.col_of_x(sx[1]).ceil() as i64 + gx;
        let row_of = |yy: f64| (p.height as f64 - 1.0) / 2.0 - yy / p.pitch[1];
        let r0 = row_of(sy[1]).floor() as i64 - gy;
        let r1 = row_of(sy[0]).ceil() as i64 + gy;
        let size = [
            smooth_size((c1 - c0 + 1) as usize),
            smooth_size((r1 - r0 + 1) as usize),
        ];
        if size[0] > 1 << 20 || size[1] > 1 << 20 {
            return Err(format!(
                "the scene's front plane would be {} x {} samples (more than 2^20 on a side)",
                size[0], size[1]
            ));
        }
        let rect = LatticeRect {
            origin: [c0, r0],
            size,
        };
        // The frame: every kept ray from the front plane lands in [land_lo, land_hi]; a period N
        // with N > plate_hi - land_lo and N > land_hi - plate_lo folds none of them onto the
        // plate (plus half an edge width for the soft edge's own tails).
        let fx = [
            p.x_of_col(c0 as f64),
            p.x_of_col((c0 + size[0] as i64 - 1) as f64),
        ];
        let fy = [
            p.y_of_row((r0 + size[1] as i64 - 1) as f64),
            p.y_of_row(r0 as f64),
        ];
        let period =
            |f: [f64; 2], s: [f64; 2], q: [f64; 2], pitch: f64, own: usize, plate_n: usize| {
                let land = [f[0] + s[0] * z_front, f[1] + s[1] * z_front];
                let span = (q[1] - land[0]).max(land[1] - q[0]) + edge / 2.0;
                smooth_size(((span / pitch).ceil() as usize + 16).max(own + plate_n))
            };
        let n = [
            period(fx, sup[0], plate_x, p.pitch[0], size[0], p.width as usize),
            period(fy, sup[1], plate_y, p.pitch[1], size[1], p.height as usize),
        ];
        let layout = FrameLayout {
            n,
            plane: size,
            plane_origin: [c0, r0],
            plate: [p.width as usize, p.height as usize],
        };
        let closed = objects.iter().map(|o| is_closed(&o.mesh)).collect();
        let step_tangent = [0, 1].map(|a| hop_sup[a][0].abs().max(hop_sup[a][1].abs()));
        let tile_core =
            (2 * size[0] as u64 * size[1] as u64 * 8 > PLANE_MEMORY_BYTES).then_some(TILE_CORE);
        Ok(LayerSynthesis {
            step_tangent,
            tile_core,
            plate,
            tilt,
            objects,
            closed,
            slicing,
            rect,
            hop_window,
            final_window,
            layout,
            scratch_dir,
            stem: stem.to_string(),
            frame: OnceLock::new(),
        })
    }

    /// The plate.
    pub fn plate(&self) -> &Plate {
        &self.plate
    }
    /// Carries the front plane in tiles of `core` samples through scratch files (None: in
    /// memory), whatever its size: for checks of the tiled path on small scenes.
    pub fn with_tiles(mut self, core: Option<usize>) -> Self {
        self.tile_core = core;
        self
    }
    /// |F| below which the plate is written as 0 ([`RESIDUE_FLOOR`]), once prepared.
    pub fn residue_floor(&self) -> Option<f64> {
        self.frame.get().map(|f| f.1)
    }
    /// The tile core of the front plane on disk, if it is tiled.
    pub fn tile_core(&self) -> Option<usize> {
        self.tile_core
    }
    /// Margins [x, y] (samples) a tile needs for one slab's step: the reach of its steepest ray
    /// over one slab, plus 4 Fresnel widths of the slab and 32 samples for the soft edges' tails.
    pub fn step_halo(&self) -> [usize; 2] {
        let s = self.slicing.spacing;
        [0, 1].map(|a| {
            let p = self.plate.pitch[a];
            ((s * self.step_tangent[a]) / p).ceil() as usize
                + (4.0 * (self.plate.wavelength * s).sqrt() / p).ceil() as usize
                + 32
        })
    }
    /// The depth slabs.
    pub fn slicing(&self) -> Slicing {
        self.slicing
    }
    /// The front plane's lattice rectangle.
    pub fn plane_rect(&self) -> LatticeRect {
        self.rect
    }
    /// The frame of the last step.
    pub fn frame_layout(&self) -> FrameLayout {
        self.layout
    }
    /// Whether each object is a closed mesh (its inside is masked too).
    pub fn closed(&self) -> &[bool] {
        &self.closed
    }
    /// Whether any object occludes.
    pub fn occludes(&self) -> bool {
        self.objects.iter().any(|o| o.occludes)
    }
    /// Emitters nothing can reach (always 0: the frame carries every sample).
    pub fn unreachable(&self) -> usize {
        0
    }

    fn spectral(&self, n: [usize; 2]) -> SpectralGrid {
        let p = &self.plate;
        SpectralGrid {
            n,
            pitch: p.pitch,
            wavelength: p.wavelength,
            f_r: [
                self.tilt[0].sin() / p.wavelength,
                self.tilt[1].sin() / p.wavelength,
            ],
            band_flat: BAND_FLAT,
        }
    }

    /// Work of the whole computation in FFT element-passes (one element of one radix-2 pass):
    /// the slices' transforms, the frame's three passes, and the rasterisation counted as one
    /// element-pass per lattice point tested.
    pub fn work(&self) -> LayerWork {
        let s = self.rect.len() as f64;
        let [nx, ny] = self.layout.n.map(|v| v as f64);
        let ph = self.layout.plane[1] as f64;
        let hops = self.slicing.count.saturating_sub(1) as f64;
        let slices = hops * 2.0 * s * s.log2().max(1.0);
        let frame = ph * nx * nx.log2() + nx * 2.0 * ny * ny.log2();
        let bands = self.plate.height as f64 * nx * nx.log2();
        LayerWork {
            slices,
            frame,
            bands,
        }
    }

    /// Lattice points the rasterisation tests (the triangles' boxes over the slabs they span).
    pub fn raster_work(&self) -> f64 {
        self.slices().work()
    }

    /// Peak memory of the computation, bytes: the front plane and its transfer function while
    /// slicing, or the plane and a column block of the frame.
    pub fn peak_bytes(&self) -> u64 {
        let bits = self.closed.iter().filter(|c| **c).count() as u64 * self.rect.len() as u64 / 8;
        let s = match self.tile_core {
            None => self.rect.len() as u64 * 8,
            // A tile with its margins, its transfer function and its core.
            Some(core) => {
                let [hx, hy] = self.step_halo();
                3 * ((core + 2 * hx) * (core + 2 * hy)) as u64 * 8
            }
        };
        (2 * s + bits).max(s + 2 * frame::BLOCK_BYTES as u64)
    }

    /// Where the scratch files go.
    pub fn scratch_dir(&self) -> &std::path::Path {
        &self.scratch_dir
    }
    /// Bytes of the scratch files.
    pub fn scratch_bytes(&self) -> u64 {
        let plane = match self.tile_core {
            Some(_) => 2 * self.rect.len() as u64 * 8,
            None => 0,
        };
        self.layout.scratch_bytes() + plane
    }

    /// Lines for `plan`.
    pub fn describe(&self) -> Vec<String> {
        let s = self.slicing;
        let [fw, fh] = self.rect.size;
        let [nx, ny] = self.layout.n;
        let occl = if self.occludes() {
            let closed = self.closed.iter().filter(|c| **c).count();
            format!(
                "silhouette masks slice by slice, back to front ({closed} of {} meshes closed: their insides are masked too)",
                self.objects.len()
            )
        } else {
            "none".to_string()
        };
        vec![
            format!(
                "layers: {} slabs of {:.2} um from z = {:.3} to {:.3} mm; front plane {fw} x {fh} samples at the plate's pitch; frame {nx} x {ny} ({:.2} GB of scratch files beside the output, peak memory about {:.2} GB)",
                s.count,
                s.spacing * 1e6,
                s.z0 * 1e3,
                (s.z0 + s.spacing * s.count as f64) * 1e3,
                self.scratch_bytes() as f64 / 1e9,
                self.peak_bytes() as f64 / 1e9
            ),
            format!("layers occlusion: {occl}"),
            match self.tile_core {
                None => "layers front plane: held in memory".to_string(),
                Some(c) => {
                    let [hx, hy] = self.step_halo();
                    format!(
                        "layers front plane: on disk in tiles of {c} x {c} samples with margins of {hx} x {hy} (more than {:.1} GB held whole)",
                        PLANE_MEMORY_BYTES as f64 / 1e9
                    )
                }
            },
        ]
    }

    /// The surface samples as emitters on their slabs' planes (for checks against the direct
    /// sum: with the obliquity factor they give the same plate). Errors as [`Self::prepare`].
    pub fn samples_as_emitters(&self) -> Result<Vec<Emitter>> {
        let slices = self.slices();
        let shaders = self.shaders()?;
        let mut out = Vec::new();
        for k in 0..self.slicing.count {
            for h in slices.hits(k) {
                if let Some((amp, phase)) = self.sample_of(&h, &shaders, &self.rect) {
                    let (x, y) = self.lattice_xy(h.sample);
                    out.push(Emitter {
                        pos: [x, y, self.slicing.plane(k)],
                        amplitude: amp,
                        phase,
                    });
                }
            }
        }
        Ok(out)
    }

    fn slices(&self) -> Slices {
        let meshes: Vec<&Mesh> = self.objects.iter().map(|o| &o.mesh).collect();
        Slices::new(&meshes, &self.plate, self.rect, self.slicing)
    }

    fn shaders(&self) -> Result<Vec<SurfaceShader<'_>>> {
        self.objects
            .iter()
            .map(|o| SurfaceShader::new(&o.mesh, &o.shading))
            .collect()
    }

    fn lattice(&self, sample: usize) -> [i64; 2] {
        lattice_in(&self.rect, sample)
    }

    fn lattice_xy(&self, sample: usize) -> (f64, f64) {
        let [c, r] = self.lattice(sample);
        (self.plate.x_of_col(c as f64), self.plate.y_of_row(r as f64))
    }

    /// Amplitude and phase of a hit's sample (the hit's sample index in `rect`), or None when its
    /// surface faces away from the plate.
    fn sample_of(
        &self,
        h: &Hit,
        shaders: &[SurfaceShader<'_>],
        rect: &LatticeRect,
    ) -> Option<(f64, f64)> {
        let o = &self.objects[h.object as usize];
        let mesh = &o.mesh;
        let t = h.triangle as usize;
        let [a, b, c] = mesh.corners(&mesh.triangles[t]);
        let face = cross(sub(b, a), sub(c, a));
        let double = mesh.materials[mesh.tri_material[t] as usize].double_sided;
        if !(face[2] < 0.0 || double) {
            return None;
        }
        let amp = shaders[h.object as usize]
            .shade(t, h.uv[0], h.uv[1])
            .amplitude
            * o.gain;
        let [gx, gy] = lattice_in(rect, h.sample);
        let phase = match o.phase {
            PhaseMode::Random => {
                SplitMix64::stream(o.seed, gx as u64, gy as u64, t as u64).next_f64()
                    * std::f64::consts::TAU
            }
            PhaseMode::Constant(p) => p,
        };
        Some((amp, phase))
    }

    /// Work of [`Self::prepare`] in slab-step element-passes (the frame's weighted by
    /// [`FRAME_PASS_WEIGHT`]), for progress and estimates.
    pub fn prepare_work(&self) -> f64 {
        let w = self.work();
        w.slices + FRAME_PASS_WEIGHT * w.frame
    }

    /// Computes the slices and the frame (once; later calls return at once). `on_work` gets the
    /// work done by each step, in the units of [`Self::prepare_work`]. Errors: the meshes'
    /// shading, or the scratch files (named).
    pub fn prepare(&self, on_work: &mut dyn FnMut(f64)) -> Result<()> {
        if self.frame.get().is_some() {
            return Ok(());
        }
        let work = self.work();
        let pw = self.rect.size[0];
        let (memory, disk) = match self.tile_core {
            None => (
                Some(self.front_plane(&mut |share| on_work(share * work.slices))?),
                None,
            ),
            Some(core) => (
                None,
                Some(self.front_plane_tiled(core, &mut |share| on_work(share * work.slices))?),
            ),
        };
        let frame = Frame::build(
            &|r, out: &mut [Complex32]| match (&memory, &disk) {
                (Some(plane), _) => {
                    out.copy_from_slice(&plane[r * pw..(r + 1) * pw]);
                    Ok(())
                }
                (None, Some(file)) => file.read_row(r, out),
                (None, None) => unreachable!("one of the two is set"),
            },
            self.layout,
            self.spectral(self.layout.n),
            self.slicing.plane(0),
            &self.final_window,
            &self.scratch_dir,
            &self.stem,
            &mut |share| on_work(share * FRAME_PASS_WEIGHT * work.frame),
        )?;
        // The floor: RESIDUE_FLOOR of the RMS of F over the plate's rows (Parseval in the frame).
        let floor = RESIDUE_FLOOR * (frame.plate_power() / self.plate.pixels() as f64).sqrt();
        let _ = self.frame.set((frame, floor));
        Ok(())
    }

    /// The field on the front plane (row-major over [`Self::plane_rect`], demodulated by R):
    /// every slab back to front, carried, masked and added to.
    pub fn front_plane(&self, on_work: &mut dyn FnMut(f64)) -> Result<Vec<Complex32>> {
        let shaders = self.shaders()?;
        let slices = self.slices();
        let [w, h] = self.rect.size;
        let count = self.slicing.count;
        let mut u = vec![Complex32::new(0.0, 0.0); w * h];
        let step = self::step::Step::new(w, h);
        let hop = if count > 1 {
            self.spectral(self.rect.size)
                .transfer_columns(self.slicing.spacing, &self.hop_window)
        } else {
            Vec::new()
        };
        let mut behind = self.parity_bits();
        let mut lit = false;
        for k in (0..count).rev() {
            if lit && k + 1 < count {
                step.apply(&mut u, &hop);
            }
            self.apply_slab(
                k,
                &slices,
                &self.rect,
                &mut u,
                &mut behind,
                &shaders,
                &mut lit,
            );
            on_work(1.0 / count as f64);
        }
        Ok(u)
    }

    /// One bit per front-plane sample for each closed occluding mesh: the parity of its crossings
    /// behind the current plane (None for the other objects).
    fn parity_bits(&self) -> Vec<Option<Vec<u64>>> {
        let words = self.rect.len().div_ceil(64);
        self.objects
            .iter()
            .zip(&self.closed)
            .map(|(o, &c)| (o.occludes && c).then(|| vec![0u64; words]))
            .collect()
    }

    /// Slab `k`'s masks and samples on `u`, the field over `rect` (the front plane or a part of
    /// it; `slices` built on `rect`). `behind` indexes the whole front plane.
    ///
    /// Crossings are visited twice, a bounded piece at a time: first the masks (the parity of the
    /// closed occluders' crossings behind the plane, their surfaces, then the insides), then the
    /// parity in front and the samples, so no sample of this slab is masked by another piece of it.
    #[allow(clippy::too_many_arguments)]
    fn apply_slab(
        &self,
        k: usize,
        slices: &Slices,
        rect: &LatticeRect,
        u: &mut [Complex32],
        behind: &mut [Option<Vec<u64>>],
        shaders: &[SurfaceShader<'_>],
        lit: &mut bool,
    ) {
        let plane = self.slicing.plane(k);
        let [w, h] = rect.size;
        let big = self.rect.size[0];
        let off = [
            (rect.origin[0] - self.rect.origin[0]) as usize,
            (rect.origin[1] - self.rect.origin[1]) as usize,
        ];
        let global = |s: usize| (off[1] + s / w) * big + off[0] + s % w;
        let toggle = |behind: &mut [Option<Vec<u64>>], hh: &Hit| {
            if let Some(bits) = &mut behind[hh.object as usize] {
                let g = global(hh.sample);
                bits[g / 64] ^= 1 << (g % 64);
            }
        };
        if self.occludes() {
            slices.visit(k, &mut |hits| {
                for hh in hits {
                    if hh.z > plane {
                        toggle(behind, hh);
                    }
                    if self.objects[hh.object as usize].occludes {
                        u[hh.sample] = Complex32::new(0.0, 0.0);
                    }
                }
            });
            for bits in behind.iter().flatten() {
                for i in 0..h {
                    let g0 = (off[1] + i) * big + off[0];
                    let g1 = g0 + w;
                    let first = g0 / 64;
                    for (k, &word) in bits[first..g1.div_ceil(64)].iter().enumerate() {
                        let wi = first + k;
                        let mut m = word;
                        while m != 0 {
                            let g = wi * 64 + m.trailing_zeros() as usize;
                            m &= m - 1;
                            if g >= g0 && g < g1 {
                                u[i * w + g - g0] = Complex32::new(0.0, 0.0);
                            }
                        }
                    }
                }
            }
        }
        let k_wave = self.plate.k();
        let s_r = [self.tilt[0].sin(), self.tilt[1].sin()];
        let sample_scale = self.plate.wavelength / (self.plate.pitch[0] * self.plate.pitch[1]);
        slices.visit(k, &mut |hits| {
            let values: Vec<Option<Complex32>> = hits
                .par_iter()
                .map(|hh| {
                    let (amp, phase) = self.sample_of(hh, shaders, rect)?;
                    let [c, r] = lattice_in(rect, hh.sample);
                    let (x, y) = (self.plate.x_of_col(c as f64), self.plate.y_of_row(r as f64));
                    // The sample's value, demodulated by R at its lattice point.
                    let cycles =
                        (phase - k_wave * (s_r[0] * x + s_r[1] * y)) / std::f64::consts::TAU;
                    let t = cycles - cycles.round();
                    let (s, c) = (std::f64::consts::TAU * t).sin_cos();
                    // i a lambda / (p_x p_y) e^(i phase): the factor i turns (c, s) to (-s, c).
                    let m = amp * sample_scale;
                    Some(Complex32::new((-s * m) as f32, (c * m) as f32))
                })
                .collect();
            for (hh, v) in hits.iter().zip(values) {
                if self.occludes() && hh.z <= plane {
                    toggle(behind, hh);
                }
                if let Some(v) = v {
                    u[hh.sample] += v;
                    *lit = true;
                }
            }
        });
    }

    /// Computes F for rows [r0, r0 + n) into `out`; returns the pixels computed.
    ///
    /// # Panics
    /// If [`Self::prepare`] has not run (a bug in the caller), or as [`Frame::read_band`].
    pub fn compute_band(
        &self,
        r0: usize,
        n: usize,
        out: &mut [Complex64],
        _scratch: &mut BandScratch,
    ) -> u64 {
        let (frame, floor) = self
            .frame
            .get()
            .expect("LayerSynthesis::prepare runs before the bands");
        frame.read_band(r0, n, out, *floor);
        (n * self.plate.width as usize) as u64
    }
}

/// Lattice column and row of sample `s` of `rect`.
fn lattice_in(rect: &LatticeRect, s: usize) -> [i64; 2] {
    let w = rect.size[0];
    [
        rect.origin[0] + (s % w) as i64,
        rect.origin[1] + (s / w) as i64,
    ]
}

/// Work of a layer synthesis, in FFT element-passes.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct LayerWork {
    /// The slabs' transforms.
    pub slices: f64,
    /// The frame's row and column passes.
    pub frame: f64,
    /// The bands' inverse row transforms.
    pub bands: f64,
}
