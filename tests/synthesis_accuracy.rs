//! The production point-sum engine against the slow f64 reference (`synthesis::reference`), and the
//! reference itself against closed-form optics.

use fringemill::optics::{Plate, Reference};
use fringemill::synthesis::kernels::{self, KernelIsa};
use fringemill::synthesis::point_sum::{BandScratch, PointSum};
use fringemill::synthesis::reference::fringe_at;
use fringemill::synthesis::{Approximation, Emitter, PointSumOptions, Precision};
use num_complex::Complex64;

/// Small deterministic generator (xorshift64*), so tests need no extra crate.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545F4914F6CDD1D) >> 11) as f64 / (1u64 << 53) as f64
    }
    fn range(&mut self, a: f64, b: f64) -> f64 {
        a + (b - a) * self.next()
    }
}

fn random_scene(rng: &mut Rng, n: usize, plate: &Plate, z: [f64; 2]) -> Vec<Emitter> {
    let s = plate.size();
    (0..n)
        .map(|_| Emitter {
            pos: [
                rng.range(-0.8, 0.8) * s[0],
                rng.range(-0.8, 0.8) * s[1],
                rng.range(z[0], z[1]),
            ],
            amplitude: rng.range(0.2, 1.0),
            phase: rng.range(0.0, 6.3),
        })
        .collect()
}

fn whole_plate(sum: &PointSum, band: usize) -> Vec<Complex64> {
    let p = *sum.plate();
    let (w, h) = (p.width as usize, p.height as usize);
    let mut out = vec![Complex64::new(f64::NAN, f64::NAN); w * h];
    let mut scratch = BandScratch::default();
    let mut r0 = 0;
    while r0 < h {
        let n = band.min(h - r0);
        sum.compute_band(r0, n, &mut out[r0 * w..(r0 + n) * w], &mut scratch);
        r0 += n;
    }
    out
}

/// Exact and Fresnel waves, plane (on- and off-axis) and spherical references, with and without the
/// obliquity factor: relative field error below 1e-6 against the reference sum (f64 both; the bound
/// covers the reduction of k r modulo 2 pi), on bands of several sizes including non-dividing ones.
/// The masks are the same pixel sets: any pixel where one side includes a point and the other
/// does not would show an error of order 1 / r, far above the bound.
#[test]
fn point_sum_matches_reference_sum() {
    let mut rng = Rng(0x5eed_1234);
    let plate = Plate {
        width: 37,
        height: 29,
        pitch: [1.1e-6, 0.9e-6],
        wavelength: 532e-9,
    };
    let refs = [
        Reference::Plane { tilt: [0.0, 0.0] },
        Reference::Plane {
            tilt: [12f64.to_radians(), -5f64.to_radians()],
        },
        Reference::Spherical {
            position: [3e-3, -2e-3, 40e-3],
        },
    ];
    for reference in refs {
        for approximation in [Approximation::Exact, Approximation::Fresnel] {
            for obliquity in [false, true] {
                let emitters = random_scene(&mut rng, 40, &plate, [20e-6, 300e-6]);
                let opts = PointSumOptions {
                    approximation,
                    obliquity,
                    anti_alias: true,
                    precision: Precision::F64,
                };
                let sum = PointSum::new(plate, reference, emitters.clone(), opts);
                let portable = PointSum::new(plate, reference, emitters.clone(), opts)
                    .with_isa(KernelIsa::PORTABLE);
                let mut maxref = 0.0f64;
                let reference_field: Vec<Complex64> = (0..plate.height)
                    .flat_map(|i| (0..plate.width).map(move |j| (i, j)))
                    .map(|(i, j)| fringe_at(&plate, &reference, &emitters, &opts, i, j))
                    .collect();
                for f in &reference_field {
                    maxref = maxref.max(f.norm());
                }
                assert!(maxref > 0.0);
                for (band, engine) in [(1, &sum), (4, &sum), (29, &portable), (7, &sum)] {
                    let fast = whole_plate(engine, band);
                    for (idx, (a, b)) in fast.iter().zip(&reference_field).enumerate() {
                        let err = (a - b).norm() / maxref;
                        assert!(err < 1e-6, "{reference:?} {approximation:?} obliquity={obliquity} band={band} pixel {idx}: {a} vs {b}");
                    }
                }
            }
        }
    }
}

/// The support test really removes aliasing contributions: without it, a point close to a coarse
/// plate has pixels whose local fringe frequency exceeds 1/(2p); with it, none of the counted updates
/// come from such pixels, and a pixel right under the point is always included.
#[test]
fn support_counts_follow_nyquist_limit() {
    let plate = Plate {
        width: 101,
        height: 101,
        pitch: [4e-6, 4e-6],
        wavelength: 633e-9,
    };
    let z = 200e-6;
    let e = Emitter {
        pos: [0.0, 0.0, z],
        amplitude: 1.0,
        phase: 0.0,
    };
    let sum = PointSum::new(
        plate,
        Reference::Plane { tilt: [0.0, 0.0] },
        vec![e],
        PointSumOptions::default(),
    );
    let mut f = vec![Complex64::new(0.0, 0.0); 101 * 101];
    let n = sum.compute_band(0, 101, &mut f, &mut BandScratch::default());
    // Brute-force count from the definition (physics.md, Sampling limits).
    let mut expect = 0u64;
    for i in 0..101u32 {
        for j in 0..101u32 {
            let x = plate.x_of_col(j as f64);
            let y = plate.y_of_row(i as f64);
            let r = (x * x + y * y + z * z).sqrt();
            let fx = x / (plate.wavelength * r);
            let fy = y / (plate.wavelength * r);
            if fx.abs() <= 1.0 / (2.0 * plate.pitch[0]) && fy.abs() <= 1.0 / (2.0 * plate.pitch[1])
            {
                expect += 1;
            } else {
                assert_eq!(f[(i * 101 + j) as usize], Complex64::new(0.0, 0.0));
            }
        }
    }
    assert_eq!(n, expect);
    assert!(expect < 101 * 101 && expect > 0);
    // Square support of half-width z tan(asin(lambda/2p)) on the axes (physics.md).
    let half = z * (plate.wavelength / (2.0 * plate.pitch[0])).asin().tan();
    let cols_on_axis = (0..101)
        .filter(|&j| f[50 * 101 + j] != Complex64::new(0.0, 0.0))
        .count();
    let expect_cols = 2 * (half / plate.pitch[0]).floor() as usize + 1;
    assert_eq!(cols_on_axis, expect_cols);
}

/// Band size and band order do not change a single bit (fixed summation order per pixel).
#[test]
fn bands_are_bit_identical() {
    let mut rng = Rng(77);
    let plate = Plate {
        width: 64,
        height: 48,
        pitch: [1e-6, 1e-6],
        wavelength: 633e-9,
    };
    let emitters = random_scene(&mut rng, 60, &plate, [30e-6, 200e-6]);
    let sum = PointSum::new(
        plate,
        Reference::Plane {
            tilt: [3f64.to_radians(), 0.0],
        },
        emitters,
        PointSumOptions::default(),
    );
    let a = whole_plate(&sum, 48);
    for band in [1, 5, 16] {
        let b = whole_plate(&sum, band);
        assert!(a
            .iter()
            .zip(&b)
            .all(|(x, y)| x.re.to_bits() == y.re.to_bits() && x.im.to_bits() == y.im.to_bits()));
    }
}

/// Fresnel zone plate (Hecht, Optics, sec. 10.3): one on-axis point, plane reference at normal
/// incidence. Re F changes sign where k r crosses (n + 1/2) pi, i.e. successive edges of the
/// binary-amplitude pattern lie lambda / 2 apart in sqrt(rho^2 + z^2). Zone radii from
/// rho_n^2 = n lambda f + n^2 lambda^2 / 4 measured within one pixel.
#[test]
fn zone_plate_ring_edges() {
    let lambda = 633e-9;
    let p = 1e-6;
    let z = 2e-3; // support radius z tan(asin(0.3165)) = 0.67 mm, wider than the 0.5 mm row walked
    let w = 1001u32;
    let plate = Plate {
        width: w,
        height: 1,
        pitch: [p, p],
        wavelength: lambda,
    };
    // Phase k z of the point removed so zone n starts at rho_n (phi_j = -k z mod 2 pi).
    let k = 2.0 * std::f64::consts::PI / lambda;
    let e = Emitter {
        pos: [0.0, 0.0, z],
        amplitude: 1.0,
        phase: -(k * z) % (2.0 * std::f64::consts::PI),
    };
    let sum = PointSum::new(
        plate,
        Reference::Plane { tilt: [0.0, 0.0] },
        vec![e],
        PointSumOptions::default(),
    );
    let mut f = vec![Complex64::new(0.0, 0.0); w as usize];
    sum.compute_band(0, 1, &mut f, &mut BandScratch::default());
    // Binary amplitude edges along the row, right half (x >= 0).
    let centre = (w as usize - 1) / 2;
    let clear: Vec<bool> = f.iter().map(|v| v.re >= 0.0).collect();
    let mut edges = Vec::new();
    for c in centre..w as usize - 1 {
        if clear[c] != clear[c + 1] {
            edges.push((c - centre) as f64 * p + p / 2.0);
        }
    }
    assert!(edges.len() > 20, "{} edges", edges.len());
    // Re F = cos(k (r - z)) changes sign where r - z = (2m + 1) lambda / 4, i.e. at Hecht's zone law
    // r - f = n lambda / 2 with n = m + 1/2: rho_n^2 = n lambda f + n^2 lambda^2 / 4.
    for (m, &rho) in edges.iter().enumerate() {
        let n = m as f64 + 0.5;
        let rho_expect = (n * lambda * z + n * n * lambda * lambda / 4.0).sqrt();
        // The measured edge is the midpoint between two pixel centres: within half a pixel.
        assert!(
            (rho - rho_expect).abs() <= p / 2.0 + 1e-12,
            "edge {m}: {rho} vs {rho_expect}"
        );
        if m > 0 {
            // Successive edges lambda / 2 apart in sqrt(rho^2 + z^2), up to the pixel quantization.
            let step = (rho * rho + z * z).sqrt() - (edges[m - 1].powi(2) + z * z).sqrt();
            assert!((step - lambda / 2.0).abs() <= p * rho / (rho * rho + z * z).sqrt() + 1e-12);
        }
    }
}

/// Grating equation (Hecht ch. 10): a far on-axis point and a plane reference tilted by t give
/// fringes of period lambda / sin(t) at the plate centre, within 1 %.
#[test]
fn tilted_reference_fringe_period() {
    let lambda = 532e-9;
    let p = 0.5e-6;
    let t = 10f64.to_radians();
    let w = 2001u32;
    let plate = Plate {
        width: w,
        height: 1,
        pitch: [p, p],
        wavelength: lambda,
    };
    let e = Emitter {
        pos: [0.0, 0.0, 2.0],
        amplitude: 1.0,
        phase: 0.0,
    };
    let sum = PointSum::new(
        plate,
        Reference::Plane { tilt: [t, 0.0] },
        vec![e],
        PointSumOptions::default(),
    );
    let mut f = vec![Complex64::new(0.0, 0.0); w as usize];
    sum.compute_band(0, 1, &mut f, &mut BandScratch::default());
    let mut crossings = Vec::new();
    for c in 0..w as usize - 1 {
        if (f[c].re >= 0.0) != (f[c + 1].re >= 0.0) {
            // Linear interpolation of the zero crossing.
            let a = f[c].re;
            let b = f[c + 1].re;
            crossings.push(c as f64 + a / (a - b));
        }
    }
    let n = crossings.len();
    assert!(n > 10);
    let period_px = 2.0 * (crossings[n - 1] - crossings[0]) / (n - 1) as f64;
    let expect = lambda / t.sin() / p;
    assert!(
        (period_px / expect - 1.0).abs() < 0.01,
        "period {period_px} px vs {expect} px"
    );
}

/// Angle multiplexing: a plate with two channels is the sum of each channel's F with its own
/// reference (F = sum_c O_c conj(R_c)), checked against the reference sum per channel.
#[test]
fn channels_add_their_fringe_terms() {
    let mut rng = Rng(4242);
    let plate = Plate {
        width: 41,
        height: 23,
        pitch: [1e-6, 1e-6],
        wavelength: 633e-9,
    };
    let a = random_scene(&mut rng, 20, &plate, [50e-6, 200e-6]);
    let b = random_scene(&mut rng, 15, &plate, [50e-6, 200e-6]);
    let ra = Reference::Plane {
        tilt: [8f64.to_radians(), 0.0],
    };
    let rb = Reference::Plane {
        tilt: [-6f64.to_radians(), 4f64.to_radians()],
    };
    let opts = PointSumOptions::default();
    let sum = PointSum::with_channels(plate, vec![(ra, a.clone()), (rb, b.clone())], opts);
    let f = whole_plate(&sum, 5);
    let mut maxref = 0.0f64;
    let expect: Vec<Complex64> = (0..plate.height)
        .flat_map(|i| (0..plate.width).map(move |j| (i, j)))
        .map(|(i, j)| {
            fringe_at(&plate, &ra, &a, &opts, i, j) + fringe_at(&plate, &rb, &b, &opts, i, j)
        })
        .inspect(|v| maxref = maxref.max(v.norm()))
        .collect();
    for (x, y) in f.iter().zip(&expect) {
        assert!((x - y).norm() / maxref < 1e-6);
    }
}

/// Occlusion hook: an emitter hidden from every tile contributes nothing, and the rest is
/// bit-identical to a plate computed without the hidden emitters (same summation order).
#[test]
fn hidden_emitters_contribute_nothing() {
    struct HideOdd;
    impl fringemill::synthesis::point_sum::Visibility for HideOdd {
        fn visible(&self, j: usize, _eye: [f64; 3]) -> bool {
            j.is_multiple_of(2)
        }
    }
    let mut rng = Rng(99);
    let plate = Plate {
        width: 70,
        height: 30,
        pitch: [1e-6, 1e-6],
        wavelength: 633e-9,
    };
    let all = random_scene(&mut rng, 30, &plate, [50e-6, 200e-6]);
    let even: Vec<Emitter> = all.iter().step_by(2).copied().collect();
    let r = Reference::Plane {
        tilt: [2f64.to_radians(), 0.0],
    };
    let with_hook = PointSum::new(plate, r, all, PointSumOptions::default())
        .with_occlusion_tiles(std::sync::Arc::new(HideOdd), [16, 5]);
    let plain = PointSum::new(plate, r, even, PointSumOptions::default());
    let a = whole_plate(&with_hook, 7);
    let b = whole_plate(&plain, 7);
    assert!(a
        .iter()
        .zip(&b)
        .all(|(x, y)| x.re.to_bits() == y.re.to_bits() && x.im.to_bits() == y.im.to_bits()));
}

/// The separable Fresnel path (plane reference: one phasor per column and emitter per band) gives the
/// same pixel set as the per-pixel path and the same field within 1e-10 sum(a_j / z_j): each path's
/// phasors are within 3e-11 of exact (kernels unit test), the separable one multiplies two of them,
/// so each term differs by at most 9e-11 a_j / z_j.
#[test]
fn separable_fresnel_matches_per_pixel_path() {
    let mut rng = Rng(2024);
    let plate = Plate {
        width: 97,
        height: 61,
        pitch: [1.3e-6, 0.8e-6],
        wavelength: 532e-9,
    };
    for tilt in [[0.0, 0.0], [7f64.to_radians(), -3f64.to_radians()]] {
        let emitters = random_scene(&mut rng, 50, &plate, [40e-6, 400e-6]);
        let opts = PointSumOptions {
            approximation: Approximation::Fresnel,
            obliquity: false,
            anti_alias: true,
            precision: Precision::F64,
        };
        let r = Reference::Plane { tilt };
        let fast = PointSum::new(plate, r, emitters.clone(), opts);
        let bound = 1e-10 * emitters.iter().map(|e| e.amplitude / e.pos[2]).sum::<f64>();
        let slow = PointSum::new(plate, r, emitters, opts).with_separable(false);
        for band in [1, 13, 61] {
            let a = whole_plate(&fast, band);
            let b = whole_plate(&slow, band);
            for (i, (x, y)) in a.iter().zip(&b).enumerate() {
                assert!((x - y).norm() <= bound, "pixel {i}: {x} vs {y}");
                assert_eq!(
                    x.norm() == 0.0,
                    y.norm() == 0.0,
                    "pixel {i}: support differs"
                );
            }
        }
    }
}

/// The f32 exact kernel against the f64 engine (itself checked against the reference sum above):
/// near scenes (small supports, steep fringes), deep scenes (k r up to 3e6 rad, where a plain f32
/// phase would be off by radians) and an off-axis scene seen through a 25 degree reference, on
/// plane and spherical references, with and without obliquity, both kernel copies and several
/// band sizes. Checked:
/// - the same support pixels (the update counts are equal; a pixel in one set only would also
///   show an error of order a / r, far above the bound);
/// - per pixel |F32 - F64| <= 4e-5 x sum_j a_j / r_j, the phase bound of `kernels::exact32`
///   (3e-5 rad per term) plus the f32 sum of up to 256 terms;
/// - |dF| / max |F| <= 1e-4 (the goal the speed work was set);
/// - the portable and AVX2 copies give the same bits, and so do all band sizes.
#[test]
fn f32_exact_kernel_within_bound() {
    let mut rng = Rng(0xf32f_32f3);
    let plate = Plate {
        width: 67,
        height: 41,
        pitch: [1.0e-6, 1.2e-6],
        wavelength: 633e-9,
    };
    let tilt = 25f64.to_radians();
    let s = plate.size();
    let off_axis: Vec<Emitter> = (0..60)
        .map(|_| {
            let z = rng.range(2e-3, 20e-3);
            Emitter {
                // Seen from the plate along the reference direction: dx / r near sin 25 deg.
                pos: [
                    -z * tilt.tan() + rng.range(-1.0, 1.0) * s[0],
                    rng.range(-1.0, 1.0) * s[1],
                    z,
                ],
                amplitude: rng.range(0.2, 1.0),
                phase: rng.range(0.0, 6.3),
            }
        })
        .collect();
    let cases: Vec<(&str, Reference, Vec<Emitter>)> = vec![
        (
            "near",
            Reference::Plane { tilt: [0.0, 0.0] },
            random_scene(&mut rng, 80, &plate, [20e-6, 400e-6]),
        ),
        (
            "deep",
            Reference::Plane {
                tilt: [3f64.to_radians(), -2f64.to_radians()],
            },
            random_scene(&mut rng, 80, &plate, [0.1, 0.3]),
        ),
        ("off-axis", Reference::Plane { tilt: [tilt, 0.0] }, off_axis),
        (
            "spherical",
            Reference::Spherical {
                position: [2e-3, -1e-3, 30e-3],
            },
            random_scene(&mut rng, 80, &plate, [50e-6, 2e-3]),
        ),
    ];
    let mut worst_rel = 0.0f64;
    for (name, reference, emitters) in cases {
        for obliquity in [false, true] {
            let opts = PointSumOptions {
                approximation: Approximation::Exact,
                obliquity,
                anti_alias: true,
                precision: Precision::F64,
            };
            let opts32 = PointSumOptions {
                precision: Precision::F32,
                ..opts
            };
            let f64_sum = PointSum::new(plate, reference, emitters.clone(), opts);
            let (w, h) = (plate.width as usize, plate.height as usize);
            let mut exact = vec![Complex64::new(0.0, 0.0); w * h];
            let n64 = f64_sum.compute_band(0, h, &mut exact, &mut BandScratch::default());
            assert!(n64 > 0, "{name}: no support on the plate");
            // sum_j a_j / r_j per pixel (the scale of the bound).
            let scale: Vec<f64> = (0..h)
                .flat_map(|i| (0..w).map(move |j| (i, j)))
                .map(|(i, j)| {
                    let (x, y) = (plate.x_of_col(j as f64), plate.y_of_row(i as f64));
                    emitters
                        .iter()
                        .map(|e| {
                            let d = [x - e.pos[0], y - e.pos[1], e.pos[2]];
                            e.amplitude / (d[0] * d[0] + d[1] * d[1] + d[2] * d[2]).sqrt()
                        })
                        .sum()
                })
                .collect();
            let maxf = exact.iter().map(|f| f.norm()).fold(0.0, f64::max);
            let mut first: Option<Vec<Complex64>> = None;
            for isa in kernels::available() {
                let sum32 = PointSum::new(plate, reference, emitters.clone(), opts32).with_isa(isa);
                let mut f32_whole = vec![Complex64::new(0.0, 0.0); w * h];
                let n32 = sum32.compute_band(0, h, &mut f32_whole, &mut BandScratch::default());
                assert_eq!(
                    n32, n64,
                    "{name} obliquity={obliquity}: support pixel counts differ"
                );
                for (idx, (a, b)) in f32_whole.iter().zip(&exact).enumerate() {
                    let d = (a - b).norm();
                    assert!(
                        d <= 4e-5 * scale[idx],
                        "{name} obliquity={obliquity} {isa:?} pixel {idx}: {a} vs {b}, {:e} of sum a/r",
                        d / scale[idx]
                    );
                    worst_rel = worst_rel.max(d / maxf);
                }
                for band in [1, 7] {
                    assert!(
                        whole_plate(&sum32, band) == f32_whole,
                        "{name}: band {band} differs in bits"
                    );
                }
                match &first {
                    None => first = Some(f32_whole),
                    Some(f) => assert!(*f == f32_whole, "{name}: kernel copies differ in bits"),
                }
            }
        }
    }
    eprintln!("f32 exact kernel: worst |dF| / max|F| = {worst_rel:.2e}");
    assert!(worst_rel <= 1e-4, "worst |dF| / max|F| = {worst_rel:e}");
}

/// Emitters placed so that one pixel sits within 1e-6 (in direction cosines) of the support edge,
/// in x and in y, on either side: there the f32 test cannot decide, and the kernel must defer to
/// the f64 one. Near emitters (per-pixel square root) and far ones (polynomial path, whose
/// segments are classified as inside, outside or edge from margins at their anchors), under a
/// tilted plane and a spherical reference (z from 30 um: per-pixel root; 2 mm: 16-pixel segments;
/// 10 mm: 32-pixel segments). Each emitter alone must give the f64 engine's pixel
/// count and field (an edge pixel taken or dropped wrongly is an error of a / r at that pixel).
#[test]
fn f32_support_edges_match_f64() {
    let plate = Plate {
        width: 40,
        height: 9,
        pitch: [1.0e-6, 1.0e-6],
        wavelength: 633e-9,
    };
    let half = plate.nyquist_cosines();
    let (x, y) = (plate.x_of_col(19.0), plate.y_of_row(4.0));
    let refs = [
        Reference::Plane {
            tilt: [5f64.to_radians(), -3f64.to_radians()],
        },
        Reference::Spherical {
            position: [1e-3, 0.5e-3, 20e-3],
        },
    ];
    let mut checked = 0;
    for reference in refs {
        let rd = reference.direction(x, y);
        for z0 in [30e-6, 2e-3, 10e-3] {
            for axis in 0..2 {
                for k in -40..=40 {
                    let delta = k as f64 * 2.5e-8;
                    let z = z0 * (1.0 + (k + 40) as f64 * 0.013);
                    // Direction cosines of the pixel seen from the emitter: the support edge
                    // (plus delta) on one axis, the reference's direction on the other.
                    let mut dir = rd;
                    dir[axis] += half[axis] + delta;
                    let sz = (1.0 - dir[0] * dir[0] - dir[1] * dir[1]).sqrt();
                    let e = Emitter {
                        pos: [x - z * dir[0] / sz, y - z * dir[1] / sz, z],
                        amplitude: 1.0,
                        phase: 0.4,
                    };
                    let opts = PointSumOptions::default();
                    let opts32 = PointSumOptions {
                        precision: Precision::F32,
                        ..opts
                    };
                    let (w, h) = (plate.width as usize, plate.height as usize);
                    let mut a = vec![Complex64::new(0.0, 0.0); w * h];
                    let mut b = a.clone();
                    let n64 = PointSum::new(plate, reference, vec![e], opts).compute_band(
                        0,
                        h,
                        &mut a,
                        &mut BandScratch::default(),
                    );
                    let n32 = PointSum::new(plate, reference, vec![e], opts32).compute_band(
                        0,
                        h,
                        &mut b,
                        &mut BandScratch::default(),
                    );
                    let what = format!("{reference:?} z {z:e} axis {axis} delta {delta:e}");
                    assert!(n64 > 0, "{what}: no support");
                    assert_eq!(n32, n64, "{what}");
                    for (p, q) in a.iter().zip(&b) {
                        assert!((p - q).norm() <= 1e-4 / z, "{what}: {p} vs {q}");
                    }
                    checked += 1;
                }
            }
        }
    }
    assert_eq!(checked, 2 * 3 * 2 * 81);
}

/// The f32 separable Fresnel path (plane reference) against the f64 per-pixel Fresnel path:
/// 300 emitters (more than one f32 flush group of 256, blocks with gaps where emitters miss a
/// band), on- and off-axis references, on a small plate (tails narrower than a register tile) and
/// a wide one whose supports cover a fraction of it (tiles given per-chunk emitter lists). Same update count (same support pixels); per pixel
/// |F32 - F64| <= 1e-5 x sum_j a_j / z_j (per term: f32 factors 6e-8, f32 sincos 3e-7, f32 sums of
/// at most 256 terms); the same bits for every band size and kernel copy.
#[test]
fn f32_fresnel_path_within_bound() {
    let mut rng = Rng(0xf7e5_4e10);
    let small = Plate {
        width: 71,
        height: 53,
        pitch: [1.3e-6, 0.8e-6],
        wavelength: 532e-9,
    };
    let wide = Plate {
        width: 613,
        height: 19,
        ..small
    };
    let cases = [
        (small, [0.0, 0.0]),
        (small, [7f64.to_radians(), -3f64.to_radians()]),
        (wide, [4f64.to_radians(), 2f64.to_radians()]),
    ];
    for (plate, tilt) in cases {
        let emitters = random_scene(&mut rng, 300, &plate, [30e-6, 600e-6]);
        let opts = PointSumOptions {
            approximation: Approximation::Fresnel,
            obliquity: false,
            anti_alias: true,
            precision: Precision::F64,
        };
        let r = Reference::Plane { tilt };
        let slow = PointSum::new(plate, r, emitters.clone(), opts).with_separable(false);
        let (w, h) = (plate.width as usize, plate.height as usize);
        let mut exact = vec![Complex64::new(0.0, 0.0); w * h];
        let n64 = slow.compute_band(0, h, &mut exact, &mut BandScratch::default());
        let bound = 1e-5 * emitters.iter().map(|e| e.amplitude / e.pos[2]).sum::<f64>();
        let opts32 = PointSumOptions {
            precision: Precision::F32,
            ..opts
        };
        let mut first: Option<Vec<Complex64>> = None;
        for isa in kernels::available() {
            let fast = PointSum::new(plate, r, emitters.clone(), opts32).with_isa(isa);
            let mut f = vec![Complex64::new(0.0, 0.0); w * h];
            let n32 = fast.compute_band(0, h, &mut f, &mut BandScratch::default());
            assert_eq!(n32, n64, "{tilt:?} {isa:?}: update counts differ");
            for (idx, (a, b)) in f.iter().zip(&exact).enumerate() {
                assert!(
                    (a - b).norm() <= bound,
                    "{tilt:?} {isa:?} pixel {idx}: {a} vs {b}"
                );
            }
            for band in [1, 6, 17] {
                assert!(
                    whole_plate(&fast, band) == f,
                    "{tilt:?} {isa:?}: band {band} differs in bits"
                );
            }
            match &first {
                None => first = Some(f),
                Some(g) => assert!(*g == f, "{tilt:?}: kernel copies differ in bits"),
            }
        }
    }
}
