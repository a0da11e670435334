//! Whole plates, pixel by pixel: a job is run through the library, its TIFF read back with the
//! `tiff` crate's decoder, and every pixel compared with the encoding formulas of physics.md
//! ("Fringe term and encodings") applied, here in the test, to the slow reference sum.

use std::path::Path;

use fringemill::job::{run_job, JobSpec, ProgressMode, RunOptions};
use fringemill::synthesis::reference::fringe_at;
use fringemill::synthesis::Emitter;
use num_complex::Complex64;
use tiff::decoder::Decoder;

mod common;
use common::decode;

const POINTS: &str = "x_mm,y_mm,z_mm,amplitude,phase_rad\n0.010,0.004,0.9,1.0,0.3\n-0.012,-0.006,1.1,0.7,2.2\n0.003,-0.011,1.3,0.9,4.0\n";

fn write_job(dir: &Path, encoding: &str, extra_output: &str) -> std::path::PathBuf {
    write_job_in(dir, encoding, extra_output, "f64")
}

/// As [`write_job`], with `[synthesis] precision` given.
fn write_job_in(
    dir: &Path,
    encoding: &str,
    extra_output: &str,
    precision: &str,
) -> std::path::PathBuf {
    std::fs::write(dir.join("pts.csv"), POINTS).unwrap();
    let text = format!(
        "[hologram]\nwidth_px = 53\nheight_px = 41\npitch_um = [1.0, 1.2]\nwavelength_nm = 633\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [2.0, -1.0]\n\
         [[object]]\npoints = \"pts.csv\"\n\
         [synthesis]\nmethod = \"point-sum\"\napproximation = \"exact\"\nprecision = \"{precision}\"\n\
         [encoding]\n{encoding}\n[output]\npath = \"plate.tif\"\n{extra_output}\n"
    );
    let p = dir.join("job.toml");
    std::fs::write(&p, text).unwrap();
    p
}

/// physics.md encodings, written independently of `fringemill::encoding`.
fn expected(kind: &str, levels: u32, bits: u32, b0: f64, f: Complex64) -> u16 {
    match kind {
        "phase" => {
            let mut phi = f.im.atan2(f.re);
            if phi < 0.0 {
                phi += 2.0 * std::f64::consts::PI;
            }
            let g = ((levels as f64 * phi / (2.0 * std::f64::consts::PI)).round() as u32) % levels;
            let b = if levels <= 256 { 8 } else { 16 };
            (g as f64 * (1u64 << b) as f64 / levels as f64).round() as u16
        }
        "binary-phase" => (f.re < 0.0) as u16,
        "binary-amplitude" => (f.re >= 0.0) as u16,
        "amplitude" => {
            let max = ((1u32 << bits) - 1) as f64;
            ((1.0 + f.re / b0) / 2.0 * max).round().clamp(0.0, max) as u16
        }
        _ => unreachable!(),
    }
}

#[test]
fn every_encoding_pixel_by_pixel() {
    let cases = [
        ("phase", "kind = \"phase\"\nlevels = 16", 16, 8, 0.0, ""),
        (
            "phase",
            "kind = \"phase\"\nlevels = 3",
            3,
            8,
            0.0,
            "compression = \"deflate\"",
        ),
        (
            "phase",
            "kind = \"phase\"\nlevels = 4096",
            4096,
            16,
            0.0,
            "bigtiff = true",
        ),
        ("binary-phase", "kind = \"binary-phase\"", 0, 1, 0.0, ""),
        (
            "binary-amplitude",
            "kind = \"binary-amplitude\"",
            0,
            1,
            0.0,
            "bigtiff = true\ncompression = \"deflate\"\nrows_per_strip = 7",
        ),
        (
            "amplitude",
            "kind = \"amplitude\"\nbits = 8\nbipolar_scale = 900.0",
            0,
            8,
            900.0,
            "",
        ),
        (
            "amplitude",
            "kind = \"amplitude\"\nbits = 16\nbipolar_scale = 1500.0",
            0,
            16,
            1500.0,
            "bigtiff = false",
        ),
    ];
    // f64 (the reference precision): every pixel equals the formula on the reference sum.
    // f32 (the default): a pixel may differ only where the reference F lies within 1e-5 max|F|
    // of the encoding's decision edge (the f32 kernels' bound is 3e-5 rad per term and about
    // 2.3e-6 max|F| measured, tests/synthesis_accuracy.rs), and on at most 1 % of the pixels.
    for precision in ["f64", "f32"] {
        for &(kind, enc, levels, bits, b0, extra) in &cases {
            let dir = tempfile::tempdir().unwrap();
            let job = write_job_in(dir.path(), enc, extra, precision);
            let spec = JobSpec::load(&job).unwrap();
            let summary = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
            let side: serde_json::Value =
                serde_json::from_slice(&std::fs::read(&summary.sidecar).unwrap()).unwrap();
            assert_eq!(
                side["output"]["bigtiff"].as_bool().unwrap(),
                extra.contains("bigtiff = true"),
                "{enc}"
            );
            let (w, h, samples) = decode(&summary.tiff);
            assert_eq!((w, h), (53, 41));
            let emitters: Vec<Emitter> = fringemill::job::build_emitters(&spec).unwrap();
            let fs: Vec<Complex64> = (0..h)
                .flat_map(|i| (0..w).map(move |j| (i, j)))
                .map(|(i, j)| {
                    fringe_at(
                        &spec.plate,
                        &spec.reference,
                        &emitters,
                        &spec.synthesis,
                        i,
                        j,
                    )
                })
                .collect();
            let max_f = fs.iter().map(|f| f.norm()).fold(0.0, f64::max);
            let mut mismatches = 0;
            let mut off_edge = 0;
            for (k, &f) in fs.iter().enumerate() {
                if samples[k] == expected(kind, levels, bits, b0, f) {
                    continue;
                }
                mismatches += 1;
                // Within reach of the f32 error: some F' with |F' - F| <= 1e-5 max|F| encodes so.
                let e = 1e-5 * max_f;
                let u = if f.norm() > 0.0 {
                    f / f.norm()
                } else {
                    Complex64::new(1.0, 0.0)
                };
                let near = [u, -u, u * Complex64::i(), -u * Complex64::i()]
                    .iter()
                    .any(|d| samples[k] == expected(kind, levels, bits, b0, f + d * e));
                if !near {
                    off_edge += 1;
                }
            }
            if precision == "f64" {
                assert_eq!(mismatches, 0, "{precision} {enc} {extra}");
            } else {
                assert_eq!(
                    off_edge, 0,
                    "{precision} {enc} {extra}: {off_edge} pixels off an edge"
                );
                assert!(
                    mismatches * 100 <= fs.len(),
                    "{precision} {enc} {extra}: {mismatches} of {} pixels differ",
                    fs.len()
                );
            }
            // The amplitude cases must actually use the grey range (not all clipped).
            if kind == "amplitude" {
                let distinct: std::collections::BTreeSet<u16> = samples.iter().copied().collect();
                assert!(distinct.len() > 20, "{enc}: {} grey levels", distinct.len());
            }
            if kind == "phase" {
                let distinct: std::collections::BTreeSet<u16> = samples.iter().copied().collect();
                // Every stored value is one of the N levels, and the plate uses many of them.
                assert!(distinct.iter().all(|&v| (0..levels).any(|g| expected(
                    "phase",
                    levels,
                    bits,
                    0.0,
                    Complex64::from_polar(
                        1.0,
                        2.0 * std::f64::consts::PI * g as f64 / levels as f64
                    )
                ) == v)));
                assert!(
                    distinct.len() as u32 >= levels.min(500),
                    "{enc}: {} levels used",
                    distinct.len()
                );
            }
        }
    }
}

/// TIFF resolution tags give the physical size width x pitch (ResolutionUnit 3 = centimetre).
#[test]
fn resolution_tags_give_physical_size() {
    let dir = tempfile::tempdir().unwrap();
    let job = write_job(dir.path(), "kind = \"binary-phase\"", "");
    let spec = JobSpec::load(&job).unwrap();
    let s = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
    let mut d = Decoder::new(std::fs::File::open(&s.tiff).unwrap()).unwrap();
    let unit = d.get_tag_u32(tiff::tags::Tag::ResolutionUnit).unwrap();
    assert_eq!(unit, 3);
    for (tag, pitch_cm) in [
        (tiff::tags::Tag::XResolution, 1.0e-4),
        (tiff::tags::Tag::YResolution, 1.2e-4),
    ] {
        let v = d.get_tag(tag).unwrap();
        let px_per_cm = match v {
            tiff::decoder::ifd::Value::Rational(n, dd) => n as f64 / dd as f64,
            other => panic!("{other:?}"),
        };
        assert!((px_per_cm * pitch_cm - 1.0).abs() < 1e-9);
    }
}

/// physics.md-independent rule for a calibrated level -> grey map, by brute force: the table's
/// points joined by straight lines at every integer grey, the one branch from the lowest grey
/// whose phase counted from it stays below 2 pi, and for level l the grey of that branch whose
/// phase is nearest (circular distance) to 2 pi l / N, ties to the lower grey.
fn brute_level_to_grey(table: &[(u32, f64)], levels: u32) -> Vec<u16> {
    let two_pi = 2.0 * std::f64::consts::PI;
    let (g0, p0) = table[0];
    let (gl, _) = table[table.len() - 1];
    let phase = |g: u32| {
        let k = table.iter().position(|&(t, _)| t >= g).unwrap();
        if table[k].0 == g {
            return table[k].1;
        }
        let ((ga, pa), (gb, pb)) = (table[k - 1], table[k]);
        pa + (pb - pa) * (g - ga) as f64 / (gb - ga) as f64
    };
    let branch: Vec<(u32, f64)> = (g0..=gl)
        .map(|g| (g, phase(g) - p0))
        .take_while(|&(_, u)| u < two_pi)
        .collect();
    (0..levels)
        .map(|l| {
            let want = two_pi * l as f64 / levels as f64;
            let mut best = (f64::INFINITY, 0u32);
            for &(g, u) in &branch {
                let d = (u - want).rem_euclid(two_pi);
                let d = d.min(two_pi - d);
                if d < best.0 {
                    best = (d, g);
                }
            }
            best.1 as u16
        })
        .collect()
}

/// Runs the 53 x 41 plate of [`write_job`] with `encoding` and returns its samples.
fn plate_with(dir: &Path, encoding: &str) -> Vec<u16> {
    let job = write_job(dir, encoding, "");
    let spec = JobSpec::load(&job).unwrap();
    decode(
        &run_job(&spec, &RunOptions::new(ProgressMode::Quiet))
            .unwrap()
            .tiff,
    )
    .2
}

/// The level (0..N) of every pixel of the [`write_job`] plate, from the slow reference sum.
fn reference_levels(dir: &Path, levels: u32) -> Vec<u32> {
    let two_pi = 2.0 * std::f64::consts::PI;
    let job = write_job(dir, "kind = \"phase\"\nlevels = 16", "");
    let spec = JobSpec::load(&job).unwrap();
    let emitters = fringemill::job::build_emitters(&spec).unwrap();
    let mut out = Vec::new();
    for i in 0..41u32 {
        for j in 0..53u32 {
            let f = fringe_at(
                &spec.plate,
                &spec.reference,
                &emitters,
                &spec.synthesis,
                i,
                j,
            );
            let mut phi = f.im.atan2(f.re);
            if phi < 0.0 {
                phi += two_pi;
            }
            out.push(((levels as f64 * phi / two_pi).round() as u32) % levels);
        }
    }
    out
}

/// A modulator calibration table: the identity table (phase 2 pi s / 256 for grey s) leaves the plate
/// unchanged; a non-linear one, sampled sparsely, writes for every pixel the grey of one monotonic
/// branch whose interpolated phase is nearest to the pixel's level phase 2 pi g / N (computed here
/// independently, by brute force over every grey).
#[test]
fn calibration_table_is_applied_exactly() {
    let two_pi = 2.0 * std::f64::consts::PI;
    let dir = tempfile::tempdir().unwrap();
    let plain = plate_with(dir.path(), "kind = \"phase\"\nlevels = 16");
    let mut ident = String::from("grey,phase_rad\n");
    for s in 0..256 {
        ident += &format!("{s},{}\n", two_pi * s as f64 / 256.0);
    }
    std::fs::write(dir.path().join("ident.csv"), ident).unwrap();
    let with_ident = plate_with(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ncalibration = \"ident.csv\"",
    );
    assert!(
        with_ident == plain,
        "identity calibration changed the plate"
    );
    // A gamma-like response reaching 2.2 pi at grey 255, sampled every 3 grey values (rows given
    // out of order: the table is sorted by grey).
    let response = |s: u32| 2.2 * std::f64::consts::PI * (s as f64 / 255.0).powf(1.6);
    let mut rows: Vec<(u32, f64)> = (0..256).step_by(3).map(|s| (s, response(s))).collect();
    let mut table = String::from("# measured response\ngrey,phase_rad\n");
    for &(s, p) in rows.iter().rev() {
        table += &format!("{s},{p}\n");
    }
    std::fs::write(dir.path().join("lut.csv"), table).unwrap();
    let out = plate_with(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ncalibration = \"lut.csv\"",
    );
    rows.sort_by_key(|r| r.0);
    let map = brute_level_to_grey(&rows, 16);
    // One branch: the map rises with the level, and no grey of the branch's far end (phase past
    // 2 pi from grey 0) is used.
    assert!(map.windows(2).all(|w| w[0] < w[1]), "{map:?}");
    let levels = reference_levels(dir.path(), 16);
    for (k, &g) in levels.iter().enumerate() {
        assert_eq!(
            out[k],
            map[g as usize],
            "pixel ({}, {}) level {g}",
            k / 53,
            k % 53
        );
    }
    // A table every 8th grey is interpolated: 64 levels use 64 distinct greys, not the 32 tabulated.
    let sparse: Vec<(u32, f64)> = (0..=255).step_by(8).map(|s| (s, response(s))).collect();
    let mut text = String::from("grey,phase_rad\n");
    for &(s, p) in &sparse {
        text += &format!("{s},{p}\n");
    }
    std::fs::write(dir.path().join("sparse.csv"), text).unwrap();
    let out = plate_with(
        dir.path(),
        "kind = \"phase\"\nlevels = 64\ncalibration = \"sparse.csv\"",
    );
    let map = brute_level_to_grey(&sparse, 64);
    let mut distinct = map.clone();
    distinct.dedup();
    assert_eq!(distinct.len(), 64, "{map:?}");
    let levels = reference_levels(dir.path(), 64);
    for (k, &g) in levels.iter().enumerate() {
        assert_eq!(out[k], map[g as usize], "sparse table, pixel {k} level {g}");
    }
    // A table measured at 532 nm used at 633 nm: phases scale by 532 / 633 (retardance ~ 1 / lambda,
    // common practice), so the 2 pi grey moves up.
    let out = plate_with(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ncalibration = \"sparse.csv\"\ncalibration_nm = 532",
    );
    let scaled: Vec<(u32, f64)> = sparse
        .iter()
        .map(|&(s, p)| (s, p * 532.0 / 633.0))
        .collect();
    let map = brute_level_to_grey(&scaled, 16);
    let levels = reference_levels(dir.path(), 16);
    for (k, &g) in levels.iter().enumerate() {
        assert_eq!(
            out[k], map[g as usize],
            "calibration_nm, pixel {k} level {g}"
        );
    }
    // A response that turns back by more than noise is refused, naming the grey.
    std::fs::write(
        dir.path().join("turn.csv"),
        "grey,phase_rad\n0,0\n64,2.0\n128,3.5\n192,2.5\n255,6.5\n",
    )
    .unwrap();
    let job = write_job(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ncalibration = \"turn.csv\"",
        "",
    );
    let e = JobSpec::load(&job).unwrap_err().to_string();
    assert!(
        e.contains("turn.csv") && e.contains("grey 192") && e.contains("monotonic"),
        "{e}"
    );
    // A malformed table is a one-line error naming the file and line.
    std::fs::write(dir.path().join("bad.csv"), "grey,phase_rad\n3,x\n").unwrap();
    let job = write_job(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ncalibration = \"bad.csv\"",
        "",
    );
    let e = JobSpec::load(&job).unwrap_err().to_string();
    assert!(e.contains("bad.csv") && e.contains("line 2"), "{e}");
}

/// A linear panel calibrated to reach 2 pi at grey G (`two_pi_grey`): level l of N is written as
/// round(l G / N), halves down; 10-bit levels can be written right-justified (`justify = "right"`,
/// s = l in 16-bit samples, as panels take them) and replay reads them back.
#[test]
fn linear_panels_and_right_justified_levels() {
    let dir = tempfile::tempdir().unwrap();
    let levels = reference_levels(dir.path(), 16);
    let out = plate_with(
        dir.path(),
        "kind = \"phase\"\nlevels = 16\ntwo_pi_grey = 200",
    );
    for (k, &l) in levels.iter().enumerate() {
        // 12.5 l, halves down (common practice: ties to the lower grey).
        let want = (l as f64 * 200.0 / 16.0 - 0.5).ceil() as u16;
        assert_eq!(out[k], want, "two_pi_grey, pixel {k} level {l}");
    }
    let levels = reference_levels(dir.path(), 1024);
    let job = write_job(
        dir.path(),
        "kind = \"phase\"\nlevels = 1024\njustify = \"right\"",
        "",
    );
    let spec = JobSpec::load(&job).unwrap();
    let tif = run_job(&spec, &RunOptions::new(ProgressMode::Quiet))
        .unwrap()
        .tiff;
    let mut d = Decoder::new(std::fs::File::open(&tif).unwrap()).unwrap();
    assert_eq!(d.colortype().unwrap(), tiff::ColorType::Gray(16));
    let out = decode(&tif).2;
    for (k, &l) in levels.iter().enumerate() {
        assert_eq!(out[k] as u32, l, "right-justified, pixel {k}");
    }
    // The tool's own replay reads the right-justified samples as phases 2 pi s / 1024: the
    // replayed field at the plate (distance 0 is refused, so compare transmittances directly).
    let pf = fringemill::replay::PlateFile::open(&tif).unwrap();
    for s in [0u16, 1, 512, 1023] {
        let t = pf.encoding.transmittance(s);
        let want =
            num_complex::Complex64::from_polar(1.0, 2.0 * std::f64::consts::PI * s as f64 / 1024.0);
        assert!((t - want).norm() < 1e-12, "sample {s}: {t} vs {want}");
    }
    // Conflicting or misplaced keys are refused.
    for (enc, what) in [
        (
            "kind = \"phase\"\nlevels = 16\ntwo_pi_grey = 200\njustify = \"right\"",
            "give one",
        ),
        (
            "kind = \"phase\"\nlevels = 16\ntwo_pi_grey = 1",
            "two_pi_grey",
        ),
        (
            "kind = \"phase\"\nlevels = 16\njustify = \"middle\"",
            "justify",
        ),
        ("kind = \"binary-phase\"\njustify = \"right\"", "justify"),
        (
            "kind = \"phase\"\nlevels = 16\ncalibration_nm = 532",
            "calibration_nm",
        ),
    ] {
        let job = write_job(dir.path(), enc, "");
        let e = JobSpec::load(&job).unwrap_err().to_string();
        assert!(e.contains(what), "{enc}: {e}");
    }
}
