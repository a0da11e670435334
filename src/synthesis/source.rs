//! What a synthesis path is to the rest of the program: something that computes the fringe term F
//! of any band of plate rows, says how much work the plate is, and names itself for the sidecar.
//! Implemented by the direct point sum, the recording plane and the iterated phase cell; the job
//! streams bands from a `dyn FringeSource` without knowing which.

use num_complex::Complex64;

use super::point_sum::BandScratch;
use crate::optics::Plate;

/// Which path a source is, with what the sidecar records of it.
#[derive(Clone, Debug, PartialEq)]
pub enum SourcePath {
    /// Every emitter summed on the plate itself.
    Direct,
    /// Emitters summed on a recording plane, carried to the plate by an angular-spectrum step.
    RecordingPlane {
        /// Plate -> plane distance, metres.
        distance: f64,
        /// Grid margins of the plane [x, y], pixels.
        margins: [usize; 2],
        /// Rows per band the plane is computed in.
        band_rows: usize,
    },
    /// An iterated phase cell repeated over the plate.
    PhaseCell,
    /// Meshes sliced in depth, carried to the plate by angular-spectrum steps.
    Layers {
        /// Number of slabs.
        slabs: usize,
        /// Slab thickness, metres.
        spacing: f64,
        /// Front plane [columns, rows].
        plane: [usize; 2],
        /// Frame of the last step [columns, rows].
        frame: [usize; 2],
        /// Whether silhouettes mask.
        silhouettes: bool,
    },
}

impl SourcePath {
    /// The sidecar's `synthesis.path` for point sums (None for the phase cell).
    pub fn name(&self) -> Option<&'static str> {
        match self {
            SourcePath::Direct => Some("direct"),
            SourcePath::RecordingPlane { .. } => Some("recording-plane"),
            SourcePath::Layers { .. } => Some("layers"),
            SourcePath::PhaseCell => None,
        }
    }
}

/// A synthesis path: produces F band by band. Implementations must give the same values for a
/// row whatever band it is computed in and whatever thread computes it (the determinism rule of
/// DEVELOPERS.md), so bands, shards and thread counts never change the plate's bits.
pub trait FringeSource: Send + Sync {
    /// The plate.
    fn plate(&self) -> &Plate;
    /// Computes F for rows [r0, r0 + n) into `out` (n x width, row-major); returns the work done
    /// (point-pixel updates for point sums, pixels otherwise).
    fn compute_band(
        &self,
        r0: usize,
        n: usize,
        out: &mut [Complex64],
        scratch: &mut BandScratch,
    ) -> u64;
    /// Estimated work of the whole plate, in the units `compute_band` returns.
    fn estimate_work(&self, max_rows: usize) -> f64;
    /// Relative cost of rows [r0, r0 + n), for balancing shards (default: pixels).
    fn rows_work(&self, r0: usize, n: usize, scratch: &mut Vec<u32>) -> f64 {
        let _ = (r0, scratch);
        self.plate().width as f64 * n as f64
    }
    /// Rows per band the source prefers (it pays a cost once per band), if any.
    fn preferred_band_rows(&self) -> Option<usize> {
        None
    }
    /// Emitters whose support misses the plate.
    fn unreachable(&self) -> usize {
        0
    }
    /// Which path this is.
    fn path(&self) -> SourcePath;
    /// Work done once before the bands (in the units `prepare` reports), 0 for none.
    fn prepare_work(&self) -> f64 {
        0.0
    }
    /// Does the work every band needs, once, before the first band; `on_work` gets the work done
    /// by each step. Sources that need nothing keep the default.
    fn prepare(&self, on_work: &mut dyn FnMut(f64)) -> crate::error::Result<()> {
        let _ = on_work;
        Ok(())
    }
}

/// The trait's plate, band and reach methods forwarded to a type's own methods of those names.
macro_rules! forward_band_methods {
    () => {
        fn plate(&self) -> &Plate {
            self.plate()
        }
        fn compute_band(
            &self,
            r0: usize,
            n: usize,
            out: &mut [Complex64],
            scratch: &mut BandScratch,
        ) -> u64 {
            self.compute_band(r0, n, out, scratch)
        }
        fn unreachable(&self) -> usize {
            self.unreachable()
        }
    };
}

impl FringeSource for super::point_sum::PointSum {
    forward_band_methods!();
    fn estimate_work(&self, max_rows: usize) -> f64 {
        self.estimate_updates(max_rows)
    }
    fn rows_work(&self, r0: usize, n: usize, cands: &mut Vec<u32>) -> f64 {
        self.candidates(r0, n, cands);
        let mid = r0 + n / 2;
        // Span lengths on the middle row, plus a per-pixel cost for the reference and encoding.
        let spans: usize = cands
            .iter()
            .filter_map(|&j| self.row_span(j as usize, mid))
            .map(|(a, b)| b - a)
            .sum();
        (spans as f64 + 0.05 * self.plate().width as f64) * n as f64
    }
    fn path(&self) -> SourcePath {
        SourcePath::Direct
    }
}

impl FringeSource for super::recording_plane::RecordingPlane {
    forward_band_methods!();
    fn estimate_work(&self, _max_rows: usize) -> f64 {
        self.estimate_cost(1.0, 0.0)
    }
    fn preferred_band_rows(&self) -> Option<usize> {
        Some(self.band_rows())
    }
    fn path(&self) -> SourcePath {
        SourcePath::RecordingPlane {
            distance: self.distance(),
            margins: self.margins(),
            band_rows: self.band_rows(),
        }
    }
}

impl FringeSource for super::phase_cell::PhaseCell {
    fn plate(&self) -> &Plate {
        self.plate()
    }
    fn compute_band(
        &self,
        r0: usize,
        n: usize,
        out: &mut [Complex64],
        _scratch: &mut BandScratch,
    ) -> u64 {
        self.compute_band(r0, n, out)
    }
    fn estimate_work(&self, _max_rows: usize) -> f64 {
        self.plate().pixels() as f64
    }
    fn path(&self) -> SourcePath {
        SourcePath::PhaseCell
    }
}

impl FringeSource for super::layers::LayerSynthesis {
    forward_band_methods!();
    fn estimate_work(&self, _max_rows: usize) -> f64 {
        self.plate().pixels() as f64
    }
    fn path(&self) -> SourcePath {
        SourcePath::Layers {
            slabs: self.slicing().count,
            spacing: self.slicing().spacing,
            plane: self.plane_rect().size,
            frame: self.frame_layout().n,
            silhouettes: self.occludes(),
        }
    }
    fn prepare_work(&self) -> f64 {
        self.prepare_work()
    }
    fn prepare(&self, on_work: &mut dyn FnMut(f64)) -> crate::error::Result<()> {
        self.prepare(on_work)
    }
}
