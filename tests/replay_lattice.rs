//! The replay lattice of Fourier and single-FFT Fresnel planes, checked the way a lab checks it:
//! with a plain 2-D DFT of the plate samples (rustfft, unshifted) and the index shift of
//! `fftshift`. physics.md, "Replay lattices": the optical axis is the sample floor(N/2) on each
//! axis, for odd and even N, and |U(k)| = |DFT(t)[k - floor(N/2)]|.

use std::f64::consts::PI;
use std::path::Path;
use std::process::Command;

use fringemill::optics::propagation::{Grid, Lattice, PropagationPlanner, PropagationRecipe};
use num_complex::Complex64;
use rustfft::FftPlanner;

mod common;
use common::decode;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

/// Plain 2-D DFT, `X[m, n] = sum t[i, j] exp(-i 2 pi (j n / nx + i m / ny))`, row-major, no shift.
fn dft2(t: &[Complex64], nx: usize, ny: usize) -> Vec<Complex64> {
    let mut planner = FftPlanner::<f64>::new();
    let (fx, fy) = (planner.plan_fft_forward(nx), planner.plan_fft_forward(ny));
    let mut a = t.to_vec();
    for row in a.chunks_exact_mut(nx) {
        fx.process(row);
    }
    let mut col = vec![Complex64::new(0.0, 0.0); ny];
    for j in 0..nx {
        for i in 0..ny {
            col[i] = a[i * nx + j];
        }
        fy.process(&mut col);
        for i in 0..ny {
            a[i * nx + j] = col[i];
        }
    }
    a
}

/// `fftshift` index: the DFT sample shown at replay sample (m, n).
fn shifted(m: usize, n: usize, nx: usize, ny: usize) -> usize {
    let i = (m + ny - ny / 2) % ny;
    let j = (n + nx - nx / 2) % nx;
    i * nx + j
}

fn lcg(seed: &mut u64) -> f64 {
    *seed = seed
        .wrapping_mul(6364136223846793005)
        .wrapping_add(1442695040888963407);
    (*seed >> 11) as f64 / (1u64 << 53) as f64
}

/// The Fourier propagator and single-FFT Fresnel agree with |DFT| after the fftshift index, for
/// odd and even sizes; their output grids put x = y = 0 on sample floor(N/2).
#[test]
fn propagators_replay_on_the_plain_dft_lattice() {
    let mut seed = 5;
    for (nx, ny) in [(16, 16), (15, 9), (12, 7), (9, 10)] {
        let g = Grid {
            nx,
            ny,
            pitch: [8e-6, 6e-6],
            wavelength: 633e-9,
            lattice: Lattice::PixelCentres,
        };
        let t: Vec<Complex64> = (0..nx * ny)
            .map(|_| Complex64::from_polar(0.2 + lcg(&mut seed), 2.0 * PI * lcg(&mut seed)))
            .collect();
        let d = dft2(&t, nx, ny);
        let mut planner = PropagationPlanner::<f64>::new();
        let f = 0.2;
        let z = 2.0 * g.critical_distance()[0].max(g.critical_distance()[1]);
        for (name, recipe, dist, scale) in [
            // Fourier: |U| = px py / (lambda f) |DFT| (Goodman, Introduction to Fourier Optics,
            // sec. 5.2); single-FFT Fresnel: px py / (lambda z) |DFT of t times a unit chirp|.
            (
                "fourier",
                PropagationRecipe::Fourier { focal: f },
                0.0,
                g.pixel_area() / (633e-9 * f),
            ),
            ("fresnel", PropagationRecipe::SingleFftFresnel, z, 0.0),
        ] {
            let p = planner.plan_recipe(&g, dist, recipe);
            let out = p.output();
            assert_eq!(out.lattice, Lattice::FftAxis, "{name}");
            assert_eq!(out.x_of_col(nx / 2), 0.0);
            assert_eq!(out.y_of_row(ny / 2), 0.0);
            let mut u = t.clone();
            p.propagate(&mut u);
            let want: Vec<f64> = if name == "fourier" {
                (0..ny * nx)
                    .map(|k| scale * d[shifted(k / nx, k % nx, nx, ny)].norm())
                    .collect()
            } else {
                // The input chirp exp(i pi rho^2 / (lambda z)) at the plate's pixel centres.
                let tc: Vec<Complex64> = (0..ny * nx)
                    .map(|k| {
                        let x = g.x_of_col(k % nx);
                        let y = g.y_of_row(k / nx);
                        t[k] * Complex64::from_polar(1.0, PI * (x * x + y * y) / (633e-9 * z))
                    })
                    .collect();
                let dc = dft2(&tc, nx, ny);
                let s = g.pixel_area() / (633e-9 * z);
                (0..ny * nx)
                    .map(|k| s * dc[shifted(k / nx, k % nx, nx, ny)].norm())
                    .collect()
            };
            let peak = want.iter().cloned().fold(0.0, f64::max);
            for k in 0..nx * ny {
                assert!(
                    (u[k].norm() - want[k]).abs() < 1e-10 * peak,
                    "{name} {nx}x{ny} sample {k}: {} vs {}",
                    u[k].norm(),
                    want[k]
                );
            }
            // And back to the plate's pixel centres, to rounding.
            let back = planner.plan_recipe(
                &out,
                -dist,
                match recipe {
                    PropagationRecipe::Fourier { focal } => {
                        PropagationRecipe::Fourier { focal: -focal }
                    }
                    r => r,
                },
            );
            assert_eq!(back.output().lattice, Lattice::PixelCentres);
            back.propagate(&mut u);
            let e = u
                .iter()
                .zip(&t)
                .map(|(a, b)| (a - b).norm())
                .fold(0.0, f64::max);
            assert!(e < 1e-10, "{name} {nx}x{ny}: round trip {e:e}");
        }
    }
}

fn write_grey_png(path: &Path, w: usize, h: usize, v: &[u8]) {
    let f = std::fs::File::create(path).unwrap();
    let mut e = png::Encoder::new(std::io::BufWriter::new(f), w as u32, h as u32);
    e.set_color(png::ColorType::Grayscale);
    e.set_depth(png::BitDepth::Eight);
    e.write_header().unwrap().write_image_data(v).unwrap();
}

fn run(args: &[&str]) {
    let o = Command::new(BIN).args(args).output().unwrap();
    assert!(
        o.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
}

/// Pearson correlation of two equal-length sequences.
fn correlation(a: &[f64], b: &[f64]) -> f64 {
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb) = (0.0, 0.0, 0.0);
    for (x, y) in a.iter().zip(b) {
        sab += (x - ma) * (y - mb);
        saa += (x - ma) * (x - ma);
        sbb += (y - mb) * (y - mb);
    }
    sab / (saa * sbb).sqrt()
}

/// A grey target synthesised by the tool (Fourier geometry, 256 phase levels) and replayed by a
/// plain DFT of its stored samples correlates >= 0.95 with the target on the fftshift lattice;
/// on the lattice half a sample off (the axis between samples) it does not.
#[test]
fn tool_plate_replays_its_target_under_a_plain_fft() {
    for n in [256usize, 255] {
        let d = tempfile::tempdir().unwrap();
        // An invented grey target: a soft ramp, a disc and a bright bar, 90 x 70 px.
        let (tw, th) = (90usize, 70usize);
        let mut v = vec![0u8; tw * th];
        for r in 0..th {
            for c in 0..tw {
                let ramp = 40.0 + 120.0 * c as f64 / tw as f64;
                let (dx, dy) = (c as f64 - 30.0, r as f64 - 35.0);
                let disc = if dx * dx + dy * dy < 18.0 * 18.0 {
                    80.0
                } else {
                    0.0
                };
                let bar = if (60..80).contains(&c) && (10..25).contains(&r) {
                    95.0
                } else {
                    0.0
                };
                v[r * tw + c] = (ramp + disc + bar).min(255.0) as u8;
            }
        }
        write_grey_png(&d.path().join("t.png"), tw, th, &v);
        let job = d.path().join("job.toml");
        std::fs::write(
            &job,
            format!(
                "[hologram]\nwidth_px = {n}\nheight_px = {n}\npitch_um = 8.0\nwavelength_nm = 532\n\
                 [reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\n\
                 [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\n\
                 algorithm = \"mixed-region\"\niterations = 60\nseed = 4\n\
                 [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"p.tif\"\n"
            ),
        )
        .unwrap();
        run(&["run", "-q", job.to_str().unwrap()]);
        let (w, h, s) = decode(&d.path().join("p.tif"));
        assert_eq!((w as usize, h as usize), (n, n));
        // physics.md: displayed phase 2 pi s / 2^8.
        let t: Vec<Complex64> = s
            .iter()
            .map(|&s| Complex64::from_polar(1.0, 2.0 * PI * s as f64 / 256.0))
            .collect();
        let x0 = n / 2 - tw / 2;
        let y0 = n / 2 - th / 2;
        let target: Vec<f64> = v.iter().map(|&g| g as f64 / 255.0).collect();
        let corr_of = |t: &[Complex64]| {
            let dd = dft2(t, n, n);
            let got: Vec<f64> = (0..th * tw)
                .map(|k| dd[shifted(y0 + k / tw, x0 + k % tw, n, n)].norm_sqr())
                .collect();
            correlation(&got, &target)
        };
        let c = corr_of(&t);
        assert!(
            c >= 0.95,
            "N = {n}: correlation {c} on the fftshift lattice"
        );
        // The same plate seen half a sample off on both axes (a lattice with the axis between
        // samples): the image decorrelates into speckle, so the lattice matters to this check.
        let half: Vec<Complex64> = t
            .iter()
            .enumerate()
            .map(|(k, &v)| {
                let (i, j) = ((k / n) as f64, (k % n) as f64);
                v * Complex64::from_polar(1.0, -PI * (i + j) / n as f64)
            })
            .collect();
        let ch = corr_of(&half);
        eprintln!("N = {n}: correlation {c:.4} on the lattice, {ch:.4} half a sample off");
        assert!(ch < 0.9, "N = {n}: correlation {ch} half a sample off");
    }
}

/// The undiffracted zero order of a blank plate lands on replay sample (floor(N/2), floor(N/2)),
/// in `reconstruct`'s image and metrics, for even and odd sizes.
#[test]
fn blank_plate_zero_order_on_the_axis_sample() {
    for (w, h) in [(64u32, 48u32), (63, 47)] {
        let d = tempfile::tempdir().unwrap();
        // A point-sum plate gives a sidecar of the right kind; its samples are then blanked.
        std::fs::write(
            d.path().join("p.csv"),
            "x_mm,y_mm,z_mm,amplitude\n0,0,5,1\n",
        )
        .unwrap();
        let job = d.path().join("job.toml");
        std::fs::write(
            &job,
            format!(
                "[hologram]\nwidth_px = {w}\nheight_px = {h}\npitch_um = 8.0\nwavelength_nm = 532\n\
                 [reference]\nkind = \"plane\"\n[[object]]\npoints = \"p.csv\"\n\
                 [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"p.tif\"\n"
            ),
        )
        .unwrap();
        run(&["run", "-q", job.to_str().unwrap()]);
        let tif = d.path().join("p.tif");
        let f = std::fs::File::create(&tif).unwrap();
        let mut enc = tiff::encoder::TiffEncoder::new(f).unwrap();
        enc.write_image::<tiff::encoder::colortype::Gray8>(w, h, &vec![0u8; (w * h) as usize])
            .unwrap();
        let out = d.path().join("r.png");
        run(&[
            "reconstruct",
            tif.to_str().unwrap(),
            "--focal-mm",
            "200",
            "--out",
            out.to_str().unwrap(),
        ]);
        let m: serde_json::Value =
            serde_json::from_slice(&std::fs::read(out.with_extension("json")).unwrap()).unwrap();
        let pk = &m["planes"][0]["peaks"][0];
        assert_eq!(pk["col"].as_u64().unwrap(), (w / 2) as u64, "{w}x{h}: {pk}");
        assert_eq!(pk["row"].as_u64().unwrap(), (h / 2) as u64, "{w}x{h}: {pk}");
        assert!(pk["x_mm"].as_f64().unwrap().abs() < 1e-12);
        assert!(pk["y_mm"].as_f64().unwrap().abs() < 1e-12);
    }
}
