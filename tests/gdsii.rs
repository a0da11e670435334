//! GDSII layouts checked from outside: read back with gdstk (a general-purpose GDSII library from
//! PyPI, installed by the test into `target/check-venv` when missing), rasterised to pixels by
//! `tools/check/gds_raster.py` and compared with the TIFF of the same job, or with crafted rows,
//! pixel for pixel.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

use fringemill::output::gdsii::{GdsLayout, GdsWriter, Merge};

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// A Python with gdstk and numpy: `FRINGEMILL_CHECK_PYTHON`, or a venv made once under target/.
fn python() -> &'static Path {
    static PY: OnceLock<PathBuf> = OnceLock::new();
    PY.get_or_init(|| {
        if let Some(p) = std::env::var_os("FRINGEMILL_CHECK_PYTHON") {
            return PathBuf::from(p);
        }
        let venv = root().join("target/check-venv");
        let py = venv.join("bin/python");
        let ok = |py: &Path| {
            Command::new(py)
                .args(["-c", "import gdstk, numpy"])
                .status()
                .is_ok_and(|s| s.success())
        };
        if !ok(&py) {
            let made = Command::new("python3")
                .args(["-m", "venv", venv.to_str().unwrap()])
                .status()
                .is_ok_and(|s| s.success());
            let installed = made
                && Command::new(&py)
                    .args(["-m", "pip", "install", "-q", "gdstk==1.0.2", "numpy"])
                    .status()
                    .is_ok_and(|s| s.success());
            assert!(
                installed && ok(&py),
                "the GDSII checks need Python 3 with gdstk and numpy: pip could not install them into {} (set FRINGEMILL_CHECK_PYTHON to a Python that has them)",
                venv.display()
            );
        }
        py
    })
}

fn check(gds: &Path, want: &Path, w: u32, h: u32, pitch_nm: f64, db_nm: f64) -> String {
    check_max(gds, want, w, h, pitch_nm, db_nm, 8190)
}

/// [`check`] with a limit on the vertices of one boundary.
fn check_max(
    gds: &Path,
    want: &Path,
    w: u32,
    h: u32,
    pitch_nm: f64,
    db_nm: f64,
    max_vertices: u32,
) -> String {
    let o = Command::new(python())
        .arg(root().join("tools/check/gds_raster.py"))
        .args([gds.as_os_str(), want.as_os_str()])
        .args([
            w.to_string(),
            h.to_string(),
            pitch_nm.to_string(),
            db_nm.to_string(),
            max_vertices.to_string(),
        ])
        .output()
        .unwrap();
    let out = String::from_utf8_lossy(&o.stdout).into_owned();
    assert!(
        o.status.success(),
        "{out}{}",
        String::from_utf8_lossy(&o.stderr)
    );
    out
}

/// Rows of pixels packed as the TIFF's (1 bit per pixel, MSB first, rows padded to bytes).
fn pack_rows(bits: &[Vec<bool>], w: u32) -> Vec<u8> {
    let rb = (w as usize).div_ceil(8);
    let mut packed = vec![0u8; rb * bits.len()];
    for (r, row) in bits.iter().enumerate() {
        for (c, &b) in row.iter().enumerate() {
            if b {
                packed[r * rb + c / 8] |= 0x80 >> (c % 8);
            }
        }
    }
    packed
}

fn run(args: &[&str]) -> std::process::Output {
    Command::new(BIN).args(args).output().unwrap()
}

fn job(dir: &Path, output: &str, enc: &str, extra: &str) -> PathBuf {
    std::fs::copy(root().join("samples/badge_points.ply"), dir.join("pts.ply")).unwrap();
    let j = dir.join(format!("{output}.toml"));
    std::fs::write(
        &j,
        format!(
            "[hologram]\nwidth_px = 320\nheight_px = 200\npitch_um = 0.8\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\ntilt_deg = [3.0, 8.0]\n\
             [[object]]\npoints = \"pts.ply\"\noffset_mm = [0, 0, 15]\n\
             [encoding]\nkind = \"{enc}\"\n\
             [output]\npath = \"{output}\"\nrows_per_strip = 16\n{extra}"
        ),
    )
    .unwrap();
    j
}

/// Runs the job as `lay.gds` (with `extra` output keys) and as `plate.tif` in `dir`, and compares
/// them through gdstk; returns the check's line.
fn layout_and_tiff(dir: &Path, enc: &str, extra: &str, db_nm: f64) -> String {
    let g = job(dir, "lay.gds", enc, extra);
    let t = job(dir, "plate.tif", enc, "");
    for j in [&g, &t] {
        let o = run(&["run", "-q", j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    check(
        &dir.join("lay.gds"),
        &dir.join("plate.tif"),
        320,
        200,
        800.0,
        db_nm,
    )
}

/// A point-sum plate written as GDSII and as TIFF: the layout's rectangles cover exactly the
/// TIFF's set pixels (binary amplitude and binary phase), the sidecar counts them, and the
/// database unit reads back as given.
#[test]
fn layout_equals_the_tiff_pixel_for_pixel() {
    for (enc, db) in [("binary-amplitude", 1.0), ("binary-phase", 0.5)] {
        let d = tempfile::tempdir().unwrap();
        let extra =
            format!("format = \"gdsii\"\ndatabase_unit_nm = {db}\nlayer = 7\ndatatype = 2\n");
        let out = layout_and_tiff(d.path(), enc, &extra, db);
        let side: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("lay.json")).unwrap()).unwrap();
        let n = side["output"]["boundaries"].as_u64().unwrap();
        assert_eq!(out.trim(), format!("equal {n} boundaries 1 cells"), "{enc}");
        assert_eq!(side["output"]["vertices"].as_u64(), Some(5 * n));
        assert_eq!(side["output"]["layer"].as_i64(), Some(7));
        assert_eq!(side["output"]["database_unit_nm"].as_f64(), Some(db));
        let bytes = std::fs::read(d.path().join("lay.gds")).unwrap();
        assert_eq!(side["output"]["bytes"].as_u64(), Some(bytes.len() as u64));
    }
}

/// `merge = "contour"`: the same plates as traced regions. Every boundary is a simple
/// counter-clockwise rectilinear polygon within the vertex limit, no two overlap, and together
/// they are the TIFF pixel for pixel; far fewer boundaries than rectangles, and the sidecar
/// counts the XY points written.
#[test]
fn contour_layout_equals_the_tiff_pixel_for_pixel() {
    for (enc, max) in [("binary-amplitude", 8190u32), ("binary-phase", 16)] {
        let d = tempfile::tempdir().unwrap();
        let extra = format!("format = \"gdsii\"\nmerge = \"contour\"\nmax_vertices = {max}\n");
        let g = job(d.path(), "lay.gds", enc, &extra);
        let r = job(d.path(), "rect.gds", enc, "format = \"gdsii\"\n");
        let t = job(d.path(), "plate.tif", enc, "");
        for j in [&g, &r, &t] {
            let o = run(&["run", "-q", j.to_str().unwrap()]);
            assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        }
        let tif = d.path().join("plate.tif");
        let out = check_max(&d.path().join("lay.gds"), &tif, 320, 200, 800.0, 1.0, max);
        let side: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("lay.json")).unwrap()).unwrap();
        let rect: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("rect.json")).unwrap()).unwrap();
        let n = side["output"]["boundaries"].as_u64().unwrap();
        assert_eq!(out.trim(), format!("equal {n} boundaries 1 cells"), "{enc}");
        let nr = rect["output"]["boundaries"].as_u64().unwrap();
        assert!(n * 2 < nr, "{enc}: {n} contours against {nr} rectangles");
        assert_eq!(
            side["output"]["max_vertices"].as_u64(),
            Some(u64::from(max))
        );
        assert!(side["output"]["merge"]
            .as_str()
            .unwrap()
            .starts_with("contour"));
        // The XY points, counted from the file's own XY records (type 0x10, 8 bytes a point).
        let bytes = std::fs::read(d.path().join("lay.gds")).unwrap();
        let (mut i, mut points) = (0usize, 0u64);
        while i + 4 <= bytes.len() {
            let len = u16::from_be_bytes([bytes[i], bytes[i + 1]]) as usize;
            if bytes[i + 2] == 0x10 {
                points += ((len - 4) / 8) as u64;
            }
            i += len.max(4);
        }
        assert_eq!(side["output"]["vertices"].as_u64(), Some(points), "{enc}");
    }
}

/// Crafted rows: isolated pixels, a checkerboard, full rows, empty rows, runs touching both
/// edges, equal spans over many rows (merged vertically within a strip), on an odd width.
#[test]
fn crafted_patterns_round_trip_through_gdstk() {
    let (w, h) = (37u32, 41u32);
    let mut bits = vec![vec![false; w as usize]; h as usize];
    for (r, row) in bits.iter_mut().enumerate() {
        for (c, b) in row.iter_mut().enumerate() {
            *b = match r {
                0..=4 => (r + c) % 2 == 0,                // checkerboard
                5 | 6 => true,                            // full rows
                7 => false,                               // empty row
                8..=20 => (3..9).contains(&c) || c >= 30, // a block and a run to the edge
                21 => c == 0 || c == 36 || c == 18,       // isolated pixels at both edges
                _ => (c * 7 + r * 3) % 11 < 4,            // irregular runs
            };
        }
    }
    let rb = (w as usize).div_ceil(8);
    let packed = pack_rows(&bits, w);
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("want.bits"), &packed).unwrap();
    // Pitch 2 um in 0.5 nm units: W p = 37 x 4000 units, even.
    let layout = GdsLayout::new(w, h, [2e-6, 2e-6], 0.5e-9, 1, 0, 16, "crafted").unwrap();
    let path = d.path().join("c.gds");
    let mut wr = GdsWriter::create(&path, layout).unwrap();
    // In uneven pieces, as bands arrive.
    let mut r = 0usize;
    for n in [3usize, 10, 1, 20, 7] {
        wr.write_rows(&packed[r * rb..(r + n) * rb]).unwrap();
        r += n;
    }
    let done = wr.finish_unpublished().unwrap().publish().unwrap();
    let out = check(&path, &d.path().join("want.bits"), w, h, 2000.0, 0.5);
    assert_eq!(
        out.trim(),
        format!("equal {} boundaries 1 cells", done.boundaries)
    );
    // The count the merging rule gives, the slow way: a rectangle starts at every run whose row
    // above (within the same strip of 16 rows) does not hold the same run.
    let runs = |r: usize| {
        let mut v = Vec::new();
        let mut c = 0;
        while c < w as usize {
            if bits[r][c] {
                let s = c;
                while c < w as usize && bits[r][c] {
                    c += 1;
                }
                v.push((s, c));
            } else {
                c += 1;
            }
        }
        v
    };
    let mut want = 0;
    for r in 0..h as usize {
        for run in runs(r) {
            if r % 16 == 0 || !runs(r - 1).contains(&run) {
                want += 1;
            }
        }
    }
    assert_eq!(done.boundaries, want);
    // The same rows traced as regions (checkerboards are all corner contacts), under small and
    // default vertex limits, the strips 16 rows as above.
    for max in [4u32, 10, 8190] {
        let layout = GdsLayout::new(w, h, [2e-6, 2e-6], 0.5e-9, 1, 0, 16, "crafted")
            .unwrap()
            .with_merge(Merge::Contour { max_vertices: max });
        let path = d.path().join(format!("k{max}.gds"));
        let mut wr = GdsWriter::create(&path, layout).unwrap();
        wr.write_rows(&packed).unwrap();
        let done = wr.finish_unpublished().unwrap().publish().unwrap();
        let out = check_max(&path, &d.path().join("want.bits"), w, h, 2000.0, 0.5, max);
        assert_eq!(
            out.trim(),
            format!("equal {} boundaries 1 cells", done.boundaries)
        );
    }
}

/// Regions with holes, nested rings, corner contacts and outlines longer than the vertex limit,
/// traced by `merge = "contour"` on one strip; read back by gdstk they are the pixels exactly.
#[test]
fn contour_regions_with_holes_round_trip_through_gdstk() {
    let (w, h) = (64u32, 48u32);
    let mut bits = vec![vec![false; w as usize]; h as usize];
    for (r, row) in bits.iter_mut().enumerate() {
        for (c, b) in row.iter_mut().enumerate() {
            let (x, y) = (c as i64, r as i64);
            // Nested square rings around (15, 15); a round ring with a dot inside at (46, 16);
            // two blocks touching at a corner; a comb with 13 teeth; a loop closed only by a
            // corner contact (a pinch inside one region: rows 34-39, columns 40-49).
            let ring = (x - 15).abs().max((y - 15).abs());
            let d2 = (x - 46).pow(2) + (y - 16).pow(2);
            let pinch = (r == 34 && (40..50).contains(&c))
                || ((35..39).contains(&r) && (c == 40 || c == 49))
                || (r == 39 && (40..49).contains(&c));
            *b = (r < 31 && c < 31 && ring % 4 != 1 && ring <= 14)
                || (r < 33 && c >= 33 && ((64..=196).contains(&d2) || d2 <= 4))
                || ((34..38).contains(&r) && (2..6).contains(&c))
                || ((38..42).contains(&r) && (6..10).contains(&c))
                || ((40..44).contains(&r) && (12..38).contains(&c) && (c % 2 == 0 || r >= 42))
                || pinch;
        }
    }
    let packed = pack_rows(&bits, w);
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("want.bits"), &packed).unwrap();
    for max in [8u32, 60, 8190] {
        let layout = GdsLayout::new(w, h, [1e-6, 1e-6], 1e-9, 1, 0, h, "rings")
            .unwrap()
            .with_merge(Merge::Contour { max_vertices: max });
        let path = d.path().join(format!("r{max}.gds"));
        let mut wr = GdsWriter::create(&path, layout).unwrap();
        wr.write_rows(&packed).unwrap();
        let done = wr.finish_unpublished().unwrap().publish().unwrap();
        let out = check_max(&path, &d.path().join("want.bits"), w, h, 1000.0, 1.0, max);
        assert_eq!(
            out.trim(),
            format!("equal {} boundaries 1 cells", done.boundaries)
        );
        if max == 8190 {
            // Few pieces: each hole costs one cut, the pinch one, the comb none.
            assert!(done.boundaries < 40, "{}", done.boundaries);
        }
    }
}

/// Contour merging inside write fields: regions are cut at field columns and traced in their
/// field's coordinates.
#[test]
fn contour_write_fields_round_trip() {
    let d = tempfile::tempdir().unwrap();
    let out = layout_and_tiff(
        d.path(),
        "binary-amplitude",
        "format = \"gdsii\"\nfield_px = [100, 64]\nmerge = \"contour\"\n",
        1.0,
    );
    assert!(out.trim().ends_with("boundaries 17 cells"), "{out}");
}

/// Write fields: one structure per field (coordinates from its lower-left corner) placed by
/// references in the top structure; flattened by gdstk, the layout is the TIFF pixel for pixel,
/// runs cut at field columns. Shards and assemble give the same bytes.
#[test]
fn write_fields_are_structures_placed_by_references() {
    let d = tempfile::tempdir().unwrap();
    let out = layout_and_tiff(
        d.path(),
        "binary-amplitude",
        "format = \"gdsii\"\nfield_px = [100, 64]\n",
        1.0,
    );
    // 4 x 4 fields (320 / 100 and 200 / 64, rounded up) and the top structure.
    assert!(out.trim().ends_with("boundaries 17 cells"), "{out}");
    let want = std::fs::read(d.path().join("lay.gds")).unwrap();
    let s = tempfile::tempdir().unwrap();
    let js = job(
        s.path(),
        "lay.gds",
        "binary-amplitude",
        "format = \"gdsii\"\nfield_px = [100, 64]\n",
    );
    for k in [2, 1] {
        let o = run(&[
            "run",
            "-q",
            "--shard",
            &format!("{k}/2"),
            js.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    assert!(run(&["assemble", "-q", js.to_str().unwrap()])
        .status
        .success());
    assert!(
        std::fs::read(s.path().join("lay.gds")).unwrap() == want,
        "assembled fields differ"
    );
    let left: Vec<_> = std::fs::read_dir(s.path())
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains("partial") || n.contains(".col"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
}

/// Shards plus assemble, and an interrupted run resumed, give the layout of one run, byte for
/// byte.
fn shards_and_resume_with(extra: &str) {
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), "plate.gds", "binary-amplitude", extra);
    assert!(run(&["run", "-q", j.to_str().unwrap()]).status.success());
    let want = std::fs::read(d.path().join("plate.gds")).unwrap();
    let s = tempfile::tempdir().unwrap();
    let js = job(s.path(), "plate.gds", "binary-amplitude", extra);
    for k in [3, 1, 2] {
        let o = run(&[
            "run",
            "-q",
            "--shard",
            &format!("{k}/3"),
            js.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let o = run(&["assemble", "-q", js.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        std::fs::read(s.path().join("plate.gds")).unwrap() == want,
        "assembled layout differs"
    );
    // Stop after a few strips (a tiny checkpoint interval and SIGINT), then run again.
    let r = tempfile::tempdir().unwrap();
    let jr = job(r.path(), "plate.gds", "binary-amplitude", extra);
    let mut stopped = false;
    for ms in [60u64, 25, 10, 3] {
        let child = Command::new(BIN)
            .args([
                "run",
                "-q",
                "--threads",
                "1",
                "--checkpoint-secs",
                "0",
                jr.to_str().unwrap(),
            ])
            .stdout(std::process::Stdio::null())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap();
        std::thread::sleep(std::time::Duration::from_millis(ms));
        // SAFETY: plain kill(2) on our own child's pid.
        unsafe { libc::kill(child.id() as i32, libc::SIGINT) };
        let o = child.wait_with_output().unwrap();
        if !o.status.success() {
            stopped = true;
            break;
        }
        let _ = std::fs::remove_file(r.path().join("plate.gds"));
    }
    assert!(stopped, "every run finished before SIGINT");
    assert!(!r.path().join("plate.gds").exists());
    // The stop left a checkpoint: the next run resumes rather than starting afresh.
    assert!(
        r.path().join("plate.gds.partial.journal").exists(),
        "the stop left no journal"
    );
    let o = run(&["run", "-q", jr.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        std::fs::read(r.path().join("plate.gds")).unwrap() == want,
        "resumed layout differs"
    );
}

#[test]
fn shards_and_resume_are_byte_identical() {
    shards_and_resume_with("format = \"gdsii\"\n");
}

#[test]
fn contour_shards_and_resume_are_byte_identical() {
    shards_and_resume_with("format = \"gdsii\"\nmerge = \"contour\"\n");
    shards_and_resume_with("format = \"gdsii\"\nmerge = \"contour\"\nfield_px = [100, 64]\n");
}

/// The same with write fields: the field-column files are cut back to their journal's lengths.
#[test]
fn shards_and_resume_with_write_fields_are_byte_identical() {
    shards_and_resume_with("format = \"gdsii\"\nfield_px = [100, 64]\n");
}

/// What GDSII cannot hold is refused at once, naming why: a pitch that is not a whole number of
/// database units, a plate beyond the 32-bit coordinates, a non-binary encoding.
#[test]
fn layouts_gdsii_cannot_hold_are_refused() {
    let d = tempfile::tempdir().unwrap();
    for (enc, extra, want) in [
        (
            "binary-amplitude",
            "format = \"gdsii\"\ndatabase_unit_nm = 3\n",
            "whole number",
        ),
        ("phase", "format = \"gdsii\"\n", "binary plates"),
        (
            "binary-amplitude",
            "format = \"gdsii\"\nmerge = \"blobs\"\n",
            "not one of",
        ),
        (
            "binary-amplitude",
            "format = \"gdsii\"\nmerge = \"contour\"\nmax_vertices = 3\n",
            "outside 4..=8190",
        ),
        (
            "binary-amplitude",
            "format = \"gdsii\"\nmax_vertices = 100\n",
            "applies to merge",
        ),
        ("binary-amplitude", "layer = 3\n", "applies to format"),
    ] {
        let j = job(d.path(), "x.gds", enc, extra);
        let o = run(&["plan", j.to_str().unwrap()]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success() && err.contains(want), "{extra}: {err}");
    }
    // 2^31 units of 1 nm is 2.15 m: a 16.7 M px plate at 0.2 mm pitch (3.4 m) is too wide.
    let j = job(
        d.path(),
        "x.gds",
        "binary-amplitude",
        "format = \"gdsii\"\n",
    );
    let text = std::fs::read_to_string(&j)
        .unwrap()
        .replace("width_px = 320", "width_px = 16777216")
        .replace("pitch_um = 0.8", "pitch_um = 200");
    std::fs::write(&j, text).unwrap();
    let o = run(&["plan", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success() && err.contains("32-bit"), "{err}");
}
