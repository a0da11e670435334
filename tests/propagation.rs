//! The free-space propagation engine (`optics::fft2d`, `optics::propagation`) against slow exact
//! references (naive DFT, direct Rayleigh-Sommerfeld sum) and closed-form optics (Fraunhofer pattern
//! of a square aperture, Fresnel straight edge, Gaussian beam, spherical wave), plus its invariants
//! (power, f32 vs f64, thread count, dirty scratch, inverse round trips).

use std::f64::consts::PI;
use std::sync::Arc;

use fringemill::optics::fft2d::{fftshift, ifftshift, Fft2d};
use fringemill::optics::propagation::{
    AngularSpectrum, Fourier, Grid, PropagationPlanner, PropagationRecipe, Propagator,
    SingleFftFresnel,
};
use num_complex::{Complex, Complex32, Complex64};

// ---------------------------------------------------------------------------------------------
// helpers

/// Small deterministic generator (xorshift64*), so tests need no extra crate.
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545F4914F6CDD1D) >> 11) as f64 / (1u64 << 53) as f64
    }
    fn complex(&mut self) -> Complex64 {
        Complex64::new(self.next() - 0.5, self.next() - 0.5)
    }
    fn field(&mut self, n: usize) -> Vec<Complex64> {
        (0..n).map(|_| self.complex()).collect()
    }
}

fn to32(v: &[Complex64]) -> Vec<Complex32> {
    v.iter()
        .map(|c| Complex32::new(c.re as f32, c.im as f32))
        .collect()
}

fn from32(v: &[Complex32]) -> Vec<Complex64> {
    v.iter()
        .map(|c| Complex64::new(c.re as f64, c.im as f64))
        .collect()
}

/// Relative L2 error ||a - b|| / ||b||.
fn rel_l2(a: &[Complex64], b: &[Complex64]) -> f64 {
    assert_eq!(a.len(), b.len());
    let num: f64 = a.iter().zip(b).map(|(x, y)| (x - y).norm_sqr()).sum();
    let den: f64 = b.iter().map(|y| y.norm_sqr()).sum();
    (num / den).sqrt()
}

/// max |a - b| / max |b|.
fn rel_max(a: &[Complex64], b: &[Complex64]) -> f64 {
    assert_eq!(a.len(), b.len());
    let num = a
        .iter()
        .zip(b)
        .map(|(x, y)| (x - y).norm())
        .fold(0.0, f64::max);
    let den = b.iter().map(|y| y.norm()).fold(0.0, f64::max);
    num / den
}

fn bits<T: Copy + Into<f64>>(v: &[Complex<T>]) -> Vec<(u64, u64)> {
    v.iter()
        .map(|c| (c.re.into().to_bits(), c.im.into().to_bits()))
        .collect()
}

/// Naive O((nx ny)^2) 2-D DFT in f64, sign -1 (forward) or +1 (inverse, unscaled).
fn naive_dft(x: &[Complex64], nx: usize, ny: usize, sign: f64) -> Vec<Complex64> {
    let mut out = vec![Complex64::new(0.0, 0.0); nx * ny];
    for m in 0..ny {
        for n in 0..nx {
            let mut acc = Complex64::new(0.0, 0.0);
            for i in 0..ny {
                for j in 0..nx {
                    // Reduce the index products exactly before the trigonometry.
                    let cyc = ((i * m) % ny) as f64 / ny as f64 + ((j * n) % nx) as f64 / nx as f64;
                    acc += x[i * nx + j] * Complex64::from_polar(1.0, sign * 2.0 * PI * cyc);
                }
            }
            out[m * nx + n] = acc;
        }
    }
    out
}

/// Samples `f(x, y)` on the pixel centres of `grid` (physics.md: x = (j - (nx-1)/2) px,
/// y = ((ny-1)/2 - i) py).
fn sample(grid: &Grid, f: impl Fn(f64, f64) -> Complex64) -> Vec<Complex64> {
    let mut v = Vec::with_capacity(grid.len());
    for i in 0..grid.ny {
        for j in 0..grid.nx {
            v.push(f(grid.x_of_col(j), grid.y_of_row(i)));
        }
    }
    v
}

/// Fresnel integrals C(v), S(v) by composite Simpson's rule on cos, sin(pi t^2 / 2).
fn fresnel_cs(v: f64) -> (f64, f64) {
    let n = 4000; // even
    let h = v / n as f64;
    let (mut c, mut s) = (0.0, 0.0);
    for k in 0..=n {
        let t = k as f64 * h;
        let w = if k == 0 || k == n {
            1.0
        } else if k % 2 == 1 {
            4.0
        } else {
            2.0
        };
        let a = PI * t * t / 2.0;
        c += w * a.cos();
        s += w * a.sin();
    }
    (c * h / 3.0, s * h / 3.0)
}

/// Closed-form Fresnel propagation of a Gaussian `exp(-rho^2 / w0^2)` over z (paraxial):
/// `exp(i k z) / (1 + i z / zR) * exp(-rho^2 / (w0^2 (1 + i z / zR)))`, zR = pi w0^2 / lambda.
/// (The Gaussian integral of Goodman's Fresnel formula, ch. 4, in closed form; the Gaussian-beam
/// q-parameter result of Siegman, Lasers, 1986, ch. 17.)
fn gaussian_beam(w0: f64, lambda: f64, z: f64, x: f64, y: f64) -> Complex64 {
    let zr = PI * w0 * w0 / lambda;
    let q = Complex64::new(1.0, z / zr);
    let carrier = Complex64::from_polar(1.0, 2.0 * PI * (z / lambda).fract());
    carrier / q * (-(x * x + y * y) / (w0 * w0 * q)).exp()
}

fn propagate64(p: &dyn Propagator<f64>, field: &[Complex64]) -> Vec<Complex64> {
    let mut f = field.to_vec();
    p.propagate(&mut f);
    f
}

fn propagate32(p: &dyn Propagator<f32>, field: &[Complex64]) -> Vec<Complex64> {
    let mut f = to32(field);
    p.propagate(&mut f);
    from32(&f)
}

// ---------------------------------------------------------------------------------------------
// Fft2d against the naive DFT

/// Common practice (RustFFT's own tests check every algorithm against a naive DFT): forward, inverse
/// and unnormalized inverse against an O(N^2) DFT, odd and even sizes, f64 and f32, with the
/// transpose scratch filled with NaN first (a read of unwritten scratch would poison the result).
/// Bounds, max error over max |X|: f64 1e-13 (measured at most 4e-15), f32 1e-6 (measured 1.5e-7).
#[test]
fn fft2d_matches_naive_dft_odd_and_even_sizes() {
    let mut rng = Rng(0x5eed_0001);
    for &(nx, ny) in &[(6, 10), (15, 8), (1, 7), (7, 1), (1, 1), (33, 40), (64, 48)] {
        let x = rng.field(nx * ny);
        let want_fwd = naive_dft(&x, nx, ny, -1.0);
        let want_inv: Vec<Complex64> = naive_dft(&x, nx, ny, 1.0)
            .iter()
            .map(|v| v / (nx * ny) as f64)
            .collect();

        let f64plan = Fft2d::<f64>::new(nx, ny);
        let nan64 = Complex64::new(f64::NAN, f64::NAN);
        let mut scratch = vec![nan64; f64plan.scratch_len()];
        let mut got = x.clone();
        f64plan.process_with_scratch(&mut got, &mut scratch);
        let e = rel_max(&got, &want_fwd);
        assert!(e < 1e-13, "f64 forward {nx}x{ny}: {e:e}");
        scratch.fill(nan64);
        let mut got = x.clone();
        f64plan.process_inverse_with_scratch(&mut got, &mut scratch);
        let e = rel_max(&got, &want_inv);
        assert!(e < 1e-13, "f64 inverse {nx}x{ny}: {e:e}");
        scratch.fill(nan64);
        let mut got = x.clone();
        f64plan.process_inverse_unnormalized(&mut got, &mut scratch);
        let scaled: Vec<Complex64> = want_inv.iter().map(|v| v * (nx * ny) as f64).collect();
        let e = rel_max(&got, &scaled);
        assert!(e < 1e-13, "f64 unnormalized inverse {nx}x{ny}: {e:e}");
        // The allocating entry points give the same bits as the scratch ones.
        let mut a = x.clone();
        f64plan.process(&mut a);
        let mut b = x.clone();
        f64plan.process_with_scratch(&mut b, &mut vec![nan64; nx * ny]);
        assert_eq!(bits(&a), bits(&b));

        let f32plan = Fft2d::<f32>::new(nx, ny);
        let nan32 = Complex32::new(f32::NAN, f32::NAN);
        let mut scratch = vec![nan32; f32plan.scratch_len()];
        let mut got = to32(&x);
        f32plan.process_with_scratch(&mut got, &mut scratch);
        let e = rel_max(&from32(&got), &want_fwd);
        assert!(e < 1e-6, "f32 forward {nx}x{ny}: {e:e}");
        scratch.fill(nan32);
        let mut got = to32(&x);
        f32plan.process_inverse_with_scratch(&mut got, &mut scratch);
        let e = rel_max(&from32(&got), &want_inv);
        assert!(e < 1e-6, "f32 inverse {nx}x{ny}: {e:e}");
    }
}

/// Common practice (numpy.fft.fftshift semantics): after fftshift the zero frequency of a DFT sits at
/// index n/2 (rounded down) on both axes; ifftshift undoes it for odd and even sizes.
#[test]
fn fftshift_puts_dc_at_half_size() {
    for &(nx, ny) in &[(5, 4), (6, 7), (1, 3)] {
        let mut d = vec![Complex64::new(1.0, 0.0); nx * ny]; // constant -> only DC is non-zero
        Fft2d::<f64>::new(nx, ny).process(&mut d);
        let orig = d.clone();
        fftshift(&mut d, nx, ny);
        let peak = d
            .iter()
            .enumerate()
            .max_by(|a, b| a.1.norm().total_cmp(&b.1.norm()))
            .unwrap()
            .0;
        assert_eq!(peak, (ny / 2) * nx + nx / 2, "{nx}x{ny}");
        ifftshift(&mut d, nx, ny);
        assert_eq!(d, orig);
    }
}

// ---------------------------------------------------------------------------------------------
// Planner recipes, as data

/// Voelz and Roggemann, Applied Optics 48, 6132, 2009: critical distance z_c = N p^2 / lambda;
/// band-limited ASM with 2x padding below it, single-FFT Fresnel at and above it (physics.md).
#[test]
fn planner_recipes_by_distance() {
    let asm = PropagationRecipe::AngularSpectrum {
        band_limited: true,
        pad: 2,
    };
    let fresnel = PropagationRecipe::SingleFftFresnel;
    let planner = PropagationPlanner::<f32>::new();
    // z_c = 1000 * (8e-6)^2 / 500e-9 = 0.128 m.
    let g = Grid {
        nx: 1000,
        ny: 1000,
        pitch: [8e-6, 8e-6],
        wavelength: 500e-9,
        lattice: Default::default(),
    };
    let zc = g.critical_distance();
    assert!((zc[0] - 0.128).abs() < 1e-15 && zc[0] == zc[1]);
    let table = [
        (0.0, asm),
        (1e-6, asm),
        (0.1, asm),
        (-0.1, asm),
        (0.127_999, asm),
        (0.128, fresnel),
        (0.2, fresnel),
        (-0.2, fresnel),
        (10.0, fresnel),
    ];
    for (z, want) in table {
        assert_eq!(planner.recipe(&g, z), want, "z = {z}");
    }
    // Unequal axes: x 2000 px of 4 um -> z_c 50.55 mm, y 100 px of 8 um -> 10.11 mm (633 nm).
    // ASM until the larger, so Fresnel runs only where both axes sample its chirp.
    let g = Grid {
        nx: 2000,
        ny: 100,
        pitch: [4e-6, 8e-6],
        wavelength: 633e-9,
        lattice: Default::default(),
    };
    let zc = g.critical_distance();
    assert!((zc[0] - 2000.0 * 16e-12 / 633e-9).abs() < 1e-15);
    assert!((zc[1] - 100.0 * 64e-12 / 633e-9).abs() < 1e-15);
    assert_eq!(planner.recipe(&g, 0.03), asm);
    assert_eq!(planner.recipe(&g, 0.06), fresnel);
    // The planner builds what the recipe says: same output pitch as input for ASM, lambda z / (N p)
    // for Fresnel, lambda f / (N p) for Fourier.
    let mut planner = PropagationPlanner::<f64>::new();
    let g = Grid {
        nx: 20,
        ny: 10,
        pitch: [2e-6, 3e-6],
        wavelength: 500e-9,
        lattice: Default::default(),
    };
    assert_eq!(planner.plan(&g, 1e-5).output(), g);
    let out = planner.plan(&g, 1.0).output().pitch;
    assert!((out[0] - 500e-9 / (20.0 * 2e-6)).abs() < 1e-18);
    assert!((out[1] - 500e-9 / (10.0 * 3e-6)).abs() < 1e-18);
    let out = planner
        .plan_recipe(&g, 0.0, PropagationRecipe::Fourier { focal: -0.5 })
        .output()
        .pitch;
    assert!((out[0] - 0.5 * 500e-9 / (20.0 * 2e-6)).abs() < 1e-18);
    // Plans are shared by shape.
    assert!(Arc::ptr_eq(&planner.fft2d(20, 10), &planner.fft2d(20, 10)));
}

// ---------------------------------------------------------------------------------------------
// Closed-form optics

/// Goodman, Introduction to Fourier Optics, ch. 4 (Fraunhofer pattern of a square aperture): zeros at
/// multiples of lambda z / D along both axes, within a sample; peak amplitude D^2 / (lambda z) with
/// phase -pi/2 (the 1 / (i lambda z) factor).
#[test]
fn square_aperture_far_field_zeros() {
    // 255 = 15 * 17: an aperture of 15 pixels puts the zeros exactly on every 17th output sample.
    let (n, p, lambda) = (255, 10e-6, 500e-9);
    let grid = Grid {
        nx: n,
        ny: n,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let d = 15.0 * p;
    let aperture = sample(&grid, |x, y| {
        let inside = x.abs() < d / 2.0 && y.abs() < d / 2.0;
        Complex64::new(if inside { 1.0 } else { 0.0 }, 0.0)
    });
    assert_eq!(aperture.iter().filter(|v| v.re > 0.0).count(), 225);
    let c = (n - 1) / 2;
    let mut planner = PropagationPlanner::<f64>::new();

    // Lens geometry, focal length f.
    let f = 0.1;
    let lens = planner.plan_recipe(&grid, 0.0, PropagationRecipe::Fourier { focal: f });
    let out = propagate64(lens.as_ref(), &aperture);
    let q = lens.output().pitch[0];
    let peak = out[c * n + c];
    assert!(
        (peak.norm() - d * d / (lambda * f)).abs() < 1e-12 * peak.norm(),
        "peak {peak}"
    );
    assert!(
        (peak.arg() + PI / 2.0).abs() < 1e-12,
        "peak phase {}",
        peak.arg()
    );
    let zero_step = lambda * f / d / q; // in output samples
    assert!((zero_step - 17.0).abs() < 1e-9);
    check_zeros(&out, n, c, zero_step, 1e-20);

    // Far field by single-FFT Fresnel at 44 Fraunhofer distances D^2 / lambda: zeros still within a
    // sample of lambda z / D (the residual input chirp keeps them from being exact).
    let z = 2.0;
    assert!(z > 40.0 * d * d / lambda);
    let far = planner.plan_recipe(&grid, z, PropagationRecipe::SingleFftFresnel);
    let out = propagate64(far.as_ref(), &aperture);
    let zero_step = lambda * z / d / far.output().pitch[0];
    check_zeros(&out, n, c, zero_step, 1e-4);
}

/// Finds, along the centre row and the centre column, the local minima of the intensity near each
/// multiple of `step` samples from the centre: each must be within one sample of k * step and its
/// intensity below `floor` times the peak.
fn check_zeros(out: &[Complex64], n: usize, c: usize, step: f64, floor: f64) {
    let peak = out[c * n + c].norm_sqr();
    let row: Vec<f64> = (0..n).map(|j| out[c * n + j].norm_sqr()).collect();
    let col: Vec<f64> = (0..n).map(|i| out[i * n + c].norm_sqr()).collect();
    for profile in [&row, &col] {
        for sgn in [-1.0, 1.0] {
            let mut k = 1.0;
            while k * step < c as f64 - 2.0 {
                let want = c as f64 + sgn * k * step;
                let lo = (want - 3.0).round() as usize;
                let hi = (want + 3.0).round() as usize;
                let (imin, vmin) = (lo..=hi)
                    .map(|i| (i, profile[i]))
                    .min_by(|a, b| a.1.total_cmp(&b.1))
                    .unwrap();
                assert!(
                    profile[imin - 1] > vmin && profile[imin + 1] > vmin,
                    "not a local minimum at {imin}"
                );
                assert!(
                    (imin as f64 - want).abs() <= 1.0,
                    "zero {k} at {imin}, expected {want}"
                );
                assert!(
                    vmin < floor * peak,
                    "zero {k}: I = {:e} of the peak",
                    vmin / peak
                );
                k += 1.0;
            }
        }
    }
}

/// Hecht, Optics, sec. 10.3 (Cornu spiral): Fresnel diffraction by a straight edge gives I0/4 at the
/// geometric shadow edge and a first bright fringe of about 1.37 I0. Fresnel integrals C(1) =
/// 0.77989, S(1) = 0.43826 are quoted from memory of Abramowitz and Stegun, Table 7.7; the test
/// computes its own C, S (Simpson) and checks them against those values first, then takes the exact
/// expected profile, I/I0 = ((1/2 + C(v))^2 + (1/2 + S(v))^2) / 2 with v = x sqrt(2 / (lambda z)), from
/// them.
///
/// Geometry: an edge uniform along y (a periodic 4-row grid, no padding, so every row stays equal) and
/// a wide zero-padded x axis: dark for x < 0, 1/2 on the pixel at x = 0, open to 2.5 mm, then a
/// cos^2 taper to zero at 3.5 mm, so the far side sends no fringes back to the edge (lambda 500 nm,
/// pitch 0.5 um, z = 2 mm). Bounds: the theory's own maximum within 0.005 of Hecht's 1.37 (it is
/// 1.37044); the complex field within 1e-3 of the theory over |x| <= 60 um (measured 3.5e-4, the
/// paraxial error of the theory); I at the edge within 1e-3 of 1/4 (measured 1e-15); the sampled first
/// fringe, refined by a parabola, within 1e-3 of the theory's value (measured 3e-4) and 0.1 pixel of
/// its position.
#[test]
fn straight_edge_fresnel_fringes() {
    // The reference Fresnel integrals.
    let (c1, s1) = fresnel_cs(1.0);
    assert!(
        (c1 - 0.77989).abs() < 1e-5 && (s1 - 0.43826).abs() < 1e-5,
        "C(1) = {c1}, S(1) = {s1}"
    );
    let theory = |v: f64| {
        let (c, s) = if v >= 0.0 {
            fresnel_cs(v)
        } else {
            let (c, s) = fresnel_cs(-v);
            (-c, -s)
        };
        // complex amplitude relative to the unobstructed wave: (1 - i)/2 ((1/2 + C) + i (1/2 + S))
        Complex64::new(0.5, -0.5) * Complex64::new(0.5 + c, 0.5 + s)
    };
    assert!((theory(0.0).norm_sqr() - 0.25).abs() < 1e-15);
    // First maximum of the theory by golden-section search on [0.5, 2].
    let (mut a, mut b) = (0.5, 2.0);
    let g = (5f64.sqrt() - 1.0) / 2.0;
    for _ in 0..80 {
        let (m1, m2) = (b - g * (b - a), a + g * (b - a));
        if theory(m1).norm_sqr() > theory(m2).norm_sqr() {
            b = m2;
        } else {
            a = m1;
        }
    }
    let (v_max, i_max) = ((a + b) / 2.0, theory((a + b) / 2.0).norm_sqr());
    assert!(
        (i_max - 1.37).abs() < 0.005,
        "first fringe {i_max} (Hecht: about 1.37)"
    );

    let (lambda, p, z) = (500e-9, 0.5e-6, 2e-3);
    let nx = 19683; // 3^9, odd: the centre pixel sits on x = 0
    let grid = Grid {
        nx,
        ny: 4,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let field = sample(&grid, |x, _| {
        let t = if x < -p / 4.0 {
            0.0
        } else if x < p / 4.0 {
            0.5
        } else if x <= 2.5e-3 {
            1.0
        } else if x < 3.5e-3 {
            (PI / 2.0 * (x - 2.5e-3) / 1e-3).cos().powi(2)
        } else {
            0.0
        };
        Complex64::new(t, 0.0)
    });
    let mut planner = PropagationPlanner::<f64>::new();
    let asm = planner.plan_recipe(
        &grid,
        z,
        PropagationRecipe::AngularSpectrum {
            band_limited: true,
            pad: 1,
        },
    );
    let out = propagate64(asm.as_ref(), &field);
    let carrier = Complex64::from_polar(1.0, 2.0 * PI * (z / lambda).fract());
    let row = 2; // any row: all are equal
    let scale = (2.0 / (lambda * z)).sqrt();
    let c = (nx - 1) / 2;
    // Complex profile over -60 um .. 60 um against the theory. Farther out the paraxial (Fresnel)
    // theory itself drifts from the exact propagation: the edge wave's phase error k x^4 / (8 z^3)
    // reaches 0.04 rad at 120 um.
    let mut worst: f64 = 0.0;
    for j in c - 120..=c + 120 {
        let x = grid.x_of_col(j);
        let got = out[row * nx + j] / carrier;
        worst = worst.max((got - theory(x * scale)).norm());
    }
    assert!(worst < 1e-3, "straight-edge profile error {worst:e}");
    // I0/4 at the geometric shadow edge.
    let edge = out[row * nx + c].norm_sqr();
    assert!((edge - 0.25).abs() < 1e-3, "shadow edge I = {edge}");
    // First bright fringe: the largest sample in 0 < x < 60 um, refined by a parabola.
    let (jm, _) = (c + 1..c + 120)
        .map(|j| (j, out[row * nx + j].norm_sqr()))
        .max_by(|a, b| a.1.total_cmp(&b.1))
        .unwrap();
    let (y0, y1, y2) = (
        out[row * nx + jm - 1].norm_sqr(),
        out[row * nx + jm].norm_sqr(),
        out[row * nx + jm + 1].norm_sqr(),
    );
    let dj = 0.5 * (y0 - y2) / (y0 - 2.0 * y1 + y2);
    let peak = y1 - 0.25 * (y0 - y2) * dj;
    let x_peak = grid.x_of_col(jm) + dj * p;
    assert!(
        (peak - i_max).abs() < 1e-3,
        "first fringe {peak}, theory {i_max}"
    );
    assert!(
        (x_peak - v_max / scale).abs() < 0.1 * p,
        "fringe at {x_peak}, theory {}",
        v_max / scale
    );
}

/// Sign convention (physics.md: exp(-i w t), a diverging wave is exp(+i k r) / r): a spherical wave
/// sampled at z0 from its source and propagated by +d must match exp(i k r') / r' at z0 + d; back by
/// -d it must return to the z0 samples. Checked in the central 60 um square, away from the tapered
/// edges of the window, to 1e-3 of the peak amplitude (measured 2.1e-4 forward, 3.3e-4 back); a sign
/// error gives an O(1) mismatch, which is checked too.
#[test]
fn point_source_sign_convention_asm() {
    let (n, p, lambda) = (256, 1e-6, 500e-9);
    let grid = Grid {
        nx: n,
        ny: n,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let (z0, d) = (600e-6, 300e-6);
    let sphere = |z: f64, x: f64, y: f64| {
        let r = (x * x + y * y + z * z).sqrt();
        // exp(i k r) with the phase reduced in cycles first
        Complex64::from_polar(1.0 / r, 2.0 * PI * (r / lambda).fract())
    };
    // Smooth window: 1 inside 80 um, cos^2 down to 0 at 126 um.
    let taper = |t: f64| {
        let a = t.abs();
        if a < 80e-6 {
            1.0
        } else if a < 126e-6 {
            (PI / 2.0 * (a - 80e-6) / 46e-6).cos().powi(2)
        } else {
            0.0
        }
    };
    let central =
        |i: usize, j: usize| grid.x_of_col(j).abs() < 30e-6 && grid.y_of_row(i).abs() < 30e-6;
    let pick = |v: &[Complex64]| {
        let mut out = Vec::new();
        for i in 0..n {
            for j in 0..n {
                if central(i, j) {
                    out.push(v[i * n + j]);
                }
            }
        }
        out
    };
    let mut planner = PropagationPlanner::<f64>::new();
    assert!(matches!(
        planner.recipe(&grid, d),
        PropagationRecipe::AngularSpectrum { .. }
    ));
    let at_z0 = sample(&grid, |x, y| sphere(z0, x, y) * taper(x) * taper(y));
    let forward = propagate64(planner.plan(&grid, d).as_ref(), &at_z0);
    let want = sample(&grid, |x, y| sphere(z0 + d, x, y));
    let e = rel_max(&pick(&forward), &pick(&want));
    assert!(e < 1e-3, "forward point-source error {e:e}");
    // The opposite sign convention is far off: exp(-i k r) / r at z0 + d.
    let wrong: Vec<Complex64> = want.iter().map(|v| v.conj()).collect();
    assert!(rel_max(&pick(&forward), &pick(&wrong)) > 0.5);

    let at_z1 = sample(&grid, |x, y| sphere(z0 + d, x, y) * taper(x) * taper(y));
    let back = propagate64(planner.plan(&grid, -d).as_ref(), &at_z1);
    let want = sample(&grid, |x, y| sphere(z0, x, y));
    let e = rel_max(&pick(&back), &pick(&want));
    assert!(e < 1e-3, "back-propagated point-source error {e:e}");
}

/// The single-FFT Fresnel output, with its pitch change and absolute phase, against the closed-form
/// Fresnel propagation of a Gaussian (Goodman ch. 4 integral in closed form; Siegman, Lasers, ch. 17),
/// at one and three critical distances, forward and back: bound 1e-12 of the peak (measured 5e-16).
/// And the band-limited ASM against the same closed form at half the critical distance: bound 2e-5
/// (measured 6.1e-6, the closed form's own paraxial error), then back by -z to the input: 1e-12.
#[test]
fn gaussian_beam_fresnel_and_asm() {
    let (n, p, lambda, w0) = (128, 2e-6, 500e-9, 20e-6);
    let grid = Grid {
        nx: n,
        ny: n,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let zc = grid.critical_distance()[0];
    let input = sample(&grid, |x, y| {
        Complex64::new((-(x * x + y * y) / (w0 * w0)).exp(), 0.0)
    });
    let mut planner = PropagationPlanner::<f64>::new();
    for zf in [1.0, 3.0, -3.0] {
        let z = zf * zc;
        let fr = planner.plan_recipe(&grid, z, PropagationRecipe::SingleFftFresnel);
        let out_grid = fr.output();
        assert!((out_grid.pitch[0] - lambda * z.abs() / (n as f64 * p)).abs() < 1e-18);
        let got = propagate64(fr.as_ref(), &input);
        let want = sample(&out_grid, |x, y| gaussian_beam(w0, lambda, z, x, y));
        let e = rel_max(&got, &want);
        assert!(e < 1e-12, "Fresnel at {zf} z_c: {e:e}");
    }
    let z = 0.5 * zc;
    let asm = planner.plan(&grid, z);
    let got = propagate64(asm.as_ref(), &input);
    let want = sample(&grid, |x, y| gaussian_beam(w0, lambda, z, x, y));
    let e = rel_max(&got, &want);
    assert!(e < 2e-5, "ASM at z_c / 2: {e:e}");
    let back = propagate64(planner.plan(&grid, -z).as_ref(), &got);
    let e = rel_max(&back, &input);
    assert!(e < 1e-12, "ASM +z then -z: {e:e}");
}

/// Fourier geometry against the closed-form transform of a Gaussian (Goodman ch. 5, lens between its
/// focal planes): U2(u) = pi w0^2 / (i lambda f) exp(-(pi w0 |u| / (lambda f))^2), bound 1e-10 of the
/// peak (measured 6e-12: the Gaussian's cut tails at the window edge); and the inverse transform
/// (negative focal length) returns the input to 1e-12.
#[test]
fn gaussian_fourier_transform() {
    let (nx, ny, p, lambda, w0, f) = (96, 81, 3e-6, 633e-9, 25e-6, 0.05);
    let grid = Grid {
        nx,
        ny,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let input = sample(&grid, |x, y| {
        Complex64::new((-(x * x + y * y) / (w0 * w0)).exp(), 0.0)
    });
    let mut planner = PropagationPlanner::<f64>::new();
    let lens = planner.plan_recipe(&grid, 0.0, PropagationRecipe::Fourier { focal: f });
    let got = propagate64(lens.as_ref(), &input);
    let want = sample(&lens.output(), |u, v| {
        let s = PI * w0 / (lambda * f);
        Complex64::new(0.0, -PI * w0 * w0 / (lambda * f)) * (-(s * s) * (u * u + v * v)).exp()
    });
    let e = rel_max(&got, &want);
    assert!(e < 1e-10, "Fourier of a Gaussian: {e:e}");
    let inv = planner.plan_recipe(
        &lens.output(),
        0.0,
        PropagationRecipe::Fourier { focal: -f },
    );
    assert!((inv.output().pitch[0] - p).abs() < 1e-18 && (inv.output().pitch[1] - p).abs() < 1e-18);
    let back = propagate64(inv.as_ref(), &got);
    assert!(rel_max(&back, &input) < 1e-12);
}

// ---------------------------------------------------------------------------------------------
// Slow exact reference: direct Rayleigh-Sommerfeld sum

/// Direct Rayleigh-Sommerfeld sum (first kind, Goodman ch. 3) over the samples of `field`, evaluated
/// at the pixel centres of `grid` at distance z: h = z / (2 pi r^2) (1/r - i k) exp(i k r).
fn rayleigh_sommerfeld(grid: &Grid, field: &[Complex64], z: f64) -> Vec<Complex64> {
    let (n, lambda) = (grid.nx, grid.wavelength);
    let k = 2.0 * PI / lambda;
    let src: Vec<(f64, f64, Complex64)> = (0..grid.len())
        .filter(|&t| field[t].norm() > 0.0)
        .map(|t| (grid.x_of_col(t % n), grid.y_of_row(t / n), field[t]))
        .collect();
    sample(grid, |x, y| {
        let mut acc = Complex64::new(0.0, 0.0);
        for &(xs, ys, u) in &src {
            let (dx, dy) = (x - xs, y - ys);
            let r2 = dx * dx + dy * dy + z * z;
            let r = r2.sqrt();
            let h = Complex64::new(1.0 / r, -k) * (z / (2.0 * PI * r2));
            acc += u * h * Complex64::from_polar(1.0, 2.0 * PI * (r / lambda).fract());
        }
        acc * grid.pixel_area()
    })
}

/// The band-limited, 2x padded ASM against the direct Rayleigh-Sommerfeld sum (Goodman ch. 3) on a
/// 64 x 64 grid of pitch lambda, for a small circular aperture (radius 8 lambda, slightly tilted) at
/// z = 200 lambda. The sum's sample replicas leave at 30 degrees or more and land outside the window,
/// so both describe the same field there; what remains is the spectrum that the band limit (here
/// |f| <= 0.3 / lambda) cuts. Bounds (relative L2): 1e-3 for a soft-edged aperture (logistic edge one
/// wavelength wide, measured 3.1e-4), 2e-2 for a hard-edged one (measured 1.2e-2: its slowly decaying
/// spectrum still holds about 1 % of the amplitude at the band limit).
#[test]
fn asm_against_direct_rayleigh_sommerfeld_sum() {
    let lambda = 500e-9;
    let (n, p) = (64, lambda);
    let grid = Grid {
        nx: n,
        ny: n,
        pitch: [p, p],
        wavelength: lambda,
        lattice: Default::default(),
    };
    let z = 200.0 * lambda;
    let a = 8.0 * lambda; // aperture radius
    let tilt = |x: f64| Complex64::from_polar(1.0, 2.0 * PI * 0.02 * x / lambda);
    let soft = sample(&grid, |x, y| {
        tilt(x) / (1.0 + (((x * x + y * y).sqrt() - a) / lambda).exp())
    });
    let hard = sample(&grid, |x, y| {
        if x * x + y * y <= a * a {
            tilt(x)
        } else {
            Complex64::new(0.0, 0.0)
        }
    });
    let mut planner = PropagationPlanner::<f64>::new();
    let asm = planner.plan_recipe(
        &grid,
        z,
        PropagationRecipe::AngularSpectrum {
            band_limited: true,
            pad: 2,
        },
    );
    for (name, field, bound) in [("soft", &soft, 1e-3), ("hard", &hard, 2e-2)] {
        let want = rayleigh_sommerfeld(&grid, field, z);
        let got = propagate64(asm.as_ref(), field);
        let e = rel_l2(&got, &want);
        assert!(e < bound, "ASM vs direct RS sum, {name} aperture: {e:e}");
    }
}

// ---------------------------------------------------------------------------------------------
// Invariants

/// Physics.md (Parseval): unitary propagators conserve power, sum |U|^2 dx dy with the pitch of each
/// plane; physics.md asks for about 1e-6 relative, this holds f64 to 1e-12 (measured 2e-16) and f32 to
/// 1e-6 (measured at most 8e-8; common practice: a few f32 epsilons times log2 N for an FFT). Single-FFT Fresnel, Fourier and the unpadded ASM without band limit (|H| = 1 on
/// every bin, no evanescent bin at p > lambda / sqrt 2) are exactly unitary on any field; the padded,
/// band-limited ASM conserves power for a field whose light stays inside the window and the band: a
/// tilted Gaussian.
#[test]
fn power_is_conserved() {
    let mut rng = Rng(0x5eed_0002);
    let grid = Grid {
        nx: 120,
        ny: 90,
        pitch: [2e-6, 2.5e-6],
        wavelength: 633e-9,
        lattice: Default::default(),
    };
    let random = rng.field(grid.len());
    let (w0, tilt) = (15e-6, 0.01);
    let gauss = sample(&grid, |x, y| {
        Complex64::from_polar(
            (-(x * x + y * y) / (w0 * w0)).exp(),
            2.0 * PI * tilt * (x + 0.5 * y) / 633e-9,
        )
    });
    let zc = grid.critical_distance()[0];
    let cases: Vec<(&str, PropagationRecipe, f64, &Vec<Complex64>)> = vec![
        (
            "ASM unpadded",
            PropagationRecipe::AngularSpectrum {
                band_limited: false,
                pad: 1,
            },
            0.3 * zc,
            &random,
        ),
        (
            "ASM padded band-limited",
            PropagationRecipe::AngularSpectrum {
                band_limited: true,
                pad: 2,
            },
            0.5 * zc,
            &gauss,
        ),
        (
            "Fresnel",
            PropagationRecipe::SingleFftFresnel,
            2.0 * zc,
            &random,
        ),
        (
            "Fresnel back",
            PropagationRecipe::SingleFftFresnel,
            -1.5 * zc,
            &random,
        ),
        (
            "Fourier",
            PropagationRecipe::Fourier { focal: 0.02 },
            0.0,
            &random,
        ),
    ];
    let mut p64 = PropagationPlanner::<f64>::new();
    let mut p32 = PropagationPlanner::<f32>::new();
    for (name, recipe, z, field) in cases {
        let prop = p64.plan_recipe(&grid, z, recipe);
        let before = grid.power(field);
        let out = propagate64(prop.as_ref(), field);
        let after = prop.output().power(&out);
        let e = (after - before).abs() / before;
        assert!(e < 1e-12, "{name} f64: power changed by {e:e}");
        let prop = p32.plan_recipe(&grid, z, recipe);
        let f32in = to32(field);
        let before = grid.power(&f32in);
        let mut out = f32in.clone();
        prop.propagate(&mut out);
        let after = prop.output().power(&out);
        let e = (after - before).abs() / before;
        assert!(e < 1e-6, "{name} f32: power changed by {e:e}");
    }
}

/// Common practice: Fresnel by z then by -z, and Fourier by f then by -f, are exact inverses of each
/// other on any field (the discrete operators are unitary and mutually adjoint). Bound 1e-11 of the
/// peak (measured 1.5e-12).
#[test]
fn fresnel_round_trip_is_identity() {
    let mut rng = Rng(0x5eed_0003);
    let grid = Grid {
        nx: 50,
        ny: 36,
        pitch: [4e-6, 3e-6],
        wavelength: 1064e-9,
        lattice: Default::default(),
    };
    let field = rng.field(grid.len());
    let mut planner = PropagationPlanner::<f64>::new();
    let z = 0.37;
    let fwd = planner.plan_recipe(&grid, z, PropagationRecipe::SingleFftFresnel);
    let back = planner.plan_recipe(&fwd.output(), -z, PropagationRecipe::SingleFftFresnel);
    let out = propagate64(back.as_ref(), &propagate64(fwd.as_ref(), &field));
    assert!(back
        .output()
        .pitch
        .iter()
        .zip(grid.pitch)
        .all(|(a, b)| (a - b).abs() < 1e-18));
    let e = rel_max(&out, &field);
    assert!(e < 1e-11, "Fresnel round trip {e:e}");
}

/// f32 against f64 on the same random fields. Bound (relative L2): 1e-6 for every propagator, common
/// practice for single-precision FFT pipelines of a few hundred points per axis (measured 1.6e-7 to
/// 2.1e-7). The ASM transfer phase is formed in f64 and reduced before conversion, so large z / lambda
/// (here up to 7e4 cycles) costs no accuracy.
#[test]
fn f32_matches_f64() {
    let mut rng = Rng(0x5eed_0004);
    let grid = Grid {
        nx: 256,
        ny: 200,
        pitch: [4e-6, 4e-6],
        wavelength: 532e-9,
        lattice: Default::default(),
    };
    let field = rng.field(grid.len());
    let zc = grid.critical_distance()[0];
    let mut p64 = PropagationPlanner::<f64>::new();
    let mut p32 = PropagationPlanner::<f32>::new();
    for (name, z, recipe) in [
        ("ASM", 0.9 * zc, None),
        (
            "ASM far",
            5.0 * zc,
            Some(PropagationRecipe::AngularSpectrum {
                band_limited: true,
                pad: 2,
            }),
        ),
        ("Fresnel", 4.0 * zc, None),
        (
            "Fourier",
            0.0,
            Some(PropagationRecipe::Fourier { focal: 0.2 }),
        ),
    ] {
        let (a, b) = match recipe {
            Some(r) => (p64.plan_recipe(&grid, z, r), p32.plan_recipe(&grid, z, r)),
            None => (p64.plan(&grid, z), p32.plan(&grid, z)),
        };
        let want = propagate64(a.as_ref(), &field);
        let got = propagate32(b.as_ref(), &field);
        let e = rel_l2(&got, &want);
        assert!(e < 1e-6, "{name}: f32 vs f64 {e:e}");
    }
}

/// Common practice (RustFFT's dirty-scratch pass): scratch filled with NaN gives bit-identical output
/// to zeroed scratch, for every propagator.
#[test]
fn dirty_scratch_gives_identical_results() {
    let mut rng = Rng(0x5eed_0005);
    let grid = Grid {
        nx: 40,
        ny: 27,
        pitch: [3e-6, 3e-6],
        wavelength: 500e-9,
        lattice: Default::default(),
    };
    let field = to32(&rng.field(grid.len()));
    let mut planner = PropagationPlanner::<f32>::new();
    for recipe in [
        PropagationRecipe::AngularSpectrum {
            band_limited: true,
            pad: 2,
        },
        PropagationRecipe::AngularSpectrum {
            band_limited: false,
            pad: 3,
        },
        PropagationRecipe::SingleFftFresnel,
        PropagationRecipe::Fourier { focal: 0.1 },
    ] {
        let prop = planner.plan_recipe(&grid, 2e-3, recipe);
        let mut clean = field.clone();
        prop.propagate_with_scratch(
            &mut clean,
            &mut vec![Complex32::new(0.0, 0.0); prop.scratch_len()],
        );
        let mut dirty = field.clone();
        prop.propagate_with_scratch(
            &mut dirty,
            &mut vec![Complex32::new(f32::NAN, f32::NAN); prop.scratch_len() + 5],
        );
        assert!(clean.iter().all(|v| v.re.is_finite() && v.im.is_finite()));
        assert_eq!(bits(&clean), bits(&dirty), "{recipe:?}");
    }
}

/// Common practice (each row and column is transformed independently): results are bit-identical on
/// rayon pools of 1 and 2 threads, for the 2-D FFT and every propagator.
#[test]
fn one_and_two_threads_agree_bitwise() {
    let mut rng = Rng(0x5eed_0006);
    let grid = Grid {
        nx: 150,
        ny: 96,
        pitch: [2e-6, 2e-6],
        wavelength: 633e-9,
        lattice: Default::default(),
    };
    let field = rng.field(grid.len());
    let run = |threads: usize| {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap();
        pool.install(|| {
            let mut outs = Vec::new();
            let mut f = field.clone();
            Fft2d::<f64>::new(grid.nx, grid.ny).process(&mut f);
            outs.push(bits(&f));
            let mut planner = PropagationPlanner::<f64>::new();
            for (z, recipe) in [
                (
                    1e-4,
                    PropagationRecipe::AngularSpectrum {
                        band_limited: true,
                        pad: 2,
                    },
                ),
                (
                    -3e-4,
                    PropagationRecipe::AngularSpectrum {
                        band_limited: true,
                        pad: 2,
                    },
                ),
                (0.1, PropagationRecipe::SingleFftFresnel),
                (0.0, PropagationRecipe::Fourier { focal: 0.05 }),
            ] {
                outs.push(bits(&propagate64(
                    planner.plan_recipe(&grid, z, recipe).as_ref(),
                    &field,
                )));
            }
            let mut planner = PropagationPlanner::<f32>::new();
            let mut f = to32(&field);
            planner.plan(&grid, 1e-4).propagate(&mut f);
            outs.push(bits(&f));
            outs
        })
    };
    let (one, two) = (run(1), run(2));
    assert_eq!(one.len(), two.len());
    for (k, (a, b)) in one.iter().zip(&two).enumerate() {
        assert!(a == b, "case {k} differs between 1 and 2 threads");
    }
}

/// Common practice (one algorithm, two entry points): direct construction gives the same bits as the
/// planner (the public constructors are usable on their own).
#[test]
fn constructors_match_planner() {
    let mut rng = Rng(0x5eed_0007);
    let grid = Grid {
        nx: 30,
        ny: 22,
        pitch: [5e-6, 5e-6],
        wavelength: 500e-9,
        lattice: Default::default(),
    };
    let field = rng.field(grid.len());
    let mut planner = PropagationPlanner::<f64>::new();
    type Pair = (Arc<dyn Propagator<f64>>, Arc<dyn Propagator<f64>>);
    let pairs: Vec<Pair> = vec![
        (
            Arc::new(AngularSpectrum::new(
                &grid,
                1e-3,
                true,
                2,
                Arc::new(Fft2d::new(60, 44)),
            )),
            planner.plan_recipe(
                &grid,
                1e-3,
                PropagationRecipe::AngularSpectrum {
                    band_limited: true,
                    pad: 2,
                },
            ),
        ),
        (
            Arc::new(SingleFftFresnel::new(
                &grid,
                0.2,
                Arc::new(Fft2d::new(30, 22)),
            )),
            planner.plan_recipe(&grid, 0.2, PropagationRecipe::SingleFftFresnel),
        ),
        (
            Arc::new(Fourier::new(&grid, 0.3, Arc::new(Fft2d::new(30, 22)))),
            planner.plan_recipe(&grid, 0.0, PropagationRecipe::Fourier { focal: 0.3 }),
        ),
    ];
    for (a, b) in pairs {
        assert_eq!(
            bits(&propagate64(a.as_ref(), &field)),
            bits(&propagate64(b.as_ref(), &field))
        );
    }
}

// ---------------------------------------------------------------------------------------------
// Transposed middle plane

/// The transposed halves (`propagate_into_transposed`, `propagate_from_transposed`) against the plain
/// propagation and an index-by-index transpose, with hooks that scale each line by a known factor
/// (common practice: a layout change is checked element by element against the definition
/// `t[j * ny + i] = u[i * nx + j]`). Odd and even, non-square sizes; the three recipes (the angular
/// spectrum takes the trait's default path). Bound: max error over max |U| 1e-12 in f64 (the halves
/// transform columns before rows on the way back, so rounding differs from the plain order; measured
/// below 1e-15), 2e-6 in f32 (one f32 2-D FFT's rounding, as in `f32_matches_f64`).
#[test]
fn transposed_halves_match_plain_propagation() {
    for &(nx, ny) in &[(24usize, 37usize), (33, 16)] {
        let grid = Grid {
            nx,
            ny,
            pitch: [4e-6, 5e-6],
            wavelength: 633e-9,
            lattice: Default::default(),
        };
        let mut rng = Rng(0x5eed ^ (nx * 131 + ny) as u64);
        let input = rng.field(nx * ny);
        let transpose = |v: &[Complex64]| -> Vec<Complex64> {
            let mut t = vec![Complex64::new(0.0, 0.0); nx * ny];
            for i in 0..ny {
                for j in 0..nx {
                    t[j * ny + i] = v[i * nx + j];
                }
            }
            t
        };
        let col_factor = |j: usize| Complex64::new(1.0 + j as f64, 0.5);
        let row_factor = |i: usize| Complex64::new(0.25, 2.0 - i as f64 * 0.1);
        let mut planner = PropagationPlanner::<f64>::new();
        let mut planner32 = PropagationPlanner::<f32>::new();
        for (name, recipe, native) in [
            ("fourier", PropagationRecipe::Fourier { focal: 0.05 }, true),
            ("fresnel", PropagationRecipe::SingleFftFresnel, true),
            (
                "angular spectrum",
                PropagationRecipe::AngularSpectrum {
                    band_limited: true,
                    pad: 2,
                },
                false,
            ),
        ] {
            let p = planner.plan_recipe(&grid, 0.02, recipe);
            assert_eq!(p.transposes_natively(), native, "{name}");

            // Forward half: out_t[j * ny + i] = col_factor(j) * P(u)[i * nx + j].
            let want = transpose(&propagate64(p.as_ref(), &input));
            let want: Vec<Complex64> = want
                .iter()
                .enumerate()
                .map(|(k, v)| v * col_factor(k / ny))
                .collect();
            let src = input.clone();
            let mut work = vec![Complex64::new(f64::NAN, 0.0); nx * ny];
            let mut out_t = vec![Complex64::new(f64::NAN, 0.0); nx * ny];
            let hook = |j: usize, col: &mut [Complex64]| {
                assert_eq!(col.len(), ny);
                col.iter_mut().for_each(|v| *v *= col_factor(j));
            };
            p.propagate_into_transposed(&src, &mut work, &mut out_t, &hook);
            assert_eq!(src, input, "{name}: the source was changed");
            let e = rel_max(&out_t, &want);
            assert!(e < 1e-12, "{name} {nx}x{ny}: into transposed {e:e}");

            // Back half from a transposed input, hooks on input columns and output rows:
            // out[i * nx + j] = row_factor(i) * P(g)[i * nx + j], g[i * nx + j] = col_factor(j) u.
            let g: Vec<Complex64> = input
                .iter()
                .enumerate()
                .map(|(k, v)| v * col_factor(k % nx))
                .collect();
            let want: Vec<Complex64> = propagate64(p.as_ref(), &g)
                .iter()
                .enumerate()
                .map(|(k, v)| v * row_factor(k / nx))
                .collect();
            let mut in_t = transpose(&input);
            let mut out = vec![Complex64::new(f64::NAN, 0.0); nx * ny];
            let after = |i: usize, row: &mut [Complex64]| {
                assert_eq!(row.len(), nx);
                row.iter_mut().for_each(|v| *v *= row_factor(i));
            };
            p.propagate_from_transposed(&mut in_t, &mut out, &hook, &after);
            let e = rel_max(&out, &want);
            assert!(e < 1e-12, "{name} {nx}x{ny}: from transposed {e:e}");

            // f32, the iterative loop's precision: the forward half against the f64 plain result.
            let p32 = planner32.plan_recipe(&grid, 0.02, recipe);
            let want = transpose(&propagate64(p.as_ref(), &input));
            let src32 = to32(&input);
            let mut work32 = vec![Complex32::new(0.0, 0.0); nx * ny];
            let mut out32 = vec![Complex32::new(0.0, 0.0); nx * ny];
            p32.propagate_into_transposed(&src32, &mut work32, &mut out32, &|_, _| {});
            let e = rel_max(&from32(&out32), &want);
            assert!(e < 2e-6, "{name} {nx}x{ny}: f32 into transposed {e:e}");
        }
    }
}
