//! Spot lists and aberration correction for modulator patterns, checked from outside: the plate
//! is read back from its TIFF and replayed by the test's own code (a plain 2-D DFT, a direct sum
//! of the paraxial far field, a direct Fresnel propagation), never by the tool's replay.

use std::f64::consts::{PI, TAU};
use std::path::Path;
use std::process::Command;

use num_complex::Complex64;
use rustfft::FftPlanner;

mod common;
use common::decode;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

const N: usize = 256;
const PITCH: f64 = 8e-6;
const LAMBDA: f64 = 1.064e-6;
const FOCAL: f64 = 0.2;

fn run(args: &[&str]) -> std::process::Output {
    Command::new(BIN).args(args).output().unwrap()
}

/// Writes a spot-list job (N x N panel, 8 um, 1064 nm, f = 200 mm, 256 levels) and runs it;
/// returns the plate's phases (radians, row-major) and the sidecar.
fn spot_plate(
    dir: &Path,
    spots: &str,
    synthesis: &str,
    extra: &str,
) -> (Vec<f64>, serde_json::Value) {
    spot_plate_at(dir, FOCAL, spots, synthesis, extra)
}

/// As [`spot_plate`] with a lens of focal length `focal` (metres).
fn spot_plate_at(
    dir: &Path,
    focal: f64,
    spots: &str,
    synthesis: &str,
    extra: &str,
) -> (Vec<f64>, serde_json::Value) {
    std::fs::write(dir.join("spots.csv"), spots).unwrap();
    let job = dir.join("job.toml");
    std::fs::write(
        &job,
        format!(
            "[hologram]\nwidth_px = {N}\nheight_px = {N}\npitch_um = 8.0\nwavelength_nm = 1064\n\
             [reference]\nkind = \"plane\"\n\
             [[object]]\nspots = \"spots.csv\"\n\
             [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = {}\n{synthesis}\n\
             {extra}\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n\
             [output]\npath = \"plate.tif\"\n",
            focal * 1e3
        ),
    )
    .unwrap();
    let o = run(&["run", "-q", job.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let (w, h, s) = decode(&dir.join("plate.tif"));
    assert_eq!((w as usize, h as usize), (N, N));
    let phase = s.iter().map(|&v| TAU * f64::from(v) / 256.0).collect();
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("plate.json")).unwrap()).unwrap();
    (phase, side)
}

/// Pixel centres (physics.md, "Units and axes").
fn xy(i: usize, j: usize) -> (f64, f64) {
    (
        (j as f64 - (N as f64 - 1.0) / 2.0) * PITCH,
        ((N as f64 - 1.0) / 2.0 - i as f64) * PITCH,
    )
}

/// The paraxial far field of the plate at a spot (Di Leonardo, Ianni and Ruocco, Optics Express
/// 15, 1913, 2007, eq. 1), summed directly over every pixel.
fn far_field(phase: &[f64], x: f64, y: f64, z: f64) -> Complex64 {
    let mut v = Complex64::new(0.0, 0.0);
    for i in 0..N {
        for j in 0..N {
            let (px, py) = xy(i, j);
            let d = TAU * (px * x + py * y) / (LAMBDA * FOCAL)
                + PI * z * (px * px + py * py) / (LAMBDA * FOCAL * FOCAL);
            v += Complex64::from_polar(1.0, phase[i * N + j] - d);
        }
    }
    v / (N * N) as f64
}

fn spots_of(side: &serde_json::Value) -> &Vec<serde_json::Value> {
    side["iterative"]["spots"]["spots"].as_array().unwrap()
}

/// 2-D spots on replay samples: the plate's plain DFT (the lab's check, physics.md "Replay
/// lattices": sample floor(N/2) is the axis) puts in each spot the share of the power the sidecar
/// predicts, and the direct far-field sum agrees; weighted GS makes them uniform.
#[test]
fn lattice_spots_replay_as_the_sidecar_predicts() {
    let d = tempfile::tempdir().unwrap();
    let step = LAMBDA * FOCAL / (N as f64 * PITCH); // replay sample, metres
    let cells = [
        (20i64, 5i64),
        (35, -12),
        (-30, 25),
        (18, 30),
        (40, 40),
        (-25, -33),
    ];
    let mut csv = String::from("x_um,y_um,z_um,weight\n");
    for (kx, ky) in cells {
        csv += &format!(
            "{},{},0,1\n",
            kx as f64 * step * 1e6,
            ky as f64 * step * 1e6
        );
    }
    let (phase, side) = spot_plate(d.path(), &csv, "iterations = 40", "");
    // Plain DFT, unshifted: X[m, n] = sum t exp(-i 2 pi (j n + i m) / N).
    let mut a: Vec<Complex64> = phase
        .iter()
        .map(|&p| Complex64::from_polar(1.0, p))
        .collect();
    let mut planner = FftPlanner::<f64>::new();
    let f = planner.plan_fft_forward(N);
    for row in a.chunks_exact_mut(N) {
        f.process(row);
    }
    let mut col = vec![Complex64::new(0.0, 0.0); N];
    for j in 0..N {
        for i in 0..N {
            col[i] = a[i * N + j];
        }
        f.process(&mut col);
        for i in 0..N {
            a[i * N + j] = col[i];
        }
    }
    let total: f64 = a.iter().map(|v| v.norm_sqr()).sum();
    let mut got = Vec::new();
    for ((kx, ky), s) in cells.iter().zip(spots_of(&side)) {
        // Replay sample (row N/2 - ky, column N/2 + kx) is DFT index (-ky, kx) mod N.
        let (m, n) = (
            (N as i64 - ky).rem_euclid(N as i64),
            kx.rem_euclid(N as i64),
        );
        let share = a[m as usize * N + n as usize].norm_sqr() / total;
        let predicted = s["predicted_intensity"].as_f64().unwrap();
        assert!(
            (share - predicted).abs() < 1e-9,
            "spot ({kx}, {ky}): DFT {share} vs sidecar {predicted}"
        );
        let direct = far_field(&phase, *kx as f64 * step, *ky as f64 * step, 0.0).norm_sqr();
        assert!(
            (direct - share).abs() < 1e-9,
            "direct sum {direct} vs DFT {share}"
        );
        got.push(share);
    }
    let (lo, hi) = got
        .iter()
        .fold((1.0f64, 0.0f64), |(l, h), &v| (l.min(v), h.max(v)));
    let u = 1.0 - (hi - lo) / (hi + lo);
    assert!((u - side["iterative"]["spots"]["uniformity"].as_f64().unwrap()).abs() < 1e-9);
    assert!(u > 0.98, "uniformity {u}");
}

/// 3-D spots: the direct far-field sum of the written plate at each spot (the paper's eq. 1,
/// coded here independently) gives the intensities the sidecar predicts. Weighted GS beats GS in
/// uniformity and the superposition start in efficiency, as Di Leonardo, Ianni and Ruocco
/// report (Optics Express 15, 1913, 2007, Table 1; from memory: GSW e about 0.93, u about 0.99;
/// check the table), and reaches u > 0.99, e > 0.85 here.
#[test]
fn three_d_spots_weighted_gs_against_a_direct_sum() {
    let mut csv = String::from("# traps\nx_um, y_um, z_um, weight\n");
    let mut spots = Vec::new();
    for k in 0..9 {
        let (x, y) = (
            300.0 + 130.0 * (k % 3) as f64,
            -150.0 + 150.0 * (k / 3) as f64,
        );
        let z = [-400.0, 0.0, 400.0][k % 3];
        csv += &format!("{x}, {y}, {z}, 1\n");
        spots.push((x * 1e-6, y * 1e-6, z * 1e-6));
    }
    let mut figures = Vec::new();
    for alg in ["weighted-gs", "gs", "superposition"] {
        let d = tempfile::tempdir().unwrap();
        let (phase, side) = spot_plate(
            d.path(),
            &csv,
            &format!("algorithm = \"{alg}\"\niterations = 30"),
            "",
        );
        let mut got = Vec::new();
        for (&(x, y, z), s) in spots.iter().zip(spots_of(&side)) {
            let i = far_field(&phase, x, y, z).norm_sqr();
            let p = s["predicted_intensity"].as_f64().unwrap();
            assert!((i - p).abs() < 1e-9, "{alg}: direct {i} vs sidecar {p}");
            got.push(i);
        }
        let e: f64 = got.iter().sum();
        let (lo, hi) = got
            .iter()
            .fold((1.0f64, 0.0f64), |(l, h), &v| (l.min(v), h.max(v)));
        figures.push((alg, e, 1.0 - (hi - lo) / (hi + lo)));
    }
    let (_, e_w, u_w) = figures[0];
    let (_, _, u_gs) = figures[1];
    let (_, e_sr, _) = figures[2];
    assert!(u_w > 0.99 && e_w > 0.85, "{figures:?}");
    assert!(u_w > u_gs && e_w > e_sr, "{figures:?}");
}

/// A pure Zernike defocus term moves a spot's focus by what geometric optics gives: c waves rms
/// of Z(2, 0) = sqrt(3) (2 rho^2 - 1) over a pupil of radius R is a thin lens of power
/// -4 sqrt(3) c lambda / R^2 (Noll, JOSA 66, 207, 1976, for the polynomial; thin lenses in
/// contact add their powers, Hecht, Optics, sec. 6.2), so the focus of the lens moves to
/// f' = 1 / (1/f - 4 sqrt(3) c lambda / R^2). The plate is propagated here by a direct Fresnel
/// sum (Goodman, Introduction to Fourier Optics, eq. 4-17) through the lens, over the pupil only
/// (the beam fills the pupil), and the axial peak of the intensity found: it equals the peak of
/// an ideal thin lens of that power made by the test, and the geometric focus within the focal
/// shift of a finite Fresnel number.
#[test]
fn zernike_defocus_moves_the_focus_as_geometric_optics_says() {
    let d = tempfile::tempdir().unwrap();
    let focal = 0.05;
    let r_pupil = N as f64 * PITCH / 2.0;
    let f_want = 0.055;
    let power = 1.0 / focal - 1.0 / f_want;
    let c = power * r_pupil * r_pupil / (4.0 * 3f64.sqrt() * LAMBDA);
    let (phase, side) = spot_plate_at(
        d.path(),
        focal,
        "x_um,y_um,z_um,weight\n0,0,0,1\n",
        "iterations = 5",
        &format!(
            "[correction]\nzernike = [[2, 0, {c}]]\npupil_radius_mm = {}\n",
            r_pupil * 1e3
        ),
    );
    assert_eq!(
        side["iterative"]["correction"]["zernike"][0][2].as_f64(),
        Some(c)
    );
    let k = TAU / LAMBDA;
    let peak_of = |ph: &dyn Fn(usize) -> f64| axial_peak(ph, focal, r_pupil, focal, focal + 0.010);
    let plate_peak = peak_of(&|p| phase[p]);
    // The thin lens of power -power itself, made here (a diverging lens, phase +k r^2 power / 2
    // with the diverging wave exp(+i k r) of physics.md).
    let lens_peak = peak_of(&|p| {
        let (x, y) = xy(p / N, p % N);
        k * (x * x + y * y) * power / 2.0
    });
    let (moved, want) = (plate_peak - focal, f_want - focal);
    assert!(
        (plate_peak - lens_peak).abs() < 0.005 * want,
        "Zernike plate focus {:.4} mm, thin lens {:.4} mm",
        plate_peak * 1e3,
        lens_peak * 1e3
    );
    // The axial peak of a pupil of Fresnel number R^2 / (lambda f') = 17.9 sits nearer the lens
    // than the geometric focus by about 12 / (pi^2 N_F^2) f' = 0.2 mm (focal shift; Li and Wolf,
    // Optics Communications 39, 211, 1981, from memory): 5 % of the 5 mm motion.
    assert!(
        (moved - want).abs() < 0.06 * want,
        "focus moved {:.3} mm, geometric optics {:.3} mm",
        moved * 1e3,
        want * 1e3
    );
}

/// A measured map is added to the pattern modulo 2 pi: the plate with the map minus the plate
/// without it is the map's phase, pixel for pixel, within one phase level (both are rounded).
#[test]
fn correction_map_is_added_modulo_two_pi() {
    let d = tempfile::tempdir().unwrap();
    let csv = "x_um,y_um,z_um,weight\n400,100,0,1\n-300,200,0,2\n";
    let (plain, _) = spot_plate(d.path(), csv, "iterations = 5", "");
    // A map of grey codes 0..=255 (a ramp and a bump), 2 pi at grey 200.
    let codes: Vec<u8> = (0..N * N)
        .map(|k| (((k % N) + 3 * (k / N)) % 256) as u8)
        .collect();
    let file = std::fs::File::create(d.path().join("map.png")).unwrap();
    let mut enc = png::Encoder::new(std::io::BufWriter::new(file), N as u32, N as u32);
    enc.set_color(png::ColorType::Grayscale);
    enc.set_depth(png::BitDepth::Eight);
    enc.write_header()
        .unwrap()
        .write_image_data(&codes)
        .unwrap();
    let (with, side) = spot_plate(
        d.path(),
        csv,
        "iterations = 5",
        "[correction]\ncorrection_map = \"map.png\"\nmap_two_pi_grey = 200\n",
    );
    assert_eq!(
        side["iterative"]["correction"]["correction_map"].as_str(),
        Some("map.png")
    );
    let level = TAU / 256.0;
    for k in 0..N * N {
        let want = TAU * f64::from(codes[k]) / 200.0;
        let diff = (with[k] - plain[k] - want).rem_euclid(TAU);
        let err = diff.min(TAU - diff);
        assert!(err <= level * 1.0001, "pixel {k}: off by {err} rad");
    }
}

/// Bad spot jobs are refused with one line naming the cause.
#[test]
fn spot_jobs_refuse_what_does_not_apply() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("s.csv"), "x_um,y_um,z_um,weight\n1,2,3,1\n").unwrap();
    for (synthesis, extra, want) in [
        ("geometry = \"fresnel\"", "", "fourier"),
        (
            "geometry = \"fourier\"\nfocal_mm = 200\ncell_px = [64, 64]",
            "",
            "cell_px",
        ),
        (
            "geometry = \"fourier\"\nfocal_mm = 200\nalgorithm = \"mixed-region\"",
            "",
            "mixed-region",
        ),
        (
            "geometry = \"fourier\"\nfocal_mm = 200",
            "[correction]\nzernike = [[3, 2, 0.1]]\n",
            "not a Zernike term",
        ),
        (
            "geometry = \"fourier\"\nfocal_mm = 200",
            "[correction]\ncorrection_map = \"nope.png\"\n",
            "nope.png",
        ),
    ] {
        let job = d.path().join("job.toml");
        std::fs::write(
            &job,
            format!(
                "[hologram]\nwidth_px = 64\nheight_px = 64\npitch_um = 8.0\nwavelength_nm = 1064\n\
                 [reference]\nkind = \"plane\"\n[[object]]\nspots = \"s.csv\"\n\
                 [synthesis]\nmethod = \"iterative\"\n{synthesis}\n{extra}\n\
                 [encoding]\nkind = \"phase\"\n[output]\npath = \"p.tif\"\n"
            ),
        )
        .unwrap();
        let o = run(&["run", "-q", job.to_str().unwrap()]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            !o.status.success() && err.contains(want),
            "{synthesis}: {err}"
        );
        assert_eq!(err.trim().lines().count(), 1, "{err}");
        assert!(!d.path().join("p.tif").exists());
    }
    // A spot beyond lambda f / 2p = 13.3 mm would alias (physics.md, "Sampling limits"): `plan`
    // and `run` refuse it, naming the spot and the limit.
    std::fs::write(
        d.path().join("s.csv"),
        "x_um,y_um,z_um,weight\n1,2,3,1\n14000,0,0,1\n",
    )
    .unwrap();
    let job = d.path().join("job.toml");
    let text = std::fs::read_to_string(&job).unwrap();
    let text = text[..text.find("[correction]").unwrap()].to_string()
        + "\n[encoding]\nkind = \"phase\"\n[output]\npath = \"p.tif\"\n";
    std::fs::write(&job, text).unwrap();
    for cmd in ["plan", "run"] {
        let o = run(&[cmd, job.to_str().unwrap()]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            !o.status.success() && err.contains("spot 2") && err.contains("13300.0 um"),
            "{cmd}: {err}"
        );
    }
}

/// `plan` warns when a spot sits on the zero order or its twin on another spot; `reconstruct`
/// reads the spot figures off the plate (the sidecar's prediction, times F^2 with a fill
/// factor F, and with the correction taken out again "through the corrected aberration"), and
/// reports the zero order as |F <t> + 1 - F|^2 (the fill-factor model of `replay::orders`,
/// common practice).
#[test]
fn plan_warnings_and_reconstruct_spot_figures() {
    let d = tempfile::tempdir().unwrap();
    let step = LAMBDA * FOCAL / (N as f64 * PITCH) * 1e6; // um
    let csv = format!(
        "x_um,y_um,z_um,weight\n{},0,0,1\n{},{},0,1\n{},{},0,1\n",
        0.5 * step,
        30.0 * step,
        10.0 * step,
        -30.0 * step,
        -10.0 * step
    );
    let (phase, side) = spot_plate(
        d.path(),
        &csv,
        "iterations = 20",
        "[correction]\nzernike = [[2, 2, 0.1]]\n",
    );
    let o = run(&["plan", d.path().join("job.toml").to_str().unwrap()]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("spot 1 of") && text.contains("from the zero order"),
        "{text}"
    );
    // 256 levels send almost no light to the conjugate order: no twin warning; two levels do.
    assert!(!text.contains("the twin of spot"), "{text}");
    let job = d.path().join("job.toml");
    let binary = d.path().join("binary.toml");
    std::fs::write(
        &binary,
        std::fs::read_to_string(&job)
            .unwrap()
            .replace("kind = \"phase\"\nlevels = 256", "kind = \"binary-phase\""),
    )
    .unwrap();
    let o = run(&["plan", binary.to_str().unwrap()]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("the twin of spot 2") && text.contains("falls on spot 3"),
        "{text}"
    );
    let fill = 0.9;
    let o = run(&[
        "reconstruct",
        d.path().join("plate.tif").to_str().unwrap(),
        "--focal-mm",
        "200",
        "--fill-factor",
        "0.9",
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.path().join("plate-replay.json")).unwrap())
            .unwrap();
    // The sidecar predicts the quantized design; the plate holds the quantized sum of design and
    // correction, so the two differ by the rounding noise of 256 levels (phase error uniform
    // within +-pi/256: intensity share 1 - (2 pi / 256)^2 / 12 = 1 - 5e-5 on average).
    let through = &m["spot_list"]["through_the_corrected_aberration"];
    for (k, s) in spots_of(&side).iter().enumerate() {
        let want = s["predicted_intensity"].as_f64().unwrap() * fill * fill;
        let got = through["intensity"][k].as_f64().unwrap();
        assert!(
            (got - want).abs() < 3e-4 * want,
            "spot {k}: {got} vs {want}"
        );
    }
    // Ideal optics see the correction as an aberration: the spots lose light.
    let ideal = m["spot_list"]["ideal_optics"]["efficiency"]
        .as_f64()
        .unwrap();
    assert!(ideal < 0.9 * through["efficiency"].as_f64().unwrap(), "{m}");
    // Zero order from the plate's own mean transmittance (the correction left in: as replayed).
    let mean = phase
        .iter()
        .map(|&p| Complex64::from_polar(1.0, p))
        .sum::<Complex64>()
        / (N * N) as f64;
    let z0 = (mean * fill + (1.0 - fill)).norm_sqr();
    let zo = &m["planes"][0]["orders"]["zero_order"];
    assert_eq!(zo["sample"], serde_json::json!([N / 2, N / 2]));
    assert!(
        (zo["share_with_fill_factor"].as_f64().unwrap() - z0).abs() < 1e-6,
        "{zo}"
    );
    assert!(
        (zo["share"].as_f64().unwrap() - mean.norm_sqr()).abs() < 1e-6,
        "{zo}"
    );
}

/// A binary phase pattern replays its twin as strongly as its image (the +1 and -1 orders of a
/// two-level phase grating are equal: Goodman, Introduction to Fourier Optics, ch. 9), and
/// `reconstruct --region` finds it point-mirrored through the axis; 256 levels keep it weak.
#[test]
fn twin_of_binary_phase_is_as_strong_as_the_image() {
    let step = LAMBDA * FOCAL / (N as f64 * PITCH) * 1e6;
    let csv = format!(
        "x_um,y_um,z_um,weight\n{},{},0,1\n",
        40.0 * step,
        12.0 * step
    );
    let mut shares = Vec::new();
    for enc in ["kind = \"binary-phase\"", "kind = \"phase\"\nlevels = 256"] {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("spots.csv"), &csv).unwrap();
        let job = d.path().join("job.toml");
        std::fs::write(
            &job,
            format!(
                "[hologram]\nwidth_px = {N}\nheight_px = {N}\npitch_um = 8.0\nwavelength_nm = 1064\n\
                 [reference]\nkind = \"plane\"\n[[object]]\nspots = \"spots.csv\"\n\
                 [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\niterations = 5\n\
                 [encoding]\n{enc}\n[output]\npath = \"plate.tif\"\n"
            ),
        )
        .unwrap();
        assert!(run(&["run", "-q", job.to_str().unwrap()]).status.success());
        // The spot's sample: column N/2 + 40, row N/2 - 12.
        let region = format!("{},{},1,1", N / 2 + 40, N / 2 - 12);
        let o = run(&[
            "reconstruct",
            d.path().join("plate.tif").to_str().unwrap(),
            "--focal-mm",
            "200",
            "--region",
            &region,
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let m: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("plate-replay.json")).unwrap())
                .unwrap();
        let t = &m["planes"][0]["orders"]["twin"];
        assert_eq!(
            t["mirrored_region"],
            serde_json::json!([N / 2 - 40, N / 2 + 12, 1, 1])
        );
        shares.push((
            t["region_share"].as_f64().unwrap(),
            t["twin_share"].as_f64().unwrap(),
        ));
    }
    let (img, twin) = shares[0];
    // Binary phase: 4 / pi^2 = 0.405 into each first order (Swanson 1989; physics.md table).
    assert!(
        (img - twin).abs() < 1e-6 && (img - 4.0 / (PI * PI)).abs() < 0.01,
        "{shares:?}"
    );
    let (img, twin) = shares[1];
    assert!(img > 0.99 && twin < 1e-4, "{shares:?}");
}

/// `two_pi_grey` measured at another wavelength (`calibration_nm`): phase goes as 1 / lambda
/// (retardance 2 pi dn d / lambda, dispersion neglected: common practice), so at the design
/// wavelength 2 pi falls at grey g lambda / lambda_cal and level l is written as the grey nearest
/// to l g (lambda / lambda_cal) / N.
#[test]
fn two_pi_grey_is_scaled_to_the_design_wavelength() {
    let d = tempfile::tempdir().unwrap();
    let (plain, side) = spot_plate(
        d.path(),
        "x_um,y_um,z_um,weight\n500,300,0,1\n",
        "iterations = 3",
        "",
    );
    assert!(side["encoding"]["calibration"].is_null());
    // Uncalibrated 256 levels store the level itself.
    let levels: Vec<usize> = plain
        .iter()
        .map(|&p| (p * 256.0 / TAU).round() as usize % 256)
        .collect();
    let job = d.path().join("job.toml");
    let text = std::fs::read_to_string(&job).unwrap().replace(
        "levels = 256\n",
        "levels = 256\ntwo_pi_grey = 212\ncalibration_nm = 1310\n",
    );
    std::fs::write(&job, text).unwrap();
    let o = run(&["run", "-q", job.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.path().join("plate.json")).unwrap()).unwrap();
    let map = side["encoding"]["calibration"]["level_to_grey"]
        .as_array()
        .unwrap();
    let g2pi = 212.0 * 1064.0 / 1310.0;
    for (l, g) in map.iter().enumerate() {
        let want = l as f64 * g2pi / 256.0;
        let got = g.as_f64().unwrap();
        assert!(
            (got - want).abs() <= 0.5 + 1e-6,
            "level {l}: grey {got}, want {want:.3}"
        );
    }
    // The plate's greys are the map of the same design's levels, pixel for pixel.
    let (_, _, greys) = decode(&d.path().join("plate.tif"));
    for (k, (&g, &l)) in greys.iter().zip(&levels).enumerate() {
        assert_eq!(
            u64::from(g),
            map[l].as_u64().unwrap(),
            "pixel {k}, level {l}"
        );
    }
}

/// With a carrier and a tilted illumination, `reconstruct` finds the spots where the plate puts
/// them (the carrier's whole samples, then f sin t of the tilt) with the predicted figures.
#[test]
fn reconstruct_follows_the_carrier_and_the_illumination() {
    let d = tempfile::tempdir().unwrap();
    let csv = "x_um,y_um,z_um,weight\n300,100,0,1\n-200,250,60,2\n150,-300,-40,1\n";
    let (_, side) = spot_plate(
        d.path(),
        csv,
        "iterations = 20\ncarrier_deg = [0.5, -0.2]",
        "",
    );
    let step = LAMBDA * FOCAL / (N as f64 * PITCH);
    let m = side["iterative"]["carrier_samples"].clone();
    let (mx, my) = (m[0].as_f64().unwrap(), m[1].as_f64().unwrap());
    assert!(mx != 0.0 && my != 0.0);
    for (s, (x, y)) in
        spots_of(&side)
            .iter()
            .zip([(300.0, 100.0), (-200.0, 250.0), (150.0, -300.0)])
    {
        let at = s["replayed_at_um"].as_array().unwrap();
        assert!((at[0].as_f64().unwrap() - (x + mx * step * 1e6)).abs() < 1e-6);
        assert!((at[1].as_f64().unwrap() - (y + my * step * 1e6)).abs() < 1e-6);
    }
    let o = run(&[
        "reconstruct",
        d.path().join("plate.tif").to_str().unwrap(),
        "--focal-mm",
        "200",
        "--illumination",
        "0.3,0.1",
    ]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let r: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.path().join("plate-replay.json")).unwrap())
            .unwrap();
    let got = &r["spot_list"]["ideal_optics"]["intensity"];
    for (k, s) in spots_of(&side).iter().enumerate() {
        let want = s["predicted_intensity"].as_f64().unwrap();
        let g = got[k].as_f64().unwrap();
        // The plate holds the quantized design plus carrier: rounding noise only (see above).
        assert!((g - want).abs() < 3e-4 * want, "spot {k}: {g} vs {want}");
    }
}

/// The z of a spot is a distance beyond the focal plane: a single spot at z = +4 mm behind a
/// 50 mm lens focuses where a diverging thin lens of power -z / f^2 put on the panel focuses
/// (Newton's lens equation for a panel in the front focal plane; the scan here puts the panel at
/// the lens, where that lens gives f' = f^2 / (f - z)), by a direct Fresnel scan (Goodman,
/// Introduction to Fourier Optics, eq. 4-17) independent of the tool's spot formula.
#[test]
fn spot_depth_is_beyond_the_focal_plane() {
    let d = tempfile::tempdir().unwrap();
    let focal = 0.05;
    let z = 0.004;
    let (phase, _) = spot_plate_at(
        d.path(),
        focal,
        &format!("x_um,y_um,z_um,weight\n0,0,{},1\n", z * 1e6),
        "iterations = 3",
        "",
    );
    let r_pupil = N as f64 * PITCH / 2.0;
    let k = TAU / LAMBDA;
    let power = -z / (focal * focal);
    let plate = axial_peak(&|p| phase[p], focal, r_pupil, focal - 0.002, focal + 0.010);
    let lens = axial_peak(
        &|p| {
            let (x, y) = xy(p / N, p % N);
            -k * (x * x + y * y) * power / 2.0
        },
        focal,
        r_pupil,
        focal - 0.002,
        focal + 0.010,
    );
    let f_lens = focal * focal / (focal - z);
    assert!(
        (plate - lens).abs() < 0.02 * z,
        "spot focus {plate}, thin lens {lens}"
    );
    // And near f^2 / (f - z) (focal shift of a Fresnel number near 18: a few percent of z).
    assert!(
        (plate - f_lens).abs() < 0.08 * z,
        "spot focus {plate}, geometric {f_lens}"
    );
}

/// The axial intensity peak behind a lens of focal length `focal` at the panel, for panel phases
/// `ph`, over a pupil of radius `r_pupil`: direct Fresnel sums on the axis (Goodman eq. 4-17)
/// scanned over [z0, z1] and a parabola through the top three.
fn axial_peak(ph: &dyn Fn(usize) -> f64, focal: f64, r_pupil: f64, z0: f64, z1: f64) -> f64 {
    let k = TAU / LAMBDA;
    let on_axis = |zz: f64| {
        let mut v = Complex64::new(0.0, 0.0);
        for i in 0..N {
            for j in 0..N {
                let (x, y) = xy(i, j);
                let r2 = x * x + y * y;
                if r2 > r_pupil * r_pupil {
                    continue;
                }
                v += Complex64::from_polar(
                    1.0,
                    ph(i * N + j) - k * r2 / (2.0 * focal) + k * r2 / (2.0 * zz),
                );
            }
        }
        v.norm_sqr() / (zz * zz)
    };
    let steps = 240;
    let scan: Vec<(f64, f64)> = (0..=steps)
        .map(|s| {
            let z = z0 + (z1 - z0) * s as f64 / steps as f64;
            (z, on_axis(z))
        })
        .collect();
    let best = (1..steps)
        .max_by(|&a, &b| scan[a].1.total_cmp(&scan[b].1))
        .unwrap();
    let (ya, yb, yc) = (scan[best - 1].1, scan[best].1, scan[best + 1].1);
    let h = (z1 - z0) / steps as f64;
    scan[best].0 + h * 0.5 * (ya - yc) / (ya - 2.0 * yb + yc)
}
