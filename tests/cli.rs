//! End-to-end tests of the real binary: a small job runs and writes TIFF + sidecar; bad inputs give
//! a one-line error naming the problem, a non-zero exit and no output file.

mod common;
use common::peak_mib;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_fringemill"))
}

fn run(args: &[&str]) -> Output {
    bin().args(args).output().expect("spawn fringemill")
}

const POINTS_CSV: &str =
    "x_mm,y_mm,z_mm,amplitude,phase_rad\n0,0,5,1,0\n0.05,-0.02,6,0.8,1.0\n-0.03,0.04,5.5,0.6,2.0\n";

fn job_text(encoding: &str, output: &str) -> String {
    format!(
        r#"[hologram]
width_px = 96
height_px = 64
pitch_um = 2.0
wavelength_nm = 633

[reference]
kind = "plane"
tilt_deg = [3.0, 0.0]

[[object]]
points = "pts.csv"
offset_mm = [0, 0, 0]

[synthesis]
method = "point-sum"
approximation = "exact"

[encoding]
{encoding}

[output]
path = "{output}"
"#
    )
}

fn setup(job: &str) -> (tempfile::TempDir, PathBuf) {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("pts.csv"), POINTS_CSV).unwrap();
    let j = d.path().join("job.toml");
    std::fs::write(&j, job).unwrap();
    (d, j)
}

fn files_in(dir: &Path) -> Vec<String> {
    let mut v = Vec::new();
    for e in walk(dir) {
        v.push(e.strip_prefix(dir).unwrap().display().to_string());
    }
    v.sort();
    v
}

fn walk(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(walk(&p));
        } else {
            out.push(p);
        }
    }
    out
}

#[test]
fn runs_a_small_job_and_writes_tiff_and_sidecar() {
    let (d, j) = setup(&job_text("kind = \"phase\"\nlevels = 16", "out/plate.tif"));
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let tif = d.path().join("out/plate.tif");
    let side: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.path().join("out/plate.json")).unwrap()).unwrap();
    assert_eq!(side["hologram"]["width_px"], 96);
    assert_eq!(side["encoding"]["levels"], 16);
    assert_eq!(side["synthesis"]["emitters"], 3);
    // The recorded hash is the file's SHA-256.
    use sha2::Digest;
    let h = sha2::Sha256::digest(std::fs::read(&tif).unwrap());
    let hex: String = h.iter().map(|b| format!("{b:02x}")).collect();
    assert_eq!(side["output"]["sha256"], hex);
    assert!(!files_in(d.path()).iter().any(|f| f.ends_with(".partial")));
}

/// Each bad input: non-zero exit, one line on stderr naming the problem, no output file.
#[test]
fn bad_inputs_fail_cleanly() {
    let good_enc = "kind = \"binary-amplitude\"";
    let cases: Vec<(&str, String, &str)> = vec![
        ("malformed toml", "[hologram\nwidth_px = 3".into(), "line"),
        (
            "unknown key",
            job_text(good_enc, "o.tif")
                .replace("wavelength_nm = 633", "wavelength_nm = 633\ncolour = 3"),
            "colour",
        ),
        (
            "zero pitch",
            job_text(good_enc, "o.tif").replace("pitch_um = 2.0", "pitch_um = 0"),
            "pitch_um",
        ),
        (
            "negative pitch",
            job_text(good_enc, "o.tif").replace("pitch_um = 2.0", "pitch_um = [2.0, -1]"),
            "pitch_um",
        ),
        (
            "zero wavelength",
            job_text(good_enc, "o.tif").replace("wavelength_nm = 633", "wavelength_nm = 0"),
            "wavelength_nm",
        ),
        (
            "nan wavelength",
            job_text(good_enc, "o.tif").replace("wavelength_nm = 633", "wavelength_nm = nan"),
            "wavelength_nm",
        ),
        (
            "levels too low",
            job_text("kind = \"phase\"\nlevels = 1", "o.tif"),
            "levels",
        ),
        (
            "levels too high",
            job_text("kind = \"phase\"\nlevels = 65537", "o.tif"),
            "levels",
        ),
        (
            "missing points file",
            job_text(good_enc, "o.tif").replace("pts.csv", "nope.csv"),
            "nope.csv",
        ),
        (
            "z behind plate",
            job_text(good_enc, "o.tif")
                .replace("offset_mm = [0, 0, 0]", "offset_mm = [0, 0, -5.8]"),
            "z =",
        ),
        (
            "unknown encoding",
            job_text("kind = \"holo\"", "o.tif"),
            "kind",
        ),
        (
            "absurd size",
            job_text(good_enc, "o.tif").replace("width_px = 96", "width_px = 100000000000"),
            "width_px",
        ),
    ];
    for (name, text, needle) in cases {
        let (d, j) = setup(&text);
        let o = run(&["run", "-q", j.to_str().unwrap()]);
        let err = String::from_utf8_lossy(&o.stderr);
        assert!(!o.status.success(), "{name}: exit 0");
        assert_eq!(
            err.trim_end().lines().count(),
            1,
            "{name}: stderr not one line: {err}"
        );
        assert!(err.contains(needle), "{name}: '{needle}' not in: {err}");
        assert!(!err.contains("panicked"), "{name}: {err}");
        let files = files_in(d.path());
        assert!(
            files.iter().all(|f| f == "pts.csv" || f == "job.toml"),
            "{name}: left {files:?}"
        );
    }
}

#[test]
fn unwritable_output_folder_fails_cleanly() {
    let (d, j) = setup(&job_text("kind = \"binary-phase\"", "blocker/o.tif"));
    // A regular file where the output folder should be: no user can write below it, root included.
    std::fs::write(d.path().join("blocker"), b"x").unwrap();
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success());
    assert_eq!(err.trim_end().lines().count(), 1, "{err}");
    assert!(err.contains("blocker"), "{err}");
}

#[test]
fn nan_coordinate_in_points_fails_cleanly() {
    let (d, j) = setup(&job_text("kind = \"binary-phase\"", "o.tif"));
    std::fs::write(d.path().join("pts.csv"), "x_mm,y_mm,z_mm\n0,0,5\nNaN,0,5\n").unwrap();
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success());
    assert!(err.contains("pts.csv"), "{err}");
    assert!(!d.path().join("o.tif").exists());
}

#[test]
fn unknown_key_names_key_and_line() {
    let text =
        job_text("kind = \"binary-phase\"", "o.tif").replace("[output]\n", "[output]\nspeed = 3\n");
    let line = text.lines().position(|l| l.starts_with("speed")).unwrap() + 1;
    let (_d, j) = setup(&text);
    let o = run(&["plan", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success());
    assert!(
        err.contains("speed") && err.contains(&format!("line {line}")),
        "{err}"
    );
}

#[test]
fn plan_reports_without_writing() {
    let (d, j) = setup(&job_text("kind = \"phase\"\nlevels = 256", "o.tif"));
    let o = run(&["plan", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let out = String::from_utf8_lossy(&o.stdout);
    // asin(633 nm / (2 x 2 um)) = 9.105 deg (physics.md, Sampling limits).
    assert!(out.contains("9.105 deg"), "{out}");
    assert!(out.contains("emitters: 3"), "{out}");
    // User units and words, no program text; a time estimate.
    assert!(out.contains("reference: plane wave, tilted"), "{out}");
    assert!(!out.contains('{') && !out.contains("Some("), "{out}");
    assert!(out.contains("time: about"), "{out}");
    assert!(!d.path().join("o.tif").exists());
}

/// Several jobs in one call: a failing one does not stop the others; exit non-zero at the end.
#[test]
fn batch_goes_on_after_a_failure() {
    let (d, j) = setup(&job_text("kind = \"binary-phase\"", "a.tif"));
    let bad = d.path().join("bad.toml");
    std::fs::write(&bad, "nonsense").unwrap();
    let o = run(&["run", "-q", bad.to_str().unwrap(), j.to_str().unwrap()]);
    assert!(!o.status.success());
    assert!(d.path().join("a.tif").exists());
    assert!(String::from_utf8_lossy(&o.stderr).contains("1 failed"));
}

/// Peak memory is set by the band, not the plate: 32 times more rows (1.9 GB of complex field if held
/// at once) must not raise the peak by more than a few MiB. Linux only (reads VmHWM).
#[test]
fn peak_memory_flat_as_plate_grows() {
    if !Path::new("/proc/self/status").exists() {
        return;
    }
    let mut peaks = Vec::new();
    for h in [512, 16384] {
        let text = job_text("kind = \"binary-amplitude\"", "o.tif")
            .replace("width_px = 96", "width_px = 8192")
            .replace("height_px = 64", &format!("height_px = {h}"));
        let (_d, j) = setup(&text);
        let o = run(&["run", "-q", "--stats", j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        peaks.push(peak_mib(&String::from_utf8_lossy(&o.stderr)));
    }
    assert!(
        peaks[1] - peaks[0] < 8.0,
        "peak memory grew from {} to {} MiB",
        peaks[0],
        peaks[1]
    );
}
