//! The layers path (meshes sliced in depth, silhouette occlusion) against the direct point sum of
//! its own samples, and its occlusion against geometry through windows of the plate, replayed by
//! this file's own angular-spectrum code (rustfft, Goodman, Introduction to Fourier Optics,
//! 3rd ed., sec. 3.10).

mod common;
use common::peak_mib;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use fringemill::optics::{Plate, Reference};
use fringemill::scene::mesh::Mesh;
use fringemill::scene::sampling::{sample_surface, Density, PhaseMode, SamplingOptions, Shading};
use fringemill::synthesis::layers::{LayerObject, LayerSynthesis};
use fringemill::synthesis::point_sum::{BandScratch, PointSum};
use fringemill::synthesis::Emitter;
use fringemill::synthesis::{PointSumOptions, Precision};
use num_complex::Complex64;
use rustfft::FftPlanner;

/// A closed box between two corners, 12 triangles wound outwards (anticlockwise seen from
/// outside).
fn cuboid(lo: [f64; 3], hi: [f64; 3], name: &str) -> Mesh {
    let v = |i: usize| {
        [
            if i & 1 == 0 { lo[0] } else { hi[0] },
            if i & 2 == 0 { lo[1] } else { hi[1] },
            if i & 4 == 0 { lo[2] } else { hi[2] },
        ]
    };
    let positions: Vec<[f64; 3]> = (0..8).map(v).collect();
    // Faces as quads, anticlockwise seen from outside.
    let quads: [[u32; 4]; 6] = [
        [0, 2, 3, 1], // z = lo (faces -z, towards the plate)
        [4, 5, 7, 6], // z = hi
        [0, 1, 5, 4], // y = lo
        [2, 6, 7, 3], // y = hi
        [0, 4, 6, 2], // x = lo
        [1, 3, 7, 5], // x = hi
    ];
    let mut tris = Vec::new();
    for q in quads {
        tris.push([q[0], q[1], q[2]]);
        tris.push([q[0], q[2], q[3]]);
    }
    Mesh::from_triangles(positions, tris, PathBuf::from(name))
}

/// An open square facing the plate (normal -z), centred at (cx, cy, z), half side a.
fn sheet(c: [f64; 3], a: f64) -> Mesh {
    let p = vec![
        [c[0] - a, c[1] - a, c[2]],
        [c[0] - a, c[1] + a, c[2]],
        [c[0] + a, c[1] + a, c[2]],
        [c[0] + a, c[1] - a, c[2]],
    ];
    Mesh::from_triangles(p, vec![[0, 1, 2], [0, 2, 3]], PathBuf::from("sheet"))
}

fn object(mesh: Mesh, occludes: bool, seed: u64) -> LayerObject {
    LayerObject {
        mesh,
        shading: Shading::default(),
        phase: PhaseMode::Random,
        seed,
        gain: 1.0,
        occludes,
    }
}

fn layers_field(l: &LayerSynthesis, band: usize) -> Vec<Complex64> {
    l.prepare(&mut |_| {}).unwrap();
    let p = *l.plate();
    let (w, h) = (p.width as usize, p.height as usize);
    let mut f = vec![Complex64::new(f64::NAN, 0.0); w * h];
    let mut r0 = 0;
    while r0 < h {
        let n = band.min(h - r0);
        l.compute_band(
            r0,
            n,
            &mut f[r0 * w..(r0 + n) * w],
            &mut BandScratch::default(),
        );
        r0 += n;
    }
    f
}

/// A non-square plate, a reference tilted in y, a sloped closed box and a tilted sheet over
/// several slabs: every sample sees the whole plate within 40 % of its band (largest ray tangent
/// 0.09 against the band's 0.28; the layers path keeps 80 % of the half band at full weight), so
/// nothing is cut at a support edge. The layers plate then equals the direct sum (f64, obliquity
/// z / r) of the same samples on their slabs' planes. Measured: 4.2e-5 of max |F|, which is the
/// 1 / (k r) term of the Rayleigh-Sommerfeld kernel that the point sum leaves out (k r = 2.4e4;
/// Goodman, Introduction to Fourier Optics, eq. 3-41); the f32 transforms add about 1e-6. Bound
/// 1e-4. Before the band's soft edge the same test gave 1e-2 (kernel tails wrapping around the
/// front plane), and before the soft direction window 0.2 (knife-edge ringing).
#[test]
fn layers_equal_the_direct_sum_of_their_samples() {
    let plate = Plate {
        width: 192,
        height: 160,
        pitch: [1e-6, 1e-6],
        wavelength: 532e-9,
    };
    let reference = Reference::Plane {
        tilt: [0.0, 3f64.to_radians()],
    };
    let bx = cuboid([-35e-6, -20e-6, 2.0e-3], [5e-6, 12e-6, 2.04e-3], "box");
    // A sheet tilted about x: its depth runs over 60 um.
    let mut s = sheet([20e-6, 15e-6, 2.05e-3], 18e-6);
    for (k, p) in s.positions.iter_mut().enumerate() {
        p[2] += if k == 1 || k == 2 { 60e-6 } else { 0.0 };
    }
    let objects = vec![object(bx, false, 3), object(s, false, 4)];
    let dir = tempfile::tempdir().unwrap();
    let l = LayerSynthesis::new(
        plate,
        reference,
        objects,
        Some(5),
        dir.path().to_path_buf(),
        "t",
    )
    .unwrap();
    let em = l.samples_as_emitters().unwrap();
    assert!(em.len() > 1500, "{} samples", em.len());
    let f = layers_field(&l, 37);
    let opts = PointSumOptions {
        obliquity: true,
        precision: Precision::F64,
        ..PointSumOptions::default()
    };
    let (w, h) = (plate.width as usize, plate.height as usize);
    let mut d = vec![Complex64::new(0.0, 0.0); w * h];
    PointSum::new(plate, reference, em, opts).compute_band(
        0,
        h,
        &mut d,
        &mut BandScratch::default(),
    );
    let max = d.iter().map(|v| v.norm()).fold(0.0, f64::max);
    let err = f
        .iter()
        .zip(&d)
        .map(|(a, b)| (a - b).norm())
        .fold(0.0, f64::max);
    // Values under the residue floor are written as 0: allowed on top of the bound.
    let floor = l.residue_floor().unwrap();
    eprintln!(
        "layers vs direct sum: {:.3e} of max |F| ({max:.3e}), floor {:.3e} of max",
        err / max,
        floor / max
    );
    assert!(floor < 1e-3 * max, "floor {:.3e} of max", floor / max);
    assert!(
        max > 0.0 && err <= 1e-4 * max + floor,
        "error {:.3e} of max",
        err / max
    );
    // The scratch files are gone once the synthesis is dropped.
    drop(l);
    assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 0);
}

/// The front plane carried in tiles through scratch files (tiles of 48 samples, margins from the
/// slab's reach) equals the plane held in memory: same scene as above, with occlusion on (the
/// closed box masks its inside across tiles). Measured 1.1e-5 of max |F| (different transform
/// sizes round differently in f32, and the margins' soft-edge tails); bound 1e-4. With margins of
/// 2 samples instead the same test gives 0.14. The tiled path's scratch files are gone after.
#[test]
fn tiled_front_plane_equals_the_plane_in_memory() {
    let plate = Plate {
        width: 192,
        height: 160,
        pitch: [1e-6, 1e-6],
        wavelength: 532e-9,
    };
    let reference = Reference::Plane {
        tilt: [0.0, 3f64.to_radians()],
    };
    let make = |tiles: Option<usize>, dir: &Path| {
        let bx = cuboid([-35e-6, -20e-6, 2.0e-3], [5e-6, 12e-6, 2.04e-3], "box");
        let mut s = sheet([20e-6, 15e-6, 2.05e-3], 18e-6);
        for (k, p) in s.positions.iter_mut().enumerate() {
            p[2] += if k == 1 || k == 2 { 60e-6 } else { 0.0 };
        }
        LayerSynthesis::new(
            plate,
            reference,
            vec![object(s, true, 4), object(bx, true, 3)],
            Some(5),
            dir.to_path_buf(),
            "t",
        )
        .unwrap()
        .with_tiles(tiles)
    };
    let d = tempfile::tempdir().unwrap();
    let a = make(None, d.path());
    let b = make(Some(48), d.path());
    assert!(b.plane_rect().size[0] > 2 * 48, "{:?}", b.plane_rect());
    let fa = layers_field(&a, 160);
    let fb = layers_field(&b, 160);
    let max = fa.iter().map(|v| v.norm()).fold(0.0, f64::max);
    let err = fa
        .iter()
        .zip(&fb)
        .map(|(x, y)| (x - y).norm())
        .fold(0.0, f64::max);
    eprintln!("tiled vs in memory: {:.3e} of max |F|", err / max);
    assert!(
        max > 0.0 && err <= 1e-4 * max,
        "error {:.3e} of max",
        err / max
    );
    drop((a, b));
    assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 0);
}

/// Where no sample's band reaches (a small square 1 mm before a plate much wider than its band's
/// footprint), F is exactly 0, as the direct sum's is: the transforms' rounding residue there is
/// floored, or phase and binary encodings would turn it into full-strength noise. Inside the
/// footprint F is not floored (every pixel within 0.2 mm of the axis is nonzero).
#[test]
fn no_light_means_zero_not_residue() {
    let plate = Plate {
        width: 1024,
        height: 1024,
        pitch: [1e-6, 1e-6],
        wavelength: 532e-9,
    };
    let dir = tempfile::tempdir().unwrap();
    let l = LayerSynthesis::new(
        plate,
        Reference::Plane { tilt: [0.0, 0.0] },
        vec![object(sheet([0.0, 0.0, 1e-3], 25e-6), false, 9)],
        None,
        dir.path().to_path_buf(),
        "r",
    )
    .unwrap();
    let f = layers_field(&l, 256);
    // The band's footprint: tan(asin(lambda / 2p)) x 1 mm = 0.28 mm, plus the square's half side.
    let (mut outside, mut zero_out, mut inside, mut lit_in) = (0, 0, 0, 0);
    for i in 0..1024 {
        for j in 0..1024 {
            let r = plate.x_of_col(j as f64).hypot(plate.y_of_row(i as f64));
            let v = f[i * 1024 + j];
            if r > 0.45e-3
                && (plate.x_of_col(j as f64).abs() > 0.36e-3
                    || plate.y_of_row(i as f64).abs() > 0.36e-3)
            {
                outside += 1;
                zero_out += usize::from(v.norm() == 0.0);
            } else if r < 0.2e-3 {
                inside += 1;
                lit_in += usize::from(v.norm() > 0.0);
            }
        }
    }
    assert!(outside > 100_000 && inside > 100_000);
    assert_eq!(
        zero_out,
        outside,
        "{} of {outside} pixels beyond the band left nonzero",
        outside - zero_out
    );
    assert_eq!(lit_in, inside);
}

/// Intensity of the windowed plate field refocused at depth z (backward angular spectrum over a
/// frame of `n` samples holding the plate at its top-left; zero-tilt reference, so O = F).
fn refocus(
    f: &[Complex64],
    w: usize,
    h: usize,
    window: [usize; 4],
    z: f64,
    p: &Plate,
    n: usize,
) -> Vec<f64> {
    let mut g = vec![Complex64::new(0.0, 0.0); n * n];
    let [c0, r0, ww, wh] = window;
    for r in r0..r0 + wh {
        for c in c0..c0 + ww {
            g[r * n + c] = f[r * w + c];
        }
    }
    let _ = h;
    let mut planner = FftPlanner::<f64>::new();
    let fwd = planner.plan_fft_forward(n);
    let inv = planner.plan_fft_inverse(n);
    let transpose = |g: &mut Vec<Complex64>| {
        let mut t = vec![Complex64::new(0.0, 0.0); n * n];
        for r in 0..n {
            for c in 0..n {
                t[c * n + r] = g[r * n + c];
            }
        }
        *g = t;
    };
    for row in g.chunks_exact_mut(n) {
        fwd.process(row);
    }
    transpose(&mut g);
    for row in g.chunks_exact_mut(n) {
        fwd.process(row);
    }
    // Back towards the scene: exp(-i 2 pi z sqrt(1/lambda^2 - f^2)), even in f.
    let df = 1.0 / (n as f64 * p.pitch[0]);
    let signed = |k: usize| {
        if k < n / 2 {
            k as f64
        } else {
            k as f64 - n as f64
        }
    };
    for a in 0..n {
        for b in 0..n {
            let (fa, fb) = (signed(a) * df, signed(b) * df);
            let w2 = 1.0 / (p.wavelength * p.wavelength) - fa * fa - fb * fb;
            let v = &mut g[a * n + b];
            *v = if w2 > 0.0 {
                *v * Complex64::from_polar(1.0, -std::f64::consts::TAU * z * w2.sqrt())
            } else {
                Complex64::new(0.0, 0.0)
            };
        }
    }
    for row in g.chunks_exact_mut(n) {
        inv.process(row);
    }
    transpose(&mut g);
    for row in g.chunks_exact_mut(n) {
        inv.process(row);
    }
    g.iter().map(|v| v.norm_sqr()).collect()
}

/// Centre (x, metres) of the shadow on the bright sheet and its depth: the intensity averaged over
/// the shadow's rows, smoothed over 21 columns (speckle), its darkest column, then the centroid of
/// the dip below the profile's median within 50 columns of it. Also the darkest smoothed value as
/// a share of the median.
fn shadow_centre(i: &[f64], n: usize, p: &Plate, rows: [usize; 2], cols: [usize; 2]) -> (f64, f64) {
    let prof: Vec<f64> = (cols[0]..cols[1])
        .map(|c| (rows[0]..rows[1]).map(|r| i[r * n + c]).sum::<f64>() / (rows[1] - rows[0]) as f64)
        .collect();
    let half = 10;
    let smooth: Vec<f64> = (0..prof.len())
        .map(|k| {
            let (a, b) = (k.saturating_sub(half), (k + half + 1).min(prof.len()));
            prof[a..b].iter().sum::<f64>() / (b - a) as f64
        })
        .collect();
    let mut sorted = smooth.clone();
    sorted.sort_by(f64::total_cmp);
    let level = sorted[sorted.len() / 2];
    let (kmin, vmin) =
        smooth.iter().enumerate().fold(
            (0, f64::INFINITY),
            |m, (k, &v)| if v < m.1 { (k, v) } else { m },
        );
    let (mut m0, mut m1) = (0.0, 0.0);
    let first = kmin.saturating_sub(50);
    for (k, v) in smooth.iter().enumerate().take(kmin + 51).skip(first) {
        let dip = (level - v).max(0.0);
        m0 += dip;
        m1 += dip * p.x_of_col((cols[0] + k) as f64);
    }
    (m1 / m0, vmin / level)
}

/// A black closed box 1 mm in front of a bright sheet: seen through a window at the plate's
/// centre, it hides the sheet around the point geometry predicts; seen through windows 128 um to
/// either side, the hidden part moves the other way by (1 - z_sheet / z_box) times the window's
/// offset (the ray from the window's centre through the box's centre, continued to the sheet).
/// Without occlusion the same scene shows no such dip.
#[test]
fn silhouettes_hide_what_geometry_hides_from_each_window() {
    let plate = Plate {
        width: 512,
        height: 512,
        pitch: [1e-6, 1e-6],
        wavelength: 532e-9,
    };
    let (zb, zs) = (2.0e-3, 3.0e-3);
    let run = |occlude: bool| {
        let mut bx = cuboid([-30e-6, -30e-6, zb], [30e-6, 30e-6, zb + 20e-6], "box");
        bx.materials[0].base_color = [0.0, 0.0, 0.0, 1.0];
        let objects = vec![
            object(bx, occlude, 1),
            object(sheet([0.0, 0.0, zs], 200e-6), occlude, 2),
        ];
        let dir = tempfile::tempdir().unwrap();
        let l = LayerSynthesis::new(
            plate,
            Reference::Plane { tilt: [0.0, 0.0] },
            objects,
            Some(8),
            dir.path().to_path_buf(),
            "o",
        )
        .unwrap();
        layers_field(&l, 64)
    };
    // Geometry from the true depths; the slabs (125 um) move the box to 2.0625 mm and the sheet
    // to 2.9375 mm, which alone would predict 54 um for the side windows: within the 12 um
    // allowed.
    let n = 1024;
    let rows = [226, 286]; // y within +-30 um of the axis
    let cols = [130, 382]; // x within +-126 um, inside the sheet
    let f = run(true);
    let mut centres = Vec::new();
    for c0 in [64usize, 192, 320] {
        let win = [c0, 192, 128, 128];
        let xw = plate.x_of_col(c0 as f64 + 63.5);
        let i = refocus(&f, 512, 512, win, zs, &plate, n);
        let (x, dark) = shadow_centre(&i, n, &plate, rows, cols);
        let predicted = xw * (1.0 - zs / zb);
        eprintln!(
            "window at x = {:.1} um: shadow at {:.1} um (geometry {:.1} um), darkest {:.3} of the sheet",
            xw * 1e6,
            x * 1e6,
            predicted * 1e6,
            dark
        );
        assert!(
            (x - predicted).abs() < 12e-6,
            "shadow at {x}, predicted {predicted}"
        );
        assert!(dark < 0.25, "shadow not dark: {dark}");
        centres.push(x);
    }
    // The parallax between the side windows: 256 um x 0.5 = 128 um.
    assert!(((centres[0] - centres[2]) - 128e-6).abs() < 16e-6);
    // Control: with nothing occluding, the black box hides nothing.
    let f = run(false);
    let i = refocus(&f, 512, 512, [192, 192, 128, 128], zs, &plate, n);
    let (_, dark) = shadow_centre(&i, n, &plate, rows, cols);
    assert!(dark > 0.3, "dip without occlusion: {dark}");
}

/// Box blur of `r` samples each side, then the Pearson correlation of two images over a region.
fn blurred_correlation(a: &[f64], b: &[f64], n: usize, region: [usize; 4], r: usize) -> f64 {
    let blur = |img: &[f64]| -> Vec<f64> {
        let [c0, r0, w, h] = region;
        let mut out = Vec::with_capacity(w * h);
        for i in r0..r0 + h {
            for j in c0..c0 + w {
                let mut s = 0.0;
                for ii in i - r..=i + r {
                    for jj in j - r..=j + r {
                        s += img[ii * n + jj];
                    }
                }
                out.push(s);
            }
        }
        out
    };
    let (x, y) = (blur(a), blur(b));
    let m = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
    let (mx, my) = (m(&x), m(&y));
    let (mut sxy, mut sxx, mut syy) = (0.0, 0.0, 0.0);
    for (p, q) in x.iter().zip(&y) {
        sxy += (p - mx) * (q - my);
        sxx += (p - mx) * (p - mx);
        syy += (q - my) * (q - my);
    }
    sxy / (sxx * syy).sqrt()
}

/// The same scene through both paths, without occlusion: an L of two rectangles 2 mm before a
/// 512^2 plate, as a continuous surface (layers) and as emitters at the default density lambda z / D
/// (the direct sum, stratified samples, their own random phases). The speckle differs, the image
/// must not: replayed at the scene's depth by this file's angular spectrum and blurred over 11 x 11
/// um (about 5 x 5 speckle grains, lambda z / D = 2.1 um), the intensities correlate to 0.93 or
/// more (measured 0.96), where the L against its mirror image correlates to 0.3 or less.
#[test]
fn layers_and_direct_sum_replay_the_same_image() {
    let plate = Plate {
        width: 512,
        height: 512,
        pitch: [1e-6, 1e-6],
        wavelength: 532e-9,
    };
    let z = 2.0e-3;
    // An L: a tall bar on the left and a foot to the right (normals towards the plate).
    let rect = |x0: f64, y0: f64, x1: f64, y1: f64, base: u32| {
        (
            vec![[x0, y0, z], [x0, y1, z], [x1, y1, z], [x1, y0, z]],
            vec![[base, base + 1, base + 2], [base, base + 2, base + 3]],
        )
    };
    let (mut p, mut t) = rect(-100e-6, -100e-6, -40e-6, 110e-6, 0);
    let (p2, t2) = rect(-40e-6, -100e-6, 90e-6, -40e-6, 4);
    p.extend(p2);
    t.extend(t2);
    let mesh = Mesh::from_triangles(p, t, PathBuf::from("L"));
    let dir = tempfile::tempdir().unwrap();
    let layers = LayerSynthesis::new(
        plate,
        Reference::Plane { tilt: [0.0, 0.0] },
        vec![object(mesh.clone(), false, 5)],
        Some(1),
        dir.path().to_path_buf(),
        "c",
    )
    .unwrap();
    let fl = layers_field(&layers, 128);
    let spacing = plate.wavelength * z / 512e-6;
    let samples = sample_surface(&mesh, &SamplingOptions::new(Density::SpacingM(spacing))).unwrap();
    let em: Vec<Emitter> = samples
        .iter()
        .map(|s| Emitter {
            pos: s.pos,
            amplitude: s.amplitude,
            phase: s.phase,
        })
        .collect();
    let (w, h) = (512usize, 512usize);
    let mut fd = vec![Complex64::new(0.0, 0.0); w * h];
    PointSum::new(
        plate,
        Reference::Plane { tilt: [0.0, 0.0] },
        em,
        PointSumOptions::default(),
    )
    .compute_band(0, h, &mut fd, &mut BandScratch::default());
    let n = 1024;
    let il = refocus(&fl, w, h, [0, 0, w, h], z, &plate, n);
    let id = refocus(&fd, w, h, [0, 0, w, h], z, &plate, n);
    let region = [136, 136, 240, 240]; // the L and its surroundings
    let c = blurred_correlation(&il, &id, n, region, 5);
    // The mirror image of the direct replay (x reversed about the plate's centre column).
    let mirrored: Vec<f64> = (0..n * n)
        .map(|k| {
            let (i, j) = (k / n, k % n);
            if j < w {
                id[i * n + (w - 1 - j)]
            } else {
                0.0
            }
        })
        .collect();
    let cm = blurred_correlation(&il, &mirrored, n, region, 5);
    eprintln!("layers vs direct sum replays: correlation {c:.3}, against the mirror image {cm:.3}");
    assert!(c >= 0.93, "correlation {c}");
    assert!(cm <= 0.3, "mirror correlation {cm}");
}

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_fringemill"))
}

fn run(args: &[&str]) -> Output {
    bin().args(args).output().unwrap()
}

/// A small closed-box scene on a binary-amplitude plate through the layers path.
fn job(dir: &Path, extra: &str, size: [u32; 2]) -> PathBuf {
    let mesh = dir.join("box.obj");
    std::fs::write(
        &mesh,
        "v -0.03 -0.02 0\nv 0.03 -0.02 0\nv 0.03 0.02 0\nv -0.03 0.02 0\n\
         v -0.03 -0.02 0.03\nv 0.03 -0.02 0.03\nv 0.03 0.02 0.03\nv -0.03 0.02 0.03\n\
         f 1 4 3 2\nf 5 6 7 8\nf 1 2 6 5\nf 4 8 7 3\nf 1 5 8 4\nf 2 3 7 6\n",
    )
    .unwrap();
    let text = format!(
        "[hologram]\nwidth_px = {}\nheight_px = {}\npitch_um = 1.0\nwavelength_nm = 532\n\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [0.0, 4.0]\n\n\
         [[object]]\nmesh = \"box.obj\"\noffset_mm = [0.01, 0.0, 1.5]\nrotation_deg = [20.0, 30.0, 0.0]\n\n\
         [synthesis]\npath = \"layers\"\nlayers = 6\n{extra}\n\n\
         [encoding]\nkind = \"binary-amplitude\"\n\n[output]\npath = \"out/plate.tif\"\nrows_per_strip = 16\n",
        size[0], size[1]
    );
    let j = dir.join("job.toml");
    std::fs::write(&j, text).unwrap();
    j
}

/// 1 and 2 threads, and 3 shards assembled, give the same bytes; the sidecar names the path;
/// no scratch file is left.
#[test]
fn threads_and_shards_give_the_same_plate() {
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), "", [256, 200]);
    let o = run(&["run", "-q", "--threads", "1", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let reference = std::fs::read(d.path().join("out/plate.tif")).unwrap();
    let side = std::fs::read_to_string(d.path().join("out/plate.json")).unwrap();
    assert!(
        side.contains("\"path\": \"layers\"") && side.contains("\"occlusion\": \"silhouette\""),
        "{side}"
    );
    let o = run(&["run", "-q", "--threads", "2", j.to_str().unwrap()]);
    assert!(o.status.success());
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
    let d2 = tempfile::tempdir().unwrap();
    let j2 = job(d2.path(), "", [256, 200]);
    for k in [3, 1, 2] {
        let o = run(&[
            "run",
            "-q",
            "--shard",
            &format!("{k}/3"),
            j2.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let o = run(&["assemble", "-q", j2.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::read(d2.path().join("out/plate.tif")).unwrap() == reference);
    for dir in [d.path().join("out"), d2.path().join("out")] {
        let names: Vec<String> = std::fs::read_dir(&dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert!(!names.iter().any(|n| n.contains("frame")), "{names:?}");
    }
}

/// Memory follows the front plane and one column block, not the plate: a plate 4 times taller
/// (the frame's scratch files grow, the process does not) raises the peak by less than 16 MiB.
#[test]
fn peak_memory_flat_as_the_layers_plate_grows() {
    if !Path::new("/proc/self/status").exists() {
        return;
    }
    let mut peaks = Vec::new();
    for h in [4096, 16384] {
        let d = tempfile::tempdir().unwrap();
        let j = job(d.path(), "", [1024, h]);
        let o = run(&["run", "-q", "--stats", j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        peaks.push(peak_mib(&String::from_utf8_lossy(&o.stderr)));
    }
    eprintln!("peak memory {peaks:?} MiB");
    assert!(
        peaks[1] - peaks[0] < 16.0,
        "peak grew from {} to {} MiB",
        peaks[0],
        peaks[1]
    );
}

/// What the path does not take is refused with the reason, before any work.
#[test]
fn refusals_name_the_reason() {
    let d = tempfile::tempdir().unwrap();
    let cases = [
        ("layers = 0", "outside 1..=100000"),
        ("approximation = \"fresnel\"", "exact waves"),
    ];
    for (extra, want) in cases {
        let j = job(d.path(), extra, [64, 64]);
        if extra.starts_with("layers") {
            let t = std::fs::read_to_string(&j)
                .unwrap()
                .replace("layers = 6\n", "");
            std::fs::write(&j, t).unwrap();
        }
        let o = run(&["run", "-q", j.to_str().unwrap()]);
        let e = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success() && e.contains(want), "{extra}: {e}");
        assert_eq!(e.trim().lines().count(), 1, "{e}");
    }
    // The slab count applies to the layers path only.
    let j = job(d.path(), "", [64, 64]);
    let t = std::fs::read_to_string(&j)
        .unwrap()
        .replace("path = \"layers\"\n", "");
    std::fs::write(&j, t).unwrap();
    let o = run(&["plan", j.to_str().unwrap()]);
    assert!(String::from_utf8_lossy(&o.stderr).contains("applies to path = \"layers\""));
    // A spherical reference.
    let j = job(d.path(), "", [64, 64]);
    let t = std::fs::read_to_string(&j).unwrap().replace(
        "kind = \"plane\"\ntilt_deg = [0.0, 4.0]",
        "kind = \"spherical\"\nposition_mm = [0.0, 0.0, -50.0]",
    );
    std::fs::write(&j, t).unwrap();
    let o = run(&["plan", j.to_str().unwrap()]);
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("plane reference"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // A point cloud.
    std::fs::write(d.path().join("p.csv"), "x,y,z\n0,0,1.5\n").unwrap();
    let t = std::fs::read_to_string(job(d.path(), "", [64, 64]))
        .unwrap()
        .replace(
            "mesh = \"box.obj\"\noffset_mm = [0.01, 0.0, 1.5]\nrotation_deg = [20.0, 30.0, 0.0]",
            "points = \"p.csv\"",
        );
    std::fs::write(&j, t).unwrap();
    let o = run(&["plan", j.to_str().unwrap()]);
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("point clouds take path = \"direct\""),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}
