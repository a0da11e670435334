//! Synthesis: from emitters (or targets) to the complex fringe term F = O conj(R), band by band.
//!
//! A synthesis path is a [`source::FringeSource`]: the direct point sum (`point_sum`, inner loops
//! in `kernels`), the recording plane (`recording_plane`) or an iterated phase cell (`iterative`
//! computes the cell, `phase_cell` lays it over the plate); `planner` chooses between the point-sum
//! paths as a plain recipe. `reference` is the slow, obviously correct per-pixel sum that every
//! fast path is tested against; `support` bounds where each emitter may contribute without
//! aliasing; `occlusion` tests visibility on a tile grid fixed in plate pixels. This module
//! depends on `optics`, `cpu` and `encoding` (the phase-level rule the iteration projects onto).

pub mod iterative;
pub mod kernels;
pub mod layers;
pub mod occlusion;
pub mod phase_cell;
pub mod planner;
pub mod point_sum;
pub mod recording_plane;
pub mod reference;
pub mod source;
pub mod spots;
pub mod support;

/// One point source on the object side of the plate, in plate coordinates (metres).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Emitter {
    /// Position (x, y, z), metres; z > 0 is the distance in front of the plate.
    pub pos: [f64; 3],
    /// Amplitude a_j (dimensionless, >= 0).
    pub amplitude: f64,
    /// Initial phase phi_j, radians.
    pub phase: f64,
}

/// How the phase and amplitude of each spherical wave are computed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Approximation {
    /// exp(i k r) / r with r the exact distance.
    Exact,
    /// Paraxial: phase k (z + rho^2 / (2 z)), amplitude 1 / z.
    Fresnel,
}

impl Approximation {
    /// The job-file spelling.
    pub fn name(self) -> &'static str {
        match self {
            Approximation::Exact => "exact",
            Approximation::Fresnel => "fresnel",
        }
    }
}

/// Arithmetic of the exact point sum.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Precision {
    /// f64 throughout (phasor error below 3e-11 per term).
    #[default]
    F64,
    /// f32 lanes with the phase anchored in f64 per segment of eight pixels
    /// ([`kernels`]' `exact32`): phase error below 3e-5 rad per term, the same support pixels.
    /// Applies to the exact approximation; the Fresnel paths stay in f64.
    F32,
}

impl Precision {
    /// The job-file spelling.
    pub fn name(self) -> &'static str {
        match self {
            Precision::F64 => "f64",
            Precision::F32 => "f32",
        }
    }
}

/// Options of the point-source summation.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PointSumOptions {
    /// Exact or paraxial waves.
    pub approximation: Approximation,
    /// Multiply each wave by the obliquity factor z / r (Rayleigh-Sommerfeld, first kind);
    /// with the Fresnel approximation the factor is 1.
    pub obliquity: bool,
    /// Restrict each emitter to the plate region where its fringes are below the pixel Nyquist limit.
    /// Always on in jobs; off only to study aliasing.
    pub anti_alias: bool,
    /// Arithmetic of the exact kernel.
    pub precision: Precision,
}

impl Default for PointSumOptions {
    fn default() -> Self {
        PointSumOptions {
            approximation: Approximation::Exact,
            obliquity: false,
            anti_alias: true,
            precision: Precision::F64,
        }
    }
}
