//! Jobs end to end through the library and the binary: meshes sampled into emitters with channels,
//! and iterative synthesis from a target image replayed through the replay engine.

use std::path::{Path, PathBuf};

use fringemill::job::{run_job, JobSpec, ProgressMode, RunOptions};
use fringemill::replay::{metrics, replay_planes, Illumination, PlateFile, Window};

mod common;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

fn samples() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("samples")
}

#[test]
fn mesh_job_with_a_second_channel() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(samples().join("lantern.glb"), d.path().join("lantern.glb")).unwrap();
    std::fs::write(d.path().join("dot.csv"), "x_mm,y_mm,z_mm\n0.1,0.1,9\n").unwrap();
    let job = d.path().join("job.toml");
    std::fs::write(
        &job,
        "[hologram]\nwidth_px = 256\nheight_px = 256\npitch_um = 1.0\nwavelength_nm = 532\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [0, 0]\n\
         [[object]]\nmesh = \"lantern.glb\"\nfit_mm = 1.0\noffset_mm = [0, 0, 8]\nemitters = 300\nseed = 5\n\
         [[object]]\npoints = \"dot.csv\"\nreference = { kind = \"plane\", tilt_deg = [6, 0] }\n\
         [encoding]\nkind = \"binary-phase\"\n[output]\npath = \"out/m.tif\"\n",
    )
    .unwrap();
    let o = std::process::Command::new(BIN)
        .args(["plan", job.to_str().unwrap()])
        .output()
        .unwrap();
    let plan = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success()
            && plan.contains("301 from 2 object(s) in 2 channel(s)")
            && plan.contains("placed in x"),
        "{plan}"
    );
    let spec = JobSpec::load(&job).unwrap();
    let s = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
    assert_eq!(s.emitters, 301);
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&s.sidecar).unwrap()).unwrap();
    assert_eq!(side["objects"][0]["mesh"], "lantern.glb");
    assert_eq!(
        side["objects"][1]["reference"]["tilt_deg"][0]
            .as_f64()
            .unwrap()
            .round(),
        6.0
    );
    // The emitters as a point cloud: 301 vertices with normals, readable by the project's PLY reader.
    let ply = d.path().join("em.ply");
    let o = std::process::Command::new(BIN)
        .args([
            "sample",
            job.to_str().unwrap(),
            "--out",
            ply.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let pts = fringemill::scene::points::read_points(&ply).unwrap();
    assert_eq!(pts.len(), 301);
    assert!(pts[..300].iter().all(|p| p.z_mm > 7.0 && p.z_mm < 9.0));
}

/// Iterative synthesis (Fourier geometry) of an image at 1024 x 1024, written as a 256-level phase
/// plate, replayed through the replay engine: correlation with the target >= 0.9 and at least 80 %
/// of the light in the signal window (the acceptance values; GS: Gerchberg and Saxton 1972).
#[test]
fn iterative_image_replays_its_target() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(samples().join("tern_target.png"), d.path().join("t.png")).unwrap();
    let job = d.path().join("job.toml");
    std::fs::write(
        &job,
        "[hologram]\nwidth_px = 1024\nheight_px = 1024\npitch_um = 8.0\nwavelength_nm = 532\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [0, 0]\n[[object]]\nimage = \"t.png\"\n\
         [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\niterations = 30\nseed = 9\n\
         [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"s.tif\"\n",
    )
    .unwrap();
    let spec = JobSpec::load(&job).unwrap();
    let s = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&s.sidecar).unwrap()).unwrap();
    let errs = side["iterative"]["error_per_iteration"].as_array().unwrap();
    assert!(errs.len() >= 2 && errs.last().unwrap().as_f64().unwrap() < errs[0].as_f64().unwrap());
    let pf = PlateFile::open(&s.tiff).unwrap();
    let img = &replay_planes(
        &pf,
        Window {
            x: 0,
            y: 0,
            w: 1024,
            h: 1024,
        },
        Illumination::Recorded,
        &[],
        Some(0.2),
    )
    .unwrap()[0];
    // The target, centred on the 1024 x 1024 replay grid.
    let (tw, th, t) = fringemill::raster::read_grey(&d.path().join("t.png")).unwrap();
    let (x0, y0) = ((1024 - tw) / 2, (1024 - th) / 2);
    let mut canvas = vec![0.0; 1024 * 1024];
    for r in 0..th {
        for c in 0..tw {
            canvas[(y0 + r) * 1024 + x0 + c] = t[r * tw + c];
        }
    }
    let win = [x0, y0, tw, th];
    let cmp = metrics::compare(1024, 1024, &img.intensity, &canvas, Some(win));
    let stats = metrics::region_stats(1024, 1024, &img.intensity, win).unwrap();
    assert!(cmp.correlation >= 0.9, "correlation {}", cmp.correlation);
    assert!(
        stats.power_fraction >= 0.8,
        "power in window {}",
        stats.power_fraction
    );
}

/// A cell repeated over a writer-sized plate: the plate is periodic with the cell size, and the
/// sidecar records it.
#[test]
fn cell_repeats_over_the_plate() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(samples().join("tern_target.png"), d.path().join("t.png")).unwrap();
    let job = d.path().join("job.toml");
    std::fs::write(
        &job,
        "[hologram]\nwidth_px = 700\nheight_px = 600\npitch_um = 1.0\nwavelength_nm = 633\n\
         [reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\n\
         [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 50\niterations = 5\ncell_px = [256, 256]\n\
         [encoding]\nkind = \"phase\"\nlevels = 16\n[output]\npath = \"c.tif\"\n",
    )
    .unwrap();
    let spec = JobSpec::load(&job).unwrap();
    let s = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
    let (w, h, px) = common::decode(&s.tiff);
    assert_eq!((w, h), (700, 600));
    for r in 0..h as usize {
        for c in 0..w as usize {
            assert_eq!(
                px[r * 700 + c],
                px[(r % 256) * 700 + c % 256],
                "pixel ({r}, {c})"
            );
        }
    }
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(&s.sidecar).unwrap()).unwrap();
    assert_eq!(side["iterative"]["cell_px"], serde_json::json!([256, 256]));
}

#[test]
fn iterative_job_errors_are_one_line() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(samples().join("tern_target.png"), d.path().join("t.png")).unwrap();
    let base = "[hologram]\nwidth_px = 64\nheight_px = 64\npitch_um = 8.0\nwavelength_nm = 532\n[reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\n[synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\n[encoding]\nkind = \"phase\"\n[output]\npath = \"x.tif\"\n";
    for (name, text, needle) in [
        (
            "target larger than the cell",
            base.to_string(),
            "does not fit",
        ),
        (
            "no geometry",
            base.replace("geometry = \"fourier\"\n", ""),
            "geometry",
        ),
        (
            "points with iterative",
            base.replace("image = \"t.png\"", "points = \"t.csv\""),
            "image objects only",
        ),
    ] {
        let job = d.path().join("j.toml");
        std::fs::write(&job, text).unwrap();
        let o = std::process::Command::new(BIN)
            .args(["run", "-q", job.to_str().unwrap()])
            .output()
            .unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(
            !o.status.success() && err.trim_end().lines().count() == 1 && err.contains(needle),
            "{name}: {err}"
        );
        assert!(!d.path().join("x.tif").exists());
    }
}

/// `precision = "f32"` end to end: the badge sample's points on a small plate, 256 phase levels.
/// The fast kernel's phase error (below 3e-5 rad per term, `synthesis_accuracy`) can only move a
/// pixel whose phase lies that close to a level boundary (a level is 2 pi / 256 = 0.0245 rad
/// wide), so against the f64 plate: at most one level apart, on under 0.5 % of the pixels.
#[test]
fn f32_precision_plate_matches_f64_plate() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(samples().join("badge_points.ply"), d.path().join("pts.ply")).unwrap();
    let mut plates = Vec::new();
    for precision in ["f64", "f32"] {
        let job = d.path().join(format!("{precision}.toml"));
        std::fs::write(
            &job,
            format!(
                "[hologram]\nwidth_px = 384\nheight_px = 256\npitch_um = 1.0\nwavelength_nm = 633\n\
                 [reference]\nkind = \"plane\"\ntilt_deg = [4, 0]\n\
                 [[object]]\npoints = \"pts.ply\"\noffset_mm = [0, 0, 30]\n\
                 [synthesis]\nmethod = \"point-sum\"\napproximation = \"exact\"\nprecision = \"{precision}\"\n\
                 [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"out/{precision}.tif\"\n"
            ),
        )
        .unwrap();
        let spec = JobSpec::load(&job).unwrap();
        let s = run_job(&spec, &RunOptions::new(ProgressMode::Quiet)).unwrap();
        let side: serde_json::Value =
            serde_json::from_slice(&std::fs::read(&s.sidecar).unwrap()).unwrap();
        assert_eq!(side["synthesis"]["precision"], precision);
        assert!(s.updates > 0);
        plates.push(common::decode(
            &d.path().join(format!("out/{precision}.tif")),
        ));
    }
    let (a, b) = (&plates[0].2, &plates[1].2);
    assert_eq!(a.len(), b.len());
    let mut moved = 0usize;
    for (x, y) in a.iter().zip(b) {
        let diff = (*x as i32 - *y as i32).rem_euclid(256);
        assert!(diff <= 1 || diff == 255, "{x} vs {y}");
        moved += (diff != 0) as usize;
    }
    assert!(moved * 200 < a.len(), "{moved} of {} pixels moved", a.len());
    eprintln!(
        "f32 vs f64 plate: {moved} of {} pixels one level apart",
        a.len()
    );
}
