//! Overnight robustness, end to end through the binary: kill -9 and Ctrl-C followed by a resume give
//! byte-identical plates; thread counts and shard splits give byte-identical plates; a disk that
//! fills mid-run stops cleanly and resumes; an edited job never resumes onto old work.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::Duration;

mod common;

const BIN: &str = env!("CARGO_BIN_EXE_fringemill");

fn job(dir: &Path, encoding: &str) -> PathBuf {
    job_in(dir, encoding, "f32")
}

/// As [`job`], with `[synthesis] precision` given. The kill tests take the f64 reference kernel:
/// resuming does not depend on the kernel, and its slower run leaves the kills time to land.
fn job_in(dir: &Path, encoding: &str, precision: &str) -> PathBuf {
    let pts = Path::new(env!("CARGO_MANIFEST_DIR")).join("samples/badge_points.ply");
    std::fs::copy(pts, dir.join("pts.ply")).unwrap();
    let text = format!(
        "[hologram]\nwidth_px = 768\nheight_px = 640\npitch_um = 2.0\nwavelength_nm = 532\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [3.0, 1.0]\n\
         [[object]]\npoints = \"pts.ply\"\noffset_mm = [0, 0, 20]\n\
         [synthesis]\nprecision = \"{precision}\"\n\
         [encoding]\n{encoding}\n[output]\npath = \"out/plate.tif\"\nrows_per_strip = 16\n"
    );
    let p = dir.join("job.toml");
    std::fs::write(&p, text).unwrap();
    p
}

fn run(args: &[&str]) -> std::process::Output {
    Command::new(BIN).args(args).output().unwrap()
}

fn clean_plate(encoding: &str) -> Vec<u8> {
    clean_plate_in(encoding, "f32")
}

fn clean_plate_in(encoding: &str, precision: &str) -> Vec<u8> {
    let d = tempfile::tempdir().unwrap();
    let j = job_in(d.path(), encoding, precision);
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    std::fs::read(d.path().join("out/plate.tif")).unwrap()
}

/// Deterministic pseudo-random delays in 30 ms ..= 30 + max_ms, shortest first (so the first
/// run is killed even when the longer delays outlast a run).
fn delays(seed: u64, n: usize, max_ms: u64) -> Vec<u64> {
    let mut x = seed;
    let mut v: Vec<u64> = (0..n)
        .map(|_| {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            30 + x % max_ms
        })
        .collect();
    v.sort_unstable();
    v
}

/// Starts `run` and kills it (SIGKILL) after each delay in turn, until `done` exists; returns how
/// many runs were killed.
fn kill_runs(j: &Path, done: &Path, delays_ms: Vec<u64>) -> usize {
    let mut kills = 0;
    for ms in delays_ms {
        let mut child = Command::new(BIN)
            .args(["run", "-q", "--checkpoint-secs", "0", j.to_str().unwrap()])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(ms));
        if child.try_wait().unwrap().is_none() {
            child.kill().unwrap();
            kills += 1;
        }
        child.wait().unwrap();
        if done.exists() {
            break;
        }
    }
    kills
}

#[test]
fn kill_9_then_resume_is_byte_identical() {
    let enc = "kind = \"phase\"\nlevels = 256";
    let t0 = std::time::Instant::now();
    let reference = clean_plate_in(enc, "f64");
    let clean_ms = t0.elapsed().as_millis() as u64;
    let d = tempfile::tempdir().unwrap();
    let j = job_in(d.path(), enc, "f64");
    let tif = d.path().join("out/plate.tif");
    // A kill can land after the final rename; the file under the final name is then whole, which
    // the comparison below checks. Delays follow the clean run's time on this machine and load.
    let kills = kill_runs(&j, &tif, delays(0x9e3779b9, 4, clean_ms.max(40)));
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        kills > 0,
        "the run finished before any kill: make the job heavier"
    );
    assert!(
        std::fs::read(&tif).unwrap() == reference,
        "resumed plate differs"
    );
    assert!(!d.path().join("out/plate.tif.partial.journal").exists());
}

/// Starts a run and sends SIGINT after a delay; retries with shorter delays if the run finished
/// first (a fast machine), so the test does not depend on the machine's speed.
fn interrupt_run(dir: &Path, j: &Path) -> std::process::Output {
    for ms in [400, 120, 40, 10] {
        let child = Command::new(BIN)
            .args(["run", "-q", "--checkpoint-secs", "0", j.to_str().unwrap()])
            .stdout(Stdio::null())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        std::thread::sleep(Duration::from_millis(ms));
        // SAFETY: plain kill(2) on our own child's pid.
        unsafe { libc::kill(child.id() as i32, libc::SIGINT) };
        let o = child.wait_with_output().unwrap();
        if !o.status.success() {
            return o;
        }
        let _ = std::fs::remove_dir_all(dir.join("out"));
    }
    panic!("every run finished before SIGINT: make the job heavier");
}

#[test]
fn sigint_stops_cleanly_and_resumes_byte_identical() {
    let enc = "kind = \"binary-amplitude\"";
    let reference = clean_plate(enc);
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), enc);
    let o = interrupt_run(d.path(), &j);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(130), "{err}");
    assert!(err.contains("run the same command again"), "{err}");
    assert!(d.path().join("out/plate.tif.partial.journal").exists());
    assert!(!d.path().join("out/plate.tif").exists());
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
}

/// A job whose run was stopped by SIGINT (exit 130) with its work saved.
fn interrupted(enc: &str) -> (tempfile::TempDir, PathBuf) {
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), enc);
    let o = interrupt_run(d.path(), &j);
    assert_eq!(
        o.status.code(),
        Some(130),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    (d, j)
}

/// An input edited between an interruption and the resume (here the points file) is found by
/// its SHA-256 recorded in the journal: the resume refuses, naming the file, instead of mixing
/// rows of two scenes; `--restart` then computes the new scene from the start.
#[test]
fn resume_refuses_an_edited_points_file() {
    let enc = "kind = \"binary-amplitude\"";
    let (d, j) = interrupted(enc);
    let pts = d.path().join("pts.ply");
    let mut bytes = std::fs::read(&pts).unwrap();
    // One digit of the last vertex changed (the file stays a valid PLY).
    let k = bytes
        .iter()
        .rposition(|b| (b'1'..=b'8').contains(b))
        .unwrap();
    bytes[k] += 1;
    std::fs::write(&pts, bytes).unwrap();
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "{e}");
    assert!(e.contains("pts.ply") && e.contains("changed"), "{e}");
    assert!(!d.path().join("out/plate.tif").exists());
    let o = run(&["run", "-q", "--restart", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

/// The same job resumed through another spelling of its path (`dir/./job.toml`): the inputs are
/// compared by content, so the saved work is used and the plate is byte-identical.
#[test]
fn resume_accepts_another_spelling_of_the_job_path() {
    let enc = "kind = \"binary-amplitude\"";
    let reference = clean_plate(enc);
    let (d, _) = interrupted(enc);
    let other = d.path().join(".").join("job.toml");
    let o = run(&["run", "-q", other.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
}

/// 1, 2 and 4 threads, and shard splits 1/1, 2/2, 3/3 and 5/5 (assembled), all byte-identical.
#[test]
fn threads_and_shards_are_byte_identical() {
    let enc = "kind = \"phase\"\nlevels = 16";
    let reference = clean_plate(enc);
    for threads in ["1", "2", "4"] {
        let d = tempfile::tempdir().unwrap();
        let j = job(d.path(), enc);
        assert!(
            run(&["run", "-q", "--threads", threads, j.to_str().unwrap()])
                .status
                .success()
        );
        assert!(
            std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference,
            "threads {threads}"
        );
    }
    for n in [1u32, 2, 3, 5] {
        let d = tempfile::tempdir().unwrap();
        let j = job(d.path(), enc);
        // Shards in reverse order, as a scheduler may run them.
        for k in (1..=n).rev() {
            let o = run(&[
                "run",
                "-q",
                "--shard",
                &format!("{k}/{n}"),
                j.to_str().unwrap(),
            ]);
            assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        }
        let o = run(&["assemble", "-q", j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        assert!(
            std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference,
            "{n} shards"
        );
        let left: Vec<_> = std::fs::read_dir(d.path().join("out"))
            .unwrap()
            .map(|e| e.unwrap().file_name())
            .collect();
        assert_eq!(left.len(), 2, "parts left behind: {left:?}");
    }
    // The Slurm environment selects the shard.
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), enc);
    for id in 0..2 {
        let o = Command::new(BIN)
            .args(["run", "-q", "--shard", "slurm", j.to_str().unwrap()])
            .env("SLURM_ARRAY_TASK_ID", id.to_string())
            .env("SLURM_ARRAY_TASK_COUNT", "2")
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    assert!(run(&["assemble", "-q", j.to_str().unwrap()])
        .status
        .success());
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
}

/// A file-size limit (the same write error a full disk gives) stops the run with the journal
/// intact; without the limit the same command finishes the identical plate.
#[test]
fn disk_full_mid_run_then_resume() {
    let enc = "kind = \"phase\"\nlevels = 256"; // 768 x 640 x 8 bit: 491 kB uncompressed
    let reference = clean_plate(enc);
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), enc);
    // bash counts ulimit -f in 1024-byte blocks; SIGXFSZ ignored so write(2) fails with EFBIG.
    let o = Command::new("bash")
        .arg("-c")
        .arg(format!(
            "trap '' XFSZ; ulimit -f 250; exec '{BIN}' run -q --checkpoint-secs 0 '{}'",
            j.display()
        ))
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "{err}");
    assert_eq!(err.trim_end().lines().count(), 1, "{err}");
    assert!(err.contains("run the same command again"), "{err}");
    assert!(!d.path().join("out/plate.tif").exists());
    let journal = d.path().join("out/plate.tif.partial.journal");
    let jv: serde_json::Value = serde_json::from_slice(&std::fs::read(&journal).unwrap()).unwrap();
    let rows = jv["rows_done"].as_u64().unwrap();
    assert!(
        rows > 0 && rows < 640 && rows.is_multiple_of(16),
        "rows_done {rows}"
    );
    // The journal never claims more than the file holds.
    let len = std::fs::metadata(d.path().join("out/plate.tif.partial"))
        .unwrap()
        .len();
    assert!(jv["writer"]["file_len"].as_u64().unwrap() <= len);
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
}

#[test]
fn edited_job_refuses_to_resume_and_names_the_change() {
    let d = tempfile::tempdir().unwrap();
    let j = job(d.path(), "kind = \"binary-phase\"");
    interrupt_run(d.path(), &j);
    let text = std::fs::read_to_string(&j)
        .unwrap()
        .replace("wavelength_nm = 532", "wavelength_nm = 633");
    std::fs::write(&j, text).unwrap();
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success());
    assert!(
        err.contains("hologram.wavelength_nm: 532 -> 633") && err.contains("--restart"),
        "{err}"
    );
    let o = run(&["run", "-q", "--restart", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(d.path().join("out/plate.tif").exists());
}

/// Field files: their pixels laid side by side reproduce the single-file plate exactly, the manifest
/// origins match the pixel geometry, and sharded or resumed field runs give the same files.
#[test]
fn fields_tile_the_plate_exactly() {
    for enc in [
        "kind = \"binary-amplitude\"",
        "kind = \"phase\"\nlevels = 4096",
    ] {
        let single = tempfile::tempdir().unwrap();
        let j = job(single.path(), enc);
        assert!(run(&["run", "-q", j.to_str().unwrap()]).status.success());
        let (w, h, plate) = common::decode(&single.path().join("out/plate.tif"));
        let d = tempfile::tempdir().unwrap();
        let j = job(d.path(), enc);
        // 300 px is not a whole number of bytes at 1 bit; 208 rows = 13 strips of 16.
        let text = std::fs::read_to_string(&j).unwrap() + "field_px = [300, 208]\n";
        std::fs::write(&j, text).unwrap();
        let o = run(&["run", "-q", j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        let m: serde_json::Value =
            serde_json::from_slice(&std::fs::read(d.path().join("out/plate.fields.json")).unwrap())
                .unwrap();
        let fields = m["fields"].as_array().unwrap();
        assert_eq!(
            fields.len(),
            3 * 4,
            "768 / 300 -> 3 columns, 640 / 208 -> 4 rows"
        );
        let mut tiled = vec![u16::MAX; (w * h) as usize];
        for f in fields {
            let (fw, fh, px) =
                common::decode(&d.path().join("out").join(f["file"].as_str().unwrap()));
            let [c0, r0] = [
                f["first_px"][0].as_u64().unwrap() as u32,
                f["first_px"][1].as_u64().unwrap() as u32,
            ];
            assert_eq!(
                [fw as u64, fh as u64],
                [
                    f["size_px"][0].as_u64().unwrap(),
                    f["size_px"][1].as_u64().unwrap()
                ]
            );
            // Origin = top-left pixel edge: x = (c0 - W/2) p, y = (H/2 - r0) p with p = 2 um (physics.md pixel centres).
            let x = (c0 as f64 - w as f64 / 2.0) * 2e-3;
            let y = (h as f64 / 2.0 - r0 as f64) * 2e-3;
            assert!(
                (f["origin_mm"][0].as_f64().unwrap() - x).abs() < 1e-9
                    && (f["origin_mm"][1].as_f64().unwrap() - y).abs() < 1e-9
            );
            for r in 0..fh {
                for c in 0..fw {
                    tiled[((r0 + r) * w + c0 + c) as usize] = px[(r * fw + c) as usize];
                }
            }
        }
        assert!(
            tiled == plate,
            "{enc}: fields differ from the single-file plate"
        );
        let hashes = |dir: &Path| -> Vec<(String, Vec<u8>)> {
            let mut v: Vec<(String, Vec<u8>)> = std::fs::read_dir(dir.join("out"))
                .unwrap()
                .map(|e| e.unwrap().path())
                .filter(|p| p.extension().is_some_and(|x| x == "tif"))
                .map(|p| {
                    (
                        p.file_name().unwrap().to_string_lossy().into_owned(),
                        std::fs::read(&p).unwrap(),
                    )
                })
                .collect();
            v.sort();
            v
        };
        let reference = hashes(d.path());
        // Sharded by field rows: no pixel assembly, the records merge into the manifest.
        let s = tempfile::tempdir().unwrap();
        let js = job(s.path(), enc);
        std::fs::write(&js, std::fs::read_to_string(&j).unwrap()).unwrap();
        for k in [2, 1] {
            assert!(run(&[
                "run",
                "-q",
                "--shard",
                &format!("{k}/2"),
                js.to_str().unwrap()
            ])
            .status
            .success());
        }
        assert!(run(&["assemble", "-q", js.to_str().unwrap()])
            .status
            .success());
        assert!(
            hashes(s.path()) == reference,
            "{enc}: sharded fields differ"
        );
        assert!(s.path().join("out/plate.fields.json").exists());
    }
}

#[test]
fn fields_resume_after_kill_9() {
    let enc = "kind = \"phase\"\nlevels = 256";
    let mk = |dir: &Path| {
        let j = job_in(dir, enc, "f64");
        std::fs::write(
            &j,
            std::fs::read_to_string(&j).unwrap() + "field_px = [256, 160]\n",
        )
        .unwrap();
        j
    };
    let clean = tempfile::tempdir().unwrap();
    let jc = mk(clean.path());
    let t0 = std::time::Instant::now();
    assert!(run(&["run", "-q", jc.to_str().unwrap()]).status.success());
    let clean_ms = t0.elapsed().as_millis() as u64;
    let d = tempfile::tempdir().unwrap();
    let j = mk(d.path());
    let manifest = d.path().join("out/plate.fields.json");
    // Delays follow the clean run's time (kills land inside the run on any machine and load).
    let kills = kill_runs(&j, &manifest, delays(0x51ed, 6, clean_ms.max(40)));
    assert!(kills > 0, "finished before any kill");
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    for r in 0..4 {
        for c in 0..3 {
            let name = format!("out/plate_r{r:03}_c{c:03}.tif");
            assert!(
                std::fs::read(d.path().join(&name)).unwrap()
                    == std::fs::read(clean.path().join(&name)).unwrap(),
                "{name}"
            );
        }
    }
    let left: Vec<_> = std::fs::read_dir(d.path().join("out"))
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .filter(|n| n.contains("partial"))
        .collect();
    assert!(left.is_empty(), "{left:?}");
}

/// Occlusion is decided on a tile grid fixed in plate pixels: the bytes of an occluded mesh plate
/// do not change with the strip height, the band height, the thread count or a shard split (and
/// occlusion does change them, so the comparison sees it).
#[test]
fn occlusion_does_not_depend_on_bands_strips_threads_or_shards() {
    let mesh = Path::new(env!("CARGO_MANIFEST_DIR")).join("samples/lantern.glb");
    let mk = |dir: &Path, occlusion: &str, output_extra: &str, synthesis_extra: &str| {
        std::fs::copy(&mesh, dir.join("m.glb")).unwrap();
        let text = format!(
            "[hologram]\nwidth_px = 520\nheight_px = 300\npitch_um = 1.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\ntilt_deg = [1.0, 2.0]\n\
             [[object]]\nmesh = \"m.glb\"\nfit_mm = 1.2\nrotation_deg = [20, 35, 0]\noffset_mm = [0, 0, 4]\n\
             emitters = 600\nseed = 3\nocclusion = \"{occlusion}\"\n\
             [synthesis]\n{synthesis_extra}\n\
             [encoding]\nkind = \"phase\"\nlevels = 256\n\
             [output]\npath = \"out/plate.tif\"\n{output_extra}\n"
        );
        let p = dir.join("job.toml");
        std::fs::write(&p, text).unwrap();
        p
    };
    let plate = |occlusion: &str, out: &str, syn: &str, args: &[&str]| {
        let d = tempfile::tempdir().unwrap();
        let j = mk(d.path(), occlusion, out, syn);
        let mut a = vec!["run", "-q"];
        a.extend_from_slice(args);
        a.push(j.to_str().unwrap());
        let o = run(&a);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        std::fs::read(d.path().join("out/plate.tif")).unwrap()
    };
    let pixels = |tif: &[u8]| {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("p.tif");
        std::fs::write(&p, tif).unwrap();
        common::decode(&p).2
    };
    // plan counts the visibility tests in its time estimate.
    let d = tempfile::tempdir().unwrap();
    let j = mk(d.path(), "tiles", "", "");
    let o = run(&["plan", j.to_str().unwrap()]);
    let text = String::from_utf8_lossy(&o.stdout);
    assert!(
        text.contains("256 x 64 px tile") && text.contains("tests"),
        "{text}"
    );
    assert!(text.contains("time: about"), "{text}");
    let reference = pixels(&plate("tiles", "", "", &[]));
    assert_ne!(
        reference,
        pixels(&plate("none", "", "", &[])),
        "occlusion hides nothing here"
    );
    for (out, syn, args, what) in [
        ("rows_per_strip = 12", "", vec![], "rows_per_strip 12"),
        (
            "rows_per_strip = 7",
            "band_rows = 7",
            vec![],
            "7-row strips and bands",
        ),
        (
            "",
            "band_rows = 3",
            vec!["--threads", "1"],
            "3-row bands, one thread",
        ),
        ("", "", vec!["--threads", "2"], "two threads"),
    ] {
        assert!(
            pixels(&plate("tiles", out, syn, &args)) == reference,
            "{what}"
        );
    }
    // Three shards, then assemble.
    let d = tempfile::tempdir().unwrap();
    let j = mk(d.path(), "tiles", "rows_per_strip = 16", "");
    for k in 1..=3 {
        let o = run(&[
            "run",
            "-q",
            "--shard",
            &format!("{k}/3"),
            j.to_str().unwrap(),
        ]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let o = run(&["assemble", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(
        pixels(&std::fs::read(d.path().join("out/plate.tif")).unwrap()) == reference,
        "3 shards"
    );
}

/// A long run in a batch log: a progress line comes after the first band (not after a wave of
/// bands), and SIGTERM stops it once the bands in flight are done, not after the wave, with the
/// whole strips done saved. The job's wave is long (one strip of 2048 rows: the whole plate,
/// seconds at f64), its bands short (16 rows, under 0.1 s each here).
#[test]
fn sigterm_stops_within_the_bands_in_flight_and_progress_starts_at_once() {
    let d = tempfile::tempdir().unwrap();
    let pts = Path::new(env!("CARGO_MANIFEST_DIR")).join("samples/badge_points.ply");
    std::fs::copy(pts, d.path().join("pts.ply")).unwrap();
    let j = d.path().join("job.toml");
    std::fs::write(
        &j,
        "[hologram]\nwidth_px = 2048\nheight_px = 2048\npitch_um = 2.0\nwavelength_nm = 532\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [4.0, 0.0]\n\
         [[object]]\npoints = \"pts.ply\"\noffset_mm = [0, 0, 30]\n\
         [synthesis]\nprecision = \"f64\"\nband_rows = 16\n\
         [encoding]\nkind = \"binary-amplitude\"\n\
         [output]\npath = \"out/plate.tif\"\nrows_per_strip = 2048\n",
    )
    .unwrap();
    let start = std::time::Instant::now();
    let child = Command::new(BIN)
        .args(["run", "--log-progress", j.to_str().unwrap()])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    std::thread::sleep(Duration::from_millis(700));
    // SAFETY: plain kill(2) on our own child's pid.
    unsafe { libc::kill(child.id() as i32, libc::SIGTERM) };
    let signalled = start.elapsed();
    let o = child.wait_with_output().unwrap();
    let stopped = start.elapsed() - signalled;
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        !d.path().join("out/plate.tif").exists(),
        "the run finished before SIGTERM: make the job heavier"
    );
    assert!(!o.status.success(), "{err}");
    assert!(err.contains("run the same command again"), "{err}");
    assert!(
        err.contains("% elapsed"),
        "no progress line before the stop: {err}"
    );
    // The bands in flight (two of 16 rows) take under 0.1 s here; waiting for the wave took 4-5 s.
    // Generous for a loaded machine.
    assert!(
        stopped < Duration::from_millis(1500),
        "stopped {stopped:?} after SIGTERM"
    );
}

/// A partial file damaged after its checkpoint (one byte of a written strip flipped) is refused
/// on resume, naming the file and the bytes, instead of being finished into a wrong plate;
/// `--restart` recomputes it.
#[test]
fn resume_refuses_a_damaged_partial_file() {
    let enc = "kind = \"binary-amplitude\"";
    let reference = clean_plate(enc);
    let (d, j) = interrupted(enc);
    let partial = d.path().join("out/plate.tif.partial");
    let mut bytes = std::fs::read(&partial).unwrap();
    assert!(bytes.len() > 64, "the interrupted run wrote no strip");
    let k = bytes.len() / 2;
    bytes[k] ^= 0x10;
    std::fs::write(&partial, bytes).unwrap();
    let o = run(&["run", "-q", j.to_str().unwrap()]);
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "{e}");
    assert!(
        e.contains("plate.tif.partial") && e.contains("changed since the checkpoint"),
        "{e}"
    );
    assert!(!d.path().join("out/plate.tif").exists());
    let o = run(&["run", "-q", "--restart", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(std::fs::read(d.path().join("out/plate.tif")).unwrap() == reference);
}
