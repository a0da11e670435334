//! Point-cloud input: PLY (ascii, binary little- and big-endian) and CSV readers, and the
//! errors they give on malformed files.

use std::io::Cursor;
use std::path::{Path, PathBuf};

use fringemill::scene::points::{
    read_csv, read_csv_from, read_ply, read_ply_from, read_points, write_ply, PointRecord,
};
use fringemill::Error;

fn p(x: f64, y: f64, z: f64, amplitude: f64, phase_rad: f64) -> PointRecord {
    PointRecord {
        x_mm: x,
        y_mm: y,
        z_mm: z,
        amplitude,
        phase_rad,
    }
}

/// A cloud whose values need all 17 significant digits, plus awkward magnitudes and signs.
fn cloud() -> Vec<PointRecord> {
    vec![
        p(0.1, -0.2, 0.3, 1.0, 0.0),
        p(
            -1.234_567_890_123_456_7,
            2.0 / 3.0,
            std::f64::consts::PI,
            0.5,
            -std::f64::consts::E,
        ),
        p(1e-300, -1e300, 5e-324, 0.0, std::f64::consts::TAU),
        p(-0.0, 0.0, -4.0, 123_456.789, 1e-17),
        p(
            1.0 / 7.0,
            -3.0 / 11.0,
            0.999_999_999_999_999_9,
            0.1 + 0.2,
            -100.25,
        ),
    ]
}

/// Writes `bytes` to `dir/name` and returns the path.
fn put(dir: &Path, name: &str, bytes: impl AsRef<[u8]>) -> PathBuf {
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap();
    path
}

/// The Display text of an error that must occur; it must name the file.
fn err_text<T: std::fmt::Debug>(r: fringemill::Result<T>, path: &Path) -> String {
    let e = r.expect_err("malformed input must be rejected");
    let text = e.to_string();
    let name = path.file_name().unwrap().to_str().unwrap();
    assert!(
        text.contains(name),
        "error does not name the file {name}: {text}"
    );
    assert!(
        !text.chars().any(char::is_control),
        "error is not one clean line: {text:?}"
    );
    text
}

fn assert_contains(text: &str, parts: &[&str]) {
    for part in parts {
        assert!(text.contains(part), "expected {part:?} in error: {text}");
    }
}

fn bits(points: &[PointRecord]) -> Vec<[u64; 5]> {
    points
        .iter()
        .map(|q| [q.x_mm, q.y_mm, q.z_mm, q.amplitude, q.phase_rad].map(f64::to_bits))
        .collect()
}

/// A binary big-endian PLY of doubles, built by hand (the library only writes little-endian).
fn big_endian_ply(points: &[PointRecord]) -> Vec<u8> {
    let mut out = format!(
        "ply\nformat binary_big_endian 1.0\nelement vertex {}\nproperty float64 x\n\
         property float64 y\nproperty float64 z\nproperty float64 amplitude\n\
         property float64 phase\nend_header\n",
        points.len()
    )
    .into_bytes();
    for q in points {
        for v in [q.x_mm, q.y_mm, q.z_mm, q.amplitude, q.phase_rad] {
            out.extend_from_slice(&v.to_be_bytes());
        }
    }
    out
}

fn csv_text(points: &[PointRecord]) -> String {
    // Columns in a different order from the PLY, with spaces around names and values.
    let mut s = String::from("# invented test cloud\n phase_rad , z_mm,x_mm ,amplitude,y_mm\n\n");
    for q in points {
        s += &format!(
            "{:?}, {:?},{:?} ,{:?},{:?}\r\n",
            q.phase_rad, q.z_mm, q.x_mm, q.amplitude, q.y_mm
        );
    }
    s
}

#[test]
fn all_encodings_read_back_bit_exactly() {
    let dir = tempfile::tempdir().unwrap();
    let points = cloud();
    let ascii = dir.path().join("cloud_ascii.ply");
    let le = dir.path().join("cloud_le.ply");
    write_ply(&ascii, &points, false).unwrap();
    write_ply(&le, &points, true).unwrap();
    let be = put(dir.path(), "cloud_be.ply", big_endian_ply(&points));
    let csv = put(dir.path(), "cloud.csv", csv_text(&points));

    assert!(std::fs::read_to_string(&ascii)
        .unwrap()
        .contains("format ascii 1.0"));
    assert!(std::fs::read(&le)
        .unwrap()
        .windows(20)
        .any(|w| w == b"binary_little_endian"));

    let want = bits(&points);
    for path in [&ascii, &le, &be, &csv] {
        let got = read_points(path).unwrap_or_else(|e| panic!("{e}"));
        assert_eq!(bits(&got), want, "{}", path.display());
    }
    assert_eq!(bits(&read_ply(&be).unwrap()), want);
    assert_eq!(bits(&read_csv(&csv).unwrap()), want);
    // The reader-based entry points agree and use the given name in messages.
    let bytes = std::fs::read(&le).unwrap();
    assert_eq!(
        bits(&read_ply_from(Cursor::new(&bytes), &le).unwrap()),
        want
    );
    let text = std::fs::read(&csv).unwrap();
    assert_eq!(
        bits(&read_csv_from(Cursor::new(&text), &csv).unwrap()),
        want
    );
    let e = read_ply_from(
        Cursor::new(&bytes[..bytes.len() - 1]),
        Path::new("in-memory.ply"),
    );
    err_text(e, Path::new("in-memory.ply"));
}

#[test]
fn float_properties_keep_f32_precision() {
    let dir = tempfile::tempdir().unwrap();
    let points = cloud();
    // Values that a float can hold (no 1e300 or denormal doubles).
    let points: Vec<_> = points
        .iter()
        .map(|q| {
            p(
                q.x_mm.clamp(-1e30, 1e30),
                q.y_mm.clamp(-1e30, 1e30),
                q.z_mm.max(1e-30),
                q.amplitude,
                q.phase_rad,
            )
        })
        .collect();
    for (name, big) in [("f32_le.ply", false), ("f32_be.ply", true)] {
        let format = if big {
            "binary_big_endian"
        } else {
            "binary_little_endian"
        };
        let mut bytes = format!(
            "ply\nformat {format} 1.0\nelement vertex {}\nproperty float x\nproperty float32 y\n\
             property float z\nproperty float amplitude\nend_header\n",
            points.len()
        )
        .into_bytes();
        for q in &points {
            for v in [q.x_mm, q.y_mm, q.z_mm, q.amplitude] {
                let f = v as f32;
                bytes.extend_from_slice(&if big {
                    f.to_be_bytes()
                } else {
                    f.to_le_bytes()
                });
            }
        }
        let path = put(dir.path(), name, bytes);
        let got = read_ply(&path).unwrap();
        let want: Vec<_> = points
            .iter()
            .map(|q| {
                let f = |v: f64| f64::from(v as f32);
                p(f(q.x_mm), f(q.y_mm), f(q.z_mm), f(q.amplitude), 0.0)
            })
            .collect();
        assert_eq!(bits(&got), bits(&want), "{name}");
        // f32 rounding really happened: 0.1 is not exactly representable.
        assert_ne!(got[0].x_mm, 0.1);
    }
}

/// Header of a file with a face element before the vertices, extra vertex properties, colours
/// and a trailing element after the vertices, in the given encoding.
fn rich_header(format: &str) -> String {
    format!(
        "ply\nformat {format} 1.0\ncomment made up for a test\nobj_info nothing real\n\
         element face 2\nproperty list uchar int vertex_indices\nproperty uchar flags\n\
         element vertex 3\nproperty float nx\nproperty double x\nproperty uint8 red\n\
         property short y\nproperty list ushort float extra\nproperty uchar green\n\
         property int32 z\nproperty double phase\nproperty float amplitude\nproperty uchar blue\n\
         element edge 1\nproperty int vertex1\nproperty int16 vertex2\nend_header\n"
    )
}

fn rich_expected() -> Vec<PointRecord> {
    vec![
        p(0.5, -3.0, 7.0, 0.25, 1.5),
        p(-1.25, 300.0, -2.0, 1.0, -0.5),
        p(2.0, 0.0, 0.0, 0.75, 0.0),
    ]
}

fn rich_ascii() -> String {
    rich_header("ascii")
        + "3 0 1 2 7\n4 0 1 2 0 255\n\
           0.1 0.5 255 -3 0 10 7 1.5 0.25 0\n\
           -0.7 -1.25 0 300 2 1.5 -2.5 20 -2 -0.5 1 128\n\
           \n\
           0 2 17 0 1 9.5 30 0 0 0.75 3\n\
           0 1\n"
}

/// nx, x, red, y, extra, green, z, phase, amplitude, blue.
type VertexRow = (f32, f64, u8, i16, &'static [f32], u8, i32, f64, f32, u8);

fn rich_binary(big: bool) -> Vec<u8> {
    let mut b = rich_header(if big {
        "binary_big_endian"
    } else {
        "binary_little_endian"
    })
    .into_bytes();
    macro_rules! put {
        ($v:expr) => {{
            let v = $v;
            b.extend_from_slice(&if big {
                v.to_be_bytes()
            } else {
                v.to_le_bytes()
            });
        }};
    }
    // faces: list uchar int, then uchar flags
    for face in [&[0i32, 1, 2][..], &[0, 1, 2, 0]] {
        b.push(face.len() as u8);
        for &i in face {
            put!(i);
        }
        b.push(7);
    }
    // vertices: nx f32, x f64, red u8, y i16, extra list(u16 count, f32 items), green u8,
    // z i32, phase f64, amplitude f32, blue u8
    let rows: [VertexRow; 3] = [
        (0.1, 0.5, 255, -3, &[], 10, 7, 1.5, 0.25, 0),
        (-0.7, -1.25, 0, 300, &[1.5, -2.5], 20, -2, -0.5, 1.0, 128),
        (0.0, 2.0, 17, 0, &[9.5], 30, 0, 0.0, 0.75, 3),
    ];
    for (nx, x, red, y, extra, green, z, phase, amp, blue) in rows {
        put!(nx);
        put!(x);
        b.push(red);
        put!(y);
        put!(extra.len() as u16);
        for &e in extra {
            put!(e);
        }
        b.push(green);
        put!(z);
        put!(phase);
        put!(amp);
        b.push(blue);
    }
    // edge: int, int16
    put!(0i32);
    put!(1i16);
    b
}

#[test]
fn other_elements_and_properties_are_skipped() {
    let dir = tempfile::tempdir().unwrap();
    let want = rich_expected();
    let ascii = put(dir.path(), "rich_ascii.ply", rich_ascii());
    assert_eq!(read_ply(&ascii).unwrap(), want);
    let le = put(dir.path(), "rich_le.ply", rich_binary(false));
    assert_eq!(read_ply(&le).unwrap(), want);
    let be = put(dir.path(), "rich_be.PLY", rich_binary(true));
    assert_eq!(read_points(&be).unwrap(), want);
    // Windows line ends in an ASCII file.
    let crlf = put(
        dir.path(),
        "rich_crlf.ply",
        rich_ascii().replace('\n', "\r\n"),
    );
    assert_eq!(read_ply(&crlf).unwrap(), want);
}

#[test]
fn extension_dispatch() {
    let dir = tempfile::tempdir().unwrap();
    let csv = put(dir.path(), "UPPER.CSV", "x_mm,y_mm,z_mm\n1,2,3\n");
    assert_eq!(
        read_points(&csv).unwrap(),
        vec![PointRecord::new(1.0, 2.0, 3.0)]
    );
    let xyz = put(dir.path(), "cloud.xyz", "1 2 3\n");
    let e = read_points(&xyz);
    assert!(matches!(e, Err(Error::Unsupported { .. })), "{e:?}");
    assert_contains(&err_text(e, &xyz), &[".xyz"]);
    let bare = put(dir.path(), "cloud", "x_mm,y_mm,z_mm\n1,2,3\n");
    let e = read_points(&bare);
    assert!(matches!(e, Err(Error::Unsupported { .. })), "{e:?}");
    let missing = dir.path().join("missing.ply");
    let e = read_points(&missing);
    assert!(matches!(e, Err(Error::Io { .. })), "{e:?}");
}

#[test]
fn csv_defaults_and_comments() {
    let dir = tempfile::tempdir().unwrap();
    let path = put(
        dir.path(),
        "plain.csv",
        "\u{feff}# a comment\n\n   # indented comment\nz_mm, y_mm ,x_mm\n3,2,1\n  \n-6e-1,+5,4.25",
    );
    assert_eq!(
        read_csv(&path).unwrap(),
        vec![
            PointRecord::new(1.0, 2.0, 3.0),
            PointRecord::new(4.25, 5.0, -0.6)
        ]
    );
    // z <= 0 is for the job to judge after placement, not for the reader.
    let path = put(
        dir.path(),
        "behind.csv",
        "x_mm,y_mm,z_mm,amplitude\n0,0,-5,0\n",
    );
    assert_eq!(read_csv(&path).unwrap(), vec![p(0.0, 0.0, -5.0, 0.0, 0.0)]);
}

#[test]
fn non_finite_values_are_rejected_with_their_place() {
    let dir = tempfile::tempdir().unwrap();
    let header = "ply\nformat ascii 1.0\nelement vertex 2\nproperty float x\nproperty float y\n\
                  property float z\nproperty float amplitude\nproperty float phase\nend_header\n";
    let cases = [
        (
            "nan_x.ply",
            "1 2 3 1 0\nnan 2 3 1 0\n",
            &["line 11", "vertex index 1", "x is NaN"][..],
        ),
        (
            "inf_z.ply",
            "1 2 inf 1 0\n1 2 3 1 0\n",
            &["line 10", "vertex index 0", "z is infinite"],
        ),
        (
            "inf_phase.ply",
            "1 2 3 1 0\n1 2 3 1 -infinity\n",
            &["line 11", "phase is infinite"],
        ),
        (
            "nan_amp.ply",
            "1 2 3 NaN 0\n1 2 3 1 0\n",
            &["line 10", "amplitude is NaN"],
        ),
        (
            "neg_amp.ply",
            "1 2 3 1 0\n1 2 3 -0.5 0\n",
            &["line 11", "amplitude is negative"],
        ),
    ];
    for (name, body, parts) in cases {
        let path = put(dir.path(), name, format!("{header}{body}"));
        assert_contains(&err_text(read_ply(&path), &path), parts);
    }

    let csv_cases = [
        (
            "nan.csv",
            "x_mm,y_mm,z_mm\n1,2,3\n1,NaN,3\n",
            &["line 3", "y_mm is NaN"][..],
        ),
        (
            "inf.csv",
            "# c\nz_mm,x_mm,y_mm\n\ninf,2,3\n",
            &["line 4", "z_mm is infinite"],
        ),
        (
            "neg.csv",
            "x_mm,y_mm,z_mm,amplitude\n1,2,3,-1\n",
            &["line 2", "amplitude is negative"],
        ),
        (
            "phase.csv",
            "x_mm,y_mm,z_mm,phase_rad\n1,2,3,-inf\n",
            &["line 2", "phase_rad is infinite"],
        ),
    ];
    for (name, text, parts) in csv_cases {
        let path = put(dir.path(), name, text);
        assert_contains(&err_text(read_points(&path), &path), parts);
    }

    // Binary: the element index and byte offset of the row.
    let mut points = cloud();
    points[3].y_mm = f64::NAN;
    let path = dir.path().join("nan_le.ply");
    write_ply(&path, &points, true).unwrap();
    let header_len = std::fs::read(&path).unwrap().len() - 5 * 8 * points.len();
    let offset = header_len + 3 * 5 * 8;
    assert_contains(
        &err_text(read_ply(&path), &path),
        &[
            "vertex index 3",
            &format!("byte offset {offset}"),
            "y is NaN",
        ],
    );
    points[3].y_mm = 0.0;
    points[4].amplitude = f64::NEG_INFINITY;
    let path = put(dir.path(), "inf_be.ply", big_endian_ply(&points));
    assert_contains(
        &err_text(read_ply(&path), &path),
        &["vertex index 4", "amplitude is infinite"],
    );
}

#[test]
fn malformed_csv() {
    let dir = tempfile::tempdir().unwrap();
    let cases: [(&str, &str, &[&str]); 10] = [
        (
            "nocol.csv",
            "# c\nx_mm,y_mm\n1,2\n",
            &["line 2", "no 'z_mm' column"],
        ),
        (
            "unknown.csv",
            "x_mm,y_mm,z_mm,colour\n1,2,3,4\n",
            &["line 1", "unknown column 'colour'"],
        ),
        (
            "noheader.csv",
            "1,2,3\n",
            &["line 1", "unknown column '1'", "header"],
        ),
        (
            "dup.csv",
            "x_mm,y_mm,z_mm,x_mm\n",
            &["line 1", "'x_mm' appears twice"],
        ),
        (
            "emptyname.csv",
            "x_mm,,y_mm,z_mm\n",
            &["line 1", "column 2 has no name"],
        ),
        (
            "fields.csv",
            "x_mm,y_mm,z_mm\n1,2,3\n\n1,2\n",
            &["line 4", "2 fields", "3 columns"],
        ),
        (
            "extra.csv",
            "x_mm,y_mm,z_mm\n1,2,3,4\n",
            &["line 2", "4 fields"],
        ),
        (
            "text.csv",
            "x_mm,y_mm,z_mm\n1,2,3\n1,two,3\n",
            &["line 3", "y_mm", "'two' is not a number"],
        ),
        (
            "blankfield.csv",
            "x_mm,y_mm,z_mm\n1, ,3\n",
            &["line 2", "y_mm", "empty"],
        ),
        (
            "utf.csv",
            "x_mm,y_mm,z_mm\n1,2,3\n1,2,\u{3}\u{ff}\n",
            &["line 3", "z_mm"],
        ),
    ];
    for (name, text, parts) in cases {
        let path = put(dir.path(), name, text);
        assert_contains(&err_text(read_csv(&path), &path), parts);
    }
    let path = put(dir.path(), "cr.csv", "x_mm,y_mm,z_mm\n1,2,3\r4\n");
    assert_contains(&err_text(read_csv(&path), &path), &["line 2", "'3\\r4'"]);
    let bin = put(dir.path(), "binary.csv", b"x_mm,y_mm,z_mm\n1,2,\xff\n");
    assert_contains(&err_text(read_csv(&bin), &bin), &["line 2", "UTF-8"]);
    for (name, text) in [
        ("empty.csv", ""),
        ("onlyheader.csv", "# nothing\nx_mm,y_mm,z_mm\n\n"),
    ] {
        let path = put(dir.path(), name, text);
        let msg = err_text(read_csv(&path), &path);
        assert!(
            msg.contains("no points") || msg.contains("no header"),
            "{msg}"
        );
    }
    let path = put(dir.path(), "onlyheader2.csv", "x_mm,y_mm,z_mm\n");
    assert_contains(&err_text(read_csv(&path), &path), &["no points"]);
}

/// Reads the file `text` saved as `name`; it must fail with a message holding `parts`.
fn expect_ply_error(dir: &Path, name: &str, text: &str, parts: &[&str]) {
    let path = put(dir, name, text);
    assert_contains(&err_text(read_ply(&path), &path), parts);
}

const XYZ: &str = "property float x\nproperty float y\nproperty float z\n";

/// An ASCII PLY header up to and including the x, y, z properties of `rows` vertices (6 lines),
/// followed by `rest`.
fn ascii_xyz(rows: &str, rest: &str) -> String {
    format!("ply\nformat ascii 1.0\nelement vertex {rows}\n{XYZ}{rest}")
}

#[test]
fn malformed_ply() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    // Header errors.
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\nproperty float y\n\
                end_header\n1 2\n";
    expect_ply_error(d, "noz.ply", text, &["line 3", "no property 'z'"]);
    let text = "ply\nformat ascii 1.0\nelement point 1\nproperty float x\nend_header\n1\n";
    expect_ply_error(d, "novertex.ply", text, &["no 'vertex' element"]);
    expect_ply_error(
        d,
        "notply.ply",
        "PLY\nformat ascii 1.0\n",
        &["line 1", "not a PLY file"],
    );
    let text = format!("ply\nelement vertex 1\n{XYZ}end_header\n1 2 3\n");
    expect_ply_error(d, "noformat.ply", &text, &["no 'format' line"]);
    let text = format!("ply\nformat binary 1.0\nelement vertex 1\n{XYZ}end_header\n");
    expect_ply_error(
        d,
        "badformat.ply",
        &text,
        &["line 2", "unknown encoding 'binary'"],
    );
    let text = format!("ply\nformat ascii 2.0\nelement vertex 1\n{XYZ}end_header\n");
    expect_ply_error(d, "version.ply", &text, &["line 2", "version"]);
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty float x\nproperty int64 y\n";
    expect_ply_error(
        d,
        "type.ply",
        text,
        &["line 5", "unknown property type 'int64'"],
    );
    let text = ascii_xyz("1", "propertee float w\nend_header\n");
    expect_ply_error(
        d,
        "keyword.ply",
        &text,
        &["line 7", "unknown keyword 'propertee'"],
    );
    let text = "ply\nformat ascii 1.0\nproperty float x\n";
    expect_ply_error(d, "orphan.ply", text, &["line 3", "before any 'element'"]);
    let text = ascii_xyz("1", "1 2 3\n");
    expect_ply_error(d, "noend.ply", &text, &["line 7", "unknown keyword '1'"]);
    expect_ply_error(
        d,
        "noend2.ply",
        &ascii_xyz("1", ""),
        &["no 'end_header'", "line 6"],
    );
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty list uchar float x\n\
                property float y\nproperty float z\nend_header\n";
    expect_ply_error(d, "listxyz.ply", text, &["line 4", "'x' must be a scalar"]);
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty list float int idx\n";
    expect_ply_error(
        d,
        "floatcount.ply",
        text,
        &["line 4", "not an integer type"],
    );
    let text = ascii_xyz("1", "property double x\nend_header\n");
    expect_ply_error(d, "dupprop.ply", &text, &["line 7", "'x'", "twice"]);
    let text = ascii_xyz("-3", "end_header\n");
    expect_ply_error(d, "count.ply", &text, &["line 3", "'-3'"]);
    let text = ascii_xyz("0", "end_header\n");
    expect_ply_error(d, "zero.ply", &text, &["no points"]);
    let text = ascii_xyz("1", "element ghost 1000000000000\nend_header\n1 2 3\n");
    expect_ply_error(
        d,
        "noprops.ply",
        &text,
        &["line 7", "'ghost'", "no properties"],
    );

    // ASCII body errors; the body starts on line 8.
    let text = ascii_xyz("2", "end_header\n1 2 3\n4 five 6\n");
    expect_ply_error(
        d,
        "word.ply",
        &text,
        &["line 9", "vertex index 1", "'five'"],
    );
    let text = ascii_xyz("2", "end_header\n1.0 2.0 3.0\n4 5\n");
    expect_ply_error(d, "short.ply", &text, &["line 9", "too few values", "'z'"]);
    let text = ascii_xyz("1", "end_header\n1 2 3 4\n");
    expect_ply_error(d, "long.ply", &text, &["line 8", "more values"]);
    let text = ascii_xyz("3", "end_header\n1.0 2.0 3.0\n4.0 5.0 6.0\n\n");
    expect_ply_error(d, "fewrows.ply", &text, &["line 9", "2 of 3"]);
    let text = ascii_xyz("1", "end_header\n1 2 3\n4 5 6\n");
    expect_ply_error(
        d,
        "morerows.ply",
        &text,
        &["line 9", "after the last element"],
    );
    let text = ascii_xyz("1", "end_header\n1 2 3");
    expect_ply_error(d, "nolf.ply", &text, &["line 8", "final line break"]);
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty uchar x\nproperty uchar y\n\
                property uchar z\nend_header\n1 2 256\n";
    expect_ply_error(
        d,
        "uchar.ply",
        text,
        &["line 8", "'256' is not a valid uchar"],
    );
    let text = ascii_xyz(
        "1",
        "element face 1\nproperty list uchar int i\nend_header\n1 2 3\n4294967295 1 2\n",
    );
    let parts = [
        "line 11",
        "face index 0",
        "'4294967295' is not a non-negative uchar",
    ];
    expect_ply_error(d, "listlen.ply", &text, &parts);
    let text = ascii_xyz(
        "1",
        "element face 1\nproperty list uint int i\nend_header\n1 2 3\n4294967295 1 2\n",
    );
    let parts = ["line 11", "face index 0", "too few values", "item 2"];
    expect_ply_error(d, "listitems.ply", &text, &parts);

    // Text copied from the file is escaped and shortened.
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty float\x0bx\n";
    expect_ply_error(d, "ctrl.ply", text, &["line 4", "'property float\\u{b}x'"]);
    let text = ascii_xyz("1", &format!("end_header\n1 2 {}\n", "q".repeat(5000)));
    let path = put(d, "longtoken.ply", text);
    let msg = err_text(read_ply(&path), &path);
    assert_contains(&msg, &["line 8", "property 'z'", "..."]);
    assert!(msg.len() < 300, "{msg}");
    // A file cut inside its header.
    let text = "ply\nformat ascii 1.0\nelement vertex 1\nproperty flo";
    expect_ply_error(
        d,
        "cuthead.ply",
        text,
        &["line 4", "ends inside the header"],
    );

    // Binary body errors.
    let text = format!(
        "ply\nformat binary_little_endian 1.0\nelement vertex 1\n{XYZ}end_header\n{}\n",
        "\0".repeat(12)
    );
    expect_ply_error(
        d,
        "tail.ply",
        &text,
        &["1 unexpected byte(s)", "byte offset"],
    );
    // A binary list with a negative length.
    let mut b = format!(
        "ply\nformat binary_little_endian 1.0\nelement face 1\nproperty list char int i\n\
         element vertex 1\n{XYZ}end_header\n"
    )
    .into_bytes();
    let body_start = b.len();
    b.push(0xff);
    b.extend_from_slice(&[0; 12]);
    let path = put(dir.path(), "neglist.ply", b);
    assert_contains(
        &err_text(read_ply(&path), &path),
        &[
            "face index 0",
            &format!("byte offset {body_start}"),
            "negative length -1",
        ],
    );
}

#[test]
fn absurd_counts_are_rejected_before_allocating() {
    let dir = tempfile::tempdir().unwrap();
    let xyz = "property double x\nproperty double y\nproperty double z\n";
    let filler = "0 0 0\n".repeat(150); // about 1 KiB of body
    for (format, n) in [
        ("ascii", "1000000000000"),
        ("binary_little_endian", "1000000000000"),
        ("binary_big_endian", "18446744073709551615"),
    ] {
        let name = format!("huge_{format}.ply");
        let path = put(
            dir.path(),
            &name,
            format!("ply\nformat {format} 1.0\nelement vertex {n}\n{xyz}end_header\n{filler}"),
        );
        let started = std::time::Instant::now();
        let msg = err_text(read_ply(&path), &path);
        assert_contains(&msg, &["line 3", "'vertex'", n, "bytes"]);
        assert!(
            started.elapsed().as_secs() < 5,
            "took {:?}",
            started.elapsed()
        );
    }
    // A huge element of another kind, after a plausible vertex element.
    let path = put(
        dir.path(),
        "huge_face.ply",
        format!(
            "ply\nformat binary_little_endian 1.0\nelement vertex 1\n{xyz}\
             element face 4000000000\nproperty list uchar int i\nend_header\n{}",
            "\0".repeat(24)
        ),
    );
    assert_contains(
        &err_text(read_ply(&path), &path),
        &["line 7", "'face'", "4000000000"],
    );
    // A count beyond u64.
    let path = put(
        dir.path(),
        "overflow.ply",
        format!("ply\nformat ascii 1.0\nelement vertex 99999999999999999999999\n{xyz}end_header\n"),
    );
    assert_contains(
        &err_text(read_ply(&path), &path),
        &["line 3", "not a non-negative integer"],
    );
}

/// Cuts `bytes` at every length; each prefix must give an error naming the file, or (only for
/// the full file) the original points.
fn check_every_cut(dir: &Path, name: &str, bytes: &[u8], want: &[PointRecord]) {
    let path = dir.join(name);
    for len in 0..=bytes.len() {
        std::fs::write(&path, &bytes[..len]).unwrap();
        match read_ply(&path) {
            Ok(points) => {
                assert_eq!(
                    len,
                    bytes.len(),
                    "{name} cut at {len} bytes parsed as {points:?}"
                );
                assert_eq!(points, want);
            }
            Err(e) => {
                assert_ne!(len, bytes.len(), "{name}: the whole file fails: {e}");
                let text = e.to_string();
                assert!(text.contains(name), "{text}");
                // Past the header, the message says where.
                if len
                    > bytes
                        .windows(11)
                        .position(|w| w == b"end_header\n")
                        .unwrap()
                        + 11
                {
                    assert!(
                        text.contains("line") || text.contains("byte"),
                        "cut at {len}: {text}"
                    );
                }
            }
        }
    }
}

#[test]
fn truncation_at_every_length_is_an_error() {
    let dir = tempfile::tempdir().unwrap();
    let want = rich_expected();
    check_every_cut(dir.path(), "cut_le.ply", &rich_binary(false), &want);
    check_every_cut(dir.path(), "cut_be.ply", &rich_binary(true), &want);
    check_every_cut(dir.path(), "cut_ascii.ply", rich_ascii().as_bytes(), &want);
    let doubles = dir.path().join("doubles.ply");
    write_ply(&doubles, &cloud(), true).unwrap();
    check_every_cut(
        dir.path(),
        "cut_doubles.ply",
        &std::fs::read(&doubles).unwrap(),
        &cloud(),
    );

    // One cut checked in detail: inside the z of vertex 1 of the double file.
    let bytes = std::fs::read(&doubles).unwrap();
    let header_len = bytes.len() - 5 * 8 * cloud().len();
    let cut = header_len + 40 + 20;
    let path = put(dir.path(), "cut_once.ply", &bytes[..cut]);
    // The size check catches it first: the header promises more rows than fit.
    assert_contains(
        &err_text(read_ply(&path), &path),
        &[
            "line 4",
            "'vertex'",
            &format!("only {} bytes", cut - header_len),
        ],
    );
    // With lists the size check cannot know the real length: the row reader reports the cut.
    let rich = rich_binary(false);
    let path = put(dir.path(), "cut_rich.ply", &rich[..rich.len() - 1]);
    assert_contains(
        &err_text(read_ply(&path), &path),
        &["edge index 0", "inside property 'vertex2'"],
    );
}

#[test]
fn flipped_header_bytes_never_panic() {
    let dir = tempfile::tempdir().unwrap();
    let original = rich_binary(false);
    let header_len = original
        .windows(11)
        .position(|w| w == b"end_header\n")
        .unwrap()
        + 11;
    let want = rich_expected();
    let path = dir.path().join("flipped.ply");
    let (mut ok, mut failed) = (0, 0);
    for i in 0..header_len {
        for mask in [0x01u8, 0x20, 0x80] {
            let mut bytes = original.clone();
            bytes[i] ^= mask;
            std::fs::write(&path, &bytes).unwrap();
            match read_ply(&path) {
                // Only flips in comments or in names of skipped properties can leave the
                // points intact; a renamed amplitude or phase falls back to its default.
                Ok(points) => {
                    ok += 1;
                    assert_eq!(points.len(), want.len(), "flip {mask:#x} at {i}");
                    for (a, b) in points.iter().zip(&want) {
                        assert_eq!(
                            (a.x_mm, a.y_mm, a.z_mm),
                            (b.x_mm, b.y_mm, b.z_mm),
                            "flip {mask:#x} at {i}"
                        );
                    }
                }
                Err(e) => {
                    failed += 1;
                    assert!(e.to_string().contains("flipped.ply"), "{e}");
                }
            }
        }
    }
    // Comments are not decoded, so flips there parse; flips in keywords, types or x/y/z do not.
    assert!(ok > 0 && failed > ok, "{ok} flips parsed, {failed} failed");

    // Specific flips and the line they are reported on.
    let cases: [(&[u8], &[u8], &[&str]); 5] = [
        (
            b"format binary_little",
            b"format binary_littlg",
            &["line 2", "unknown encoding"],
        ),
        (
            b"property double x\n",
            b"property dOuble x\n",
            &["line 10", "unknown property type 'dOuble'"],
        ),
        (
            b"element vertex 3",
            b"element vertex #",
            &["line 8", "count '#'"],
        ),
        (
            b"property short y",
            b"property short\x00y",
            &["line 12", "expected 'property <type> <name>'"],
        ),
        (
            b"end_header",
            b"end_headeR",
            &["line 22", "unknown keyword 'end_headeR'"],
        ),
    ];
    for (from, to, parts) in cases {
        let at = original
            .windows(from.len())
            .position(|w| w == from)
            .unwrap();
        let mut bytes = original.clone();
        bytes[at..at + to.len()].copy_from_slice(to);
        std::fs::write(&path, &bytes).unwrap();
        assert_contains(&err_text(read_ply(&path), &path), parts);
    }
    // Bytes of a flipped vertex count pointing past the body.
    let text = rich_header("ascii").replace("element vertex 3", "element vertex 9");
    let path = put(dir.path(), "count9.ply", text + "3 0 1 2 7\n");
    assert_contains(
        &err_text(read_ply(&path), &path),
        &["line 8", "'vertex'", "9 rows"],
    );
}

#[test]
fn sample_files_agree() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("samples");
    let ply = read_points(&root.join("badge_points.ply")).unwrap();
    let csv = read_points(&root.join("badge_points.csv")).unwrap();
    assert_eq!(ply, csv);
    assert!((300..=600).contains(&ply.len()), "{}", ply.len());
    for q in &ply {
        assert!(q.x_mm.abs() <= 2.0 && q.y_mm.abs() <= 2.0, "{q:?}");
        assert!((0.0..=4.0).contains(&q.z_mm), "{q:?}");
        assert!((0.5..=1.0).contains(&q.amplitude), "{q:?}");
        assert!(
            (0.0..=std::f64::consts::TAU).contains(&q.phase_rad),
            "{q:?}"
        );
    }
    // The points spread over depth, so parallax shows.
    let (lo, hi) = ply.iter().fold((f64::MAX, f64::MIN), |(lo, hi), q| {
        (lo.min(q.z_mm), hi.max(q.z_mm))
    });
    assert!(hi - lo > 3.0, "depth range {lo}..{hi}");
}
