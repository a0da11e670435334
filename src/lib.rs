//! fringemill computes fringe patterns (computer-generated holograms) on the CPU, for laser and
//! e-beam mask writers and for phase-only spatial light modulators.
//!
//! Pipeline: job file ([`job::spec`]) -> scene ([`scene`]) -> emitters -> synthesis
//! ([`synthesis::point_sum`]) -> complex fringe term F, band by band -> encoding ([`encoding`]) ->
//! streamed TIFF strips and a JSON sidecar ([`output`]).
//!
//! # Conventions
//! * **Units**: SI inside (metres, radians); job files carry the unit in the key (`_mm`, `_um`, `_nm`, `_deg`).
//! * **Frame**: the plate is the plane z = 0; object points sit at z > 0 (their distance in front of it).
//! * **Pixels**: (row i, column j) of a W x H plate with pitch (px, py) has its centre at
//!   x = (j - (W-1)/2) px, y = ((H-1)/2 - i) py. Row 0 is the top row of the file; y points up.
//! * **Phase sign**: time dependence exp(-i w t); a wave diverging from a point is exp(+i k r)/r.
//! * **Reference**: unit amplitude; plane exp(i k (x sin tx + y sin ty)) or spherical exp(i k rR).
//! * **Fringe term**: F = O conj(R); every encoding is a function of F alone, pixel by pixel.
//! * **Output order**: row-major, top row first; 1-bit rows packed MSB first; 16-bit little-endian.
//! * **Normalisation**: none; amplitudes are a_j / r_j with r in metres.
//!
//! # Range checks
//! Inputs are checked as `!(x > 0.0)` rather than `x <= 0.0` on purpose: the negated form also
//! refuses NaN (clippy's `neg_cmp_op_on_partial_ord` is allowed crate-wide for that reason).
//!
//! # Example
//! ```
//! use fringemill::optics::{Plate, Reference};
//! use fringemill::synthesis::{Emitter, PointSumOptions, point_sum::{PointSum, BandScratch}};
//! use num_complex::Complex64;
//! let plate = Plate { width: 64, height: 8, pitch: [2e-6, 2e-6], wavelength: 633e-9 };
//! let e = Emitter { pos: [0.0, 0.0, 5e-3], amplitude: 1.0, phase: 0.0 };
//! let sum = PointSum::new(plate, Reference::Plane { tilt: [0.0, 0.0] }, vec![e], PointSumOptions::default());
//! let mut f = vec![Complex64::new(0.0, 0.0); 64 * 8];
//! let updates = sum.compute_band(0, 8, &mut f, &mut BandScratch::default());
//! assert_eq!(updates, 64 * 8); // every pixel lies inside this point's support
//! ```
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod cpu;
pub mod encoding;
pub mod error;
pub mod job;
pub mod optics;
pub mod output;
pub mod raster;
pub mod replay;
pub mod scene;
pub mod synthesis;
pub use error::{Error, Result};
