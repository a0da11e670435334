//! The wavefront-recording-plane path (Shimobaba, Masuda and Ito, Optics Letters 34, 3133, 2009)
//! against the direct point sum.

use fringemill::optics::{Plate, Reference};
use fringemill::synthesis::point_sum::{BandScratch, PointSum};
use fringemill::synthesis::recording_plane::RecordingPlane;
use fringemill::synthesis::{Emitter, PointSumOptions, Precision};
use num_complex::Complex64;

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

fn field_direct(plate: Plate, r: Reference, em: &[Emitter], taper: f64) -> Vec<Complex64> {
    let (w, h) = (plate.width as usize, plate.height as usize);
    let mut f = vec![Complex64::new(0.0, 0.0); w * h];
    PointSum::new(plate, r, em.to_vec(), PointSumOptions::default())
        .with_edge_taper(taper)
        .compute_band(0, h, &mut f, &mut BandScratch::default());
    f
}

fn field_wrp(wrp: &RecordingPlane, band: usize) -> Vec<Complex64> {
    let p = *wrp.plate();
    let (w, h) = (p.width as usize, p.height as usize);
    let mut f = vec![Complex64::new(f64::NAN, 0.0); w * h];
    let mut r0 = 0;
    while r0 < h {
        let n = band.min(h - r0);
        wrp.compute_band(
            r0,
            n,
            &mut f[r0 * w..(r0 + n) * w],
            &mut BandScratch::default(),
        );
        r0 += n;
    }
    f
}

/// max |a - b| over the pixels.
fn max_diff(a: &[Complex64], b: &[Complex64]) -> f64 {
    a.iter()
        .zip(b)
        .map(|(x, y)| (x - y).norm())
        .fold(0.0, f64::max)
}

/// Deep points near the axis of a small plate, seen along the reference, so every emitter reaches
/// every pixel within 4 % of its band (inside the taper's flat part): the recording-plane plate
/// equals the direct sum. Gaps from 0.25 to 2 mm (the plane from near the plate to near the
/// points), on- and off-axis references (a sign slip on either axis would be an O(1) error).
/// Measured 4e-6 .. 3.8e-4 of max |F|; bound 1e-3. Bands of another height (other grid shapes):
/// measured 4e-6, bound 1e-4.
#[test]
fn agrees_with_direct_sum_inside_supports() {
    let mut rng = Rng(0x3e11_7a2e);
    let plate = Plate {
        width: 160,
        height: 112,
        pitch: [1.0e-6, 1.0e-6],
        wavelength: 633e-9,
    };
    for tilt in [[0.0, 0.0], [3f64.to_radians(), -2f64.to_radians()]] {
        let r = Reference::Plane { tilt };
        let em: Vec<Emitter> = (0..40)
            .map(|_| {
                let z = rng.range(3e-3, 4e-3);
                Emitter {
                    pos: [
                        -z * tilt[0].tan() + rng.range(-30e-6, 30e-6),
                        -z * tilt[1].tan() + rng.range(-30e-6, 30e-6),
                        z,
                    ],
                    amplitude: rng.range(0.3, 1.0),
                    phase: rng.range(0.0, 6.2),
                }
            })
            .collect();
        let direct = field_direct(plate, r, &em, 1.0);
        let maxf = direct.iter().map(|f| f.norm()).fold(0.0, f64::max);
        for gap in [0.25e-3, 1.2e-3, 2e-3] {
            let wrp =
                RecordingPlane::new(plate, r, em.clone(), PointSumOptions::default(), Some(gap))
                    .unwrap();
            let f = field_wrp(&wrp, 112);
            let worst = max_diff(&f, &direct);
            assert!(
                worst <= 1e-3 * maxf,
                "tilt {tilt:?} gap {gap:e}: worst |dF| / max|F| = {:.2e}",
                worst / maxf
            );
            if gap == 2e-3 {
                let g = field_wrp(&wrp, 37);
                let d = max_diff(&f, &g);
                // Other grid shapes cut the plane elsewhere: a change within the method's accuracy.
                assert!(
                    d <= 1e-4 * maxf,
                    "band split changes the plate by {:.2e}",
                    d / maxf
                );
            }
        }
    }
}

/// The soft support edge in f32 (the f32 kernels' per-pixel path) against the f64 reference
/// kernel, where it matters: emitters 0.1-0.6 mm from a plate of 1 um pitch, so most supports end
/// inside the plate and many pixels sit in the taper's slope; on- and off-axis references, with and
/// without obliquity. Bound |dF| / max|F| <= 1e-4 (the f32 kernels' stated bound; measured about
/// 1e-6). Then the recording plane in f32 against the same plane in f64 (bound 1e-4, measured about
/// 1e-6) and against the direct f64 sum (the f64 test's bound, 1e-3).
#[test]
fn f32_soft_edge_matches_f64() {
    let mut rng = Rng(0x7a9e_32f0);
    let plate = Plate {
        width: 150,
        height: 90,
        pitch: [1.0e-6, 1.0e-6],
        wavelength: 633e-9,
    };
    let f32_opts = PointSumOptions {
        precision: Precision::F32,
        ..PointSumOptions::default()
    };
    for (tilt, obliquity) in [
        ([0.0, 0.0], false),
        ([4f64.to_radians(), -3f64.to_radians()], true),
    ] {
        let r = Reference::Plane { tilt };
        let em: Vec<Emitter> = (0..60)
            .map(|_| Emitter {
                pos: [
                    rng.range(-90e-6, 90e-6),
                    rng.range(-60e-6, 60e-6),
                    rng.range(0.1e-3, 0.6e-3),
                ],
                amplitude: rng.range(0.3, 1.0),
                phase: rng.range(0.0, 6.2),
            })
            .collect();
        let sum = |precision: Precision| {
            let mut f = vec![Complex64::new(0.0, 0.0); 150 * 90];
            let opts = PointSumOptions {
                precision,
                obliquity,
                ..PointSumOptions::default()
            };
            PointSum::new(plate, r, em.clone(), opts)
                .with_edge_taper(0.8)
                .compute_band(0, 90, &mut f, &mut BandScratch::default());
            f
        };
        let (f64s, f32s) = (sum(Precision::F64), sum(Precision::F32));
        let maxf = f64s.iter().map(|f| f.norm()).fold(0.0, f64::max);
        let worst = max_diff(&f32s, &f64s);
        assert!(
            worst <= 1e-4 * maxf,
            "tilt {tilt:?}: tapered f32 kernel worst |dF| / max|F| = {:.2e}",
            worst / maxf
        );
        // The taper is really exercised: without it the plate differs by far more.
        let mut plain = vec![Complex64::new(0.0, 0.0); 150 * 90];
        PointSum::new(
            plate,
            r,
            em.clone(),
            PointSumOptions {
                obliquity,
                ..f32_opts
            },
        )
        .compute_band(0, 90, &mut plain, &mut BandScratch::default());
        let d = max_diff(&plain, &f64s);
        assert!(
            d > 1e-2 * maxf,
            "the taper changed little ({:.2e})",
            d / maxf
        );
    }

    // The recording plane in f32, on the scene of `agrees_with_direct_sum_inside_supports`.
    let r = Reference::Plane {
        tilt: [3f64.to_radians(), 0.0],
    };
    let em: Vec<Emitter> = (0..40)
        .map(|_| {
            let z = rng.range(3e-3, 4e-3);
            Emitter {
                pos: [
                    -z * 3f64.to_radians().tan() + rng.range(-30e-6, 30e-6),
                    rng.range(-30e-6, 30e-6),
                    z,
                ],
                amplitude: rng.range(0.3, 1.0),
                phase: rng.range(0.0, 6.2),
            }
        })
        .collect();
    let direct = field_direct(plate, r, &em, 1.0);
    let maxf = direct.iter().map(|f| f.norm()).fold(0.0, f64::max);
    let plane = |opts| RecordingPlane::new(plate, r, em.clone(), opts, Some(0.5e-3)).unwrap();
    let p64 = field_wrp(&plane(PointSumOptions::default()), 90);
    let p32 = field_wrp(&plane(f32_opts), 90);
    let (d64, dd) = (max_diff(&p32, &p64) / maxf, max_diff(&p32, &direct) / maxf);
    assert!(d64 <= 1e-4, "recording plane f32 vs f64: {d64:.2e}");
    assert!(dd <= 1e-3, "recording plane f32 vs direct f64: {dd:.2e}");
}

/// Jobs the method does not cover are refused with the reason, not computed wrongly.
#[test]
fn refuses_what_it_does_not_cover() {
    let plate = Plate {
        width: 16,
        height: 16,
        pitch: [1.0e-6, 1.0e-6],
        wavelength: 633e-9,
    };
    let em = vec![Emitter {
        pos: [0.0, 0.0, 2e-3],
        amplitude: 1.0,
        phase: 0.0,
    }];
    let plane = Reference::Plane { tilt: [0.0, 0.0] };
    let sph = Reference::Spherical {
        position: [0.0, 0.0, 0.1],
    };
    let o = PointSumOptions::default();
    let e = |r, o, gap| {
        RecordingPlane::new(plate, r, em.clone(), o, gap)
            .err()
            .unwrap_or_default()
    };
    assert!(e(sph, o, None).contains("plane reference"));
    assert!(e(
        plane,
        PointSumOptions {
            approximation: fringemill::synthesis::Approximation::Fresnel,
            ..o
        },
        None
    )
    .contains("exact"));
    assert!(e(
        plane,
        PointSumOptions {
            obliquity: true,
            ..o
        },
        None
    )
    .contains("obliquity"));
    assert!(e(plane, o, Some(3e-3)).contains("closer to the plate"));
    assert!(RecordingPlane::new(plate, plane, em.clone(), o, None).is_ok());
    // 0.5 um at 532 nm with a 30 deg tilt in y: the band's direction cosines reach
    // (0.532, 1.032), past grazing, so no margin holds it (it was z_w x 302 from the sampled band,
    // millions of pixels). 10 deg keeps the band inside the unit circle (length 0.884): accepted,
    // margin z_w x 1.51 / p, about 5500 px.
    let fine = Plate {
        pitch: [0.5e-6, 0.5e-6],
        wavelength: 532e-9,
        ..plate
    };
    let tilted = |deg: f64| Reference::Plane {
        tilt: [0.0, deg.to_radians()],
    };
    let why = RecordingPlane::new(fine, tilted(30.0), em.clone(), o, None)
        .err()
        .unwrap_or_default();
    assert!(why.contains("grazing"), "{why:?}");
    let ok = RecordingPlane::new(fine, tilted(10.0), em.clone(), o, None).unwrap();
    assert!(ok.margins()[1] < 10_000, "{:?}", ok.margins());
}

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

fn job(dir: &std::path::Path, name: &str, extra: &str, reference: &str) -> std::path::PathBuf {
    let j = dir.join(format!("{name}.toml"));
    std::fs::write(
        &j,
        format!(
            "[hologram]\nwidth_px = 192\nheight_px = 128\npitch_um = 1.0\nwavelength_nm = 633\n\
             [reference]\n{reference}\n\
             [[object]]\npoints = \"pts.csv\"\n\
             [synthesis]\nmethod = \"point-sum\"\napproximation = \"exact\"\n{extra}\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n[output]\npath = \"out/{name}.tif\"\n"
        ),
    )
    .unwrap();
    j
}

/// Through the binary: `path = "recording-plane"` writes a plate that matches the direct one
/// (256 levels: at most one level apart, on a small share of the pixels, as the field agrees to
/// about 1e-4 of max |F| here), records the path in the sidecar, and `plan` names it; a job the
/// method cannot take fails with one line.
#[test]
fn job_path_recording_plane() {
    let d = tempfile::tempdir().unwrap();
    let mut rng = Rng(0x70b5);
    let mut csv = String::from("x_mm,y_mm,z_mm,amplitude\n");
    for _ in 0..30 {
        csv += &format!(
            "{},{},{},{}\n",
            rng.range(-0.03, 0.03),
            rng.range(-0.03, 0.03),
            rng.range(3.0, 4.0),
            rng.range(0.3, 1.0)
        );
    }
    std::fs::write(d.path().join("pts.csv"), csv).unwrap();
    let plane = "kind = \"plane\"\ntilt_deg = [2, -1]";
    let run = |j: &std::path::Path, cmd: &str| {
        std::process::Command::new(BIN)
            .args([cmd, "-q", j.to_str().unwrap()])
            .output()
            .unwrap()
    };
    let jd = job(d.path(), "direct", "", plane);
    let jw = job(
        d.path(),
        "wrp",
        "path = \"recording-plane\"\nrecording_plane_gap_mm = 2.0",
        plane,
    );
    let o = run(&jw, "plan");
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        o.status.success() && text.contains("path: recording plane"),
        "{text}"
    );
    for j in [&jd, &jw] {
        let o = run(j, "run");
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.path().join("out/wrp.json")).unwrap()).unwrap();
    assert_eq!(side["synthesis"]["path"], "recording-plane");
    assert!(
        (side["synthesis"]["recording_plane"]["distance_mm"]
            .as_f64()
            .unwrap()
            - 1.0)
            .abs()
            < 0.05
    );
    let dec = |p: &str| {
        let mut dec =
            tiff::decoder::Decoder::new(std::fs::File::open(d.path().join(p)).unwrap()).unwrap();
        match dec.read_image().unwrap() {
            tiff::decoder::DecodingResult::U8(v) => v,
            _ => panic!("8-bit plate expected"),
        }
    };
    let (a, b) = (dec("out/direct.tif"), dec("out/wrp.tif"));
    assert_eq!(a.len(), b.len());
    let mut moved = 0;
    for (x, y) in a.iter().zip(&b) {
        let diff = (*x as i32 - *y as i32).rem_euclid(256);
        assert!(diff <= 1 || diff == 255, "{x} vs {y}");
        moved += (diff != 0) as usize;
    }
    assert!(moved * 50 < a.len(), "{moved} of {} pixels moved", a.len());
    // Spherical reference: not for this method; one line, non-zero exit, no plate.
    let js = job(
        d.path(),
        "sph",
        "path = \"recording-plane\"",
        "kind = \"spherical\"\nposition_mm = [0, 0, -300]",
    );
    let o = run(&js, "run");
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !o.status.success() && err.contains("plane reference") && err.trim().lines().count() == 1,
        "{err}"
    );
    assert!(!d.path().join("out/sph.tif").exists());
}
