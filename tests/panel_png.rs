//! Modulator screen images: `[output] format = "png"` decodes (png crate) to the TIFF's samples,
//! and `panel_px` centres the plate on a larger panel (filled with the zero-phase value, or
//! tiled), the plate's centre sample on the panel's centre sample (physics.md, "Replay lattices").

use std::path::{Path, PathBuf};
use std::process::Command;

mod common;
use common::decode;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn job(dir: &Path, name: &str, enc: &str, output: &str) -> PathBuf {
    std::fs::copy(root().join("samples/tern_target.png"), dir.join("t.png")).unwrap();
    let j = dir.join(name);
    std::fs::write(
        &j,
        format!(
            "[hologram]\nwidth_px = 250\nheight_px = 210\npitch_um = 8.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\n\
             [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\niterations = 4\n\
             [encoding]\n{enc}\n[output]\n{output}\n"
        ),
    )
    .unwrap();
    let o = Command::new(BIN)
        .args(["run", "-q", j.to_str().unwrap()])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    j
}

/// PNG samples: (width, height, bit depth, samples), decoded by the png crate.
fn read_png(p: &Path) -> (u32, u32, u8, Vec<u16>) {
    let dec = png::Decoder::new(std::io::BufReader::new(std::fs::File::open(p).unwrap()));
    let mut r = dec.read_info().unwrap();
    let mut buf = vec![0u8; r.output_buffer_size().unwrap()];
    let info = r.next_frame(&mut buf).unwrap();
    assert_eq!(info.color_type, png::ColorType::Grayscale);
    let (w, h) = (info.width, info.height);
    let bits = info.bit_depth as u8;
    let rb = info.line_size;
    let mut v = Vec::with_capacity((w * h) as usize);
    for row in buf.chunks_exact(rb).take(h as usize) {
        for c in 0..w as usize {
            v.push(match bits {
                1 => u16::from(row[c / 8] >> (7 - c % 8) & 1),
                8 => u16::from(row[c]),
                _ => u16::from_be_bytes([row[2 * c], row[2 * c + 1]]),
            });
        }
    }
    (w, h, bits, v)
}

#[test]
fn png_holds_the_tiffs_samples() {
    for (enc, bits) in [
        ("kind = \"phase\"\nlevels = 256", 8u8),
        ("kind = \"phase\"\nlevels = 1024", 16),
        ("kind = \"binary-phase\"", 1),
        ("kind = \"phase\"\nlevels = 64\ntwo_pi_grey = 200", 8),
    ] {
        let d = tempfile::tempdir().unwrap();
        job(d.path(), "a.toml", enc, "path = \"p.tif\"");
        job(
            d.path(),
            "b.toml",
            enc,
            "path = \"q.png\"\nformat = \"png\"",
        );
        let (tw, th, t) = decode(&d.path().join("p.tif"));
        let (w, h, b, v) = read_png(&d.path().join("q.png"));
        assert_eq!((w, h, b), (tw, th, bits), "{enc}");
        assert!(v == t, "{enc}: samples differ");
        let side: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("q.json")).unwrap()).unwrap();
        assert_eq!(side["output"]["format"], "png");
        assert_eq!(
            side["output"]["bits_per_sample"].as_u64(),
            Some(u64::from(bits))
        );
    }
}

/// A 250 x 210 plate on a 301 x 260 panel: the plate's sample (105, 125) [row, column] lands on
/// the panel's (130, 150); around it the stored value of zero phase (grey of level 0: the
/// calibration's, here 0), or the plate repeated from that placement.
#[test]
fn panel_placement_centres_the_plate() {
    let d = tempfile::tempdir().unwrap();
    let enc = "kind = \"phase\"\nlevels = 256";
    job(d.path(), "a.toml", enc, "path = \"p.tif\"");
    let (pw, ph, t) = decode(&d.path().join("p.tif"));
    let (pw, ph) = (pw as i64, ph as i64);
    for fill in ["zero-phase", "tile"] {
        job(
            d.path(),
            "b.toml",
            enc,
            &format!("path = \"q.png\"\nformat = \"png\"\npanel_px = [301, 260]\npanel_fill = \"{fill}\""),
        );
        let (w, h, _, v) = read_png(&d.path().join("q.png"));
        assert_eq!((w, h), (301, 260));
        let (ox, oy) = (301 / 2 - pw / 2, 260 / 2 - ph / 2);
        assert_eq!((ox, oy), (25, 25));
        for r in 0..h as i64 {
            for c in 0..w as i64 {
                let (pr, pc) = (r - oy, c - ox);
                let want = if (0..ph).contains(&pr) && (0..pw).contains(&pc) {
                    t[(pr * pw + pc) as usize]
                } else if fill == "tile" {
                    t[(pr.rem_euclid(ph) * pw + pc.rem_euclid(pw)) as usize]
                } else {
                    0
                };
                assert_eq!(v[(r * w as i64 + c) as usize], want, "{fill} ({r}, {c})");
            }
        }
        assert_eq!(v[(130 * 301 + 150) as usize], t[(105 * pw + 125) as usize]);
        let side: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("q.json")).unwrap()).unwrap();
        assert_eq!(
            side["output"]["plate_origin_px"],
            serde_json::json!([25, 25])
        );
    }
    // A calibrated panel's zero-phase fill is the grey of level 0 (the lowest of its branch).
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("lut.csv"), "grey,phase_rad\n10,0\n250,6.4\n").unwrap();
    job(
        d.path(),
        "c.toml",
        "kind = \"phase\"\nlevels = 256\ncalibration = \"lut.csv\"",
        "path = \"q.png\"\nformat = \"png\"\npanel_px = [300, 300]",
    );
    let (_, _, _, v) = read_png(&d.path().join("q.png"));
    assert_eq!(v[0], 10);
}

#[test]
fn png_refusals() {
    let d = tempfile::tempdir().unwrap();
    std::fs::copy(
        root().join("samples/tern_target.png"),
        d.path().join("t.png"),
    )
    .unwrap();
    for (extra, flags, want) in [
        ("format = \"png\"\nfield_px = [64, 64]", "", "apply to TIFF"),
        ("panel_px = [300, 300]", "", "applies to format = \"png\""),
        ("format = \"png\"\npanel_px = [0, 300]", "", "panel_px"),
        ("format = \"png\"", "--shard=1/2", "no --shard"),
    ] {
        let j = d.path().join("j.toml");
        std::fs::write(
            &j,
            format!(
                "[hologram]\nwidth_px = 256\nheight_px = 256\npitch_um = 8.0\nwavelength_nm = 532\n\
                 [reference]\nkind = \"plane\"\n[[object]]\nimage = \"t.png\"\n\
                 [synthesis]\nmethod = \"iterative\"\ngeometry = \"fourier\"\nfocal_mm = 200\niterations = 2\n\
                 [encoding]\nkind = \"phase\"\n[output]\npath = \"q.png\"\n{extra}\n"
            ),
        )
        .unwrap();
        let mut args = vec!["run", "-q"];
        if !flags.is_empty() {
            args.push(flags);
        }
        args.push(j.to_str().unwrap());
        let o = Command::new(BIN).args(&args).output().unwrap();
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success() && err.contains(want), "{extra}: {err}");
        assert!(!d.path().join("q.png").exists());
    }
}
