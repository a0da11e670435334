//! Round trips of the streaming strip TIFF writer through the `tiff` crate's decoder, plus
//! the file's lifetime (partial file, checkpoints, resume, errors).

use std::fs::{self, File};
use std::io::Write;
use std::path::{Path, PathBuf};

use fringemill::output::tiff::{
    partial_path, Compression, FinishedTiff, StripWriter, TiffLayout, WriterState,
};
use fringemill::Error;
use sha2::{Digest, Sha256};
use tiff::decoder::{ifd::Value, Decoder, DecodingResult};
use tiff::tags::Tag;
use tiff::ColorType;

fn layout(
    width: u32,
    height: u32,
    bits: u8,
    compression: Compression,
    rows_per_strip: u32,
    bigtiff: Option<bool>,
) -> TiffLayout {
    TiffLayout {
        width,
        height,
        bits_per_sample: bits,
        compression,
        rows_per_strip,
        pixel_pitch_m: (1e-6, 0.8e-6),
        software: "fringemill test".into(),
        description: Some("round trip".into()),
        bigtiff,
    }
}

/// Deterministic pseudo-random image in file layout (1-bit rows have zero padding bits).
fn image_bytes(layout: &TiffLayout, seed: u64) -> Vec<u8> {
    let row = layout.row_bytes() as usize;
    let mut state = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15) | 1;
    let mut data = Vec::with_capacity(row * layout.height as usize);
    for _ in 0..layout.height {
        for _ in 0..row {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            data.push((state >> 24) as u8);
        }
        if layout.bits_per_sample == 1 && !layout.width.is_multiple_of(8) {
            let keep = layout.width % 8;
            let last = data.len() - 1;
            data[last] &= 0xFFu8 << (8 - keep);
        }
    }
    data
}

/// Writes `data` in chunks of 1, 2, 5, 3, 7... rows, deliberately unrelated to the strips.
fn write_in_chunks(writer: &mut StripWriter, data: &[u8], row_bytes: usize) {
    let pattern = [1usize, 2, 5, 3, 7];
    let mut at = 0;
    let mut i = 0;
    while at < data.len() {
        let rows = pattern[i % pattern.len()];
        let end = (at + rows * row_bytes).min(data.len());
        writer.write_rows(&data[at..end]).unwrap();
        at = end;
        i += 1;
    }
}

fn write_file(path: &Path, layout: &TiffLayout, data: &[u8]) -> FinishedTiff {
    let mut writer = StripWriter::create(path, layout.clone()).unwrap();
    write_in_chunks(&mut writer, data, layout.row_bytes() as usize);
    assert_eq!(writer.rows_written(), layout.height);
    writer.finish().unwrap()
}

fn sha256_hex(path: &Path) -> String {
    let digest = Sha256::digest(fs::read(path).unwrap());
    digest.iter().map(|b| format!("{b:02x}")).collect()
}

/// Minimal independent IFD reader: (bigtiff, ifd offset, [(tag, type, count)]).
fn raw_ifd(bytes: &[u8]) -> (bool, u64, Vec<(u16, u16, u64)>) {
    let u16_at = |at: usize| u16::from_le_bytes(bytes[at..at + 2].try_into().unwrap());
    let u32_at = |at: usize| u32::from_le_bytes(bytes[at..at + 4].try_into().unwrap());
    let u64_at = |at: usize| u64::from_le_bytes(bytes[at..at + 8].try_into().unwrap());
    assert_eq!(&bytes[..2], b"II");
    let mut entries = Vec::new();
    match u16_at(2) {
        42 => {
            let ifd = u32_at(4) as usize;
            let n = u16_at(ifd) as usize;
            for i in 0..n {
                let e = ifd + 2 + 12 * i;
                entries.push((u16_at(e), u16_at(e + 2), u64::from(u32_at(e + 4))));
            }
            assert_eq!(u32_at(ifd + 2 + 12 * n), 0, "single IFD");
            (false, ifd as u64, entries)
        }
        43 => {
            assert_eq!(u16_at(4), 8);
            assert_eq!(u16_at(6), 0);
            let ifd = u64_at(8) as usize;
            let n = u64_at(ifd) as usize;
            for i in 0..n {
                let e = ifd + 8 + 20 * i;
                entries.push((u16_at(e), u16_at(e + 2), u64_at(e + 4)));
            }
            assert_eq!(u64_at(ifd + 8 + 20 * n), 0, "single IFD");
            (true, ifd as u64, entries)
        }
        other => panic!("TIFF version {other}"),
    }
}

fn unsigned(value: Value) -> u64 {
    match value {
        Value::Byte(v) => v.into(),
        Value::Short(v) => v.into(),
        Value::Unsigned(v) => v.into(),
        Value::UnsignedBig(v) => v,
        other => panic!("not an unsigned scalar: {other:?}"),
    }
}

/// Decodes the file with the `tiff` crate and checks pixels, dimensions and every tag.
fn check_decoded(path: &Path, layout: &TiffLayout, data: &[u8], finished: &FinishedTiff) {
    let rps = layout.rows_per_strip.min(layout.height);
    let strips = layout.height.div_ceil(rps);
    assert_eq!(finished.strips, strips);
    assert_eq!(finished.path, path);
    assert_eq!(finished.bytes, fs::metadata(path).unwrap().len());
    assert_eq!(finished.sha256, sha256_hex(path));
    assert_eq!(finished.bigtiff, layout.uses_bigtiff());
    assert!(!partial_path(path).exists());

    // Structure, read independently of the decoder: tags ascending, types, IFD at the end.
    let bytes = fs::read(path).unwrap();
    let (bigtiff, ifd_offset, entries) = raw_ifd(&bytes);
    assert_eq!(bigtiff, finished.bigtiff);
    assert_eq!(ifd_offset % 2, 0);
    let tags: Vec<u16> = entries.iter().map(|e| e.0).collect();
    let mut expected_tags = vec![256, 257, 258, 259, 262];
    if layout.description.is_some() {
        expected_tags.push(270);
    }
    expected_tags.extend([273, 277, 278, 279, 282, 283, 284, 296, 305, 339]);
    assert_eq!(tags, expected_tags);
    let offset_type = if bigtiff { 16 } else { 4 };
    for &(tag, typ, count) in &entries {
        match tag {
            273 | 279 => assert_eq!((typ, count), (offset_type, u64::from(strips))),
            282 | 283 => assert_eq!((typ, count), (5, 1)),
            256 | 257 | 278 => assert_eq!((typ, count), (4, 1)),
            270 | 305 => assert_eq!(typ, 2),
            _ => assert_eq!((typ, count), (3, 1)),
        }
    }

    let mut decoder = Decoder::new(File::open(path).unwrap()).unwrap();
    assert_eq!(decoder.dimensions().unwrap(), (layout.width, layout.height));
    assert_eq!(
        decoder.colortype().unwrap(),
        ColorType::Gray(layout.bits_per_sample)
    );
    let tag = |d: &mut Decoder<File>, t: Tag| unsigned(d.get_tag(t).unwrap());
    assert_eq!(
        tag(&mut decoder, Tag::BitsPerSample),
        u64::from(layout.bits_per_sample)
    );
    let compression = match layout.compression {
        Compression::None => 1,
        Compression::Deflate => 8,
    };
    assert_eq!(tag(&mut decoder, Tag::Compression), compression);
    assert_eq!(tag(&mut decoder, Tag::PhotometricInterpretation), 1);
    assert_eq!(tag(&mut decoder, Tag::SamplesPerPixel), 1);
    assert_eq!(tag(&mut decoder, Tag::RowsPerStrip), u64::from(rps));
    assert_eq!(tag(&mut decoder, Tag::PlanarConfiguration), 1);
    assert_eq!(tag(&mut decoder, Tag::ResolutionUnit), 3);
    assert_eq!(tag(&mut decoder, Tag::SampleFormat), 1);
    let (x, y) = layout.pixel_pitch_m;
    let expect_x = TiffLayout::resolution_px_per_cm(x).unwrap();
    let expect_y = TiffLayout::resolution_px_per_cm(y).unwrap();
    assert_eq!(
        decoder.get_tag(Tag::XResolution).unwrap(),
        Value::Rational(expect_x.0, expect_x.1)
    );
    assert_eq!(
        decoder.get_tag(Tag::YResolution).unwrap(),
        Value::Rational(expect_y.0, expect_y.1)
    );
    assert_eq!(
        decoder.get_tag_ascii_string(Tag::Software).unwrap(),
        layout.software
    );
    match &layout.description {
        Some(d) => assert_eq!(
            &decoder.get_tag_ascii_string(Tag::ImageDescription).unwrap(),
            d
        ),
        None => assert!(decoder.find_tag(Tag::ImageDescription).unwrap().is_none()),
    }
    let offsets = decoder.get_tag_u64_vec(Tag::StripOffsets).unwrap();
    let counts = decoder.get_tag_u64_vec(Tag::StripByteCounts).unwrap();
    assert_eq!(offsets.len(), strips as usize);
    assert_eq!(counts.len(), strips as usize);
    // Strips follow the header back to back; the IFD comes after the last one.
    let mut end = if bigtiff { 16 } else { 8 };
    for (o, c) in offsets.iter().zip(&counts) {
        assert_eq!(*o, end);
        end = o + c;
    }
    assert!(ifd_offset >= end && ifd_offset <= end + 1);
    if layout.compression == Compression::None {
        let row = layout.row_bytes();
        for (i, c) in counts.iter().enumerate() {
            let rows = (layout.height - i as u32 * rps).min(rps);
            assert_eq!(*c, u64::from(rows) * row);
        }
    }

    // Pixels. The tiff crate returns 1-bit images packed as stored (MSB first, rows padded
    // to whole bytes), i.e. exactly the file layout; 16-bit as native u16.
    match decoder.read_image().unwrap() {
        DecodingResult::U8(pixels) => {
            assert!(layout.bits_per_sample == 1 || layout.bits_per_sample == 8);
            assert_eq!(pixels.len(), data.len());
            assert!(pixels == data, "decoded pixels differ");
        }
        DecodingResult::U16(pixels) => {
            assert_eq!(layout.bits_per_sample, 16);
            let expected: Vec<u16> = data
                .chunks_exact(2)
                .map(|b| u16::from_le_bytes([b[0], b[1]]))
                .collect();
            assert!(pixels == expected, "decoded pixels differ");
        }
        _ => panic!("unexpected sample type"),
    }
}

#[test]
fn round_trip_all_depths_compressions_and_formats() {
    let dir = tempfile::tempdir().unwrap();
    // (width, height, bits, rows per strip): odd widths, heights not a multiple of the strip.
    let shapes = [
        (13, 29, 1, 4),
        (8, 5, 1, 2),
        (1, 3, 1, 100),
        (37, 23, 8, 4),
        (5, 1, 8, 1),
        (19, 17, 16, 3),
        (2, 9, 16, 9),
    ];
    let mut n = 0;
    for &(width, height, bits, rps) in &shapes {
        for compression in [Compression::None, Compression::Deflate] {
            for bigtiff in [None, Some(false), Some(true)] {
                for description in [true, false] {
                    let mut layout = layout(width, height, bits, compression, rps, bigtiff);
                    if !description {
                        layout.description = None;
                    }
                    assert!(!layout.needs_bigtiff());
                    let data = image_bytes(&layout, n);
                    let path = dir.path().join(format!("plate-{n}.tif"));
                    let finished = write_file(&path, &layout, &data);
                    assert_eq!(finished.bigtiff, bigtiff == Some(true));
                    check_decoded(&path, &layout, &data, &finished);
                    let bound = layout.max_file_len(finished.bigtiff);
                    if compression == Compression::None {
                        assert_eq!(finished.bytes, bound, "exact size for {layout:?}");
                    } else {
                        assert!(finished.bytes <= bound);
                    }
                    n += 1;
                }
            }
        }
    }
}

#[test]
fn one_bit_bits_are_msb_first_and_white_is_one() {
    // A 10-pixel row with only the leftmost and the rightmost pixel set.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bits.tif");
    let layout = layout(10, 2, 1, Compression::None, 1, None);
    let data = [0b1000_0000, 0b0100_0000, 0, 0];
    let finished = write_file(&path, &layout, &data);
    check_decoded(&path, &layout, &data, &finished);
    let bytes = fs::read(&path).unwrap();
    assert_eq!(&bytes[8..12], &data);
}

#[test]
fn larger_deflate_strips_and_incompressible_data_stay_within_the_bound() {
    let dir = tempfile::tempdir().unwrap();
    for bits in [1u8, 8, 16] {
        let mut layout = layout(1001, 300, bits, Compression::Deflate, 0, None);
        layout.rows_per_strip = TiffLayout::default_rows_per_strip(1001, bits);
        let data = image_bytes(&layout, u64::from(bits));
        let path = dir.path().join(format!("noise-{bits}.tif"));
        let finished = write_file(&path, &layout, &data);
        check_decoded(&path, &layout, &data, &finished);
        assert!(finished.bytes <= layout.max_file_len(false));
        assert!(finished.bytes <= layout.estimated_file_bytes());

        // Smooth data compresses.
        let smooth: Vec<u8> = (0..data.len()).map(|i| (i / 4096) as u8).collect();
        let path = dir.path().join(format!("smooth-{bits}.tif"));
        let finished = write_file(&path, &layout, &smooth);
        check_decoded(&path, &layout, &smooth, &finished);
        assert!(finished.bytes < smooth.len() as u64 / 10);
    }
}

#[test]
fn default_rows_per_strip_aims_at_256_kib() {
    assert_eq!(TiffLayout::default_rows_per_strip(1024, 8), 256);
    assert_eq!(TiffLayout::default_rows_per_strip(1024, 16), 128);
    assert_eq!(TiffLayout::default_rows_per_strip(8192, 1), 256);
    assert_eq!(TiffLayout::default_rows_per_strip(13, 1), 131072);
    assert_eq!(TiffLayout::default_rows_per_strip(1_000_000, 16), 1);
}

#[test]
fn automatic_bigtiff_decision() {
    let huge = layout(70_000, 70_000, 8, Compression::None, 3, None);
    assert!(huge.needs_bigtiff());
    assert!(huge.uses_bigtiff());
    assert!(huge.max_file_len(false) > u64::from(u32::MAX));
    let huge_deflate = TiffLayout {
        compression: Compression::Deflate,
        ..huge.clone()
    };
    assert!(huge_deflate.needs_bigtiff());
    let forced = TiffLayout {
        bigtiff: Some(false),
        ..huge_deflate.clone()
    };
    assert!(!forced.uses_bigtiff());

    let small = layout(4096, 4096, 16, Compression::None, 16, None);
    assert!(!small.needs_bigtiff());
    assert!(!small.uses_bigtiff());
    assert!(TiffLayout {
        bigtiff: Some(true),
        ..small.clone()
    }
    .uses_bigtiff());

    // Near the limit: 65536 x 65535 bytes of pixels fit in 4 GiB, but not with the strip
    // tables of 16384 strips; 65536 x 65000 leaves room for them.
    let edge = layout(65_536, 65_535, 8, Compression::None, 4, None);
    assert!(edge.needs_bigtiff());
    let below = layout(65_536, 65_000, 8, Compression::None, 4, None);
    assert!(!below.needs_bigtiff());
    // Deflate may expand incompressible data a little, so its bound is above the raw size:
    // 65536 x 65400 fits uncompressed but not with the deflate worst case.
    let close = layout(65_536, 65_400, 8, Compression::None, 4, None);
    assert!(!close.needs_bigtiff());
    let close_deflate = TiffLayout {
        compression: Compression::Deflate,
        ..close.clone()
    };
    assert!(close_deflate.needs_bigtiff());
    assert!(close_deflate.max_file_len(false) > close.max_file_len(false));
}

#[test]
fn resolution_rationals_are_exact_for_round_pitches() {
    assert_eq!(TiffLayout::resolution_px_per_cm(1e-6), Some((10_000, 1)));
    assert_eq!(TiffLayout::resolution_px_per_cm(0.8e-6), Some((12_500, 1)));
    assert_eq!(TiffLayout::resolution_px_per_cm(0.3e-6), Some((100_000, 3)));
    assert_eq!(TiffLayout::resolution_px_per_cm(1e-2), Some((1, 1)));
    assert_eq!(TiffLayout::resolution_px_per_cm(0.2), Some((1, 20)));
    for pitch in [3.74e-6, 1.234567e-6, 7.77e-9, 4.2e-5, 0.0123] {
        let (n, d) = TiffLayout::resolution_px_per_cm(pitch).unwrap();
        let want = 0.01 / pitch;
        let got = f64::from(n) / f64::from(d);
        assert!(
            ((got - want) / want).abs() < 1e-9,
            "{pitch}: {n}/{d} vs {want}"
        );
    }
    for bad in [0.0, -1e-6, f64::NAN, f64::INFINITY, 1e-20, 1e20] {
        assert_eq!(TiffLayout::resolution_px_per_cm(bad), None, "{bad}");
    }
}

#[test]
fn sha256_matches_an_independent_hash() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("hash.tif");
    let layout = layout(64, 64, 8, Compression::Deflate, 7, None);
    let data = image_bytes(&layout, 99);
    let finished = write_file(&path, &layout, &data);
    let expected = sha256_hex(&path);
    assert_eq!(finished.sha256, expected);
    assert_eq!(finished.sha256.len(), 64);
    assert!(finished
        .sha256
        .chars()
        .all(|c| c.is_ascii_digit() || ('a'..='f').contains(&c)));
}

#[test]
fn finish_with_missing_rows_fails_and_leaves_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("short.tif");
    let layout = layout(16, 10, 8, Compression::None, 4, None);
    let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
    assert!(partial_path(&path).exists());
    writer.write_rows(&[7u8; 16 * 6]).unwrap();
    let err = writer.finish().unwrap_err();
    assert!(matches!(err, Error::Job { .. }), "{err:?}");
    assert!(err.to_string().contains("6 of 10 rows"), "{err}");
    assert!(!path.exists());
    assert!(!partial_path(&path).exists());
}

#[test]
fn abandon_removes_the_partial_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("abandoned.tif");
    let partial = partial_path(&path);
    assert_eq!(partial, dir.path().join("abandoned.tif.partial"));
    let layout = layout(16, 10, 8, Compression::Deflate, 4, None);
    let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
    writer.write_rows(&[1u8; 16 * 5]).unwrap();
    // A checkpoint would keep the file on drop; abandon removes it regardless.
    writer.write_rows(&[1u8; 16 * 3]).unwrap();
    writer.checkpoint().unwrap();
    assert!(partial.exists());
    writer.abandon().unwrap();
    assert!(!partial.exists());
    assert!(!path.exists());
}

#[test]
fn dropping_without_checkpoint_removes_the_partial_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("dropped.tif");
    let layout = layout(16, 10, 8, Compression::None, 4, None);
    let mut writer = StripWriter::create(&path, layout).unwrap();
    writer.write_rows(&[1u8; 16 * 5]).unwrap();
    drop(writer);
    assert!(!partial_path(&path).exists());
    assert!(!path.exists());
}

#[test]
fn an_existing_final_file_is_only_replaced_by_finish() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("old.tif");
    fs::write(&path, b"old content").unwrap();
    let layout = layout(4, 4, 8, Compression::None, 2, None);
    let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
    writer.write_rows(&[3u8; 8]).unwrap();
    writer.abandon().unwrap();
    assert_eq!(fs::read(&path).unwrap(), b"old content");
    let data = image_bytes(&layout, 1);
    let finished = write_file(&path, &layout, &data);
    check_decoded(&path, &layout, &data, &finished);
}

#[test]
fn unwritable_folder_is_an_io_error_naming_the_path() {
    let dir = tempfile::tempdir().unwrap();
    let layout = layout(8, 8, 8, Compression::None, 8, None);

    let missing = dir.path().join("no-such-folder").join("plate.tif");
    match StripWriter::create(&missing, layout.clone()) {
        Err(Error::Io { path, source }) => {
            assert_eq!(path, partial_path(&missing));
            assert_eq!(source.kind(), std::io::ErrorKind::NotFound);
        }
        other => panic!("expected an I/O error, got {other:?}"),
    }

    // A "folder" that is a regular file.
    let file = dir.path().join("not-a-folder");
    fs::write(&file, b"x").unwrap();
    let inside = file.join("plate.tif");
    let err = StripWriter::create(&inside, layout).unwrap_err();
    match &err {
        Error::Io { path, .. } => assert_eq!(path, &partial_path(&inside)),
        other => panic!("expected an I/O error, got {other:?}"),
    }
    assert!(err.to_string().contains("not-a-folder"), "{err}");
}

#[test]
fn invalid_layouts_are_refused_before_creating_anything() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("bad.tif");
    let good = layout(8, 8, 8, Compression::None, 8, None);
    let cases: Vec<(TiffLayout, &str)> = vec![
        (
            TiffLayout {
                bits_per_sample: 4,
                ..good.clone()
            },
            "unsupported",
        ),
        (
            TiffLayout {
                width: 0,
                ..good.clone()
            },
            "job",
        ),
        (
            TiffLayout {
                rows_per_strip: 0,
                ..good.clone()
            },
            "job",
        ),
        (
            TiffLayout {
                pixel_pitch_m: (1e-6, 0.0),
                ..good.clone()
            },
            "job",
        ),
        (
            TiffLayout {
                software: "caf\u{e9}".into(),
                ..good.clone()
            },
            "job",
        ),
        (
            TiffLayout {
                description: Some("a\0b".into()),
                ..good.clone()
            },
            "job",
        ),
        (
            // Forced classic for 4.9 GB of raw pixels.
            layout(70_000, 70_000, 8, Compression::None, 3, Some(false)),
            "unsupported",
        ),
    ];
    for (bad, kind) in cases {
        let err = StripWriter::create(&path, bad.clone()).unwrap_err();
        let ok = match kind {
            "job" => matches!(err, Error::Job { .. }),
            _ => matches!(err, Error::Unsupported { .. }),
        };
        assert!(ok, "{bad:?}: {err:?}");
        assert!(!partial_path(&path).exists());
    }
}

#[test]
#[should_panic(expected = "not a whole number")]
fn partial_rows_are_a_bug() {
    let dir = tempfile::tempdir().unwrap();
    let mut writer = StripWriter::create(
        &dir.path().join("p.tif"),
        layout(13, 4, 1, Compression::None, 2, None),
    )
    .unwrap();
    writer.write_rows(&[0u8; 3]).unwrap();
}

#[test]
#[should_panic(expected = "exceed the height")]
fn too_many_rows_are_a_bug() {
    let dir = tempfile::tempdir().unwrap();
    let mut writer = StripWriter::create(
        &dir.path().join("p.tif"),
        layout(4, 2, 16, Compression::None, 2, None),
    )
    .unwrap();
    writer.write_rows(&[0u8; 8 * 2]).unwrap();
    writer.write_rows(&[0u8; 8]).unwrap();
}

#[test]
#[should_panic(expected = "strip boundaries")]
fn checkpoint_inside_a_strip_is_a_bug() {
    let dir = tempfile::tempdir().unwrap();
    let mut writer = StripWriter::create(
        &dir.path().join("p.tif"),
        layout(4, 8, 8, Compression::None, 4, None),
    )
    .unwrap();
    writer.write_rows(&[0u8; 4 * 3]).unwrap();
    assert!(!writer.at_strip_boundary());
    let _ = writer.checkpoint();
}

/// Writes `checkpoint_rows`, checkpoints, writes a few more rows that the "crash" loses,
/// forgets the writer, resumes from the serialized state and finishes.
fn crash_and_resume(
    path: &Path,
    layout: &TiffLayout,
    data: &[u8],
    checkpoint_rows: u32,
) -> FinishedTiff {
    let row = layout.row_bytes() as usize;
    let cut = checkpoint_rows as usize * row;
    let mut writer = StripWriter::create(path, layout.clone()).unwrap();
    write_in_chunks(&mut writer, &data[..cut], row);
    assert!(writer.at_strip_boundary());
    let state = writer.checkpoint().unwrap();
    assert_eq!(state.rows_written, checkpoint_rows);
    assert_eq!(
        state.file_len,
        fs::metadata(partial_path(path)).unwrap().len()
    );
    let json = serde_json::to_string(&state).unwrap();
    // Work after the checkpoint that the crash loses (less than the rest of the image).
    let lost = ((layout.height - checkpoint_rows) / 2) as usize * row;
    writer.write_rows(&data[cut..cut + lost]).unwrap();
    drop(writer);
    assert!(
        partial_path(path).exists(),
        "a checkpointed file survives a drop"
    );
    assert!(!path.exists());
    // Whatever the crash left past the checkpoint is cut away, however long it is.
    let mut file = fs::OpenOptions::new()
        .append(true)
        .open(partial_path(path))
        .unwrap();
    file.write_all(&vec![0xEE; data.len() + 4096]).unwrap();
    drop(file);

    let state: WriterState = serde_json::from_str(&json).unwrap();
    let mut writer = StripWriter::resume(path, layout.clone(), state).unwrap();
    assert_eq!(writer.rows_written(), checkpoint_rows);
    write_in_chunks(&mut writer, &data[cut..], row);
    writer.finish().unwrap()
}

#[test]
fn resume_after_crash_is_byte_identical() {
    let dir = tempfile::tempdir().unwrap();
    let mut n = 0;
    for (width, height, bits, rps) in [(13u32, 30u32, 1u8, 4u32), (21, 25, 8, 5), (9, 12, 16, 3)] {
        for compression in [Compression::None, Compression::Deflate] {
            for bigtiff in [Some(false), Some(true)] {
                let layout = layout(width, height, bits, compression, rps, bigtiff);
                let data = image_bytes(&layout, 1000 + n);
                let straight = dir.path().join(format!("straight-{n}.tif"));
                let reference = write_file(&straight, &layout, &data);
                let expected = fs::read(&straight).unwrap();
                // Checkpoints at the start, in the middle, and after every row.
                for checkpoint_rows in [0, rps * 2, height] {
                    let path = dir
                        .path()
                        .join(format!("resumed-{n}-{checkpoint_rows}.tif"));
                    let resumed = crash_and_resume(&path, &layout, &data, checkpoint_rows);
                    assert!(fs::read(&path).unwrap() == expected, "{layout:?}");
                    assert_eq!(resumed.sha256, reference.sha256);
                    assert_eq!(resumed.sha256, sha256_hex(&path));
                    assert_eq!(resumed.bytes, reference.bytes);
                    check_decoded(&path, &layout, &data, &resumed);
                }
                n += 1;
            }
        }
    }
}

#[test]
fn resume_after_failed_finish_and_twice() {
    // Two crashes in a row, the second after a resume and a new checkpoint.
    let dir = tempfile::tempdir().unwrap();
    let layout = layout(33, 40, 8, Compression::Deflate, 4, None);
    let data = image_bytes(&layout, 5);
    let row = layout.row_bytes() as usize;
    let straight = dir.path().join("straight.tif");
    write_file(&straight, &layout, &data);
    let path = dir.path().join("twice.tif");

    let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
    writer.write_rows(&data[..8 * row]).unwrap();
    let first = writer.checkpoint().unwrap();
    drop(writer);
    let mut writer = StripWriter::resume(&path, layout.clone(), first.clone()).unwrap();
    writer.write_rows(&data[8 * row..24 * row]).unwrap();
    let second = writer.checkpoint().unwrap();
    assert_eq!(second.strip_offsets[..2], first.strip_offsets[..]);
    writer.write_rows(&data[24 * row..30 * row]).unwrap();
    // finish() refuses (rows missing); the checkpointed file stays.
    assert!(writer.finish().is_err());
    assert!(partial_path(&path).exists());
    let mut writer = StripWriter::resume(&path, layout.clone(), second).unwrap();
    writer.write_rows(&data[24 * row..]).unwrap();
    writer.finish().unwrap();
    assert!(fs::read(&path).unwrap() == fs::read(&straight).unwrap());
}

#[test]
fn resume_refuses_a_mismatched_layout_or_damaged_file() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("mismatch.tif");
    let layout = layout(16, 16, 8, Compression::None, 4, None);
    let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
    writer.write_rows(&[9u8; 16 * 8]).unwrap();
    let state = writer.checkpoint().unwrap();
    drop(writer);

    let wider = TiffLayout {
        width: 17,
        ..layout.clone()
    };
    let err = StripWriter::resume(&path, wider, state.clone()).unwrap_err();
    assert!(matches!(err, Error::Input { .. }), "{err:?}");
    let deflate = TiffLayout {
        compression: Compression::Deflate,
        ..layout.clone()
    };
    assert!(StripWriter::resume(&path, deflate, state.clone()).is_err());

    let mut inconsistent = state.clone();
    inconsistent.strip_byte_counts[1] += 1;
    assert!(StripWriter::resume(&path, layout.clone(), inconsistent).is_err());
    let mut off_boundary = state.clone();
    off_boundary.rows_written = 7;
    assert!(StripWriter::resume(&path, layout.clone(), off_boundary).is_err());

    // A file that is not the TIFF the checkpoint describes cannot be continued.
    let partial = partial_path(&path);
    let original = fs::read(&partial).unwrap();
    let mut damaged = original.clone();
    damaged[..4].copy_from_slice(b"MM\0*");
    fs::write(&partial, &damaged).unwrap();
    let err = StripWriter::resume(&path, layout.clone(), state.clone()).unwrap_err();
    assert!(err.to_string().contains("TIFF header"), "{err}");
    fs::write(&partial, &original).unwrap();

    // A file shorter than the checkpoint cannot be continued.
    let file = fs::OpenOptions::new().write(true).open(&partial).unwrap();
    file.set_len(state.file_len - 1).unwrap();
    drop(file);
    let err = StripWriter::resume(&path, layout.clone(), state.clone()).unwrap_err();
    assert!(err.to_string().contains("cannot be resumed"), "{err}");

    // Missing file: an I/O error naming it.
    fs::remove_file(&partial).unwrap();
    match StripWriter::resume(&path, layout, state) {
        Err(Error::Io { path: p, .. }) => assert_eq!(p, partial),
        other => panic!("expected an I/O error, got {other:?}"),
    }
}

/// A write error in the middle of the file (here EFBIG from a file-size limit, which takes the
/// same path as a full disk) comes back as `Error::Io` naming the partial file. The limit is
/// set in a child process running this same test, so other tests are not affected.
#[cfg(target_os = "linux")]
#[test]
fn write_errors_are_io_errors_naming_the_file() {
    const CHILD: &str = "FRINGEMILL_TIFF_FSIZE_CHILD";
    if let Some(dir) = std::env::var_os(CHILD) {
        let dir = PathBuf::from(dir);
        // 16 MiB of pixels against a limit of at most 1 MiB.
        let layout = layout(4096, 4096, 8, Compression::None, 64, None);
        let path = dir.join("too-big.tif");
        let mut writer = StripWriter::create(&path, layout.clone()).unwrap();
        let row = vec![0x55u8; 4096 * 64];
        let mut failure = None;
        for _ in 0..64 {
            if let Err(e) = writer.write_rows(&row) {
                failure = Some(e);
                break;
            }
        }
        let err = match failure {
            Some(e) => {
                // Once failed, the writer refuses to go on.
                assert!(writer.write_rows(&row[..4096]).is_err());
                writer.abandon().unwrap();
                e
            }
            None => panic!("16 MiB were written under a 1 MiB file-size limit"),
        };
        match &err {
            Error::Io { path: p, source } => {
                assert_eq!(p, &partial_path(&path));
                assert_eq!(source.raw_os_error(), Some(27), "EFBIG: {source}");
            }
            other => panic!("expected an I/O error, got {other:?}"),
        }
        assert!(!partial_path(&path).exists());
        assert!(!path.exists());
        return;
    }

    let dir = tempfile::tempdir().unwrap();
    let exe = std::env::current_exe().unwrap();
    // Ignoring SIGXFSZ (inherited through exec) turns the signal into an EFBIG error.
    let output = std::process::Command::new("sh")
        .arg("-c")
        .arg("trap '' XFSZ; ulimit -f 1024 && exec \"$0\" --exact --test-threads 1 \"$1\"")
        .arg(&exe)
        .arg("write_errors_are_io_errors_naming_the_file")
        .env(CHILD, dir.path())
        .output()
        .unwrap();
    assert!(
        output.status.success(),
        "child test failed ({}):\n{}\n{}",
        output.status,
        String::from_utf8_lossy(&output.stdout),
        String::from_utf8_lossy(&output.stderr)
    );
    // The child really ran the test (and did not filter it out).
    assert!(String::from_utf8_lossy(&output.stdout).contains("1 passed"));
}
