//! Time estimates for `plan`: the work a run will do (point-pixel updates, visibility tests,
//! pixels encoded and written) times per-thread costs measured on the development machine
//! (2 cores of a shared x86-64 server with AVX-512, 2026-12-03, whole jobs with `--stats`, see
//! BENCHMARKS.md). Another machine scales them by its own speed; the estimate says which costs it
//! used, so a user can compare with a short run.

use crate::synthesis::{Approximation, Precision};

/// Seconds of one thread per point-pixel update, by kernel.
pub fn seconds_per_update(
    approximation: Approximation,
    precision: Precision,
    separable: bool,
) -> f64 {
    match (approximation, precision, separable) {
        // badge job (2048^2, 442 points), one thread: 0.84-0.88 G updates/s; a 20000-emitter
        // mesh at 5 mm on two threads: 2.09 G/s.
        (Approximation::Exact, Precision::F32, _) => 1.0e-9,
        // badge job, one thread: 0.17-0.18 G updates/s.
        (Approximation::Exact, Precision::F64, _) => 5.6e-9,
        // the register-blocked tile product: 6.3-6.9 G/s on one thread (badge), 8.4 per thread
        // on the 4096^2 x 1000-point job.
        (Approximation::Fresnel, Precision::F32, true) => 0.13e-9,
        // badge Fresnel f64, one thread: 1.08 G/s.
        (Approximation::Fresnel, Precision::F64, true) => 0.93e-9,
        // The per-pixel Fresnel kernel (occlusion, several references, spherical reference) runs
        // in f64 at any precision; not measured on its own, taken as the exact f64 rate (it
        // saves the square root, so this errs long).
        (Approximation::Fresnel, _, false) => 5.6e-9,
    }
}

/// Seconds of one thread per visibility test (one emitter against one occlusion tile's centre,
/// a ray cast through the mesh's bounding-volume tree): an occluded 1016-triangle mesh, 20000
/// emitters, 2048^2 plate, two threads, the occluded run's time less its updates' time.
pub const SECONDS_PER_VISIBILITY_TEST: f64 = 1.1e-6;

/// Seconds of one thread per pixel to encode, write and hash (criterion `encode_write_band`:
/// 2-5 ns).
pub const SECONDS_PER_PIXEL_WRITTEN: f64 = 5e-9;

/// Seconds of one thread per FFT element-pass (one element of one radix-2 pass, f32 complex,
/// rustfft) in the layers path's slab steps with their masks and samples, the frame's passes
/// counted [`crate::synthesis::layers::FRAME_PASS_WEIGHT`] times (file traffic and strided
/// gathers): measured on whole layers jobs, 0.41 ns on the 8192^2 production benchmark (200 s),
/// 0.55 ns on a 2048^2 job (5.8 s); BENCHMARKS.md.
pub const SECONDS_PER_FFT_ELEMENT_PASS: f64 = 0.45e-9;

/// Seconds of one thread per lattice point tested by the layers path's rasterisation.
pub const SECONDS_PER_RASTER_POINT: f64 = 3.0e-9;

/// Wall-clock seconds of a layers job: its FFT element-passes, rasterised lattice points and
/// pixels written, on `threads` threads.
pub fn layer_seconds(passes: f64, raster: f64, pixels: f64, threads: usize) -> f64 {
    let cpu = passes * SECONDS_PER_FFT_ELEMENT_PASS
        + raster * SECONDS_PER_RASTER_POINT
        + pixels * SECONDS_PER_PIXEL_WRITTEN;
    cpu / (threads.max(1) as f64 * PARALLEL_EFFICIENCY)
}

/// Share of the threads' time a run keeps busy (two threads give 1.7-1.9x one).
pub const PARALLEL_EFFICIENCY: f64 = 0.9;

/// Wall-clock seconds for the given work on `threads` threads.
pub fn wall_seconds(update_seconds: f64, tests: f64, pixels: f64, threads: usize) -> f64 {
    let cpu =
        update_seconds + tests * SECONDS_PER_VISIBILITY_TEST + pixels * SECONDS_PER_PIXEL_WRITTEN;
    cpu / (threads.max(1) as f64 * PARALLEL_EFFICIENCY)
}

/// A duration for people: "42 s", "3.5 min", "2.1 h".
pub fn human(seconds: f64) -> String {
    if seconds < 120.0 {
        format!("{seconds:.1} s")
    } else if seconds < 7200.0 {
        format!("{:.1} min", seconds / 60.0)
    } else {
        format!("{:.1} h", seconds / 3600.0)
    }
}
