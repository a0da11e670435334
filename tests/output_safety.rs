//! Output safety, one regression test per case found by a careless or hostile user: outputs that
//! would replace inputs or special files, two runs on one output, plates that are not what their
//! sidecar says, absurd thread and field counts, emitters that miss the plate. Each refusal is one
//! line on stderr with a non-zero exit, and the file it protects is unchanged.

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

fn run(dir: &Path, args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_fringemill"))
        .current_dir(dir)
        .args(args)
        .output()
        .expect("spawn fringemill")
}

const POINTS_CSV: &str = "x_mm,y_mm,z_mm,amplitude,phase_rad\n0,0,5,1,0\n0.05,-0.02,6,0.8,1.0\n";

fn job(output: &str, extra_output: &str, points: &str) -> String {
    format!(
        "[hologram]\nwidth_px = 64\nheight_px = 48\npitch_um = 2.0\nwavelength_nm = 633\n\
         [reference]\nkind = \"plane\"\ntilt_deg = [3.0, 0.0]\n\
         [[object]]\npoints = \"{points}\"\n\
         [encoding]\nkind = \"phase\"\nlevels = 16\n\
         [output]\npath = \"{output}\"\n{extra_output}\n"
    )
}

fn setup(output: &str) -> (tempfile::TempDir, PathBuf) {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("pts.csv"), POINTS_CSV).unwrap();
    let j = d.path().join("job.toml");
    std::fs::write(&j, job(output, "", "pts.csv")).unwrap();
    (d, j)
}

/// `reconstruct base.tif --distance-mm 5 --out OUT` with `extra` options, in `dir`.
fn replay_args(dir: &Path, out: &str, extra: &[&str]) -> Output {
    let mut args = vec![
        "reconstruct",
        "base.tif",
        "--distance-mm",
        "5",
        "--out",
        out,
    ];
    args.extend_from_slice(extra);
    run(dir, &args)
}

/// `reconstruct base.tif --distance-mm 5 --out OUT`, in `dir`.
fn replay(dir: &Path, out: &str) -> Output {
    replay_args(dir, out, &[])
}

/// Refused with a one-line message containing `needle`.
fn refused(o: &Output, needle: &str) {
    let e = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success(), "accepted: {e}");
    assert!(e.contains(needle), "'{needle}' not in: {e}");
    assert_eq!(e.trim().lines().count(), 1, "{e}");
    assert!(!e.contains("panicked"), "{e}");
}

#[test]
fn output_equal_to_the_points_file_is_refused() {
    let (d, j) = setup("pts.csv");
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "overwrite an input",
    );
    assert_eq!(
        std::fs::read_to_string(d.path().join("pts.csv")).unwrap(),
        POINTS_CSV
    );
}

#[test]
fn output_equal_to_the_job_file_is_refused() {
    let (d, j) = setup("job.toml");
    let before = std::fs::read(&j).unwrap();
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "overwrite an input",
    );
    assert_eq!(std::fs::read(&j).unwrap(), before);
}

#[cfg(unix)]
#[test]
fn output_to_a_device_is_refused() {
    use std::os::unix::fs::FileTypeExt;
    let (d, j) = setup("/dev/null");
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "not a regular file",
    );
    assert!(std::fs::metadata("/dev/null")
        .unwrap()
        .file_type()
        .is_char_device());
}

#[test]
fn output_that_is_a_folder_is_refused_before_any_work() {
    let (d, j) = setup("plate.tif");
    std::fs::create_dir(d.path().join("plate.tif")).unwrap();
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "folder",
    );
    assert!(d.path().join("plate.tif").is_dir());
}

/// A finished plate `base.tif` with its sidecar `base.json`.
fn plate() -> (tempfile::TempDir, PathBuf) {
    let (d, j) = setup("base.tif");
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    (d, j)
}

#[test]
fn reconstruct_out_over_the_plates_sidecar_is_refused() {
    let (d, _) = plate();
    let side = std::fs::read(d.path().join("base.json")).unwrap();
    // --out base.png writes its metrics to base.json: the plate's sidecar.
    refused(&replay(d.path(), "base.png"), "overwrite an input");
    assert_eq!(std::fs::read(d.path().join("base.json")).unwrap(), side);
    // Another plate's sidecar under the metrics name is refused too.
    std::fs::copy(d.path().join("base.json"), d.path().join("other.json")).unwrap();
    refused(&replay(d.path(), "other.png"), "sidecar");
}

#[test]
fn reconstruct_out_over_the_plate_is_refused() {
    let (d, _) = plate();
    let tif = std::fs::read(d.path().join("base.tif")).unwrap();
    refused(&replay(d.path(), "base.tif"), "overwrite an input");
    assert_eq!(std::fs::read(d.path().join("base.tif")).unwrap(), tif);
}

#[test]
fn sample_out_over_an_input_is_refused() {
    let (d, j) = setup("plate.tif");
    refused(
        &run(
            d.path(),
            &["sample", j.to_str().unwrap(), "--out", "pts.csv"],
        ),
        "overwrite an input",
    );
    assert_eq!(
        std::fs::read_to_string(d.path().join("pts.csv")).unwrap(),
        POINTS_CSV
    );
}

#[test]
fn a_second_run_on_a_locked_output_is_refused_at_once() {
    let (d, j) = setup("plate.tif");
    // The lock another run would hold (an flock on plate.tif.lock).
    let lock = fringemill::output::guard::lock_output(&d.path().join("plate.tif")).unwrap();
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "another run",
    );
    assert!(!d.path().join("plate.tif").exists());
    drop(lock);
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(!d.path().join("plate.tif.lock").exists());
}

/// A plate whose sidecar has `key` of `table` set to `value`: `reconstruct` refuses, naming it.
fn edited_sidecar_is_refused(table: &str, key: &str, value: serde_json::Value) {
    let (d, _) = plate();
    let p = d.path().join("base.json");
    let mut v: serde_json::Value = serde_json::from_slice(&std::fs::read(&p).unwrap()).unwrap();
    v[table][key] = value;
    std::fs::write(&p, serde_json::to_vec(&v).unwrap()).unwrap();
    refused(&replay(d.path(), "r.png"), key);
}

#[test]
fn sidecar_with_zero_pitch_is_refused() {
    edited_sidecar_is_refused("hologram", "pitch_um", serde_json::json!([0.0, 2.0]));
}

#[test]
fn sidecar_with_negative_wavelength_is_refused() {
    edited_sidecar_is_refused("hologram", "wavelength_nm", serde_json::json!(-633.0));
}

#[test]
fn rgb_tiff_under_a_plates_sidecar_is_refused() {
    let (d, _) = plate();
    let f = std::fs::File::create(d.path().join("base.tif")).unwrap();
    let mut e = tiff::encoder::TiffEncoder::new(f).unwrap();
    e.write_image::<tiff::encoder::colortype::RGB8>(64, 48, &vec![7u8; 64 * 48 * 3])
        .unwrap();
    refused(&replay(d.path(), "r.png"), "grey sample");
}

/// A minimal little-endian tiled TIFF (TIFF 6.0, section 15): one 16 x 16 tile of 8-bit grey.
fn tiled_tiff(w: u32, h: u32) -> Vec<u8> {
    let tiles_x = w.div_ceil(16);
    let tiles_y = h.div_ceil(16);
    let n_tiles = tiles_x * tiles_y;
    let data_len = n_tiles * 256;
    let mut out = b"II*\0".to_vec();
    let data_at = 8u32;
    let offsets_at = data_at + data_len;
    let counts_at = offsets_at + 4 * n_tiles;
    let ifd_at = counts_at + 4 * n_tiles;
    out.extend_from_slice(&ifd_at.to_le_bytes());
    out.extend(std::iter::repeat_n(0u8, data_len as usize));
    for k in 0..n_tiles {
        out.extend_from_slice(&(data_at + 256 * k).to_le_bytes());
    }
    for _ in 0..n_tiles {
        out.extend_from_slice(&256u32.to_le_bytes());
    }
    let entries: [(u16, u16, u32, u32); 9] = [
        (256, 4, 1, w),
        (257, 4, 1, h),
        (258, 3, 1, 8),
        (259, 3, 1, 1),
        (262, 3, 1, 1),
        (322, 3, 1, 16),
        (323, 3, 1, 16),
        (324, 4, n_tiles, offsets_at),
        (325, 4, n_tiles, counts_at),
    ];
    out.extend_from_slice(&(entries.len() as u16).to_le_bytes());
    for (tag, typ, count, value) in entries {
        out.extend_from_slice(&tag.to_le_bytes());
        out.extend_from_slice(&typ.to_le_bytes());
        out.extend_from_slice(&count.to_le_bytes());
        if typ == 3 && count == 1 {
            out.extend_from_slice(&(value as u16).to_le_bytes());
            out.extend_from_slice(&[0, 0]);
        } else {
            out.extend_from_slice(&value.to_le_bytes());
        }
    }
    out.extend_from_slice(&0u32.to_le_bytes());
    out
}

#[test]
fn tiled_tiff_under_a_plates_sidecar_is_refused() {
    let (d, _) = plate();
    std::fs::write(d.path().join("base.tif"), tiled_tiff(64, 48)).unwrap();
    refused(&replay(d.path(), "r.png"), "tiled");
}

#[test]
fn a_hundred_thousand_threads_are_refused() {
    let (d, j) = setup("plate.tif");
    let o = run(
        d.path(),
        &["run", "-q", "--threads", "100000", j.to_str().unwrap()],
    );
    let e = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(2), "{e}");
    assert!(e.contains("at most"), "{e}");
}

#[test]
fn one_pixel_fields_are_refused() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("pts.csv"), POINTS_CSV).unwrap();
    let j = d.path().join("job.toml");
    let text = job("plate.tif", "field_px = [1, 1]", "pts.csv")
        .replace("width_px = 64", "width_px = 200")
        .replace("height_px = 48", "height_px = 200");
    std::fs::write(&j, text).unwrap();
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "40000 field files",
    );
    assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 2);
}

/// An emitter far to the side of a small plate: its waves reach the plate's plane only at angles
/// beyond the half-angle asin(lambda / 2p) the 2 um pitch holds (9.1 deg at 633 nm; the point is
/// at 45 deg and more from every pixel), so its support misses every pixel.
#[test]
fn an_emitter_that_misses_the_plate_is_counted_and_a_blank_plate_refused() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(
        d.path().join("pts.csv"),
        "x_mm,y_mm,z_mm,amplitude,phase_rad\n0,0,5,1,0\n8,0,1,1,0\n",
    )
    .unwrap();
    let j = d.path().join("job.toml");
    std::fs::write(&j, job("plate.tif", "", "pts.csv")).unwrap();
    let o = run(d.path(), &["plan", j.to_str().unwrap()]);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(out.contains("warning: 1 emitter(s) lie outside"), "{out}");
    std::fs::write(
        d.path().join("pts.csv"),
        "x_mm,y_mm,z_mm,amplitude,phase_rad\n8,0,1,1,0\n",
    )
    .unwrap();
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "none of the 1 emitters",
    );
    assert!(!d.path().join("plate.tif").exists());
}

#[test]
fn a_plate_and_a_sidecar_of_different_runs_are_refused() {
    let (d, j) = plate();
    // A second run of another scene into another name, its TIFF then put under the first name
    // (as a stop between the two renames of a finish would leave it).
    std::fs::write(
        d.path().join("pts2.csv"),
        "x_mm,y_mm,z_mm,amplitude,phase_rad\n0.01,0,5,1,0\n",
    )
    .unwrap();
    std::fs::write(&j, job("other.tif", "", "pts2.csv")).unwrap();
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    std::fs::copy(d.path().join("other.tif"), d.path().join("base.tif")).unwrap();
    refused(&replay(d.path(), "r.png"), "not the TIFF its sidecar");
    let o = replay_args(d.path(), "r.png", &["--no-verify"]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
}

#[test]
fn a_failed_sidecar_keeps_the_previous_plate_and_sidecar() {
    let (d, j) = plate();
    let (tif, side) = (
        std::fs::read(d.path().join("base.tif")).unwrap(),
        std::fs::read(d.path().join("base.json")).unwrap(),
    );
    // The next run's sidecar cannot be written: its partial name is taken by a folder.
    std::fs::create_dir(d.path().join("base.json.partial")).unwrap();
    std::fs::write(
        d.path().join("pts.csv"),
        "x_mm,y_mm,z_mm,amplitude,phase_rad\n0.02,0,5,1,0\n",
    )
    .unwrap();
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    assert!(!o.status.success());
    assert_eq!(std::fs::read(d.path().join("base.tif")).unwrap(), tif);
    assert_eq!(std::fs::read(d.path().join("base.json")).unwrap(), side);
    assert!(!d.path().join("base.tif.partial").exists());
}

#[test]
fn an_implausible_wavelength_is_refused_with_a_readable_number() {
    let (d, j) = setup("plate.tif");
    let text = std::fs::read_to_string(&j)
        .unwrap()
        .replace("wavelength_nm = 633", "wavelength_nm = 1e300");
    std::fs::write(&j, text).unwrap();
    refused(&run(d.path(), &["plan", j.to_str().unwrap()]), "1e300");
}

#[test]
fn a_damaged_shard_part_is_refused_at_assemble() {
    let (d, j) = setup("plate.tif");
    for k in ["1/2", "2/2"] {
        let o = run(d.path(), &["run", "-q", "--shard", k, j.to_str().unwrap()]);
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    }
    let part = d.path().join("plate.tif.part-1-of-2");
    let mut bytes = std::fs::read(&part).unwrap();
    bytes[0] ^= 0xff;
    std::fs::write(&part, bytes).unwrap();
    refused(
        &run(d.path(), &["assemble", j.to_str().unwrap()]),
        "SHA-256 differs",
    );
    assert!(!d.path().join("plate.tif").exists());
}

#[test]
fn a_file_that_is_not_its_format_is_refused_before_it_is_read() {
    let d = tempfile::tempdir().unwrap();
    // An image renamed as a mesh, and a points file of zeros (as a sparse file reads).
    std::fs::write(
        d.path().join("model.glb"),
        b"\x89PNG\r\n\x1a\nrest of an image",
    )
    .unwrap();
    std::fs::write(d.path().join("zeros.ply"), vec![0u8; 1 << 16]).unwrap();
    let j = d.path().join("mesh.toml");
    std::fs::write(
        &j,
        job("plate.tif", "", "pts.csv").replace("points = \"pts.csv\"", "mesh = \"model.glb\""),
    )
    .unwrap();
    refused(
        &run(d.path(), &["plan", j.to_str().unwrap()]),
        "not a glTF file",
    );
    let j = d.path().join("pts.toml");
    std::fs::write(&j, job("plate.tif", "", "zeros.ply")).unwrap();
    refused(
        &run(d.path(), &["plan", j.to_str().unwrap()]),
        "not a PLY file",
    );
}

#[test]
fn an_output_named_like_its_own_sidecar_is_refused() {
    let (d, j) = setup("plate.json");
    refused(
        &run(d.path(), &["run", "-q", j.to_str().unwrap()]),
        "its own sidecar",
    );
    assert!(!d.path().join("plate.json").exists());
}

/// The files a glTF (JSON) names are inputs too: its external buffer and texture are listed
/// (percent-escapes decoded, `data:` URIs not), so resume hashes them and an output named like
/// one is refused.
#[test]
fn gltf_external_buffers_and_textures_are_inputs() {
    let d = tempfile::tempdir().unwrap();
    // One triangle; its buffer is external, its texture too (neither needs to be valid here).
    let gltf = r#"{"asset":{"version":"2.0"},
        "buffers":[{"uri":"tri%20data.bin","byteLength":36},{"uri":"data:application/octet-stream;base64,AAAA","byteLength":3}],
        "images":[{"uri":"tex.png"}],
        "bufferViews":[{"buffer":0,"byteLength":36}],
        "accessors":[{"bufferView":0,"componentType":5126,"count":3,"type":"VEC3","min":[0,0,0],"max":[1,1,0]}],
        "meshes":[{"primitives":[{"attributes":{"POSITION":0}}]}],
        "nodes":[{"mesh":0}],"scenes":[{"nodes":[0]}],"scene":0}"#;
    std::fs::write(d.path().join("m.gltf"), gltf).unwrap();
    let tri: Vec<u8> = [0f32, 0.0, 0.0, 0.001, 0.0, 0.0, 0.0, 0.001, 0.0]
        .iter()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    std::fs::write(d.path().join("tri data.bin"), tri).unwrap();
    std::fs::write(d.path().join("tex.png"), b"not read here").unwrap();
    let text = |out: &str| {
        format!(
            "[hologram]\nwidth_px = 64\nheight_px = 64\npitch_um = 2.0\nwavelength_nm = 532\n\
             [reference]\nkind = \"plane\"\n[[object]]\nmesh = \"m.gltf\"\noffset_mm = [0, 0, 20]\nemitters = 50\n\
             [encoding]\nkind = \"binary-amplitude\"\n[output]\npath = \"{out}\"\n"
        )
    };
    let j = d.path().join("job.toml");
    std::fs::write(&j, text("p.tif")).unwrap();
    let spec = fringemill::job::spec::JobSpec::load(&j).unwrap();
    let inputs = spec.inputs();
    assert!(
        inputs.contains(&d.path().join("tri data.bin")),
        "{inputs:?}"
    );
    assert!(inputs.contains(&d.path().join("tex.png")), "{inputs:?}");
    assert_eq!(inputs.len(), 4, "{inputs:?}");
    std::fs::write(&j, text("tri data.bin")).unwrap();
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!o.status.success() && err.contains("tri data.bin"), "{err}");
    assert_eq!(
        std::fs::read(d.path().join("tri data.bin")).unwrap().len(),
        36
    );
}

/// Field plates: the sidecar records its manifest's SHA-256, so a manifest of another run is
/// refused when the plate is opened; `reconstruct` checks every field file against the
/// manifest's SHA-256 (a damaged field is named) unless `--no-verify`.
#[test]
fn field_plates_refuse_a_stale_manifest_or_a_damaged_field() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("pts.csv"), POINTS_CSV).unwrap();
    let j = d.path().join("job.toml");
    std::fs::write(&j, job("base.tif", "field_px = [32, 24]", "pts.csv")).unwrap();
    let o = run(d.path(), &["run", "-q", j.to_str().unwrap()]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    assert!(replay(d.path(), "r.png").status.success());
    // A field damaged: refused by the check, replayed with --no-verify.
    let f = d.path().join("base_r001_c000.tif");
    let mut bytes = std::fs::read(&f).unwrap();
    let k = bytes.len() / 2;
    bytes[k] ^= 1;
    std::fs::write(&f, &bytes).unwrap();
    refused(&replay(d.path(), "r.png"), "base_r001_c000.tif");
    assert!(replay_args(d.path(), "r.png", &["--no-verify"])
        .status
        .success());
    // A manifest that is not the one the sidecar names.
    let m = d.path().join("base.fields.json");
    let text = std::fs::read_to_string(&m).unwrap();
    std::fs::write(&m, text.replace("\n", "\n ")).unwrap();
    refused(&replay(d.path(), "r.png"), "manifest");
}
