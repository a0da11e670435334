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

/// `reconstruct p.tif ARGS --target TARGET --out r.png` in `dir`; returns the metrics JSON.
fn replay_metrics(dir: &Path, args: &[&str], target: &str) -> serde_json::Value {
    let (tif, t, out) = (dir.join("p.tif"), dir.join(target), dir.join("r.png"));
    let mut all = vec!["reconstruct", tif.to_str().unwrap()];
    all.extend_from_slice(args);
    all.extend_from_slice(&[
        "--target",
        t.to_str().unwrap(),
        "--out",
        out.to_str().unwrap(),
    ]);
    run(&all);
    serde_json::from_slice(&std::fs::read(dir.join("r.json")).unwrap()).unwrap()
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
        // The blanked TIFF is no longer the one its sidecar hashed: replay it anyway.
        run(&[
            "reconstruct",
            tif.to_str().unwrap(),
            "--focal-mm",
            "200",
            "--no-verify",
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

/// Intensity of a phase plate's samples under a plain DFT (physics.md: phase 2 pi s / 2^8).
fn dft_intensity_256(s: &[u16], n: usize) -> Vec<f64> {
    let t: Vec<Complex64> = s
        .iter()
        .map(|&s| Complex64::from_polar(1.0, 2.0 * PI * s as f64 / 256.0))
        .collect();
    dft2(&t, n, n).iter().map(|v| v.norm_sqr()).collect()
}

/// A 25 x 25 target of nine isolated spots (pixels (2 + 8a, 2 + 8b)), as a lab draws a spot array.
fn spot_target(dir: &Path) -> Vec<(usize, usize)> {
    let mut v = vec![0u8; 25 * 25];
    let mut spots = Vec::new();
    for a in 0..3 {
        for b in 0..3 {
            let (r, c) = (2 + 8 * a, 2 + 8 * b);
            v[r * 25 + c] = 255;
            spots.push((r, c));
        }
    }
    write_grey_png(&dir.join("spots.png"), 25, 25, &v);
    spots
}

fn spot_job(dir: &Path, n: usize, extra: &str) -> std::path::PathBuf {
    let job = dir.join("job.toml");
    std::fs::write(
        &job,
        format!(
            "[hologram]\nwidth_px = {n}\nheight_px = {n}\npitch_um = 8.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\n[[object]]\nimage = \"spots.png\"\n\
             [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\n\
             algorithm = \"weighted-gs\"\niterations = 40\nseed = 2\n{extra}\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"p.tif\"\n"
        ),
    )
    .unwrap();
    job
}

/// A 64 x 64 cell tiled 2 x 2 over a 128 x 128 plate replays only on every other sample of the
/// plate's lattice (a periodic pattern must); the cell's spots are designed on those samples, so
/// under a plain DFT each designed spot is one sample, floor(128/2) + 2 (c - floor(64/2)), holding
/// nearly all the light of its neighbourhood (physics.md, "Replay lattices").
#[test]
fn tiled_cell_replays_each_spot_as_one_sample() {
    let d = tempfile::tempdir().unwrap();
    let spots = spot_target(d.path());
    let job = spot_job(d.path(), 128, "cell_px = [64, 64]");
    run(&["run", "-q", job.to_str().unwrap()]);
    let (_, _, s) = decode(&d.path().join("p.tif"));
    // The plate is the cell repeated.
    for i in 0..128 {
        for j in 0..128 {
            assert_eq!(s[i * 128 + j], s[(i % 64) * 128 + j % 64], "({i}, {j})");
        }
    }
    let dd = dft_intensity_256(&s, 128);
    let total: f64 = dd.iter().sum();
    let at = |m: i64, n: i64| dd[shifted(m as usize, n as usize, 128, 128)];
    // Target pixel (r, c) of the 25 x 25 image sits on cell sample (32 - 12 + r, 32 - 12 + c).
    let mut in_spots = 0.0;
    let mut powers = Vec::new();
    for &(r, c) in &spots {
        let (cm, cn) = (20 + r as i64, 20 + c as i64);
        let (m, n) = (64 + 2 * (cm - 32), 64 + 2 * (cn - 32));
        let p = at(m, n);
        let mut hood = 0.0;
        for dm in -2..=2 {
            for dn in -2..=2 {
                hood += at(m + dm, n + dn);
            }
        }
        assert!(
            p >= 0.95 * hood,
            "spot ({r}, {c}) at ({m}, {n}): {:.4} of its 5 x 5 neighbourhood",
            p / hood
        );
        in_spots += p;
        powers.push(p);
    }
    let (lo, hi) = powers
        .iter()
        .fold((f64::MAX, 0.0f64), |(a, b), &p| (a.min(p), b.max(p)));
    eprintln!(
        "tiled cell: efficiency {:.4}, min/max {:.4}",
        in_spots / total,
        lo / hi
    );
    assert!(in_spots / total > 0.7, "efficiency {}", in_spots / total);
    assert!(lo / hi > 0.8, "uniformity min/max {}", lo / hi);
}

/// A carrier is snapped to a whole number m of the plate's replay samples (sin t = m lambda /
/// (N p)): the sidecar and `plan` say so, and the replay under a plain DFT moves by exactly m
/// samples (x right, y up), so a lab's own FFT samples the moved image at the designed points.
/// The shift is the DFT shift theorem: a linear phase 2 pi m j / N moves the DFT by m samples
/// (Bracewell, The Fourier Transform and Its Applications, shift theorem; cited from memory).
#[test]
fn carrier_moves_the_replay_by_whole_samples() {
    let n = 128usize;
    let d = tempfile::tempdir().unwrap();
    let spots = spot_target(d.path());
    let job = spot_job(d.path(), n, "carrier_deg = [0.9, 0.5]");
    let o = Command::new(BIN)
        .args(["plan", job.to_str().unwrap()])
        .output()
        .unwrap();
    let plan =
        String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr);
    assert!(o.status.success(), "{plan}");
    // step = lambda / (N p); m = round(sin t / step).
    let step = 532e-9 / (n as f64 * 8e-6);
    let m = [
        (0.9f64.to_radians().sin() / step).round() as i64,
        (0.5f64.to_radians().sin() / step).round() as i64,
    ];
    assert_eq!(m, [30, 17]);
    assert!(
        plan.contains("snapped") && plan.contains(&format!("[{}, {}] whole samples", m[0], m[1])),
        "{plan}"
    );
    run(&["run", "-q", job.to_str().unwrap()]);
    let side: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.path().join("p.json")).unwrap()).unwrap();
    let it = &side["iterative"];
    assert_eq!(
        it["carrier_samples"],
        serde_json::json!([m[0], m[1]]),
        "{it}"
    );
    assert_eq!(
        it["carrier_asked_deg"],
        serde_json::json!([0.9, 0.5]),
        "{it}"
    );
    let applied = it["carrier_deg"][0].as_f64().unwrap();
    assert!(((applied.to_radians().sin()) - m[0] as f64 * step).abs() < 1e-12);
    let (_, _, s) = decode(&d.path().join("p.tif"));
    let dd = dft_intensity_256(&s, n);
    let total: f64 = dd.iter().sum();
    let mut in_spots = 0.0;
    for &(r, c) in &spots {
        let (row, col) = (64 - 12 + r as i64 - m[1], 64 - 12 + c as i64 + m[0]);
        let p = dd[shifted(row as usize, col as usize, n, n)];
        // One sample per spot: its 3 x 3 neighbours hold little.
        let mut hood = 0.0;
        for dm in -1..=1i64 {
            for dn in -1..=1i64 {
                hood += dd[shifted((row + dm) as usize, (col + dn) as usize, n, n)];
            }
        }
        assert!(
            p > 0.9 * hood,
            "spot ({r}, {c}): {:.4} of its 3 x 3",
            p / hood
        );
        in_spots += p;
    }
    assert!(in_spots / total > 0.7, "efficiency {}", in_spots / total);
}

/// `plan` and `run` both refuse the spot job with `extra` in one line holding every `needle`,
/// and no plate is written.
fn refused_by_plan_and_run(extra: &str, needles: &[&str]) {
    let d = tempfile::tempdir().unwrap();
    spot_target(d.path());
    let job = spot_job(d.path(), 128, extra);
    for cmd in ["plan", "run"] {
        let o = Command::new(BIN)
            .args([cmd, job.to_str().unwrap()])
            .output()
            .unwrap();
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success(), "{cmd} accepted it");
        assert!(needles.iter().all(|n| e.contains(n)), "{e}");
        assert_eq!(e.trim().lines().count(), 1, "{e}");
    }
    assert!(!d.path().join("p.tif").exists());
}

/// `cell_px` larger than the plate is refused (it cannot repeat over it), by `plan` and `run`.
#[test]
fn cell_larger_than_the_plate_is_refused() {
    refused_by_plan_and_run("cell_px = [128, 192]", &["cell_px", "larger than"]);
}

/// A target that does not fit the cell's replay lattice is refused by `plan` as by `run`, in
/// one line naming the job, the key and the image.
#[test]
fn target_outside_the_cell_is_refused_by_plan_and_run() {
    refused_by_plan_and_run(
        "cell_px = [16, 16]",
        &["job.toml", "image", "spots.png", "does not fit the 16 x 16"],
    );
}

/// An iterative plate in Fresnel geometry is designed for a real image at +D: a lab's own
/// single-FFT Fresnel replay by +D (Goodman, Introduction to Fourier Optics, eq. 4-17: chirp
/// exp(i pi x^2 / (lambda z)) on the plate, then a plain DFT, axis on sample floor(N/2)) shows
/// the target, by -D it does not; `reconstruct --distance-mm D` uses the design's sign and says so.
#[test]
fn fresnel_iterative_plate_replays_at_plus_d() {
    let n = 128usize;
    let (p, lambda, z) = (8e-6, 532e-9, 0.1);
    let d = tempfile::tempdir().unwrap();
    // An invented target filling the lattice: a ring and a bar on black.
    let mut v = vec![0u8; n * n];
    for r in 0..n {
        for c in 0..n {
            let (dx, dy) = (c as f64 - 54.0, r as f64 - 64.0);
            let rr = (dx * dx + dy * dy).sqrt();
            if (14.0..22.0).contains(&rr) || ((80..92).contains(&c) && (40..90).contains(&r)) {
                v[r * n + c] = 255;
            }
        }
    }
    write_grey_png(&d.path().join("t.png"), n, n, &v);
    let job = d.path().join("job.toml");
    std::fs::write(
        &job,
        format!(
            "[hologram]\nwidth_px = {n}\nheight_px = {n}\npitch_um = 8.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\ndistance_mm = 100\n\
             [synthesis]\nmethod = \"iterative\"\ngeometry = \"fresnel\"\n\
             iterations = 60\nseed = 3\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"p.tif\"\n"
        ),
    )
    .unwrap();
    run(&["run", "-q", job.to_str().unwrap()]);
    let (_, _, s) = decode(&d.path().join("p.tif"));
    let target: Vec<f64> = v.iter().map(|&g| g as f64).collect();
    let c0 = (n / 2) as f64;
    let own = |sign: f64| {
        let t: Vec<Complex64> = s
            .iter()
            .enumerate()
            .map(|(k, &s)| {
                let (x, y) = (((k % n) as f64 - c0) * p, (c0 - (k / n) as f64) * p);
                let chirp = sign * PI * (x * x + y * y) / (lambda * z);
                Complex64::from_polar(1.0, 2.0 * PI * s as f64 / 256.0 + chirp)
            })
            .collect();
        // Propagating by -z conjugates the kernel: the DFT's sign flips, i.e. the image is
        // the inverse DFT, read here as the forward DFT at index -k.
        let dd = dft2(&t, n, n);
        let got: Vec<f64> = (0..n * n)
            .map(|k| {
                let (m, q) = (k / n, k % n);
                let (m, q) = if sign > 0.0 {
                    (m, q)
                } else {
                    ((n - m) % n, (n - q) % n)
                };
                dd[shifted(m, q, n, n)].norm_sqr()
            })
            .collect();
        correlation(&got, &target)
    };
    let (plus, minus) = (own(1.0), own(-1.0));
    eprintln!("own Fresnel replay: correlation {plus:.4} at +D, {minus:.4} at -D");
    assert!(plus > 0.85, "correlation {plus} at +D");
    assert!(minus < 0.5, "correlation {minus} at -D");
    let m = replay_metrics(d.path(), &["--distance-mm", "100"], "t.png");
    let corr = m["planes"][0]["target"]["correlation"].as_f64().unwrap();
    assert!(corr > 0.85, "reconstruct correlation {corr}: {m}");
    assert!(
        m["depth_convention"].as_str().unwrap().contains("+D"),
        "{}",
        m["depth_convention"]
    );
}

fn plan_text(job: &Path) -> String {
    let o = Command::new(BIN)
        .args(["plan", job.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    String::from_utf8_lossy(&o.stdout).into_owned() + &String::from_utf8_lossy(&o.stderr)
}

/// `reconstruct --target` on a spot target reports what a lab reads (Di Leonardo, Ianni and
/// Ruocco, Optics Express 15, 1913, 2007): intensity per spot, efficiency sum I_m / total and
/// spread (I_max - I_min) / (I_max + I_min), with uniformity 1 - spread; the figures equal those
/// of a plain DFT of the plate's samples. `plan` warns when a target covers the zero order, and
/// when the plate is not a whole number of cells.
#[test]
fn spot_figures_and_zero_order_warning() {
    let n = 128usize;
    let d = tempfile::tempdir().unwrap();
    let spots = spot_target(d.path());
    let job = spot_job(d.path(), n, "");
    assert!(plan_text(&job).contains("covers the zero order"));
    // A carrier of 30 x 17 samples takes the 25 x 25 window off the axis.
    let moved = spot_job(d.path(), n, "carrier_deg = [0.9, 0.5]");
    let text = plan_text(&moved);
    assert!(!text.contains("zero order"), "{text}");
    let cut = spot_job(d.path(), n, "cell_px = [48, 48]");
    assert!(plan_text(&cut).contains("not a whole number"));
    let job = spot_job(d.path(), n, "");
    run(&["run", "-q", job.to_str().unwrap()]);
    // The target as the replay image shows it: 128 x 128, the 25 x 25 spots around the axis.
    let mut full = vec![0u8; n * n];
    for &(r, c) in &spots {
        full[(64 - 12 + r) * n + 64 - 12 + c] = 255;
    }
    write_grey_png(&d.path().join("full.png"), n, n, &full);
    let m = replay_metrics(d.path(), &["--focal-mm", "200"], "full.png");
    let sp = &m["planes"][0]["spots"];
    assert_eq!(sp["count"], 9, "{sp}");
    let (_, _, s) = decode(&d.path().join("p.tif"));
    let dd = dft_intensity_256(&s, n);
    let total: f64 = dd.iter().sum();
    let own: Vec<f64> = spots
        .iter()
        .map(|&(r, c)| dd[shifted(64 - 12 + r, 64 - 12 + c, n, n)])
        .collect();
    let eff = own.iter().sum::<f64>() / total;
    let (lo, hi) = own
        .iter()
        .fold((f64::MAX, 0.0f64), |(a, b), &v| (a.min(v), b.max(v)));
    let spread = (hi - lo) / (hi + lo);
    let get = |k: &str| sp[k].as_f64().unwrap();
    eprintln!("spots: efficiency {eff:.4}, spread {spread:.5}");
    assert!(
        (get("efficiency") - eff).abs() < 1e-4 * eff,
        "{sp} vs {eff}"
    );
    assert!((get("spread") - spread).abs() < 1e-4, "{sp} vs {spread}");
    assert!((get("uniformity") - (1.0 - spread)).abs() < 1e-4, "{sp}");
    let mean = own.iter().sum::<f64>() / 9.0;
    for (k, v) in own.iter().enumerate() {
        let rel = sp["spots"][k]["relative"].as_f64().unwrap();
        assert!(
            (rel - v / mean).abs() < 1e-4,
            "spot {k}: {rel} vs {}",
            v / mean
        );
    }
}

/// `reconstruct --oversample 2` replays a Fourier plate on a lattice twice as fine (zero padding):
/// its even samples are the plain lattice, and the flat top of a top-hat target is measured on
/// the designed samples and between them, as a lab's own 2x padded FFT shows it.
#[test]
fn oversampled_replay_measures_between_samples() {
    let n = 128usize;
    let d = tempfile::tempdir().unwrap();
    // A 30 x 20 top-hat, offset from the axis by a carrier-free shift.
    let (tw, th) = (30usize, 20usize);
    write_grey_png(&d.path().join("hat.png"), tw, th, &vec![255u8; tw * th]);
    let job = d.path().join("job.toml");
    std::fs::write(
        &job,
        format!(
            "[hologram]\nwidth_px = {n}\nheight_px = {n}\npitch_um = 8.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\n[[object]]\nimage = \"hat.png\"\nshift_px = [30, 0]\n\
             [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\n\
             algorithm = \"mixed-region\"\niterations = 60\nseed = 5\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"p.tif\"\n"
        ),
    )
    .unwrap();
    run(&["run", "-q", job.to_str().unwrap()]);
    // Placed as the tool places it: middle pixel on the axis, moved 30 right.
    let (x0, y0) = (64 - tw / 2 + 30, 64 - th / 2);
    let mut full = vec![0u8; n * n];
    for r in 0..th {
        for c in 0..tw {
            full[(y0 + r) * n + x0 + c] = 255;
        }
    }
    write_grey_png(&d.path().join("full.png"), n, n, &full);
    let m = replay_metrics(
        d.path(),
        &["--focal-mm", "200", "--oversample", "2"],
        "full.png",
    );
    let os = &m["oversampled"];
    assert_eq!(os["factor"], 2);
    assert_eq!(
        (os["width_px"].clone(), os["height_px"].clone()),
        (256.into(), 256.into())
    );
    assert!(d.path().join("r-os2.png").exists());
    // Own 2x padded DFT (numpy habit: np.fft.fft2(t, s=(2N, 2N)), fftshift).
    let (_, _, s) = decode(&d.path().join("p.tif"));
    let mut padded = vec![Complex64::new(0.0, 0.0); 4 * n * n];
    for (k, &v) in s.iter().enumerate() {
        padded[(k / n) * 2 * n + k % n] = Complex64::from_polar(1.0, 2.0 * PI * v as f64 / 256.0);
    }
    let fine: Vec<f64> = dft2(&padded, 2 * n, 2 * n)
        .iter()
        .map(|v| v.norm_sqr())
        .collect();
    let at = |r: usize, c: usize| fine[shifted(r, c, 2 * n, 2 * n)];
    let stats = |v: &[f64]| {
        let mean = v.iter().sum::<f64>() / v.len() as f64;
        let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / v.len() as f64;
        let lo = v.iter().cloned().fold(f64::MAX, f64::min);
        (lo / mean, var.sqrt() / mean)
    };
    // Flat cells: pixels of the hat whose right and lower neighbours are in it too.
    let (mut on, mut between) = (Vec::new(), Vec::new());
    for r in y0..y0 + th - 1 {
        for c in x0..x0 + tw - 1 {
            // Plain sample (r, c) is fine sample 2 r, 2 c (N even: floor(2N/2) = 2 floor(N/2)).
            on.push(at(2 * r, 2 * c));
            for dr in 0..2 {
                for dc in 0..2 {
                    between.push(at(2 * r + dr, 2 * c + dc));
                }
            }
        }
    }
    let flat = &os["flat"];
    assert_eq!(flat["cells"], (tw - 1) * (th - 1));
    let (on_min, on_rms) = stats(&on);
    let (all_min, all_rms) = stats(&between);
    eprintln!("top-hat: on samples min {on_min:.3} rms {on_rms:.3}; between min {all_min:.3} rms {all_rms:.3}");
    let g = |a: &str, b: &str| flat[a][b].as_f64().unwrap();
    assert!(
        (g("on_samples", "rms_relative") - on_rms).abs() < 1e-3,
        "{flat}"
    );
    assert!(
        (g("on_samples", "min_relative") - on_min).abs() < 1e-3,
        "{flat}"
    );
    assert!(
        (g("between_samples", "rms_relative") - all_rms).abs() < 1e-3,
        "{flat}"
    );
    assert!(
        (g("between_samples", "min_relative") - all_min).abs() < 1e-3,
        "{flat}"
    );
    // The plain lattice's figures are the even samples of the fine one.
    let plain = dft_intensity_256(&s, n);
    let scale = at(2 * y0, 2 * x0) / plain[shifted(y0, x0, n, n)];
    for r in (y0..y0 + th).step_by(7) {
        for c in (x0..x0 + tw).step_by(5) {
            let a = at(2 * r, 2 * c);
            let b = plain[shifted(r, c, n, n)] * scale;
            assert!(
                (a - b).abs() < 1e-9 * a.max(b).max(1.0),
                "({r}, {c}): {a} vs {b}"
            );
        }
    }
    // Without a lens there is no lattice to oversample: a one-line error.
    let o = Command::new(BIN)
        .args([
            "reconstruct",
            d.path().join("p.tif").to_str().unwrap(),
            "--distance-mm",
            "100",
            "--oversample",
            "2",
        ])
        .output()
        .unwrap();
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(
        !o.status.success() && e.contains("--oversample") && e.trim().lines().count() == 1,
        "{e}"
    );
}
