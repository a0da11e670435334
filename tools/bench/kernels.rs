//! Criterion benches of the hot kernels.
//!
//! * `point_sum/{exact_f32,exact,fresnel_f32,fresnel}/{avx512,avx2,portable}`: `PointSum::compute_band` on one band of a plate where
//!   every emitter's anti-aliasing support covers every pixel (pitch 0.4 um at 633 nm: lambda / 2p =
//!   0.79, while no emitter is seen at a direction cosine above 0.15), so the work is exactly
//!   points x pixels; throughput is reported in point-pixel updates (`Throughput::Elements`). One core.
//! * `fft2d/2048`: one forward 2-D FFT, complex f32, 2048^2, with caller scratch (rayon, all cores).
//! * `propagation/asm_2048`: one band-limited angular-spectrum propagation (2x padding) at 2048^2, f32.
//! * `gs_equiv/{2048,4096}`: what one Gerchberg-Saxton iteration costs with the crate's parts: a
//!   Fourier-lens propagation forward, the target amplitude imposed, the inverse propagation, the
//!   plate amplitude set to one (complex f32), with the row kernels the iterative loop uses. The numpy counterpart is `tools/reference/gs_numpy.py`.
//! * `gs_loop/{2048,4096}`: one free iteration of the loop itself (`synthesis::iterative::optimise`, plain GS
//!   through a Fourier lens, the error summed every iteration), as the difference of 20 and 4
//!   iterations over 16; this is what a job's iterations cost.
//!
//! Run: `cargo bench --bench kernels` (or `-- point_sum` for one group). The numpy reference doing the
//! same work is in `tools/reference/`; `tools/bench/run_all.sh` runs both and writes the ratios.

use std::sync::Arc;
use std::time::Duration;

use criterion::{black_box, criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use fringemill::optics::fft2d::Fft2d;
use fringemill::optics::propagation::{Grid, PropagationPlanner, PropagationRecipe, Propagator};
use fringemill::optics::{Plate, Reference};
use fringemill::synthesis::iterative::{optimise, IterOptions, Plane};
use fringemill::synthesis::kernels::{self, KernelIsa};
use fringemill::synthesis::point_sum::{BandScratch, PointSum};
use fringemill::synthesis::{Approximation, Emitter, PointSumOptions, Precision};
use num_complex::{Complex32, Complex64};
use rayon::prelude::*;

/// Plate of the point-sum benches: 1024 x 1024 at 0.4 um, 633 nm (0.41 mm square).
const PLATE_W: u32 = 1024;
/// Rows of the benched band (the band sits in the middle of the plate).
const BAND_ROWS: usize = 32;
/// Emitters: a 8 x 8 grid 2 mm in front of the plate, each seeing the plate within +-0.15 in
/// direction cosine, far inside the 0.79 the pitch allows.
const POINTS_SIDE: usize = 8;

fn bench_plate() -> Plate {
    Plate {
        width: PLATE_W,
        height: PLATE_W,
        pitch: [0.4e-6; 2],
        wavelength: 633e-9,
    }
}

/// Deterministic scene: points on a 0.1 mm grid around the axis, depths 2.0 .. 2.1 mm,
/// amplitudes and phases from a fixed sequence.
fn bench_emitters() -> Vec<Emitter> {
    let mut out = Vec::with_capacity(POINTS_SIDE * POINTS_SIDE);
    for a in 0..POINTS_SIDE {
        for b in 0..POINTS_SIDE {
            let n = (a * POINTS_SIDE + b) as f64;
            out.push(Emitter {
                pos: [
                    (b as f64 - 3.5) * 12.5e-6,
                    (a as f64 - 3.5) * 12.5e-6,
                    2.0e-3 + 0.1e-3 * ((n * 0.618_033_988_7).fract()),
                ],
                amplitude: 0.5 + 0.5 * ((n * 0.754_877_666).fract()),
                phase: std::f64::consts::TAU * ((n * 0.569_840_291).fract()),
            });
        }
    }
    out
}

fn point_sum(c: &mut Criterion) {
    let plate = bench_plate();
    let emitters = bench_emitters();
    let row0 = (PLATE_W as usize - BAND_ROWS) / 2;
    let w = PLATE_W as usize;
    let work = (emitters.len() * BAND_ROWS * w) as u64;
    let mut g = c.benchmark_group("point_sum");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(3))
        .warm_up_time(Duration::from_secs(1));
    g.throughput(Throughput::Elements(work));
    let isas: Vec<(&str, KernelIsa)> = kernels::available()
        .into_iter()
        .rev()
        .map(|i| (i.name(), i))
        .collect();
    for (aname, approximation, precision) in [
        ("exact_f32", Approximation::Exact, Precision::F32),
        ("exact", Approximation::Exact, Precision::F64),
        ("fresnel_f32", Approximation::Fresnel, Precision::F32),
        ("fresnel", Approximation::Fresnel, Precision::F64),
    ] {
        for &(iname, isa) in &isas {
            // Only the f32 kernels have AVX-512 copies.
            if isa.level() == kernels::IsaLevel::Avx512 && precision != Precision::F32 {
                continue;
            }
            let opts = PointSumOptions {
                approximation,
                precision,
                ..PointSumOptions::default()
            };
            let ps = PointSum::new(
                plate,
                Reference::Plane { tilt: [0.0, 0.0] },
                emitters.clone(),
                opts,
            )
            .with_isa(isa);
            let mut out = vec![Complex64::new(0.0, 0.0); BAND_ROWS * w];
            let mut scratch = BandScratch::default();
            // The bench only means what it says if every point reached every pixel.
            let done = ps.compute_band(row0, BAND_ROWS, &mut out, &mut scratch);
            assert_eq!(
                done, work,
                "support does not cover the whole band ({aname}, {iname})"
            );
            g.bench_function(BenchmarkId::new(aname, iname), |b| {
                b.iter(|| {
                    black_box(ps.compute_band(row0, BAND_ROWS, black_box(&mut out), &mut scratch))
                })
            });
        }
    }
    g.finish();
}

fn fft(c: &mut Criterion) {
    let n = 2048;
    let fft = Fft2d::<f32>::new(n, n);
    let mut data: Vec<Complex32> = (0..n * n)
        .map(|i| Complex32::new(((i * 7919) % 1013) as f32 / 1013.0, 0.0))
        .collect();
    let mut scratch = vec![Complex32::new(0.0, 0.0); fft.scratch_len()];
    let mut g = c.benchmark_group("fft2d");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(3))
        .warm_up_time(Duration::from_secs(1));
    g.throughput(Throughput::Elements((n * n) as u64));
    g.bench_function(BenchmarkId::from_parameter(n), |b| {
        b.iter(|| fft.process_with_scratch(black_box(&mut data), &mut scratch))
    });
    g.finish();
}

fn grid(n: usize) -> Grid {
    Grid {
        nx: n,
        ny: n,
        pitch: [2e-6; 2],
        wavelength: 532e-9,
        lattice: Default::default(),
    }
}

fn propagation(c: &mut Criterion) {
    let n = 2048;
    let g0 = grid(n);
    let mut planner = PropagationPlanner::<f32>::new();
    // 5 mm is below z_c = N p^2 / lambda = 15.4 mm: the planner's own choice is this recipe too.
    let prop = planner.plan_recipe(
        &g0,
        5e-3,
        PropagationRecipe::AngularSpectrum {
            band_limited: true,
            pad: 2,
        },
    );
    let mut field: Vec<Complex32> = (0..n * n)
        .map(|i| {
            if (i / n + i % n) % 64 < 32 {
                Complex32::new(1.0, 0.0)
            } else {
                Complex32::new(0.0, 0.0)
            }
        })
        .collect();
    let mut scratch = vec![Complex32::new(0.0, 0.0); prop.scratch_len()];
    let mut g = c.benchmark_group("propagation");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(3))
        .warm_up_time(Duration::from_secs(1));
    g.throughput(Throughput::Elements((n * n) as u64));
    g.bench_function("asm_2048", |b| {
        b.iter(|| prop.propagate_with_scratch(black_box(&mut field), &mut scratch))
    });
    g.finish();
}

/// A planned propagator.
type Prop = Arc<dyn Propagator<f32>>;

/// The GS benches' problem at n x n (as `gs_numpy.py` and `gs_fftw.c`): a Fourier lens of 0.1 m
/// and its inverse, and a 64-pixel checkerboard target intensity.
fn gs_problem(n: usize) -> (Prop, Prop, Vec<f64>) {
    let g0 = grid(n);
    let mut planner = PropagationPlanner::<f32>::new();
    let focal = 0.1;
    let fwd = planner.plan_recipe(&g0, 0.0, PropagationRecipe::Fourier { focal });
    let back = planner.plan_recipe(
        &fwd.output(),
        0.0,
        PropagationRecipe::Fourier { focal: -focal },
    );
    let target = (0..n * n)
        .map(|i| {
            if (i / n / 64 + i % n / 64).is_multiple_of(2) {
                1.0
            } else {
                0.0
            }
        })
        .collect();
    (fwd, back, target)
}

fn gs_equiv(c: &mut Criterion) {
    let mut g = c.benchmark_group("gs_equiv");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(3))
        .warm_up_time(Duration::from_secs(1));
    for n in [2048usize, 4096] {
        let (fwd, inv, target) = gs_problem(n);
        let mut field: Vec<Complex32> = (0..n * n)
            .map(|i| Complex32::from_polar(1.0, ((i * 2654435761usize) % 6283) as f32 * 1e-3))
            .collect();
        let mut plate = field.clone();
        let mut scratch = vec![Complex32::new(0.0, 0.0); fwd.scratch_len().max(inv.scratch_len())];
        let isa = kernels::detect();
        g.throughput(Throughput::Elements((n * n) as u64));
        g.bench_function(BenchmarkId::from_parameter(n), |b| {
            b.iter(|| {
                field.copy_from_slice(&plate);
                fwd.propagate_with_scratch(&mut field, &mut scratch);
                field
                    .par_chunks_mut(n)
                    .zip(target.par_chunks(n))
                    .for_each(|(row, amp)| {
                        kernels::constrain_row(isa, row, amp, None, 1.0, 0, n, 1.0)
                    });
                inv.propagate_with_scratch(&mut field, &mut scratch);
                plate
                    .par_chunks_mut(n)
                    .zip(field.par_chunks(n))
                    .for_each(|(h, u)| kernels::unit_row(isa, h, u));
                black_box(&plate);
            })
        });
    }
    g.finish();
}

/// One free iteration of the crate's own loop (`synthesis::iterative::optimise`, plain GS, one
/// Fourier-lens plane, error evaluated every iteration): each sample times `optimise` with 4 and
/// with 20 iterations and keeps the difference over 16, so set-up and the final error drop out.
fn gs_loop(c: &mut Criterion) {
    let mut g = c.benchmark_group("gs_loop");
    g.sample_size(10)
        .measurement_time(Duration::from_secs(10))
        .warm_up_time(Duration::from_secs(1));
    for n in [2048usize, 4096] {
        let g0 = grid(n);
        let (fwd, back, target) = gs_problem(n);
        let planes = [Plane {
            target,
            propagator: fwd,
            back,
        }];
        let run = |iterations: usize| {
            let opts = IterOptions {
                iterations,
                ..IterOptions::default()
            };
            let t = std::time::Instant::now();
            black_box(optimise(&planes, &g0, &opts, &mut |_, _| {}));
            t.elapsed()
        };
        g.throughput(Throughput::Elements((n * n) as u64));
        g.bench_function(BenchmarkId::from_parameter(n), |b| {
            b.iter_custom(|reps| {
                let mut total = Duration::ZERO;
                for _ in 0..reps {
                    let (short, long) = (run(4), run(20));
                    total += long.saturating_sub(short) / 16;
                }
                total
            })
        });
    }
    g.finish();
}

/// Encoding one 4096-pixel row of F per iteration, and encoding plus writing a 4096 x 256 band
/// through the strip writer (uncompressed, to a file in the system's temporary folder): the
/// floor under every job, quoted in ns per pixel (time / 4096 or / 1 Mi pixels).
fn encode(c: &mut Criterion) {
    use fringemill::encoding::Encoding;
    use fringemill::output::tiff::{Compression, StripWriter, TiffLayout};
    let w = 4096usize;
    let mut x = 0x2545_f491_4f6c_dd1du64;
    let row: Vec<Complex64> = (0..w)
        .map(|_| {
            let mut next = || {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                (x >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
            };
            Complex64::new(next(), next())
        })
        .collect();
    let mut g = c.benchmark_group("encode_row");
    g.throughput(Throughput::Elements(w as u64));
    for (name, e) in [
        ("phase256", Encoding::Phase { levels: 256 }),
        ("phase65536", Encoding::Phase { levels: 65536 }),
        ("binary_amplitude", Encoding::BinaryAmplitude),
        (
            "amplitude8",
            Encoding::Amplitude {
                bits: 8,
                scale: 0.7,
            },
        ),
    ] {
        let mut out = vec![0u8; e.row_bytes(w)];
        g.bench_function(name, |b| b.iter(|| e.encode_row(black_box(&row), &mut out)));
    }
    g.finish();
    let mut g = c.benchmark_group("encode_write_band");
    let rows = 256usize;
    g.throughput(Throughput::Elements((w * rows) as u64));
    let dir = std::env::temp_dir().join(format!("fringemill-bench-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    for (name, e) in [
        ("phase256", Encoding::Phase { levels: 256 }),
        ("binary_amplitude", Encoding::BinaryAmplitude),
    ] {
        g.bench_function(name, |b| {
            b.iter(|| {
                let layout = TiffLayout {
                    width: w as u32,
                    height: rows as u32,
                    bits_per_sample: e.bits_per_sample(),
                    compression: Compression::None,
                    rows_per_strip: 64,
                    pixel_pitch_m: (1e-6, 1e-6),
                    software: "bench".into(),
                    description: None,
                    bigtiff: None,
                };
                let path = dir.join(format!("{name}.tif"));
                let mut wr = StripWriter::create(&path, layout).unwrap();
                let rb = e.row_bytes(w);
                let mut buf = vec![0u8; rb * 64];
                for _ in 0..rows / 64 {
                    for r in buf.chunks_exact_mut(rb) {
                        e.encode_row(&row, r);
                    }
                    wr.write_rows(&buf).unwrap();
                }
                wr.finish().unwrap()
            })
        });
    }
    g.finish();
    let _ = std::fs::remove_dir_all(&dir);
}

criterion_group!(
    benches,
    point_sum,
    fft,
    propagation,
    gs_equiv,
    gs_loop,
    encode
);
criterion_main!(benches);
