//! Replay of plates written by `run`: points come back where they were, focused at their own depth,
//! with the focus size and the quantization efficiency optics predicts.

use std::path::{Path, PathBuf};

use fringemill::job::{run_job, JobSpec, ProgressMode, RunOptions};
use fringemill::optics::propagation::{Grid, PropagationPlanner, PropagationRecipe};
use fringemill::replay::{lit_window, metrics, replay, Illumination, PlateFile, Window};

fn make_plate(
    dir: &Path,
    name: &str,
    size: u32,
    pitch_um: f64,
    points: &str,
    encoding: &str,
) -> PathBuf {
    std::fs::write(
        dir.join(format!("{name}.csv")),
        format!("x_mm,y_mm,z_mm\n{points}"),
    )
    .unwrap();
    let job = dir.join(format!("{name}.toml"));
    std::fs::write(
        &job,
        format!(
            "[hologram]\nwidth_px = {size}\nheight_px = {size}\npitch_um = {pitch_um}\nwavelength_nm = 633\n\
             [reference]\nkind = \"plane\"\ntilt_deg = [0, 0]\n[[object]]\npoints = \"{name}.csv\"\n\
             [encoding]\n{encoding}\n[output]\npath = \"{name}.tif\"\n"
        ),
    )
    .unwrap();
    let spec = JobSpec::load(&job).unwrap();
    run_job(&spec, &RunOptions::new(ProgressMode::Quiet))
        .unwrap()
        .tiff
}

fn peak_value(img: &[f32]) -> f64 {
    img.iter().cloned().fold(0.0f32, f32::max) as f64
}

/// Three points replay three peaks at their (x, y) within one pixel of the image plane, each
/// sharpest at its own depth (geometric optics of a point hologram; common practice). The central
/// quarter of the plate still replays all three (a fragment replays the whole scene, common
/// practice) with the image-plane pitch lambda z / (N p) doubling as N halves.
#[test]
fn three_points_focus_where_they_were() {
    let dir = tempfile::tempdir().unwrap();
    let pts = [(0.20, 0.10, 18.0), (-0.25, 0.15, 20.0), (0.05, -0.30, 22.0)];
    let text: String = pts
        .iter()
        .map(|p| format!("{},{},{}\n", p.0, p.1, p.2))
        .collect();
    let tif = make_plate(
        dir.path(),
        "three",
        1024,
        2.0,
        &text,
        "kind = \"phase\"\nlevels = 256",
    );
    let pf = PlateFile::open(&tif).unwrap();
    let whole = Window {
        x: 0,
        y: 0,
        w: 1024,
        h: 1024,
    };
    let quarter = Window {
        x: 256,
        y: 256,
        w: 512,
        h: 512,
    };
    for win in [whole, quarter] {
        let depths: Vec<f64> = pts.iter().map(|p| p.2 * 1e-3).collect();
        let imgs = replay(&pf, win, Illumination::Recorded, &depths).unwrap();
        for (k, (img, p)) in imgs.iter().zip(&pts).enumerate() {
            let (w, h) = (img.grid.nx, img.grid.ny);
            // The brightest peak near the expected position.
            let pk = metrics::peaks(w, h, &img.intensity, 50, 0.02);
            let want = (p.0 * 1e-3, p.1 * 1e-3);
            let best = pk
                .iter()
                .map(|&(c, r, rel)| {
                    (
                        img.centre[0] + img.grid.x_of_col(c),
                        img.centre[1] + img.grid.y_of_row(r),
                        rel,
                    )
                })
                .filter(|&(x, y, _)| {
                    (x - want.0).abs() < 5.0 * img.grid.pitch[0]
                        && (y - want.1).abs() < 5.0 * img.grid.pitch[1]
                })
                .max_by(|a, b| a.2.total_cmp(&b.2))
                .unwrap_or_else(|| panic!("window {win:?}: no peak near point {k}"));
            assert!(
                (best.0 - want.0).abs() <= img.grid.pitch[0]
                    && (best.1 - want.1).abs() <= img.grid.pitch[1],
                "window {win:?} point {k}: {best:?} vs {want:?}"
            );
            // Sharpest at its own depth: brighter there than at the other two points' depths.
            let at = |d: f64| {
                let im = &replay(&pf, win, Illumination::Recorded, &[d]).unwrap()[0];
                let c = ((want.0 - im.centre[0]) / im.grid.pitch[0]
                    + (im.grid.nx as f64 - 1.0) / 2.0)
                    .round() as usize;
                let r = ((im.grid.ny as f64 - 1.0) / 2.0
                    - (want.1 - im.centre[1]) / im.grid.pitch[1])
                    .round() as usize;
                let mut m = 0.0f32;
                for rr in r.saturating_sub(2)..(r + 3).min(im.grid.ny) {
                    for cc in c.saturating_sub(2)..(c + 3).min(im.grid.nx) {
                        m = m.max(im.intensity[rr * im.grid.nx + cc]);
                    }
                }
                // Power in the brightest pixel near the point (the pixel area changes with depth).
                m as f64 * im.grid.pixel_area()
            };
            let own = at(p.2 * 1e-3);
            for q in pts.iter().filter(|q| q.2 != p.2) {
                assert!(
                    own > at(q.2 * 1e-3),
                    "window {win:?} point {k} not sharpest at its own depth"
                );
            }
        }
        if win == quarter {
            assert!((imgs[0].grid.pitch[0] / (633e-9 * 18e-3 / (512.0 * 2e-6)) - 1.0).abs() < 1e-9);
        }
    }
}

/// First zero of the focus at lambda z / W for a plate of width W (rectangular aperture;
/// Goodman, Introduction to Fourier Optics, ch. 4), and at lambda z / (W/2) for the central quarter.
#[test]
fn focus_first_zero_at_lambda_z_over_w() {
    let dir = tempfile::tempdir().unwrap();
    let (n, p, z) = (501u32, 0.5e-6, 1.0e-3);
    // At 0.5 um pitch the support (z tan(asin(0.633)) = 0.82 mm) covers the whole 0.25 mm plate.
    let tif = make_plate(
        dir.path(),
        "one",
        n,
        0.5,
        "0,0,1.0\n",
        "kind = \"phase\"\nlevels = 65536",
    );
    let pf = PlateFile::open(&tif).unwrap();
    for side in [n, 251] {
        let off = (n - side) / 2;
        let win = Window {
            x: off,
            y: off,
            w: side,
            h: side,
        };
        let field0 = lit_window(&pf, win, Illumination::Recorded).unwrap();
        let grid = Grid {
            nx: side as usize,
            ny: side as usize,
            pitch: [p, p],
            wavelength: 633e-9,
            lattice: Default::default(),
        };
        // Band-limited angular spectrum keeps the plate's pitch in the image plane (fine sampling).
        let prop = PropagationPlanner::<f32>::new().plan_recipe(
            &grid,
            -z,
            PropagationRecipe::AngularSpectrum {
                band_limited: true,
                pad: 2,
            },
        );
        let mut f = field0.clone();
        prop.propagate(&mut f);
        let c = (side / 2) as usize;
        let row: Vec<f64> = (0..side as usize)
            .map(|j| f[c * side as usize + j].norm_sqr() as f64)
            .collect();
        assert_eq!(
            row.iter().cloned().fold(0.0, f64::max),
            row[c],
            "focus not on the axis"
        );
        let mut j = c + 1;
        while row[j + 1] < row[j] {
            j += 1;
        }
        let zero = (j - c) as f64 * p;
        let expect = 633e-9 * z / (side as f64 * p);
        assert!(
            (zero - expect).abs() <= p,
            "side {side}: first zero at {zero:e} m, expected {expect:e} m"
        );
    }
}

/// Kinoforms of N phase levels put sinc^2(1/N) of the light into the focus relative to an
/// unquantized one: 0.405, 0.811, 0.950 for N = 2, 4, 8, within 0.03 (Swanson, MIT Lincoln
/// Laboratory Technical Report 854, 1989). The focal peak intensity ratio measures it, since the
/// focus has the same shape in both.
#[test]
fn quantized_kinoform_efficiency() {
    let dir = tempfile::tempdir().unwrap();
    let mk = |name: &str, levels: u32| {
        make_plate(
            dir.path(),
            name,
            511,
            4.0,
            "0,0,20\n",
            &format!("kind = \"phase\"\nlevels = {levels}"),
        )
    };
    let peak = |tif: &Path| {
        let pf = PlateFile::open(tif).unwrap();
        let img = &replay(
            &pf,
            Window {
                x: 0,
                y: 0,
                w: 511,
                h: 511,
            },
            Illumination::Recorded,
            &[20e-3],
        )
        .unwrap()[0];
        peak_value(&img.intensity)
    };
    let full = peak(&mk("full", 65536));
    for (n, expect) in [(2u32, 0.405), (4, 0.811), (8, 0.950)] {
        let ratio = peak(&mk(&format!("n{n}"), n)) / full;
        assert!(
            (ratio - expect).abs() < 0.03,
            "N = {n}: {ratio} vs {expect}"
        );
    }
}

/// The reconstruct command writes a PNG per depth and the metrics JSON; errors are one line.
#[test]
fn reconstruct_command_writes_images_and_metrics() {
    let dir = tempfile::tempdir().unwrap();
    let tif = make_plate(
        dir.path(),
        "cmd",
        256,
        2.0,
        "0.05,0.02,5\n",
        "kind = \"binary-phase\"",
    );
    let out = dir.path().join("r.png");
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_fringemill"))
        .args([
            "reconstruct",
            tif.to_str().unwrap(),
            "--distance-mm",
            "4:6:1",
            "--out",
            out.to_str().unwrap(),
            "--region",
            "0,0,128,128",
        ])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    for d in ["4.000", "5.000", "6.000"] {
        assert!(dir.path().join(format!("r-z{d}mm.png")).exists());
    }
    let m: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.path().join("r.json")).unwrap()).unwrap();
    assert_eq!(m["planes"].as_array().unwrap().len(), 3);
    assert!(m["planes"][1]["region"]["power_fraction"].as_f64().unwrap() > 0.0);
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_fringemill"))
        .args([
            "reconstruct",
            tif.to_str().unwrap(),
            "--distance-mm",
            "5",
            "--window",
            "0,0,999,10",
        ])
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !o.status.success() && err.trim_end().lines().count() == 1 && err.contains("window"),
        "{err}"
    );
}

/// A plate written as fields replays like the same plate written as one TIFF: `reconstruct`
/// reads the fields manifest (named by the plate's name or by the manifest itself), the images
/// are the same bytes and the metrics the same numbers; `--stats` reports the replay.
#[test]
fn plate_written_as_fields_replays_like_one_tiff() {
    let bin = env!("CARGO_BIN_EXE_fringemill");
    let d = tempfile::tempdir().unwrap();
    std::fs::write(
        d.path().join("p.csv"),
        "x_mm,y_mm,z_mm,amplitude\n0.02,0.01,3,1\n-0.03,0.02,3.5,0.8\n",
    )
    .unwrap();
    for (name, extra) in [("one", ""), ("fields", "field_px = [100, 70]\n")] {
        std::fs::write(
            d.path().join(format!("{name}.toml")),
            format!(
                "[hologram]\nwidth_px = 256\nheight_px = 192\npitch_um = 1.0\nwavelength_nm = 633\n\
                 [reference]\nkind = \"plane\"\n[[object]]\npoints = \"p.csv\"\n\
                 [encoding]\nkind = \"phase\"\nlevels = 16\n[output]\npath = \"{name}.tif\"\n{extra}"
            ),
        )
        .unwrap();
        let o = std::process::Command::new(bin)
            .args([
                "run",
                "-q",
                d.path().join(format!("{name}.toml")).to_str().unwrap(),
            ])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    assert!(!d.path().join("fields.tif").exists());
    let replay_of = |plate: &str, out: &str| {
        let o = std::process::Command::new(bin)
            .args([
                "reconstruct",
                d.path().join(plate).to_str().unwrap(),
                "--distance-mm",
                "3",
                "--window",
                "40,30,150,120",
                "--peaks",
                "2",
                "--stats",
                "--out",
                d.path().join(out).to_str().unwrap(),
            ])
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        assert!(String::from_utf8_lossy(&o.stderr).contains("stats: reconstruct"));
        let mut m: serde_json::Value = serde_json::from_slice(
            &std::fs::read(d.path().join(out).with_extension("json")).unwrap(),
        )
        .unwrap();
        m["plate"] = serde_json::Value::Null;
        m["planes"][0]["image"] = serde_json::Value::Null;
        (std::fs::read(d.path().join(out)).unwrap(), m)
    };
    let one = replay_of("one.tif", "a.png");
    assert!(one.1["planes"][0]["peaks"].as_array().unwrap().len() == 2);
    assert!(replay_of("fields.tif", "b.png") == one);
    assert!(replay_of("fields.fields.json", "c.png") == one);
}
